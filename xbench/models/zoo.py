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
- ``bottleneck``: a small U-shaped encoder-decoder after Ronneberger et al. (MICCAI 2015) that produces a
  few evidence maps at input resolution, followed by a small classifier head on their mean and max.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from xbench.errors import XbenchInputError


class BandNorm(nn.Module):
    """Per-band standardisation with statistics stored as buffers (part of the state_dict)."""

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


class ConvUnit(nn.Module):
    """One or two 3x3 conv + batch-norm + ReLU layers (the U-Net unit; one layer at full resolution to
    keep CPU cost low)."""

    def __init__(self, c_in: int, c_out: int, double: bool = True):
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, c_out, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(c_out)
        self.relu1 = nn.ReLU()
        self.double = double
        if double:
            self.conv2 = nn.Conv2d(c_out, c_out, 3, padding=1, bias=False)
            self.bn2 = nn.BatchNorm2d(c_out)
            self.relu2 = nn.ReLU()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.relu1(self.bn1(self.conv1(x)))
        if self.double:
            x = self.relu2(self.bn2(self.conv2(x)))
        return x


class EvidenceUNet(nn.Module):
    """A two-level U-Net producing ``n_maps`` evidence maps at input resolution, then a small head.

    Encoder: full resolution -> 1/2 -> 1/4 (bottom); decoder: nearest upsampling with skip
    concatenations back to full resolution; a 1x1 conv makes the non-negative evidence maps. The head
    reads each map's spatial mean and maximum (the maximum lets a thin road or a small clearing count as
    much as a large one), so all class evidence passes through the maps.
    """

    def __init__(self, n_bands: int, n_classes: int, width: int = 8, n_maps: int = 4, dropout: float = 0.1):
        super().__init__()
        w = int(width)
        self.norm = BandNorm(n_bands)
        self.enc1 = ConvUnit(n_bands, w, double=False)
        self.down1 = nn.MaxPool2d(2)
        self.enc2 = ConvUnit(w, 2 * w)
        self.down2 = nn.MaxPool2d(2)
        self.bottom = ConvUnit(2 * w, 4 * w)
        self.up2 = nn.Upsample(scale_factor=2, mode="nearest")
        self.dec2 = ConvUnit(4 * w + 2 * w, 2 * w, double=False)
        self.up1 = nn.Upsample(scale_factor=2, mode="nearest")
        self.dec1 = ConvUnit(2 * w + w, w, double=False)
        self.evidence = nn.Conv2d(w, int(n_maps), 1)
        self.evidence_relu = nn.ReLU()
        self.flatten = nn.Flatten()
        self.dropout = nn.Dropout(dropout)
        self.head = nn.Linear(2 * int(n_maps), n_classes)
        self.explain_layer = "evidence_relu"  # rectified output of the last conv block

    def evidence_maps(self, x: torch.Tensor) -> torch.Tensor:
        """The non-negative evidence maps (N, n_maps, H, W) at input resolution."""
        h, w = x.shape[-2:]
        if h % 4 or w % 4:
            raise XbenchInputError(
                "bottleneck model input",
                "tile size must be a multiple of 4",
                expected="H, W divisible by 4",
                found=(h, w),
            )
        e1 = self.enc1(self.norm(x))
        e2 = self.enc2(self.down1(e1))
        b = self.bottom(self.down2(e2))
        d2 = self.dec2(torch.cat([self.up2(b), e2], dim=1))
        d1 = self.dec1(torch.cat([self.up1(d2), e1], dim=1))
        return self.evidence_relu(self.evidence(d1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        maps = self.evidence_maps(x)
        pooled = torch.cat([maps.mean(dim=(2, 3)), maps.amax(dim=(2, 3))], dim=1)
        return self.head(self.dropout(self.flatten(pooled)))


TORCH_KINDS = ("cnn", "resnet", "bottleneck")
ALL_KINDS = TORCH_KINDS + ("forest",)

# Architecture hyper-parameters each kind accepts (training hyper-parameters live in train.py).
ARCH_PARAMS: dict[str, dict[str, type | tuple[type, ...]]] = {
    "cnn": {"width": int, "dropout": (int, float)},
    "resnet": {"width": int, "dropout": (int, float)},
    "bottleneck": {"width": int, "n_maps": int, "dropout": (int, float)},
}


def build_torch_model(kind: str, n_bands: int, n_classes: int, **arch: Any) -> nn.Module:
    """A freshly initialised zoo module (use a seeded torch generator around this for determinism)."""
    if kind == "cnn":
        return PlainCNN(n_bands, n_classes, **arch)
    if kind == "resnet":
        return TinyResNet(n_bands, n_classes, **arch)
    if kind == "bottleneck":
        return EvidenceUNet(n_bands, n_classes, **arch)
    raise XbenchInputError("model kind", "unknown model kind", expected=" | ".join(ALL_KINDS), found=kind)


def count_parameters(module: nn.Module) -> int:
    return int(sum(p.numel() for p in module.parameters()))
