"""Fit a label box to what was actually generated, not to what was asked for.

Inside an inpainted region the generator redraws both the object and some surroundings. The object is
where the new pixels differ strongly from the old ones: the surroundings it redraws resemble what was there
(road stays road), while an object replaces the ground behind it. The box is the extent of the strongly
changed pixels that belong to the blob under the requested box.
"""

from __future__ import annotations

from collections.abc import Sequence

import cv2
import numpy as np

MIN_CHANGE = 24
"""Smallest per-pixel change (max over RGB, 0-255) that can count as object: below it, redrawn texture."""


def changed_pixels(before: np.ndarray, after: np.ndarray, region: np.ndarray) -> np.ndarray:
    """Where ``after`` differs strongly from ``before`` inside ``region``.

    Parameters
    ----------
    before, after : (H, W, 3) uint8 ndarray
    region : (H, W) bool ndarray
        Pixels that were allowed to change.

    Returns
    -------
    (H, W) bool ndarray
        The threshold is Otsu's on the region's change values, but never below :data:`MIN_CHANGE`
        (Otsu, "A threshold selection method from gray-level histograms", IEEE SMC 1979).
    """
    if before.shape != after.shape or before.shape[:2] != region.shape:
        raise ValueError(f"shapes differ: before {before.shape}, after {after.shape}, region {region.shape}")
    # No smoothing: a blurred change map would push the box a pixel beyond the object on every side.
    change = np.abs(after.astype(np.int16) - before.astype(np.int16)).max(axis=2).astype(np.uint8)
    values = change[region]
    if values.size == 0:
        return np.zeros(region.shape, dtype=bool)
    otsu, _ = cv2.threshold(values.reshape(-1, 1), 0, 255, cv2.THRESH_BINARY + cv2.THRESH_OTSU)
    strong = (change >= max(float(otsu), MIN_CHANGE)) & region
    # An odd, centred kernel: an even one shifts the opened mask by a pixel.
    strong = cv2.morphologyEx(strong.astype(np.uint8), cv2.MORPH_OPEN, np.ones((3, 3), np.uint8))
    return strong.astype(bool)


def refit_box(
    before: np.ndarray,
    after: np.ndarray,
    region: np.ndarray,
    requested: Sequence[float],
) -> tuple[float, float, float, float] | None:
    """The ``[x, y, w, h]`` box of the generated object under ``requested``, or None if nothing changed.

    Connected blobs of strongly changed pixels (8-connectivity) that overlap the requested box are kept
    when they hold at least 10% of the largest such blob's pixels: small specks of redrawn texture
    do not stretch the box, while an object drawn in two parts (a trailer and its board) stays whole.
    """
    strong = changed_pixels(before, after, region)
    count, labels, stats, _ = cv2.connectedComponentsWithStats(strong.astype(np.uint8), connectivity=8)
    x, y, w, h = requested
    r0, r1 = int(np.floor(y)), int(np.ceil(y + h))
    c0, c1 = int(np.floor(x)), int(np.ceil(x + w))
    under = np.unique(labels[max(r0, 0) : r1, max(c0, 0) : c1])
    blobs = [int(i) for i in under if i != 0]
    if not blobs:
        return None
    largest = max(stats[i, cv2.CC_STAT_AREA] for i in blobs)
    keep = [i for i in blobs if stats[i, cv2.CC_STAT_AREA] >= 0.1 * largest]
    left = min(stats[i, cv2.CC_STAT_LEFT] for i in keep)
    top = min(stats[i, cv2.CC_STAT_TOP] for i in keep)
    right = max(stats[i, cv2.CC_STAT_LEFT] + stats[i, cv2.CC_STAT_WIDTH] for i in keep)
    bottom = max(stats[i, cv2.CC_STAT_TOP] + stats[i, cv2.CC_STAT_HEIGHT] for i in keep)
    return (float(left), float(top), float(right - left), float(bottom - top))
