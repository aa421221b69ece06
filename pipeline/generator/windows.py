"""Context-window geometry: crop a square window around a box, resize it, and blend a result back.

Pure numpy/OpenCV, no torch. Every generator (our own model and a user's diffusers pipeline) goes
through the same three steps, so that a model of one fixed input size serves objects of any size:

1. :func:`context_window` picks a square window about twice the box's longer side, centred on the box
   and shifted to stay inside the image (padded only when the image is smaller than the window);
2. :func:`crop_window` cuts it out and resizes it to the model's size;
3. :func:`paste_window` resizes the model's output back and blends it into the frame with a feathered
   alpha that is zero outside the mask, so every pixel outside the mask keeps its exact input value.

Boxes are COCO ``(x, y, w, h)`` in pixels from the top-left corner; arrays are indexed ``(row, col)``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import cv2
import numpy as np

CONTEXT_SCALE = 2.0
"""Window side as a multiple of the box's longer side: enough road around the object to match lighting."""

MIN_WINDOW_PX = 16
"""Smallest window side in image pixels, so tiny boxes still get some context."""


@dataclass(frozen=True)
class Window:
    """A square region ``[x0, x0 + size) x [y0, y0 + size)`` of an image, in pixels.

    It may reach outside the image when the image is smaller than the window; :func:`crop_window`
    then pads by repeating the border pixels.
    """

    x0: int
    y0: int
    size: int


def context_window(
    box: Sequence[float],
    image_hw: tuple[int, int],
    *,
    scale: float = CONTEXT_SCALE,
    min_size: int = MIN_WINDOW_PX,
) -> Window:
    """The square context window around ``box``.

    Parameters
    ----------
    box : (4,) sequence of float
        COCO ``(x, y, w, h)`` in pixels; ``w`` and ``h`` must be > 0.
    image_hw : (int, int)
        Image height and width.
    scale : float
        Window side over the box's longer side (>= 1).
    min_size : int
        Smallest window side in pixels.

    Returns
    -------
    Window
        Centred on the box, then shifted to lie inside the image along each axis where the image is
        large enough; otherwise centred on the image along that axis. The box always lies inside.
    """
    x, y, w, h = (float(v) for v in box)
    if not (w > 0 and h > 0) or not all(math.isfinite(v) for v in (x, y, w, h)):
        raise ValueError(f"box must be finite (x, y, w, h) with w, h > 0, got {tuple(box)}")
    if scale < 1:
        raise ValueError(f"scale must be >= 1, got {scale}")
    height, width = image_hw
    side = max(int(math.ceil(max(w, h) * scale)), int(min_size))
    x0 = _place(x + w / 2, side, width)
    y0 = _place(y + h / 2, side, height)
    return Window(x0, y0, side)


def _place(centre: float, side: int, extent: int) -> int:
    start = int(round(centre - side / 2))
    if side <= extent:
        return min(max(start, 0), extent - side)
    return (extent - side) // 2


def crop_window(image: np.ndarray, window: Window, out_size: int, *, border: int = cv2.BORDER_REPLICATE) -> np.ndarray:
    """Cut ``window`` out of ``image`` and resize it to ``out_size`` x ``out_size``.

    Parameters
    ----------
    image : (H, W) or (H, W, C) ndarray
        uint8 or float32.
    window : Window
    out_size : int
        Output side in pixels.
    border : int
        OpenCV border mode for the part of the window outside the image (masks use
        ``cv2.BORDER_CONSTANT``: nothing to inpaint there).

    Returns
    -------
    (out_size, out_size[, C]) ndarray
        Same dtype as ``image``. Area averaging when shrinking (no aliasing), bilinear when enlarging.
    """
    height, width = image.shape[:2]
    left, top = max(0, -window.x0), max(0, -window.y0)
    right = max(0, window.x0 + window.size - width)
    bottom = max(0, window.y0 + window.size - height)
    crop = image[
        max(window.y0, 0) : min(window.y0 + window.size, height),
        max(window.x0, 0) : min(window.x0 + window.size, width),
    ]
    if left or top or right or bottom:
        crop = cv2.copyMakeBorder(crop, top, bottom, left, right, border, value=0)
    return _resize(crop, out_size)


def _resize(image: np.ndarray, side: int) -> np.ndarray:
    if image.shape[0] == side and image.shape[1] == side:
        return image.copy()
    interpolation = cv2.INTER_AREA if image.shape[0] > side else cv2.INTER_LINEAR
    return cv2.resize(image, (side, side), interpolation=interpolation)


def window_mask(mask: np.ndarray, window: Window, out_size: int) -> np.ndarray:
    """The part of a boolean mask inside ``window``, at model size.

    Returns
    -------
    (out_size, out_size) bool ndarray
        True wherever any masked image pixel falls in the model pixel, so the model regenerates every
        pixel that will be blended back.
    """
    coverage = crop_window(mask.astype(np.float32), window, out_size, border=cv2.BORDER_CONSTANT)
    return coverage > 0


def feather_alpha(mask: np.ndarray, *, feather_px: float) -> np.ndarray:
    """Blend weight that is 0 outside ``mask`` and ramps to 1 over ``feather_px`` pixels inside it.

    Parameters
    ----------
    mask : (H, W) bool ndarray
    feather_px : float
        Width of the ramp; 0 gives a hard mask.

    Returns
    -------
    (H, W) float32 ndarray in [0, 1]
        ``min(1, d / feather_px)`` with ``d`` the Euclidean distance (>= 1 inside) from a mask pixel to
        the nearest pixel outside the mask.

    References
    ----------
    Borgefors, "Distance transformations in digital images", CVGIP 34 (1986): the 3x3 chamfer
    approximation of the Euclidean distance used by ``cv2.distanceTransform`` (from memory).
    """
    if feather_px < 0:
        raise ValueError(f"feather_px must be >= 0, got {feather_px}")
    if feather_px == 0 or not mask.any():
        return mask.astype(np.float32)
    padded = np.pad(mask.astype(np.uint8), 1)
    distance = cv2.distanceTransform(padded, cv2.DIST_L2, 3)[1:-1, 1:-1]
    return np.clip(distance / feather_px, 0.0, 1.0).astype(np.float32) * mask


def paste_window(
    image: np.ndarray, mask: np.ndarray, window: Window, patch: np.ndarray, *, feather_px: float = 2.0
) -> np.ndarray:
    """Blend a model-size ``patch`` back into ``image`` inside ``mask``.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    mask : (H, W) bool ndarray
        Pixels that may change; it must lie inside ``window``.
    window : Window
        Where ``patch`` came from (see :func:`context_window`).
    patch : (S, S, 3) uint8 ndarray
        The model's output for the window.
    feather_px : float
        Width of the alpha ramp inside the mask's edge (see :func:`feather_alpha`).

    Returns
    -------
    (H, W, 3) uint8 ndarray
        A new frame; pixels outside ``mask`` are bit-identical to ``image``.
    """
    rows, cols = np.nonzero(mask)
    out = image.copy()
    if rows.size == 0:
        return out
    height, width = mask.shape
    if (
        rows.min() < window.y0
        or cols.min() < window.x0
        or rows.max() >= window.y0 + window.size
        or cols.max() >= window.x0 + window.size
    ):
        raise ValueError(f"mask reaches outside the context window {window}")
    # Work on the mask's bounding box grown by one pixel, so the distance ramp sees the true edge.
    r0, r1 = max(rows.min() - 1, 0), min(rows.max() + 2, height)
    c0, c1 = max(cols.min() - 1, 0), min(cols.max() + 2, width)
    big = _resize(patch, window.size) if patch.shape[0] != window.size else patch
    region = big[r0 - window.y0 : r1 - window.y0, c0 - window.x0 : c1 - window.x0].astype(np.float32)
    sub_mask = mask[r0:r1, c0:c1]
    alpha = feather_alpha(sub_mask, feather_px=feather_px)[:, :, None]
    base = image[r0:r1, c0:c1].astype(np.float32)
    blended = np.clip(np.rint(alpha * region + (1.0 - alpha) * base), 0, 255).astype(np.uint8)
    out[r0:r1, c0:c1][sub_mask] = blended[sub_mask]
    return out


def box_mask(image_hw: tuple[int, int], box: Sequence[float], *, dilate_px: float = 0.0) -> np.ndarray:
    """Boolean mask of the pixels whose centres lie in ``box`` grown by ``dilate_px`` on every side.

    Returns
    -------
    (H, W) bool ndarray
    """
    height, width = image_hw
    x, y, w, h = (float(v) for v in box)
    c0 = max(int(math.ceil(x - dilate_px - 0.5)), 0)
    r0 = max(int(math.ceil(y - dilate_px - 0.5)), 0)
    c1 = min(int(math.ceil(x + w + dilate_px - 0.5)), width)
    r1 = min(int(math.ceil(y + h + dilate_px - 0.5)), height)
    mask = np.zeros((height, width), dtype=bool)
    mask[r0:r1, c0:c1] = True
    return mask


def object_mask_box(box: Sequence[float], *, margin: float, below_px: float = 2.0) -> tuple[float, float, float, float]:
    """The region to repaint for an object in ``box``: grown by ``margin`` x width on each side,
    ``margin`` x height on top and ``below_px`` below (the footprint stays where it is).

    This is the mask geometry of the insert stage (``pipeline.stages.insert.object_mask``); training
    uses it so the model draws objects that leave the same room around them.

    Returns
    -------
    (x, y, w, h) tuple of float
    """
    if margin < 0:
        raise ValueError(f"margin must be >= 0, got {margin}")
    x, y, w, h = (float(v) for v in box)
    return (x - margin * w, y - margin * h, w * (1 + 2 * margin), h * (1 + margin) + below_px)
