"""Read models_manifest.yaml: the declarative description of every backbone oddling knows."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path

import yaml

from oddling.errors import OddlingError
from oddling.data.preprocess import Preprocessing

MANIFEST_NAME = "models_manifest.yaml"


@dataclass(frozen=True)
class BackboneSpec:
    """One manifest entry. `weights` is the raw mapping: source, filename, sha256, ...

    `stages` maps each intermediate stage the network exposes, in network order, to
    {"channels": C, "stride": S} (its output is (N, C, H/S, W/S)); empty when none are listed.
    """

    id: str
    family: str
    description: str
    weights: dict
    input_size: int
    preprocessing: Preprocessing
    embedding_dim: int
    licence: str
    architecture: str | None = None
    stages: dict[str, dict] = field(default_factory=dict)
    extra: dict = field(default_factory=dict)


def manifest_path() -> Path:
    """The installed copy inside the package, else the one at the top of a source checkout."""
    packaged = resources.files("oddling").joinpath(MANIFEST_NAME)
    if packaged.is_file():
        return Path(str(packaged))
    source_tree = Path(__file__).resolve().parents[3] / MANIFEST_NAME
    if source_tree.is_file():
        return source_tree
    raise OddlingError(f"{MANIFEST_NAME} not found in the installed package; reinstall oddling")


def parse_stages(backbone_id: str, data) -> dict[str, dict]:
    """The `stages` mapping of one entry, in the manifest's order, each {channels, stride} as ints."""
    if not data:
        return {}
    if not isinstance(data, dict):
        raise ValueError(f"backbone {backbone_id!r}: `stages` must be a mapping of stage name to channels/stride")
    stages = {}
    for name, info in data.items():
        if not isinstance(info, dict) or set(info) != {"channels", "stride"}:
            raise ValueError(f"backbone {backbone_id!r}: stage {name!r} needs exactly `channels` and `stride`")
        stages[str(name)] = {"channels": int(info["channels"]), "stride": int(info["stride"])}
    return stages


def parse_manifest(text: str) -> dict[str, BackboneSpec]:
    data = yaml.safe_load(text)
    specs: dict[str, BackboneSpec] = {}
    known = {"id", "family", "description", "weights", "input_size", "preprocessing",
             "embedding_dim", "licence", "architecture", "stages"}
    for entry in data.get("backbones", []):
        spec = BackboneSpec(
            id=entry["id"],
            family=entry["family"],
            description=" ".join(str(entry.get("description", "")).split()),
            weights=dict(entry["weights"]),
            input_size=int(entry["input_size"]),
            preprocessing=Preprocessing.from_dict(entry["preprocessing"]),
            embedding_dim=int(entry["embedding_dim"]),
            licence=str(entry.get("licence", "unknown")),
            architecture=entry.get("architecture"),
            stages=parse_stages(entry["id"], entry.get("stages")),
            extra={k: v for k, v in entry.items() if k not in known},
        )
        if spec.id in specs:
            raise ValueError(f"duplicate backbone id in manifest: {spec.id!r}")
        specs[spec.id] = spec
    return specs


@lru_cache(maxsize=1)
def load_manifest() -> dict[str, BackboneSpec]:
    return parse_manifest(manifest_path().read_text(encoding="utf-8"))


def get_spec(backbone_id: str) -> BackboneSpec:
    specs = load_manifest()
    if backbone_id not in specs:
        raise OddlingError(f"unknown backbone {backbone_id!r}; known: {', '.join(sorted(specs))}")
    return specs[backbone_id]
