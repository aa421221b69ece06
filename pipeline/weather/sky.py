"""Where the sky is: bright, smooth, grey-white or blue pixels above the horizon, connected to the top edge.

A day sky is among the brightest things in a photo, nearly flat over a few pixels, and either low in
saturation (overcast, haze, clouds, glare) or blue (Rayleigh scattering); on flat ground it lies above the
horizon and reaches the top of the frame. Each cue alone fails on real photos (white walls are bright and
grey, blue cars are blue, asphalt is smooth); together, and connected to the top edge through pixels that
pass all of them, they rarely do. Cut-outs between leaves that the connection misses stay scenery: they
are then treated as near as the tree, which errs toward a clearer scene, never a washed-out one.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from .colour import check_image

SKY_MIN_VALUE = 0.6
"""Least HSV value of a sky pixel, as a share of the frame's bright level (its 99.5th percentile)."""

SKY_MIN_MEDIAN_VALUE = 0.75
"""Least median HSV value of a connected sky region, as a share of the frame's bright level: a grey facade
reaching the top of the frame is smooth and grey too, but duller than the sky above a street (tuned by
eye on real road photos: skies came out at 0.83-1.0, facades at 0.62-0.67)."""

SKY_MAX_SATURATION = 0.28
"""Most HSV saturation of a grey-white (overcast, hazy, cloudy) sky pixel."""

SKY_MAX_GRADIENT = 5.0
"""Most mean grey-level change per pixel (Sobel, 0-255 scale, over 5x5 px) inside the sky; outlines of
roofs, branches and poles are much steeper (tuned by eye on real road photos)."""


def sky_likeness(image: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels that look like sky by colour, by colour and smoothness, and clearly blue: three (H, W) bool.

        Sky colour: bright (value >= :data:`SKY_MIN_VALUE` of the frame's bright level) and grey-white
        (saturation <= :data:`SKY_MAX_SATURATION`) or blue to cyan (hue 165-250 degrees, more blue than red: some
    cameras' colour balance turns a clear sky cyan).
        Smooth: mean gradient <= :data:`SKY_MAX_GRADIENT`.
    """
    check_image(image)
    hsv = cv2.cvtColor(image, cv2.COLOR_RGB2HSV_FULL).astype(np.float32)
    hue, sat, value = hsv[..., 0] * (360.0 / 256.0), hsv[..., 1] / 255.0, hsv[..., 2] / 255.0
    bright_level = max(float(np.percentile(value, 99.5)), 0.2)
    bright = value >= SKY_MIN_VALUE * bright_level
    blue = (hue >= 165) & (hue <= 250) & (image[..., 2] > image[..., 0])
    grey = sat <= SKY_MAX_SATURATION
    grey_level = cv2.cvtColor(image, cv2.COLOR_RGB2GRAY).astype(np.float32)
    gx = cv2.Sobel(grey_level, cv2.CV_32F, 1, 0, ksize=3) / 8.0
    gy = cv2.Sobel(grey_level, cv2.CV_32F, 0, 1, ksize=3) / 8.0
    smooth = cv2.blur(np.hypot(gx, gy), (5, 5)) <= SKY_MAX_GRADIENT
    coloured = bright & (grey | blue)
    return coloured, coloured & smooth, blue & (sat >= 0.15)


def sky_mask(image: np.ndarray, horizon_row: float) -> np.ndarray:
    """Sky pixels: sky-like (:func:`sky_likeness`), above the horizon, and connected to the top edge.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    horizon_row : float
        Horizon row (top-down); nothing at or below it is sky.

    Returns
    -------
    (H, W) bool ndarray
    """
    check_image(image)
    height, width = image.shape[:2]
    rows = int(np.clip(math.floor(horizon_row), 0, height))
    sky = np.zeros((height, width), dtype=bool)
    if rows == 0:
        return sky
    coloured, likely, blue = sky_likeness(image)
    coloured, likely, blue = coloured[:rows], likely[:rows].astype(np.uint8), blue[:rows]
    value = image[:rows].max(axis=2)
    bright_level = max(float(np.percentile(image.max(axis=2), 99.5)), 51.0)
    # a one-pixel seam of leaves or wire must not split the sky, nor a gap let it leak into a wall
    likely = cv2.morphologyEx(likely, cv2.MORPH_CLOSE, np.ones((3, 3), np.uint8))
    count, labels = cv2.connectedComponents(likely, connectivity=4)
    touching = [k for k in np.unique(labels[0][likely[0] > 0]) if k > 0]
    bright = [k for k in touching if _sky_bright(value[labels == k], blue[labels == k], bright_level)]
    keep = np.isin(labels, bright)
    small = max(4, (rows * width) // 4000)
    if count > 1 and keep.any():
        # the smoothness window misses the last pixels before an outline; sky-coloured ones rejoin
        for _ in range(3):
            keep = cv2.dilate(keep.astype(np.uint8), np.ones((3, 3), np.uint8)).astype(bool) & (keep | coloured)
        sky[:rows] = keep
        sky = _drop_specks(sky, small)
    return sky


def _sky_bright(value: np.ndarray, blue: np.ndarray, bright_level: float) -> bool:
    """A region is bright enough for sky: its median value reaches :data:`SKY_MIN_MEDIAN_VALUE` of the
    frame's bright level, or, for a clearly blue region (a clear sky is darker than a white one), the
    per-pixel :data:`SKY_MIN_VALUE`."""
    least = SKY_MIN_VALUE if np.mean(blue) >= 0.5 else SKY_MIN_MEDIAN_VALUE
    return float(np.median(value)) >= least * bright_level


def _drop_specks(mask: np.ndarray, min_px: int) -> np.ndarray:
    count, labels, stats, _ = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=4)
    big = np.flatnonzero(stats[:, cv2.CC_STAT_AREA] >= min_px)
    return np.isin(labels, big[big > 0])
