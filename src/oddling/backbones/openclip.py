"""OpenCLIP image encoders (Cherti et al., "Reproducible scaling laws for contrastive
language-image learning", CVPR 2023). Only the image tower is kept; its output is the embedding.
The towers expose no intermediate stages: their manifest entries list none."""
from __future__ import annotations

import logging
from collections.abc import Sequence
from pathlib import Path

import torch
from torch import nn

from oddling.errors import OddlingError
from oddling.backbones.statedict import load_strict, read_state_dict


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
    return read_state_dict(path)


def build(spec, weights_path: Path) -> ImageTower:
    """open_clip's own model for `spec.architecture` (its factory, no pretrained download), with
    the weights of the local file: every key and shape must match; only the image tower is kept."""
    import open_clip

    try:
        logging.disable(logging.WARNING)   # open_clip warns that no pretrained weights were loaded: they come next
        try:
            model = open_clip.create_model(spec.architecture, pretrained=None)
        finally:
            logging.disable(logging.NOTSET)
    except RuntimeError as exc:
        raise OddlingError(f"backbone {spec.id!r}: open_clip has no architecture {spec.architecture!r} "
                           f"({str(exc).splitlines()[0]}); upgrade open_clip_torch") from None
    load_strict(model, Path(weights_path), f"open_clip architecture {spec.architecture!r}")
    return ImageTower(model.visual, name=spec.id).eval()
