"""ImageNet classifiers from torchvision, used as backbones: the network is torchvision's own
(built with `weights=None`), its weights a file in the cache folder (the one torchvision's
weight enum names), loaded with every key and shape checked.

Architectures (the manifest's `architecture` field):

- `resnet18`, `resnet50`: He, Zhang, Ren & Sun, "Deep residual learning for image
  recognition", CVPR 2016. Stages `stage1`..`stage4` are `layer1`..`layer4` (strides 4..32).
- `convnext_tiny`: Liu, Mao, Wu, Feichtenhofer, Darrell & Xie, "A ConvNet for the 2020s", CVPR
  2022. Stages `stage1`..`stage4` are the four stages of blocks, each after its downsampling.
- `efficientnet_b0`: Tan & Le, "EfficientNet: Rethinking model scaling for convolutional neural
  networks", ICML 2019. Stages `stage1`..`stage7` are the seven MBConv stages and `head` the
  1280-channel 1x1 convolution, named as for EfficientNet-Lite.
- `regnet_y_800mf`: Radosavovic, Kosaraju, Girshick, He & Dollar, "Designing network design
  spaces", CVPR 2020. Stages `stage1`..`stage4` are the trunk's `block1`..`block4`.
- `vit_b_16`: Dosovitskiy et al., "An image is worth 16x16 words: Transformers for image
  recognition at scale", ICLR 2021. Token-grid stages: `stage1`..`stage4` are the outputs of
  encoder blocks 3, 6, 9 and 12 (the residual stream, before the final LayerNorm) without the
  class token, laid out as a (N, 768, H/16, W/16) grid. ViT-B/16 takes only its trained input
  size (224).

The embedding is the input of the final linear classifier: the globally average-pooled last
feature map (ConvNeXt: after its LayerNorm), or ViT's class token after the final LayerNorm.
`forward_intermediates` runs the network only as far as the deepest stage asked for.
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from oddling.errors import OddlingError
from oddling.backbones.statedict import load_strict


@dataclass(frozen=True)
class Architecture:
    """What oddling knows of one torchvision network: its builder and the stages it exposes."""

    builder: str                                     # function in torchvision.models
    kind: str                                        # resnet | convnext | efficientnet | regnet | vit
    embedding_dim: int
    stages: dict[str, tuple[int, int]] = field(default_factory=dict)   # name -> (channels, stride)


def _four(channels: tuple[int, int, int, int]) -> dict[str, tuple[int, int]]:
    return {f"stage{i + 1}": (c, 4 * 2 ** i) for i, c in enumerate(channels)}


ARCHITECTURES = {
    "resnet18": Architecture("resnet18", "resnet", 512, _four((64, 128, 256, 512))),
    "resnet50": Architecture("resnet50", "resnet", 2048, _four((256, 512, 1024, 2048))),
    "convnext_tiny": Architecture("convnext_tiny", "convnext", 768, _four((96, 192, 384, 768))),
    "efficientnet_b0": Architecture("efficientnet_b0", "efficientnet", 1280, {
        "stage1": (16, 2), "stage2": (24, 4), "stage3": (40, 8), "stage4": (80, 16),
        "stage5": (112, 16), "stage6": (192, 32), "stage7": (320, 32), "head": (1280, 32)}),
    "regnet_y_800mf": Architecture("regnet_y_800mf", "regnet", 784, _four((64, 144, 320, 784))),
    "vit_b_16": Architecture("vit_b_16", "vit", 768, {f"stage{i + 1}": (768, 16) for i in range(4)}),
}
VIT_STAGE_BLOCKS = (3, 6, 9, 12)   # encoder blocks (1-based) whose outputs are stage1..stage4


class TorchvisionBackbone(nn.Module):
    """A torchvision classifier seen as oddling backbone: `features(x)` the embedding,
    `forward_intermediates(x, stages)` named stage outputs, `forward(x)` the ImageNet logits.

    The torchvision model is `self.model`, so its state dict keys are torchvision's own."""

    def __init__(self, architecture: Architecture, model: nn.Module, name: str):
        super().__init__()
        self.architecture = architecture
        self.model = model
        self.name = name

    @property
    def stage_names(self) -> tuple[str, ...]:
        return tuple(self.architecture.stages)

    # --- convolutional networks: a sequence of segments, some of them named stages -------------

    def _segments(self) -> list[tuple[str | None, nn.Module]]:
        m, kind = self.model, self.architecture.kind
        if kind == "resnet":
            stem = nn.Sequential(m.conv1, m.bn1, m.relu, m.maxpool)
            return [(None, stem)] + [(f"stage{i}", getattr(m, f"layer{i}")) for i in range(1, 5)]
        if kind == "convnext":
            # features: stem, stage, downsample, stage, downsample, stage, downsample, stage
            names = (None, "stage1", None, "stage2", None, "stage3", None, "stage4")
            return list(zip(names, m.features))
        if kind == "efficientnet":
            names = (None,) + tuple(f"stage{i}" for i in range(1, 8)) + ("head",)
            return list(zip(names, m.features))
        if kind == "regnet":
            return [(None, m.stem)] + [(f"stage{i}", getattr(m.trunk_output, f"block{i}")) for i in range(1, 5)]
        raise AssertionError(kind)

    def _check(self, stages: Sequence[str]) -> list[str]:
        if isinstance(stages, str):
            stages = [stages]
        valid = self.stage_names
        if not stages:
            raise OddlingError(f"ask for at least one stage of backbone {self.name}: {', '.join(valid)}")
        for s in stages:
            if s not in valid:
                raise OddlingError(f"backbone {self.name} has no stage {s!r}; valid stages: {', '.join(valid)}")
        return list(stages)

    def forward_intermediates(self, x: torch.Tensor, stages: Sequence[str]) -> list[torch.Tensor]:
        """(N, C, H', W') outputs of the named stages, in the order asked."""
        stages = self._check(stages)
        if self.architecture.kind == "vit":
            return self._vit_intermediates(x, stages)
        wanted, found = set(stages), {}
        for name, segment in self._segments():
            x = segment(x)
            if name in wanted:
                found[name] = x
                if len(found) == len(wanted):
                    break
        return [found[s] for s in stages]

    def _pool(self, fmap: torch.Tensor) -> torch.Tensor:
        m = self.model
        if self.architecture.kind == "convnext":
            return torch.flatten(m.classifier[0](m.avgpool(fmap)), 1)   # LayerNorm2d, then the linear layer's input
        return torch.flatten(m.avgpool(fmap), 1)

    def features(self, x: torch.Tensor) -> torch.Tensor:
        """The embedding before normalisation: the final linear classifier's input."""
        if self.architecture.kind == "vit":
            return self._vit_tokens(x, len(self.model.encoder.layers), final_norm=True)[:, 0]
        for _, segment in self._segments():
            x = segment(x)
        return self._pool(x)

    def classifier(self) -> nn.Module:
        m, kind = self.model, self.architecture.kind
        if kind == "convnext":
            return m.classifier[2]
        if kind == "efficientnet":
            return m.classifier[1]
        if kind == "vit":
            return m.heads
        return m.fc

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """ImageNet-1k logits (used only by sanity checks)."""
        return self.classifier()(self.features(x))

    # --- ViT: tokens through the encoder blocks -----------------------------------------------

    def _vit_tokens(self, x: torch.Tensor, n_blocks: int, final_norm: bool = False,
                    keep: Sequence[int] = ()) -> torch.Tensor | dict[int, torch.Tensor]:
        m = self.model
        if x.shape[-2:] != (m.image_size, m.image_size):
            raise OddlingError(f"backbone {self.name} takes {m.image_size}x{m.image_size} inputs, "
                               f"got {x.shape[-2]}x{x.shape[-1]}")
        tokens = m._process_input(x)
        tokens = torch.cat([m.class_token.expand(tokens.shape[0], -1, -1), tokens], dim=1)
        tokens = m.encoder.dropout(tokens + m.encoder.pos_embedding)
        kept = {}
        for i, block in enumerate(m.encoder.layers[:n_blocks]):
            tokens = block(tokens)
            if i + 1 in keep:
                kept[i + 1] = tokens
        if keep:
            return kept
        return m.encoder.ln(tokens) if final_norm else tokens

    def _vit_intermediates(self, x: torch.Tensor, stages: list[str]) -> list[torch.Tensor]:
        blocks = {s: VIT_STAGE_BLOCKS[int(s.removeprefix("stage")) - 1] for s in stages}
        kept = self._vit_tokens(x, max(blocks.values()), keep=tuple(blocks.values()))
        side_h, side_w = x.shape[-2] // self.model.patch_size, x.shape[-1] // self.model.patch_size
        out = []
        for s in stages:
            grid = kept[blocks[s]][:, 1:]                                   # drop the class token
            out.append(grid.transpose(1, 2).reshape(grid.shape[0], grid.shape[2], side_h, side_w))
        return out


def architecture_of(spec) -> Architecture:
    name = spec.architecture
    if name not in ARCHITECTURES:
        raise OddlingError(f"backbone {spec.id!r}: torchvision architecture {name!r} is not one oddling knows; "
                           f"known: {', '.join(ARCHITECTURES)}")
    return ARCHITECTURES[name]


def check_manifest(spec, arch: Architecture) -> None:
    """The manifest's stages and embedding dim must be the network's."""
    listed = {name: (int(s["channels"]), int(s["stride"])) for name, s in spec.stages.items()}
    if listed and listed != arch.stages:
        raise OddlingError(f"models_manifest.yaml lists stages {listed} for backbone {spec.id!r}, but the network "
                           f"has {arch.stages} (channels, stride)")
    if spec.embedding_dim != arch.embedding_dim:
        raise OddlingError(f"models_manifest.yaml gives embedding_dim {spec.embedding_dim} for backbone {spec.id!r}, "
                           f"but {arch.builder} gives {arch.embedding_dim}")


def make_network(spec, empty: bool = False) -> TorchvisionBackbone:
    """The architecture in eval mode, with random weights; `empty`: parameters without storage
    (the meta device) where the builder allows it, for a file's weights to be assigned into,
    which skips the random initialisation (seconds for the larger networks)."""
    import torchvision.models

    arch = architecture_of(spec)
    check_manifest(spec, arch)
    builder = getattr(torchvision.models, arch.builder)
    model = None
    if empty:
        try:
            with torch.device("meta"):
                model = builder(weights=None)
        except NotImplementedError:   # RegNet computes its widths with tensors: build it for real
            model = None
    if model is None:
        model = builder(weights=None)
    return TorchvisionBackbone(arch, model, spec.id).eval()


def build(spec, weights_path: Path) -> TorchvisionBackbone:
    """The network with the weights of `weights_path` (every key and shape must match), in eval mode."""
    network = make_network(spec, empty=True)
    load_strict(network.model, Path(weights_path), f"backbone {spec.id!r} (torchvision {spec.architecture})",
                assign=True)
    left = [n for n, t in list(network.named_parameters()) + list(network.named_buffers()) if t.is_meta]
    if left:   # every tensor of these networks is in the state dict; a new torchvision may differ
        raise OddlingError(f"backbone {spec.id!r}: the weight file leaves {', '.join(left[:3])} unset")
    return network.eval()
