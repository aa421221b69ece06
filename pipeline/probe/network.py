"""A compact CenterNet in plain torch: a small strided convolutional encoder, an upsampling decoder with
skip connections back to stride 4, and three heads (class heatmap, size, offset).

References
----------
Zhou, Wang, Kraehenbuehl, "Objects as Points", arXiv:1904.07850, 2019: the heads, the output stride
of 4, and the heatmap bias of -2.19 (a prior of 0.1, from the authors' released code, from memory).
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

STRIDE = 4
"""Input pixels per output cell (the paper's stride)."""

INPUT_MULTIPLE = 32
"""Input height and width must be multiples of this (five stride-2 stages)."""

HEATMAP_PRIOR = 0.1


def _conv(c_in: int, c_out: int, stride: int = 1) -> nn.Sequential:
    return nn.Sequential(
        nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1, bias=False), nn.BatchNorm2d(c_out), nn.ReLU(inplace=True)
    )


class _Down(nn.Module):
    """Halve the resolution, then one more convolution with a residual connection."""

    def __init__(self, c_in: int, c_out: int) -> None:
        super().__init__()
        self.down = _conv(c_in, c_out, stride=2)
        self.body = nn.Sequential(
            nn.Conv2d(c_out, c_out, 3, padding=1, bias=False), nn.BatchNorm2d(c_out), nn.ReLU(inplace=True)
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.down(x)
        return x + self.body(x)


class _Up(nn.Module):
    """Double the resolution (nearest) and fuse with the encoder's feature map of that resolution."""

    def __init__(self, c_in: int, c_skip: int, c_out: int) -> None:
        super().__init__()
        self.skip = nn.Conv2d(c_skip, c_in, 1, bias=False)
        self.fuse = _conv(c_in, c_out)

    def forward(self, x: torch.Tensor, skip: torch.Tensor) -> torch.Tensor:
        return self.fuse(F.interpolate(x, scale_factor=2, mode="nearest") + self.skip(skip))


class CenterNet(nn.Module):
    """Encoder to stride 32, decoder back to stride 4, three heads.

    Parameters
    ----------
    n_classes : int
        Heatmap channels.
    width : int
        Channels of the first stage; later stages use 2x, 4x, 6x, 8x.
    head_channels : int
        Hidden channels of each head.

    Notes
    -----
    ``forward(images)`` takes ``(B, 3, H, W)`` float images (H, W multiples of 32) and returns a dict of
    ``heatmap`` logits ``(B, C, H/4, W/4)``, ``size`` and ``offset`` ``(B, 2, H/4, W/4)``.
    """

    def __init__(self, n_classes: int, *, width: int = 16, head_channels: int = 32) -> None:
        super().__init__()
        if n_classes < 1 or width < 1 or head_channels < 1:
            raise ValueError(f"n_classes, width, head_channels must be >= 1, got {n_classes}, {width}, {head_channels}")
        c1, c2, c3, c4, c5 = width, 2 * width, 4 * width, 6 * width, 8 * width
        self.n_classes = n_classes
        self.stem = _conv(3, c1, stride=2)  # stride 2
        self.down2 = _Down(c1, c2)  # 4
        self.down3 = _Down(c2, c3)  # 8
        self.down4 = _Down(c3, c4)  # 16
        self.down5 = _Down(c4, c5)  # 32
        self.up4 = _Up(c5, c4, c4)
        self.up3 = _Up(c4, c3, c3)
        self.up2 = _Up(c3, c2, c2)
        self.heads = nn.ModuleDict(
            {
                name: self._head(c2, head_channels, out)
                for name, out in (("heatmap", n_classes), ("size", 2), ("offset", 2))
            }
        )
        nn.init.constant_(self.heads["heatmap"][-1].bias, -math.log((1 - HEATMAP_PRIOR) / HEATMAP_PRIOR))

    @staticmethod
    def _head(c_in: int, hidden: int, c_out: int) -> nn.Sequential:
        return nn.Sequential(nn.Conv2d(c_in, hidden, 3, padding=1), nn.ReLU(inplace=True), nn.Conv2d(hidden, c_out, 1))

    def forward(self, images: torch.Tensor) -> dict[str, torch.Tensor]:
        if images.ndim != 4 or images.shape[1] != 3:
            raise ValueError(f"images must be (B, 3, H, W), got shape {tuple(images.shape)}")
        if images.shape[2] % INPUT_MULTIPLE or images.shape[3] % INPUT_MULTIPLE:
            raise ValueError(f"image height and width must be multiples of {INPUT_MULTIPLE}, got {tuple(images.shape)}")
        s2 = self.stem(images)
        s4 = self.down2(s2)
        s8 = self.down3(s4)
        s16 = self.down4(s8)
        s32 = self.down5(s16)
        features = self.up2(self.up3(self.up4(s32, s16), s8), s4)
        return {name: head(features) for name, head in self.heads.items()}
