"""The ground contact line of a photo: where upright scenery meets the ground, column by column.

A ground likelihood learned from the photo itself (colour and edge direction of pixels known to be ground,
against pixels known to stand upright above the horizon; continuity of upright surfaces across the
horizon) is split per column into "upright above, ground below" by dynamic programming over all columns
at once, as free space is found in driving scenes (Badino, Franke and Pfeiffer, "The Stixel World", DAGM
2009; from memory). Used by :mod:`pipeline.weather.distance`.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from .colour import check_image

WORK_WIDTH_PX = 320
"""Columns the contact line is searched on (the photo is shrunk to this width first, for speed)."""

CONTACT_SMOOTHNESS = 1.5
"""Cost of moving the contact line one row between neighbouring work columns, in mislabelled pixels: a
real building corner pays it once, a jagged line every column (tuned by eye on real road photos)."""


CONTACT_RAMP = 0.02
"""Quadratic cost per squared row of change between neighbouring work columns (see :func:`contact_rows`)."""

CONTINUITY_LAB = 8.0
"""Colour step (CIE Lab, OpenCV 8-bit units, averaged over 5 columns) between vertically neighbouring pixels
at which an upright surface is taken to end: a wall runs on below the horizon, smooth and unbroken, until
its foot (tuned by eye on real road photos)."""


def ground_likelihood(
    image: np.ndarray,
    horizon_row: float,
    *,
    sky: np.ndarray,
    ground_hint: np.ndarray | None = None,
    hint_given: bool = False,
    unknown: np.ndarray | None = None,
) -> np.ndarray:
    """Probability that each pixel below the horizon shows the ground, learned from the photo itself.

    Known ground: the drivable surface (``ground_hint``) and the bottom 8% of rows; known upright scenery:
    non-sky pixels above the horizon. A naive Bayes of two histograms, colour (CIE Lab, 8 x 8 x 8 bins) and
    edge direction (the share of horizontal gradient, 4 bins: upright things have vertical outlines), each
    learned from both example sets (smoothed so that an unseen colour is neutral), plus a prior for ground
    (log-odds 0.3 at the horizon to 1.5 at the bottom: most of a road photo below the horizon is ground, and
    more so nearer the camera); the continuity of upright surfaces across the
    horizon (:func:`_carried_uprightness`) takes the rest. A given mask is trusted (0.97 on it); an
    estimated one adds evidence. ``unknown`` pixels (labelled objects) are 0.5: they hide the contact, they
    do not tell it.

    Returns
    -------
    (H, W) float32 ndarray in [0, 1]
    """
    check_image(image)
    height, width = image.shape[:2]
    lab = cv2.cvtColor(image, cv2.COLOR_RGB2LAB)
    colour_bin = (lab[..., 0] // 32).astype(np.int32) * 64 + (lab[..., 1] // 32) * 8 + lab[..., 2] // 32
    grey = cv2.cvtColor(image, cv2.COLOR_RGB2GRAY).astype(np.float32)
    gx = cv2.blur(np.abs(cv2.Sobel(grey, cv2.CV_32F, 1, 0)), (5, 5))
    gy = cv2.blur(np.abs(cv2.Sobel(grey, cv2.CV_32F, 0, 1)), (5, 5))
    edge_bin = np.minimum(3, (4 * gx / (gx + gy + 1e-3)).astype(np.int32))
    rows = np.arange(height)[:, None] + 0.5
    hidden = np.zeros((height, width), bool) if unknown is None else unknown
    hint = np.zeros((height, width), bool) if ground_hint is None else ground_hint
    bottom_band = rows >= height - max(2, int(round(0.08 * height)))
    is_ground = ((hint | bottom_band) & (rows > horizon_row)) & ~hidden
    is_upright = (rows < horizon_row - _horizon_margin(height)) & ~sky & ~hidden
    logit = np.zeros((height, width), np.float64)
    if is_ground.any() and is_upright.any():
        for bins, n in ((colour_bin, 512), (edge_bin, 4)):
            on = np.bincount(bins[is_ground], minlength=n).astype(np.float64)
            off = np.bincount(bins[is_upright], minlength=n).astype(np.float64)
            # pseudo-counts in proportion to each set's size: a colour neither set shows is no evidence
            on, off = on + on.sum() / n, off + off.sum() / n
            logit += np.log(on / on.sum())[bins] - np.log(off / off.sum())[bins]
    span = max(1.0, height - horizon_row)
    logit += np.clip(0.3 + 1.2 * (rows - horizon_row) / span, 0.3, 1.5)
    if ground_hint is not None and not hint_given:
        logit += np.where(hint, 1.0, 0.0)
    p = 1.0 / (1.0 + np.exp(-np.clip(logit, -8, 8)))
    p *= 1.0 - _carried_uprightness(lab, horizon_row, sky=sky, hidden=hidden)
    if ground_hint is not None and hint_given:
        p = np.where(hint, np.maximum(p, 0.97), p)
    p = np.where(hidden, 0.5, p)
    return np.where(rows > horizon_row, p, 0.0).astype(np.float32)


def _carried_uprightness(lab: np.ndarray, horizon_row: float, *, sky: np.ndarray, hidden: np.ndarray) -> np.ndarray:
    """How surely each pixel below the horizon continues the upright surface just above the horizon.

    Carried down each column from a few rows above the horizon (:func:`_horizon_margin`: a field reaching
    the horizon must not pass for a wall when the horizon is a little off; 1 on upright scenery, 0 on sky) and
    multiplied, row by row, by ``exp(-(max(0, step - C / 2) / (0.75 C))^2)`` (``C`` =
    :data:`CONTINUITY_LAB`) of the colour step to the pixel above: the faint shading and grain of a wall
    (steps under ``C / 2``) keep it whole, an outline ends it; an object cuts it. A smooth wall keeps it to
    its foot, a road's far end (cars, kerbs, shadows) loses it.
    """
    height, width = lab.shape[:2]
    top = int(np.clip(math.ceil(horizon_row), 1, height))
    seed = max(0, top - _horizon_margin(height))
    carry = np.zeros((height, width), np.float32)
    values = lab.astype(np.float32)
    step = cv2.blur(np.linalg.norm(values[1:] - values[:-1], axis=2), (5, 1))
    keep = np.exp(-((np.maximum(step - CONTINUITY_LAB / 2, 0.0) / (0.75 * CONTINUITY_LAB)) ** 2)) * ~hidden[1:]
    carry[seed] = ~sky[seed] & ~hidden[seed]
    for r in range(seed + 1, height):
        carry[r] = carry[r - 1] * keep[r - 1]
    carry[:top] = 0.0
    return carry


def _horizon_margin(height: int) -> int:
    """Rows above the horizon that count as "surely above it": 3% of the image height (a fitted horizon is
    typically this close to the true one; at least 2 rows)."""
    return max(2, int(round(0.03 * height)))


def contact_rows(ground_p: np.ndarray, horizon_row: float, *, smoothness: float = CONTACT_SMOOTHNESS) -> np.ndarray:
    """Per column, the row where upright scenery meets the ground: a smooth line splitting off the ground.

    Column ``c`` with contact ``b`` costs ``sum_{v_h <= r < b} p + sum_{r >= b} (1 - p)`` (ground pixels
    called scenery above the line, scenery called ground below it); neighbouring columns pay
    ``smoothness x |b - b'| + CONTACT_RAMP x (b - b')^2``. The cheapest line over all columns is found
    exactly by dynamic programming (as free space per column in Badino et al. 2009).

    Parameters
    ----------
    ground_p : (H, W) float ndarray in [0, 1]
        Ground probability per pixel (see :func:`ground_likelihood`).
    horizon_row : float
    smoothness : float
        Cost per row of change between neighbouring columns (>= 0).

    Returns
    -------
    (W,) int64 ndarray
        First ground row per column, in ``[ceil(v_h), H]`` (``H``: no ground in that column).
    """
    height, width = ground_p.shape
    top = int(np.clip(math.ceil(horizon_row), 0, height))
    p = ground_p[top:].astype(np.float64)
    n_rows = height - top
    if n_rows == 0:
        return np.full(width, height, np.int64)
    # cost[b, c] for b = 0..n_rows: p summed above b, (1 - p) summed from b down
    above = np.vstack([np.zeros((1, width)), np.cumsum(p, axis=0)])
    below = np.vstack([np.cumsum((1 - p)[::-1], axis=0)[::-1], np.zeros((1, width))])
    cost = above + below
    steps = np.arange(n_rows + 1)
    change = np.abs(steps[:, None] - steps[None, :]).astype(np.float64)
    # a little quadratic cost on top of the linear one: where the evidence is flat (behind a labelled
    # object) the line ramps from one side to the other instead of jumping at the object's edge
    jump = smoothness * change + CONTACT_RAMP * change**2
    total = cost[:, 0].copy()
    back = np.zeros((n_rows + 1, width), np.int64)
    for c in range(1, width):
        options = total[None, :] + jump
        back[:, c] = np.argmin(options, axis=1)
        total = options[steps, back[:, c]] + cost[:, c]
    line = np.zeros(width, np.int64)
    line[-1] = int(np.argmin(total))
    for c in range(width - 1, 0, -1):
        line[c - 1] = back[line[c], c]
    return line + top


def contact_line(
    image: np.ndarray, horizon_row: float, *, sky: np.ndarray, drivable, given: bool, hidden: np.ndarray
) -> np.ndarray:
    """Contact row per full-resolution column, searched on a copy shrunk to :data:`WORK_WIDTH_PX` columns."""
    height, width = image.shape[:2]
    scale = min(1.0, WORK_WIDTH_PX / width)
    small_w, small_h = max(1, int(round(width * scale))), max(1, int(round(height * scale)))

    def shrink(mask: np.ndarray) -> np.ndarray:
        return cv2.resize(mask.astype(np.uint8), (small_w, small_h), interpolation=cv2.INTER_NEAREST).astype(bool)

    small = cv2.resize(image, (small_w, small_h), interpolation=cv2.INTER_AREA)
    p = ground_likelihood(
        small,
        horizon_row * small_h / height,
        sky=shrink(sky),
        ground_hint=None if drivable is None else shrink(drivable),
        hint_given=given,
        unknown=shrink(hidden),
    )
    line = contact_rows(p, horizon_row * small_h / height).astype(np.float64)
    line = cv2.medianBlur(line.astype(np.float32).reshape(1, -1), 5).ravel() if small_w >= 5 else line
    cols = (np.arange(width) + 0.5) * small_w / width - 0.5
    full = np.interp(cols, np.arange(small_w), line) * height / small_h
    return np.clip(np.rint(full), 0, height).astype(np.int64)
