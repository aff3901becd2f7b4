"""OpenCLIP image encoders (Cherti et al., "Reproducible scaling laws for contrastive
language-image learning", CVPR 2023). Only the image tower is kept; its output is the embedding.
The towers expose no intermediate stages: their manifest entries list none."""
from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import torch
from torch import nn

from oddling.errors import OddlingError


class ImageTower(nn.Module):
    """Wraps open_clip's visual encoder so it offers `features(x)` like every oddling backbone."""

    def __init__(self, visual: nn.Module, name: str = "open_clip"):
        super().__init__()
        self.visual = visual
        self.name = name

    def features(self, x: torch.Tensor) -> torch.Tensor:
        return self.visual(x)

    def forward_intermediates(self, x: torch.Tensor, stages: Sequence[str]) -> list[torch.Tensor]:
        raise OddlingError(f"backbone {self.name} exposes no intermediate stages")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.features(x)


def load_state_dict_file(path: Path) -> dict:
    """A plain state dict from .safetensors or a torch file; never unpickles arbitrary objects."""
    if path.suffix == ".safetensors":
        from safetensors.torch import load_file

        state = load_file(str(path))
    else:
        state = torch.load(path, map_location="cpu", weights_only=True)
    if isinstance(state, dict) and "state_dict" in state:
        state = state["state_dict"]
    if not isinstance(state, dict):
        raise OddlingError(f"{path} does not hold a state dict")
    return {k.removeprefix("module."): v for k, v in state.items()}


def build(spec, weights_path: Path) -> ImageTower:
    import open_clip

    model = open_clip.create_model(spec.architecture, pretrained=None)
    try:
        model.load_state_dict(load_state_dict_file(Path(weights_path)), strict=True)
    except RuntimeError as exc:
        raise OddlingError(
            f"weight file {weights_path} does not fit open_clip architecture {spec.architecture!r}: "
            f"{str(exc).splitlines()[0]}"
        ) from exc
    return ImageTower(model.visual, name=spec.id).eval()
