"""Distance to what each pixel shows, from one photo without a depth sensor, and where that is a guess.

The scene is read as a "vertical world" (Hoiem, Efros and Hebert 2005): a flat ground plane below the
horizon, sky above, and everything else standing upright on the ground. A ground pixel's distance follows
from its row (a level pinhole camera over a plane); an upright thing is as far as the place where it meets
the ground, so each image column takes the distance of its ground contact for every non-sky pixel above
that contact. The contact line is found per column as the row that best splits the column into "not
ground" above and "ground" below, by a ground likelihood learned from the photo itself (colour and edge
direction of the pixels known to be ground: the drivable surface and the bottom rows; against those known
not to be: non-sky pixels above the horizon), and smoothed across columns by dynamic programming, as free
space is found in driving scenes (Badino, Franke and Pfeiffer 2009). Labelled objects stand at their own
footprint distance over their silhouettes, never over whole boxes. A measured depth map, where given,
replaces all of it at every pixel it measures.

References
----------
.. [1] D. Hoiem, A. A. Efros, M. Hebert, "Automatic Photo Pop-up", SIGGRAPH 2005 (ground, vertical, sky).
.. [2] R. Hartley, A. Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole over
   a plane: ``Z = f h_cam / (v - v_h)``).
.. [3] H. Badino, U. Franke, D. Pfeiffer, "The Stixel World: A Compact Medium Level Representation of the
   3D-World", DAGM 2009 (free space per column by dynamic programming; from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from enum import IntEnum

import cv2
import numpy as np

from .colour import check_image

DEFAULT_CAMERA_HEIGHT_M = 1.65
"""Camera height used when the ground model has no estimate: the KITTI car's camera (Geiger et al., CVPR
2012; from memory)."""

FAR_LIMIT_M = 1000.0
"""Distance given to the sky and the cap on every estimated distance (a design choice: beyond a kilometre
a road scene holds nothing a visibility of interest would show, t(1 km) < 5% for V < 1 km)."""

WORK_WIDTH_PX = 320
"""Columns the contact line is searched on (the photo is shrunk to this width first, for speed)."""

CONTACT_SMOOTHNESS = 1.5
"""Cost of moving the contact line one row between neighbouring work columns, in mislabelled pixels: a
real building corner pays it once, a jagged line every column (tuned by eye on real road photos)."""


SCENERY_HEIGHT_M = 15.0
"""Height above the ground that upright roadside scenery rarely exceeds (street trees 8-15 m, houses 6-9 m;
from memory): scenery rising high above the horizon cannot be farther than such a thing reaching that
high, so tree crowns over a long street stay with the trees, not with the street's far end. Taller
buildings come out nearer than they are: clearer in fog, never washed out."""

CONTACT_RAMP = 0.02
"""Quadratic cost per squared row of change between neighbouring work columns (see :func:`contact_rows`)."""

CONTINUITY_LAB = 8.0
"""Colour step (CIE Lab, OpenCV 8-bit units, averaged over 5 columns) between vertically neighbouring pixels
at which an upright surface is taken to end: a wall runs on below the horizon, smooth and unbroken, until
its foot (tuned by eye on real road photos)."""

CONTACT_BLUR_SHARE = 0.01
"""Sd of the Gaussian (share of the image width) that smooths log contact distance across columns: a
contact line that wavers by a row must not paint vertical bands of fog on one facade."""

CONTACT_OPENING_SHARE = 0.04
"""Width (share of the image width) of the grey opening of log contact distance across columns: a far
stretch narrower than this between nearer ones (a gap behind pedestrians, a shadow mistaken for ground)
is taken as near as its neighbours; a street running away from the camera is wider and stays."""


class Source(IntEnum):
    """Where a pixel's distance comes from."""

    MEASURED = 0
    """The data set's depth map."""
    GROUND_GIVEN = 1
    """The ground plane, on the data set's drivable-surface mask."""
    GROUND = 2
    """The ground plane, below the estimated contact line (guess)."""
    VERTICAL = 3
    """Upright scenery at the distance of its column's ground contact (guess)."""
    OBJECT = 4
    """A labelled object at its footprint distance, over its given segmentation."""
    OBJECT_ESTIMATED = 5
    """A labelled object at its footprint distance, over an estimated silhouette (guess)."""
    SKY = 6
    """Sky, found from colour and position, at :data:`FAR_LIMIT_M` (guess)."""


GUESSED = (Source.GROUND, Source.VERTICAL, Source.OBJECT_ESTIMATED, Source.SKY)
"""Sources that rest on an assumption read from the image rather than on data the user gave."""


@dataclass(frozen=True)
class DistanceMap:
    """Per-pixel distance and its source.

    Attributes
    ----------
    distance : (H, W) float64 ndarray
        Metres along the optical axis, finite, at most the far limit.
    source : (H, W) uint8 ndarray
        A :class:`Source` per pixel.
    contact_row : (W,) float64 ndarray
        Per column, the row where upright scenery meets the ground (the first ground row; ``H`` when the
        column shows no ground).
    """

    distance: np.ndarray
    source: np.ndarray
    contact_row: np.ndarray

    @property
    def guessed(self) -> np.ndarray:
        """(H, W) bool: pixels whose distance is a guess (see :data:`GUESSED`)."""
        return np.isin(self.source, [int(s) for s in GUESSED])


@dataclass(frozen=True)
class PlacedObject:
    """A labelled object for the distance map: its matte (1 inside its silhouette, soft where estimated at
    the border), its bottom row (footprint) and whether the silhouette was given (a segmentation)."""

    matte: np.ndarray
    bottom_row: float
    given: bool


def footprint_distance(
    bottom_row: float, horizon_row: float, focal_px: float, camera_height_m: float, *, far_m: float = math.inf
) -> float:
    """Distance (m) of a ground point at ``bottom_row``: ``f h_cam / (v_b - v_h)``, at most ``far_m``.

    At or above the horizon the point is at ``far_m`` (infinity by default).
    """
    depth = float(bottom_row) - horizon_row
    return min(far_m, focal_px * camera_height_m / depth) if depth > 0 else far_m


def ground_plane_distance(
    shape: tuple[int, int], *, horizon_row: float, focal_px: float, camera_height_m: float, far_m: float = FAR_LIMIT_M
) -> np.ndarray:
    """Distance of the ground plane at every pixel centre (row ``r + 0.5``), ``far_m`` at and above the horizon.

    Returns
    -------
    (H, W) float64 ndarray

    References
    ----------
    Hartley, Zisserman 2004: ``Z = f h_cam / (v - v_h)``.
    """
    if not (focal_px > 0 and camera_height_m > 0 and far_m > 0):
        raise ValueError(
            f"focal_px, camera_height_m, far_m must be > 0, got {focal_px!r}, {camera_height_m!r}, {far_m!r}"
        )
    height, width = shape
    rows = np.arange(height, dtype=np.float64) + 0.5 - horizon_row
    per_row = np.full(height, far_m)
    below = rows > 0
    per_row[below] = np.minimum(far_m, focal_px * camera_height_m / rows[below])
    return np.repeat(per_row[:, None], width, axis=1)


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


def distance_map(
    image: np.ndarray,
    *,
    horizon_row: float,
    focal_px: float,
    camera_height_m: float,
    sky: np.ndarray,
    drivable: np.ndarray | None = None,
    drivable_given: bool = False,
    objects: Sequence[PlacedObject] = (),
    depth: np.ndarray | None = None,
    far_m: float = FAR_LIMIT_M,
) -> DistanceMap:
    """The distance map of a photo: ground plane, upright scenery at its ground contact, sky, objects, depth.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    horizon_row, focal_px, camera_height_m : float
        The level pinhole camera over flat ground (horizon row top-down).
    sky : (H, W) bool ndarray
        Sky pixels (see :func:`pipeline.weather.sky.sky_mask`), set to ``far_m``.
    drivable : (H, W) bool ndarray, optional
        The drivable surface; ``drivable_given`` says whether it was given (a mask file) or estimated.
    objects : sequence of PlacedObject
        Each object takes ``min(background, footprint distance)`` over its matte (an object can only be
        farther than what the scene puts there where something nearer hides it), blended by the matte.
    depth : (H, W) float ndarray, optional
        Measured distance in metres; every pixel with a finite value > 0 takes it exactly.
    far_m : float
        Far limit (> 0).

    Returns
    -------
    DistanceMap
    """
    check_image(image)
    height, width = image.shape[:2]
    for name, mask in (("sky", sky), ("drivable", drivable), ("depth", depth)):
        if mask is not None and np.shape(mask) != (height, width):
            raise ValueError(f"{name} must be a {(height, width)} array, got {np.shape(mask)}")
    plane = ground_plane_distance(
        (height, width), horizon_row=horizon_row, focal_px=focal_px, camera_height_m=camera_height_m, far_m=far_m
    )
    hidden = np.zeros((height, width), bool)
    for obj in objects:
        hidden |= obj.matte >= 0.5
    contact = _contact_line(image, horizon_row, sky=sky, drivable=drivable, given=drivable_given, hidden=hidden)
    column = _upright_distance(contact, sky, horizon_row, focal_px, camera_height_m, far_m)
    # where the cap or the smoothing brought a column nearer, its foot moves down to the row of the ground
    # at that distance: the ground behind an upright thing is hidden, and none of it is farther than the thing
    with np.errstate(divide="ignore"):
        foot = np.floor(horizon_row + focal_px * camera_height_m / column - 0.5 + 1e-6)
    contact = np.clip(np.maximum(contact, foot), 0, height).astype(np.int64)
    rows = np.arange(height)[:, None]
    upright = rows < contact[None, :]
    distance = np.where(upright, column[None, :], plane)
    ground_source = Source.GROUND_GIVEN if drivable is not None and drivable_given else Source.GROUND
    source = np.where(upright, Source.VERTICAL, Source.GROUND).astype(np.uint8)
    if ground_source == Source.GROUND_GIVEN:
        source[~upright & drivable] = Source.GROUND_GIVEN
    distance = np.where(sky, far_m, distance)
    source[sky] = Source.SKY
    distance, source = _place_objects(distance, source, objects, horizon_row, focal_px, camera_height_m, far_m)
    if depth is not None:
        measured = np.isfinite(depth) & (depth > 0)
        distance = np.where(measured, depth, distance)
        source[measured] = Source.MEASURED
    return DistanceMap(distance.astype(np.float64), source, contact.astype(np.float64))


def _upright_distance(
    contact: np.ndarray, sky: np.ndarray, horizon_row: float, focal_px: float, camera_height_m: float, far_m: float
) -> np.ndarray:
    """Distance of each column's upright scenery: its ground contact's, capped by its height, smoothed.

    The cap: the column's scenery rises without a break of sky from its contact to its top row ``v_t``; a
    thing at most :data:`SCENERY_HEIGHT_M` tall reaching ``v_t`` stands no farther than
    ``f (H - h_cam) / (v_h - v_t)`` (Hoiem, Efros, Hebert 2006: height above the horizon). A facade filling
    the frame to its top edge is therefore near, whatever its foot's estimate says. Then a grey opening of
    :data:`CONTACT_OPENING_SHARE` and a Gaussian of :data:`CONTACT_BLUR_SHARE` of the width in log distance,
    never taking a column farther than its own contact.

    Returns
    -------
    (W,) float64 ndarray of metres
    """
    height, width = sky.shape
    foot = np.array(
        [
            footprint_distance(min(b, height - 1) + 0.5, horizon_row, focal_px, camera_height_m, far_m=far_m)
            for b in contact
        ]
    )
    rows = np.arange(height)[:, None]
    sky_above = sky & (rows < contact[None, :])
    top = np.where(sky_above.any(axis=0), height - 1 - np.argmax(sky_above[::-1], axis=0) + 1, 0)
    rise = horizon_row - top
    cap = np.where(rise > 0.5, focal_px * max(SCENERY_HEIGHT_M - camera_height_m, 1.0) / np.maximum(rise, 0.5), far_m)
    distance = np.minimum(foot, cap)
    if width == 1:
        return distance
    log_d = np.log(distance).astype(np.float32).reshape(1, -1)
    span = np.ones((1, max(1, int(round(CONTACT_OPENING_SHARE * width))) | 1), np.uint8)
    log_d = cv2.dilate(cv2.erode(log_d, span, borderType=cv2.BORDER_REPLICATE), span, borderType=cv2.BORDER_REPLICATE)
    sigma = max(0.5, CONTACT_BLUR_SHARE * width)
    smoothed = np.exp(cv2.GaussianBlur(log_d, (0, 0), sigma, borderType=cv2.BORDER_REPLICATE).ravel())
    # smoothing may only bring a column nearer: an upright thing is never behind its own foot
    return np.minimum(distance, smoothed)


def _contact_line(
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


def _place_objects(distance, source, objects, horizon_row, focal_px, camera_height_m, far_m):
    """Objects far to near, each at ``min(background, its footprint distance)`` blended by its matte."""
    depths = [footprint_distance(o.bottom_row, horizon_row, focal_px, camera_height_m, far_m=far_m) for o in objects]
    for index in np.argsort(depths)[::-1]:
        obj = objects[index]
        matte = np.clip(np.asarray(obj.matte, np.float64), 0.0, 1.0)
        if matte.shape != distance.shape:
            raise ValueError(f"objects[{index}] matte must be a {distance.shape} array, got {matte.shape}")
        nearer = np.minimum(distance, depths[index])
        distance = distance + matte * (nearer - distance)
        inside = (matte >= 0.5) & (nearer < np.inf)
        source[inside] = Source.OBJECT if obj.given else Source.OBJECT_ESTIMATED
    return distance, source
