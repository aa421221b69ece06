"""CenterNet training targets: a Gaussian peak per object on a class heatmap, plus its size and offset.

An object with box ``(x, y, w, h)`` (input pixels, top-left corner) has its centre at
``c = ((x + w / 2) / stride, (y + h / 2) / stride)`` on the output grid. The heatmap of its class gets
``exp(-d^2 / (2 sigma^2))`` around the integer cell ``floor(c)`` (element-wise maximum where peaks
overlap); the size head learns ``(w, h) / stride`` and the offset head ``c - floor(c)`` at that cell.

References
----------
Zhou, Wang, Kraehenbuehl, "Objects as Points", arXiv:1904.07850, 2019 (Sec. 3: heatmap, size, offset).
Law, Deng, "CornerNet: Detecting Objects as Paired Keypoints", ECCV 2018 (Sec. 3.2: the radius).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

MIN_OVERLAP = 0.7
"""IoU that a box with corners moved by the radius must keep (CornerNet's choice, Law and Deng 2018)."""


@dataclass(frozen=True)
class Targets:
    """Targets of one image.

    Attributes
    ----------
    heatmap : (C, h, w) float32 ndarray
        One Gaussian peak of value 1 per object on its class's channel.
    size : (K, 2) float32 ndarray
        ``(w, h) / stride`` per object slot.
    offset : (K, 2) float32 ndarray
        Sub-cell position ``c - floor(c)`` (x, y) of each centre, in [0, 1).
    index : (K,) int64 ndarray
        Flat cell index ``row * w + col`` of each centre.
    mask : (K,) bool ndarray
        Which of the ``K`` slots hold an object.
    """

    heatmap: np.ndarray
    size: np.ndarray
    offset: np.ndarray
    index: np.ndarray
    mask: np.ndarray


def gaussian_radius(height: float, width: float, *, min_overlap: float = MIN_OVERLAP) -> float:
    """Largest corner displacement that keeps a box's IoU with itself at ``min_overlap`` or more.

    CornerNet's three cases, each solved exactly for ``r`` (IoU decreases in ``r`` in all three):

    * both corners move inward:  ``(w - 2r)(h - 2r) / (w h) = t``
    * both corners move outward: ``w h / ((w + 2r)(h + 2r)) = t``
    * one in, one out (the box shifts by ``(r, r)``): ``(w - r)(h - r) / (2 w h - (w - r)(h - r)) = t``

    The radius is the smallest of the three. (The authors' released code solves the same quadratics
    but divides by 2 instead of ``2a``, which inflates two of the roots; this is the exact solution.)

    Parameters
    ----------
    height, width : float
        Box size in output cells; both > 0.
    min_overlap : float
        In (0, 1).

    Returns
    -------
    float
        Radius in output cells, >= 0.

    References
    ----------
    Law, Deng, "CornerNet: Detecting Objects as Paired Keypoints", ECCV 2018, Sec. 3.2.
    """
    if not (height > 0 and width > 0):
        raise ValueError(f"box height and width must be > 0, got {height}, {width}")
    if not 0 < min_overlap < 1:
        raise ValueError(f"min_overlap must be in (0, 1), got {min_overlap}")
    t, s, p = min_overlap, height + width, height * width
    inward = (2 * s - math.sqrt(4 * s * s - 16 * (1 - t) * p)) / 8
    outward = (-2 * t * s + math.sqrt(4 * t * t * s * s + 16 * t * (1 - t) * p)) / (8 * t)
    shifted = (s - math.sqrt(s * s - 4 * p * (1 - t) / (1 + t))) / 2
    return max(0.0, min(inward, outward, shifted))


def draw_gaussian(heatmap: np.ndarray, centre: tuple[int, int], radius: int) -> None:
    """Raise ``heatmap`` to a Gaussian peak of value 1 at ``centre`` (element-wise maximum, in place).

    Parameters
    ----------
    heatmap : (h, w) float32 ndarray
        One class channel; changed in place.
    centre : (col, row) ints
        The peak's cell; may lie outside the map (then only its visible part is drawn).
    radius : int
        Half-width of the drawn square; ``sigma = (2 radius + 1) / 6``, so the square spans +-3 sigma.

    References
    ----------
    Zhou, Wang, Kraehenbuehl, "Objects as Points", 2019, Sec. 3 (size-adaptive sigma; the ``diameter / 6``
    rule is from the authors' released code, from memory).
    """
    if radius < 0:
        raise ValueError(f"radius must be >= 0, got {radius}")
    sigma = (2 * radius + 1) / 6
    offsets = np.arange(-radius, radius + 1, dtype=np.float64)
    kernel = np.exp(-(offsets[:, None] ** 2 + offsets[None, :] ** 2) / (2 * sigma * sigma)).astype(np.float32)
    col, row = centre
    height, width = heatmap.shape
    top, bottom = max(0, row - radius), min(height, row + radius + 1)
    left, right = max(0, col - radius), min(width, col + radius + 1)
    if top >= bottom or left >= right:
        return
    patch = kernel[top - row + radius : bottom - row + radius, left - col + radius : right - col + radius]
    np.maximum(heatmap[top:bottom, left:right], patch, out=heatmap[top:bottom, left:right])


def encode_targets(
    boxes: np.ndarray,
    labels: Sequence[int],
    *,
    n_classes: int,
    output_shape: tuple[int, int],
    stride: int,
    max_objects: int = 64,
) -> Targets:
    """Targets of one image from its boxes.

    Parameters
    ----------
    boxes : (N, 4) float ndarray
        COCO boxes ``(x, y, w, h)`` in input pixels; every ``w, h > 0``.
    labels : sequence of int
        Class index in ``[0, n_classes)`` of each box.
    n_classes : int
    output_shape : (h, w)
        Size of the output grid (input size / stride).
    stride : int
        Input pixels per output cell.
    max_objects : int
        Object slots ``K``; an image with more objects is an error.

    Returns
    -------
    Targets
    """
    boxes = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    if len(labels) != len(boxes):
        raise ValueError(f"{len(boxes)} boxes but {len(labels)} labels")
    if len(boxes) > max_objects:
        raise ValueError(f"{len(boxes)} objects in one image, more than max_objects={max_objects}")
    out_h, out_w = output_shape
    heatmap = np.zeros((n_classes, out_h, out_w), np.float32)
    size = np.zeros((max_objects, 2), np.float32)
    offset = np.zeros((max_objects, 2), np.float32)
    index = np.zeros(max_objects, np.int64)
    mask = np.zeros(max_objects, bool)
    for k, ((x, y, w, h), label) in enumerate(zip(boxes, labels, strict=True)):
        if not 0 <= label < n_classes:
            raise ValueError(f"label {label} outside [0, {n_classes})")
        if not (w > 0 and h > 0):
            raise ValueError(f"box {k} has width {w} and height {h}; both must be > 0")
        cx = min(max((x + w / 2) / stride, 0.0), out_w - 1e-3)
        cy = min(max((y + h / 2) / stride, 0.0), out_h - 1e-3)
        col, row = int(cx), int(cy)
        radius = int(gaussian_radius(h / stride, w / stride))
        draw_gaussian(heatmap[label], (col, row), radius)
        size[k] = (w / stride, h / stride)
        offset[k] = (cx - col, cy - row)
        index[k] = row * out_w + col
        mask[k] = True
    return Targets(heatmap, size, offset, index, mask)
