"""Representations: how images become features for a detector.

- `embedding` of a backbone: its pooled penultimate features, L2-normalised (the default).
- `stages` of a backbone: the global average of chosen intermediate stages, each L2-normalised,
  concatenated and normalised again, so every stage weighs the same.
- `patches` of a backbone: the chosen stages as a grid of local features (for the patch detector;
  `patch_grid.py`).
- `pixels`: a small thumbnail, grey or RGB, zero-mean and unit-norm per image: no network at all,
  which suits small, aligned images (a digit, a part always photographed the same way).
- `colour`: local colour statistics, the mean and spread of CIELAB in each cell of a grid
  (`backbones/colour.py`): no network; it sees the colour casts and stains pooled embeddings ignore.

Written as text for the CLI and leaderboards: `efficientnet-lite0`, `efficientnet-lite0/stages:stage4+stage6`,
`efficientnet-lite0/patches:stage2+stage3`, `pixels:32`, `pixels:32:rgb`, `colour:8`.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

import dataclasses

from oddling.backbones import colour
from oddling.data.preprocess import DEFAULT_FRAME, FRAMES, Preprocessing
from oddling.errors import OddlingError

KINDS = ("embedding", "stages", "patches", "pixels", "colour")
DEFAULT_PATCH_STAGES = ("stage2", "stage3")
PIXEL_SIZES = range(8, 129)
DEFAULT_COLOUR_GRID = 8
# ITU-R BT.601 luma weights, the usual RGB -> grey conversion (Pillow's "L" mode uses them too).
LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)


@dataclass(frozen=True)
class RepresentationSpec:
    kind: str
    backbone: str | None = None
    stages: tuple[str, ...] = ()
    size: int = 32
    colour: str = "grey"
    frame: str = DEFAULT_FRAME   # how the image meets the square input (data.preprocess); not part of the id

    def __post_init__(self):
        if self.frame not in FRAMES:
            raise OddlingError(f"frame must be one of {', '.join(FRAMES)}, got: {self.frame!r}")
        if self.kind not in KINDS:
            raise OddlingError(f"representation kind must be one of {', '.join(KINDS)}, got: {self.kind!r}")
        if self.kind == "pixels":
            if self.size not in PIXEL_SIZES:
                raise OddlingError(f"pixel size must be in [8, 128], got: {self.size}")
            if self.colour not in ("grey", "rgb"):
                raise OddlingError(f"pixel colour must be grey or rgb, got: {self.colour!r}")
        elif self.kind == "colour":
            if self.size not in colour.GRIDS:
                raise OddlingError(f"colour grid must be in [{colour.GRIDS.start}, {colour.GRIDS.stop - 1}], "
                                   f"got: {self.size}")
        elif not self.backbone:
            raise OddlingError(f"a {self.kind} representation needs a backbone")
        if self.kind in ("stages", "patches") and not self.stages:
            raise OddlingError(f"a {self.kind} representation needs at least one stage")

    @property
    def feature_kind(self) -> str:
        return "patches" if self.kind == "patches" else "vector"

    @property
    def id(self) -> str:
        if self.kind == "pixels":
            return f"pixels:{self.size}" + (":rgb" if self.colour == "rgb" else "")
        if self.kind == "colour":
            return f"colour:{self.size}"
        if self.kind == "embedding":
            return str(self.backbone)
        return f"{self.backbone}/{self.kind}:{'+'.join(self.stages)}"

    def to_dict(self) -> dict:
        out = {"kind": self.kind, "id": self.id} | ({"frame": self.frame} if self.frame != "crop" else {})
        if self.kind == "pixels":
            return out | {"size": self.size, "colour": self.colour}
        if self.kind == "colour":
            return out | {"size": self.size}
        return out | {"backbone": self.backbone} | ({"stages": list(self.stages)} if self.stages else {})

    @classmethod
    def from_dict(cls, data: dict) -> "RepresentationSpec":
        if not isinstance(data, dict) or "kind" not in data:
            raise OddlingError(f"representation must be a mapping with a kind, got: {data!r}")
        try:
            # A record without a frame is a bank made before frames existed: centre crops.
            return cls(kind=data["kind"], backbone=data.get("backbone"), stages=tuple(data.get("stages") or ()),
                       size=int(data.get("size", 32)), colour=data.get("colour", "grey"),
                       frame=data.get("frame", "crop"))
        except (TypeError, ValueError) as exc:
            raise OddlingError(f"representation {data!r} is not valid: {exc}") from exc

    def framed(self, frame: str | None) -> "RepresentationSpec":
        """The same representation with another frame (None: unchanged)."""
        return self if frame is None else dataclasses.replace(self, frame=frame)

    @classmethod
    def parse(cls, text: str) -> "RepresentationSpec":
        text = text.strip()
        if text.startswith("pixels"):
            parts = text.split(":")
            try:
                size = int(parts[1]) if len(parts) > 1 else 32
            except ValueError:
                raise OddlingError(f"pixel representation must look like pixels:32 or pixels:32:rgb, got: {text!r}") from None
            return cls("pixels", size=size, colour=parts[2] if len(parts) > 2 else "grey")
        if text.startswith("colour"):
            parts = text.split(":")
            try:
                grid = int(parts[1]) if len(parts) > 1 else DEFAULT_COLOUR_GRID
            except ValueError:
                raise OddlingError(f"colour representation must look like colour:8, got: {text!r}") from None
            if len(parts) > 2:
                raise OddlingError(f"colour representation must look like colour:8, got: {text!r}")
            return cls("colour", size=grid)
        if "/" not in text:
            return cls("embedding", backbone=text)
        backbone, rest = text.split("/", 1)
        kind, _, stages = rest.partition(":")
        if kind not in ("stages", "patches"):
            raise OddlingError(f"representation {text!r}: after the backbone write /stages:S1+S2 or /patches:S1+S2")
        return cls(kind, backbone=backbone, stages=tuple(s for s in stages.split("+") if s)
                   or (DEFAULT_PATCH_STAGES if kind == "patches" else ()))


@dataclass
class Representation:
    """A loaded representation: what the embedding runner needs (`preprocessing`, `embed`,
    `embedding_dim`) plus what a bank records to refuse mixing features (`fingerprint`)."""

    spec: RepresentationSpec
    preprocessing: Preprocessing
    embedding_dim: int
    backbone: object = None          # oddling.backbones.Backbone, or None for pixels
    patch_shape: tuple[int, int] | None = None   # patches: (locations, channels)
    _embed: object = field(default=None, repr=False)

    @property
    def id(self) -> str:
        return self.spec.id

    @property
    def runtime(self) -> str:
        return self.backbone.runtime if self.backbone is not None else "numpy"

    @property
    def cacheable(self) -> bool:
        # Patch grids are ~100x larger than a vector: recomputed rather than cached.
        return self.spec.kind != "patches"

    def embed(self, batch: np.ndarray) -> np.ndarray:
        return self._embed(batch)

    def fingerprint(self) -> dict:
        """What must match between a bank and a later run for their features to compare."""
        out = self.spec.to_dict() | {"preprocessing": self.preprocessing.to_dict(), "dim": self.embedding_dim}
        if self.backbone is not None:
            out["backbone_fingerprint"] = self.backbone.fingerprint()
            check = self.precision_check()
            if check is not None:
                out["precision_check"] = check
        return out

    def precision_check(self) -> dict | None:
        """For a reduced precision (bf16): how its embeddings compared with fp32 on the first batch
        it was checked on (recorded in the bank); None in fp32."""
        if self.backbone is None or self.backbone.precision == "fp32" or self.backbone.onnx is None:
            return None
        check = self.backbone.onnx.check or {}
        return {key: check[key] for key in ("precision", "n_images", "min_cosine", "spearman_knn_ranking",
                                             "min_cosine_required", "min_spearman_required") if key in check}

    def cache_fingerprint(self) -> dict:
        # Embeddings keep the key they always had, so caches made before representations existed still serve.
        # A frame other than the old centre crop gives other vectors, so it joins the key.
        if self.spec.kind == "embedding":
            return self.backbone.fingerprint() | ({"frame": self.spec.frame} if self.spec.frame != "crop" else {})
        return self.fingerprint()


def _unit_rows(x: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return (x / np.maximum(norms, 1e-12)).astype(np.float32, copy=False)


def pixel_features(batch: np.ndarray, colour: str = "grey") -> np.ndarray:
    """(N, 3, s, s) RGB 0..255 -> (N, s*s) grey (or 3*s*s RGB), zero-mean and unit-norm per image,
    so the cosine distance between two thumbnails is one minus their correlation."""
    x = np.asarray(batch, dtype=np.float32)
    if colour == "grey":
        x = np.tensordot(LUMA, x, axes=([0], [1]))   # (N, s, s)
    flat = x.reshape(len(x), -1)
    return _unit_rows(flat - flat.mean(axis=1, keepdims=True))


def pooled_stage_features(backbone, batch: np.ndarray, stages: tuple[str, ...]) -> np.ndarray:
    maps = backbone.intermediates(batch, stages)
    return _unit_rows(np.concatenate([_unit_rows(m.mean(axis=(2, 3))) for m in maps], axis=1))


def framed(prep: Preprocessing, spec: RepresentationSpec) -> Preprocessing:
    """The backbone's preprocessing with the representation's frame."""
    return dataclasses.replace(prep, frame=spec.frame)


def load_representation(spec: RepresentationSpec | str, cache=None, runtime: str = "auto") -> Representation:
    """Load what a representation needs (a verified backbone, unless it is `pixels`). `runtime`
    may carry a precision for the embedding ("auto:bf16", see backbones.split_runtime)."""
    if isinstance(spec, str):
        spec = RepresentationSpec.parse(spec)
    if spec.kind == "pixels":
        prep = Preprocessing(spec.size, spec.size, "bilinear", (0.0, 0.0, 0.0), (1.0, 1.0, 1.0), spec.frame)
        dim = spec.size * spec.size * (3 if spec.colour == "rgb" else 1)
        return Representation(spec, prep, dim, _embed=lambda batch: pixel_features(batch, spec.colour))
    if spec.kind == "colour":
        side = spec.size * colour.CELL_PIXELS
        prep = Preprocessing(side, side, "bilinear", (0.0, 0.0, 0.0), (1.0, 1.0, 1.0), spec.frame)
        return Representation(spec, prep, 6 * spec.size * spec.size,
                              _embed=lambda batch: colour.colour_features(batch, spec.size))
    from oddling.backbones import load_backbone, split_runtime, stage_channels

    if spec.kind == "embedding":
        net = load_backbone(spec.backbone, cache, runtime)
        return Representation(spec, framed(net.preprocessing, spec), net.embedding_dim, net, _embed=net.embed)
    # Intermediate stages run on the same runtime as embeddings, from an export of just those
    # stages (verified against PyTorch like the embedding's), in fp32 whatever precision was asked.
    net = load_backbone(spec.backbone, cache, split_runtime(runtime)[0], stages=spec.stages)
    channels = stage_channels(net.spec, spec.stages)
    if spec.kind == "stages":
        return Representation(spec, framed(net.preprocessing, spec), channels, net,
                              _embed=lambda batch: pooled_stage_features(net, batch, spec.stages))
    from oddling.backbones.patch_grid import grid_size, local_preprocessing, patch_grid

    prep = framed(local_preprocessing(net.preprocessing), spec)
    grid = grid_size(prep.crop)
    return Representation(spec, prep, channels, net, patch_shape=(grid * grid, channels),
                          _embed=lambda batch: patch_grid(net.intermediates(batch, spec.stages), grid))
