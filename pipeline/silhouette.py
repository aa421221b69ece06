"""An object's silhouette inside its box, and the region an exemplar insertion repaints around it.

Two jobs, shared by the insert stage (at inference) and the generator's training (self-supervision on real
objects), so that both see the same geometry:

- :func:`object_silhouette`: which pixels of a labelled box are the object: the COCO segmentation where the
  data set gives one, else a GrabCut estimate seeded by the box; cleaned (largest component, holes filled,
  clipped to the box) and never empty (a box-shaped silhouette is the last resort, and says so).
- :func:`repaint_mask`: what the generator may change for a placed object: its silhouette grown by a few
  pixels (a clean boundary) plus a shadow band, a flat ellipse centred on the box's bottom row where the
  contact shadow falls.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import cv2
import numpy as np
from pycocotools import mask as mask_utils

SilhouetteSource = Literal["segmentation", "grabcut", "box"]

MIN_GRABCUT_SHARE = 0.25
"""A GrabCut foreground covering less of the box than this is a failed cut (a real object fills more of
its own box); the box is used instead."""

GRABCUT_MARGIN = 0.3
"""GrabCut works on the box grown by this share of its longer side (at least 4 px): the ring is sure
background, from which the colour model of the background is learnt."""

MIN_GRABCUT_SIDE_PX = 6
"""Boxes with a shorter side than this have too few pixels to model colours in; their silhouette is the box."""

DILATE_PX = 3
"""The repainted region reaches this far outside the silhouette, so the boundary itself is redrawn."""

BAND_HEIGHT_SHARE = 0.12
"""Height of the shadow band (a flat ellipse) as a share of the box height."""

BAND_WIDTH_SHARE = 1.2
"""Width of the shadow band as a share of the box width: a contact shadow reaches a little past the sides."""


@dataclass(frozen=True)
class Silhouette:
    """An object's pixels.

    Attributes
    ----------
    mask : (H, W) bool ndarray
        Never empty; inside the box's pixel bounds.
    source : {"segmentation", "grabcut", "box"}
        Where it came from; ``"box"`` is the fallback (the whole box) when neither a segmentation nor a
        trusted GrabCut estimate was available.
    """

    mask: np.ndarray
    source: SilhouetteSource


@dataclass(frozen=True)
class RepaintRegion:
    """What an exemplar insertion may change around a placed object.

    Attributes
    ----------
    mask : (H, W) bool ndarray
        ``grown | band``: every pixel the generator may repaint.
    grown : (H, W) bool ndarray
        The silhouette dilated by ``dilate_px``.
    band : (H, W) bool ndarray
        The shadow band (the whole ellipse, including the part under the object).
    """

    mask: np.ndarray
    grown: np.ndarray
    band: np.ndarray


def segmentation_mask(segmentation: Any, height: int, width: int) -> np.ndarray:
    """Decode a COCO segmentation (polygons, uncompressed or compressed RLE) into an (H, W) bool mask.

    Decoding is pycocotools' own (``frPyObjects``, ``merge``, ``decode``), the reference reader of the COCO
    format, so the result is what ``COCO.annToMask`` gives for the same annotation.

    Raises
    ------
    ValueError
        ``segmentation`` is neither a list of polygons nor an RLE dict.
    """
    if isinstance(segmentation, list):
        rle = mask_utils.merge(mask_utils.frPyObjects(segmentation, height, width))
    elif isinstance(segmentation, dict) and isinstance(segmentation.get("counts"), list):
        rle = mask_utils.frPyObjects(segmentation, height, width)
    elif isinstance(segmentation, dict):
        rle = dict(segmentation)
        if isinstance(rle["counts"], str):
            rle["counts"] = rle["counts"].encode("ascii")
    else:
        raise ValueError(f"segmentation must be polygons or an RLE dict, got {type(segmentation).__name__}")
    return mask_utils.decode(rle).astype(bool)


def box_pixels(box: Sequence[float], shape: tuple[int, int]) -> tuple[int, int, int, int]:
    """Pixel bounds ``(c0, r0, c1, r1)`` (end exclusive) of every pixel a COCO box touches, clipped to the image."""
    height, width = shape
    x, y, w, h = (float(v) for v in box)
    c0, r0 = max(0, int(math.floor(x))), max(0, int(math.floor(y)))
    c1, r1 = min(width, int(math.ceil(x + w))), min(height, int(math.ceil(y + h)))
    return c0, r0, c1, r1


def grabcut_in_box(image: np.ndarray, bounds: tuple[int, int, int, int], *, grow: int, iterations: int) -> np.ndarray:
    """GrabCut foreground of the box ``bounds``: the box is "probably foreground", a ring of ``grow`` px around
    it sure background.

    Deterministic: GrabCut seeds its colour models with k-means on OpenCV's own (thread-local) random
    generator, which takes no seed argument, so it is reset to 0 before every cut.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray, RGB
    bounds : (c0, r0, c1, r1)
        Pixel bounds of the box, end exclusive (see :func:`box_pixels`).
    grow : int
        Width of the background ring in pixels (clipped to the image).
    iterations : int

    Returns
    -------
    (H, W) bool ndarray
        Foreground and probable foreground inside ``bounds``; False elsewhere. May be empty.

    References
    ----------
    C. Rother, V. Kolmogorov, A. Blake, "GrabCut: interactive foreground extraction using iterated graph
    cuts", SIGGRAPH 2004 (OpenCV's ``cv2.grabCut``).
    """
    height, width = image.shape[:2]
    c0, r0, c1, r1 = bounds
    q0, p0 = max(0, c0 - grow), max(0, r0 - grow)
    q1, p1 = min(width, c1 + grow), min(height, r1 + grow)
    labels = np.full((p1 - p0, q1 - q0), cv2.GC_BGD, np.uint8)
    labels[r0 - p0 : r1 - p0, c0 - q0 : c1 - q0] = cv2.GC_PR_FGD
    background, foreground = np.zeros((1, 65)), np.zeros((1, 65))
    roi = np.ascontiguousarray(image[p0:p1, q0:q1][..., ::-1])
    cv2.setRNGSeed(0)
    cv2.grabCut(roi, labels, None, background, foreground, iterations, cv2.GC_INIT_WITH_MASK)
    mask = np.zeros((height, width), dtype=bool)
    mask[p0:p1, q0:q1] = (labels == cv2.GC_FGD) | (labels == cv2.GC_PR_FGD)
    inside = np.zeros_like(mask)
    inside[r0:r1, c0:c1] = True
    return mask & inside


def object_silhouette(
    image: np.ndarray, box: Sequence[float], *, segmentation: Any = None, iterations: int = 4
) -> Silhouette:
    """The pixels of the object in ``box``: its segmentation, else a GrabCut estimate, else the box.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray, RGB
    box : (x, y, w, h)
        COCO box in pixels (w, h > 0), inside the image.
    segmentation : COCO polygons or RLE, optional
        The annotation's ``segmentation``; used whenever it decodes to pixels inside the box.
    iterations : int
        GrabCut iterations.

    Returns
    -------
    Silhouette
        Its largest 8-connected component with holes filled, clipped to the box's pixel bounds; never
        empty. GrabCut is deterministic (see :func:`grabcut_in_box`); a cut covering less than
        :data:`MIN_GRABCUT_SHARE` of the box, or a box under :data:`MIN_GRABCUT_SIDE_PX`, gives the box.

    Raises
    ------
    ValueError
        ``image`` is not (H, W, 3) uint8, or ``box`` has no pixels inside the image.
    """
    if not isinstance(image, np.ndarray) or image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"image must be an (H, W, 3) uint8 array, got {getattr(image, 'shape', type(image))}")
    shape = image.shape[:2]
    c0, r0, c1, r1 = box_pixels(box, shape)
    if c1 <= c0 or r1 <= r0:
        raise ValueError(f"box {tuple(box)} has no pixels inside the {shape[1]}x{shape[0]} image")
    inside = np.zeros(shape, dtype=bool)
    inside[r0:r1, c0:c1] = True
    if segmentation is not None:
        decoded = _clean(segmentation_mask(segmentation, *shape) & inside)
        if decoded.any():
            return Silhouette(decoded, "segmentation")
    if min(c1 - c0, r1 - r0) >= MIN_GRABCUT_SIDE_PX:
        _, _, w, h = box
        grow = max(4, int(math.ceil(GRABCUT_MARGIN * max(w, h))))
        cut = _clean(grabcut_in_box(image, (c0, r0, c1, r1), grow=grow, iterations=iterations))
        if cut.sum() >= MIN_GRABCUT_SHARE * inside.sum():
            return Silhouette(cut, "grabcut")
    return Silhouette(inside, "box")


def _clean(mask: np.ndarray) -> np.ndarray:
    """Largest 8-connected component of ``mask``, holes filled (all False stays all False)."""
    if not mask.any():
        return mask
    rows, cols = np.nonzero(mask)
    r0, r1, c0, c1 = rows.min(), rows.max() + 1, cols.min(), cols.max() + 1
    crop = mask[r0:r1, c0:c1].astype(np.uint8)
    count, labels, stats, _ = cv2.connectedComponentsWithStats(crop, connectivity=8)
    largest = 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))
    component = labels == largest
    # Holes: background pixels that a flood fill from outside the component's frame cannot reach.
    padded = np.pad(component.astype(np.uint8), 1)
    outside = padded.copy()
    cv2.floodFill(outside, np.zeros((padded.shape[0] + 2, padded.shape[1] + 2), np.uint8), (0, 0), 2)
    filled = (outside != 2)[1:-1, 1:-1]
    out = np.zeros_like(mask)
    out[r0:r1, c0:c1] = filled
    return out


def shadow_band(
    box: Sequence[float],
    shape: tuple[int, int],
    *,
    height_share: float = BAND_HEIGHT_SHARE,
    width_share: float = BAND_WIDTH_SHARE,
) -> np.ndarray:
    """The contact-shadow band of an object standing in ``box``: a flat ellipse centred on its bottom edge.

    Parameters
    ----------
    box : (x, y, w, h)
    shape : (H, W)
    height_share, width_share : float
        Full height and width of the ellipse as shares of the box height and width (each axis at least
        2 px, so small objects still get a band).

    Returns
    -------
    (H, W) bool ndarray
        Pixels whose centres lie inside the ellipse (clipped to the image; may be empty only when the
        box's bottom edge lies outside the image).
    """
    height, width = shape
    x, y, w, h = (float(v) for v in box)
    cx, cy = x + w / 2.0, y + h
    ax, ay = max(1.0, 0.5 * width_share * w), max(1.0, 0.5 * height_share * h)
    r0, r1 = max(0, int(math.floor(cy - ay))), min(height, int(math.ceil(cy + ay)) + 1)
    c0, c1 = max(0, int(math.floor(cx - ax))), min(width, int(math.ceil(cx + ax)) + 1)
    band = np.zeros(shape, dtype=bool)
    if r1 <= r0 or c1 <= c0:
        return band
    rows = np.arange(r0, r1, dtype=np.float64)[:, None] + 0.5
    cols = np.arange(c0, c1, dtype=np.float64)[None, :] + 0.5
    band[r0:r1, c0:c1] = ((cols - cx) / ax) ** 2 + ((rows - cy) / ay) ** 2 <= 1.0
    return band


def repaint_mask(
    silhouette: np.ndarray,
    box: Sequence[float],
    shape: tuple[int, int] | None = None,
    *,
    dilate_px: int = DILATE_PX,
    band_height_share: float = BAND_HEIGHT_SHARE,
    band_width_share: float = BAND_WIDTH_SHARE,
) -> RepaintRegion:
    """The region an exemplar insertion repaints: the silhouette grown by ``dilate_px`` plus the shadow band.

    One function for training and inference: the generator learns to redraw exactly this region (the
    object, its boundary and its contact shadow), and the insert stage lets it change nothing else.

    Parameters
    ----------
    silhouette : (H, W) bool ndarray, or float ndarray (an alpha; > 0.5 counts as inside)
    box : (x, y, w, h)
        The object's box (the shadow band sits on its bottom edge).
    shape : (H, W), optional
        Must equal ``silhouette.shape`` when given.
    dilate_px : int
        Growth of the silhouette (elliptic structuring element of radius ``dilate_px``).
    band_height_share, band_width_share : float
        See :func:`shadow_band`.

    Returns
    -------
    RepaintRegion
    """
    if shape is not None and tuple(shape) != silhouette.shape:
        raise ValueError(f"shape {tuple(shape)} differs from the silhouette's {silhouette.shape}")
    if dilate_px < 0:
        raise ValueError(f"dilate_px must be >= 0, got {dilate_px}")
    inside = silhouette if silhouette.dtype == bool else silhouette > 0.5
    if dilate_px:
        kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * dilate_px + 1, 2 * dilate_px + 1))
        grown = cv2.dilate(inside.astype(np.uint8), kernel).astype(bool)
    else:
        grown = inside.copy()
    band = shadow_band(box, inside.shape, height_share=band_height_share, width_share=band_width_share)
    return RepaintRegion(grown | band, grown, band)
