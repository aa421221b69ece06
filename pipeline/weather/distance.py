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
from .contact import contact_line

DEFAULT_CAMERA_HEIGHT_M = 1.65
"""Camera height used when the ground model has no estimate: the KITTI car's camera (Geiger et al., CVPR
2012; from memory)."""

FAR_LIMIT_M = 1000.0
"""Distance given to the sky and the cap on every estimated distance (a design choice: beyond a kilometre
a road scene holds nothing a visibility of interest would show, t(1 km) < 5% for V < 1 km)."""

SCENERY_HEIGHT_M = 15.0
"""Height above the ground that upright roadside scenery rarely exceeds (street trees 8-15 m, houses 6-9 m;
from memory): scenery rising high above the horizon cannot be farther than such a thing reaching that
high, so tree crowns over a long street stay with the trees, not with the street's far end. Taller
buildings come out nearer than they are: clearer in fog, never washed out."""

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
    contact = contact_line(image, horizon_row, sky=sky, drivable=drivable, given=drivable_given, hidden=hidden)
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
