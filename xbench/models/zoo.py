"""The CPU model zoo: small torch classifiers with named layers (each well under 1M parameters).

Every module takes raw reflectance (N, C, H, W) in [0, 1] and returns logits (N, n_classes). Per-band
standardisation lives inside the module (``BandNorm``, statistics set from the training split and saved
in the state_dict). Activations are separate ``nn.ReLU`` modules (never reused, never in place) so that
hook-based explainers (guided backpropagation, DeepLIFT) can override each one. ``explain_layer`` names
the module after the last ReLU of the last conv block (its rectified output), which layer-based explainers
(Grad-CAM, activation clusters, TCAV) use by default; every model of the zoo sets it.

- ``cnn``: plain conv stack (conv, batch-norm, ReLU), global average pooling and a linear head.
- ``resnet``: a tiny residual network after He et al. (CVPR 2016): a stem, three basic blocks with identity
  or 1x1-projection shortcuts, a 1x1 mixing conv after the last addition, global pooling, linear head.
- ``separable``: a depthwise-separable network after Howard et al. (MobileNets, 2017): a stem conv, four
  depthwise + pointwise blocks, global pooling, linear head.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from xbench.errors import XbenchInputError
from xbench.names import renamed_hint


class BandNorm(nn.Module):
    """Per-band standardisation with statistics stored as buffers (part of the state_dict)."""

    mean: torch.Tensor
    std: torch.Tensor

    def __init__(self, n_bands: int):
        super().__init__()
        self.register_buffer("mean", torch.zeros(1, n_bands, 1, 1))
        self.register_buffer("std", torch.ones(1, n_bands, 1, 1))

    def set_statistics(self, images: np.ndarray) -> None:
        """Set mean and standard deviation per band from training images (N, C, H, W)."""
        x = np.asarray(images, dtype=np.float64)
        mean = x.mean(axis=(0, 2, 3))
        std = np.maximum(x.std(axis=(0, 2, 3)), 1e-4)
        self.mean.copy_(torch.from_numpy(mean.astype(np.float32)).view(1, -1, 1, 1))
        self.std.copy_(torch.from_numpy(std.astype(np.float32)).view(1, -1, 1, 1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return (x - self.mean) / self.std


class PlainCNN(nn.Module):
    """conv-bn-relu x4 (max-pools after the first two), global average pooling, linear head (the CAM
    form). Batch normalisation after each conv makes the small stack learn in few epochs on a CPU."""

    def __init__(self, n_bands: int, n_classes: int, width: int = 32, dropout: float = 0.1):
        super().__init__()
        w = int(width)
        self.norm = BandNorm(n_bands)
        self.conv1 = nn.Conv2d(n_bands, w // 2, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(w // 2)
        self.relu1 = nn.ReLU()
        self.pool1 = nn.MaxPool2d(2)
        self.conv2 = nn.Conv2d(w // 2, w, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(w)
        self.relu2 = nn.ReLU()
        self.pool2 = nn.MaxPool2d(2)
        self.conv3 = nn.Conv2d(w, 2 * w, 3, padding=1, bias=False)
        self.bn3 = nn.BatchNorm2d(2 * w)
        self.relu3 = nn.ReLU()
        self.conv4 = nn.Conv2d(2 * w, 2 * w, 3, padding=1, bias=False)
        self.bn4 = nn.BatchNorm2d(2 * w)
        self.relu4 = nn.ReLU()
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten()
        self.dropout = nn.Dropout(dropout)
        self.head = nn.Linear(2 * w, n_classes)
        self.explain_layer = "relu4"  # rectified output of the last conv block

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.norm(x)
        x = self.pool1(self.relu1(self.bn1(self.conv1(x))))
        x = self.pool2(self.relu2(self.bn2(self.conv2(x))))
        x = self.relu3(self.bn3(self.conv3(x)))
        x = self.relu4(self.bn4(self.conv4(x)))
        return self.head(self.dropout(self.flatten(self.gap(x))))


class BasicBlock(nn.Module):
    """Two 3x3 conv + batch-norm layers with an identity (or 1x1 projection) shortcut (He et al. 2016)."""

    def __init__(self, c_in: int, c_out: int, stride: int = 1):
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(c_out)
        self.relu1 = nn.ReLU()
        self.conv2 = nn.Conv2d(c_out, c_out, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(c_out)
        self.shortcut: nn.Module
        if stride != 1 or c_in != c_out:
            self.shortcut = nn.Sequential(nn.Conv2d(c_in, c_out, 1, stride=stride, bias=False), nn.BatchNorm2d(c_out))
        else:
            self.shortcut = nn.Identity()
        self.relu2 = nn.ReLU()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.relu1(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return self.relu2(out + self.shortcut(x))


class TinyResNet(nn.Module):
    """stem (full resolution) -> block1 (w, /2) -> block2 (2w, /2) -> block3 (2w) -> 1x1 mix conv -> GAP
    -> linear. Downsampling early (as the stem of He et al. does) keeps the CPU cost near the plain CNN's."""

    def __init__(self, n_bands: int, n_classes: int, width: int = 16, dropout: float = 0.1):
        super().__init__()
        w = int(width)
        self.norm = BandNorm(n_bands)
        self.stem = nn.Conv2d(n_bands, w, 3, padding=1, bias=False)
        self.stem_bn = nn.BatchNorm2d(w)
        self.stem_relu = nn.ReLU()
        self.block1 = BasicBlock(w, w, stride=2)
        self.block2 = BasicBlock(w, 2 * w, stride=2)
        self.block3 = BasicBlock(2 * w, 2 * w)
        # A conv after the last residual addition, so the layer that layer-based explainers read sees
        # both the residual and the shortcut paths.
        self.mix = nn.Conv2d(2 * w, 2 * w, 1)
        self.mix_relu = nn.ReLU()
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten()
        self.dropout = nn.Dropout(dropout)
        self.head = nn.Linear(2 * w, n_classes)
        self.explain_layer = "mix_relu"  # rectified output of the last conv block

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stem_relu(self.stem_bn(self.stem(self.norm(x))))
        x = self.block3(self.block2(self.block1(x)))
        x = self.mix_relu(self.mix(x))
        return self.head(self.dropout(self.flatten(self.gap(x))))


class SeparableBlock(nn.Module):
    """A depthwise-separable convolution (Howard et al. 2017): a 3x3 depthwise conv (one filter per
    channel, optional stride) and a 1x1 pointwise conv that mixes channels, each with batch-norm and ReLU."""

    def __init__(self, c_in: int, c_out: int, stride: int = 1):
        super().__init__()
        self.depthwise = nn.Conv2d(c_in, c_in, 3, stride=stride, padding=1, groups=c_in, bias=False)
        self.depthwise_bn = nn.BatchNorm2d(c_in)
        self.depthwise_relu = nn.ReLU()
        self.pointwise = nn.Conv2d(c_in, c_out, 1, bias=False)
        self.pointwise_bn = nn.BatchNorm2d(c_out)
        self.pointwise_relu = nn.ReLU()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.depthwise_relu(self.depthwise_bn(self.depthwise(x)))
        return self.pointwise_relu(self.pointwise_bn(self.pointwise(x)))


class SeparableNet(nn.Module):
    """A small depthwise-separable network after Howard et al. (MobileNets, arXiv:1704.04861, 2017):
    a full 3x3 stem conv, four separable blocks (the first two with stride 2), global average pooling
    and a linear head. ``explain_layer`` is the ReLU after the last block's pointwise conv (the rectified
    output of the last conv block)."""

    def __init__(self, n_bands: int, n_classes: int, width: int = 16, dropout: float = 0.1):
        super().__init__()
        w = int(width)
        self.norm = BandNorm(n_bands)
        self.stem = nn.Conv2d(n_bands, w, 3, padding=1, bias=False)
        self.stem_bn = nn.BatchNorm2d(w)
        self.stem_relu = nn.ReLU()
        self.block1 = SeparableBlock(w, 2 * w, stride=2)
        self.block2 = SeparableBlock(2 * w, 2 * w, stride=2)
        self.block3 = SeparableBlock(2 * w, 4 * w)
        self.block4 = SeparableBlock(4 * w, 4 * w)
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten()
        self.dropout = nn.Dropout(dropout)
        self.head = nn.Linear(4 * w, n_classes)
        self.explain_layer = "block4.pointwise_relu"

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stem_relu(self.stem_bn(self.stem(self.norm(x))))
        x = self.block4(self.block3(self.block2(self.block1(x))))
        return self.head(self.dropout(self.flatten(self.gap(x))))


TORCH_KINDS = ("cnn", "resnet", "separable")
ALL_KINDS = TORCH_KINDS + ("forest",)

# Architecture hyper-parameters each kind accepts (training hyper-parameters live in train.py).
ARCH_PARAMS: dict[str, dict[str, type | tuple[type, ...]]] = {
    "cnn": {"width": int, "dropout": (int, float)},
    "resnet": {"width": int, "dropout": (int, float)},
    "separable": {"width": int, "dropout": (int, float)},
}


def build_torch_model(kind: str, n_bands: int, n_classes: int, **arch: Any) -> nn.Module:
    """A freshly initialised zoo module (use a seeded torch generator around this for determinism)."""
    if kind == "cnn":
        return PlainCNN(n_bands, n_classes, **arch)
    if kind == "resnet":
        return TinyResNet(n_bands, n_classes, **arch)
    if kind == "separable":
        return SeparableNet(n_bands, n_classes, **arch)
    hint = renamed_hint("model", kind)
    problem = "unknown model kind" + (f": {hint}" if hint else "")
    raise XbenchInputError("model kind", problem, expected=" | ".join(ALL_KINDS), found=kind)


def count_parameters(module: nn.Module) -> int:
    return int(sum(p.numel() for p in module.parameters()))
