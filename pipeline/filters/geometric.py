"""Geometric filters: one new box against the ground model, the drivable surface and the scene's other boxes.

Boxes are COCO ``(x, y, w, h)`` in pixels from the top-left corner.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from ..geometry import GroundModel, ground_distance, lateral_offset
from ..geometry.distances import focal_length
from ..surface import footprint_share
from .limits import FilterLimits
from .verdict import Verdict


def scale(
    box: Sequence[float], category: str, ground: GroundModel, limits: FilterLimits, *, image_id: int | None = None
) -> Verdict:
    """Is the box as tall as the ground model expects for ``category`` at its bottom row?

    Value: ``|log(h / expected)| / sd`` in standard deviations, ``sd`` from
    :meth:`~pipeline.geometry.GroundModel.log_sd` (the image's own horizon when ``image_id`` names a
    fitted image); limit: ``limits.scale_k_sd``.

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006.
    """
    _, y, _, h = _box(box)
    bottom = y + h
    ground.class_ground(category)
    horizon = ground.horizon_for(image_id)
    if not bottom > horizon:
        return Verdict(
            "scale", False, None, limits.scale_k_sd,
            f"bottom row {bottom:.1f} is at or above the horizon row {horizon:.1f}: nothing stands there",
        )  # fmt: skip
    expected = ground.expected_height(category, bottom, image_id=image_id).expected
    ratio = h / expected
    sd = abs(math.log(ratio)) / max(ground.log_sd(category, bottom, image_id=image_id), 1e-6)
    passed = sd <= limits.scale_k_sd
    reason = (
        f"height {h:.1f} px is {ratio:.2f}x the expected {expected:.1f} px at row {bottom:.0f} "
        f"({sd:.1f} sd; limit {limits.scale_k_sd:g} sd)"
    )
    return Verdict("scale", passed, sd, limits.scale_k_sd, reason if passed else reason + ": implausible size")


def surface(box: Sequence[float], mask: np.ndarray, limits: FilterLimits) -> Verdict:
    """Does the box's footprint (bottom-edge strip) stand on the drivable surface?"""
    share = footprint_share(_box(box), mask)
    passed = share >= limits.min_surface_share
    reason = f"{share:.0%} of the footprint is on the drivable surface (limit {limits.min_surface_share:.0%})"
    return Verdict("surface", passed, share, limits.min_surface_share, reason if passed else reason + ": off the road")


def box_iou(box: Sequence[float], others: np.ndarray | Sequence[Sequence[float]]) -> np.ndarray:
    """IoU of one ``(x, y, w, h)`` box with each of ``others`` ((N, 4) float): (N,) float64."""
    x, y, w, h = _box(box)
    o = np.asarray(others, dtype=np.float64).reshape(-1, 4)
    ix = np.clip(np.minimum(x + w, o[:, 0] + o[:, 2]) - np.maximum(x, o[:, 0]), 0, None)
    iy = np.clip(np.minimum(y + h, o[:, 1] + o[:, 3]) - np.maximum(y, o[:, 1]), 0, None)
    inter = ix * iy
    return inter / (w * h + o[:, 2] * o[:, 3] - inter)


def overlap(box: Sequence[float], others: Sequence[Sequence[float]], limits: FilterLimits) -> Verdict:
    """Does the box overlap another object by more than ``limits.max_iou`` (largest IoU)?"""
    worst = float(box_iou(box, others).max()) if len(others) else 0.0
    passed = worst <= limits.max_iou
    reason = f"largest IoU with another object is {worst:.2f} (limit {limits.max_iou:g})"
    return Verdict("overlap", passed, worst, limits.max_iou, reason if passed else reason + ": objects overlap")


def footprint_gaps(
    box: Sequence[float],
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> np.ndarray:
    """Ground-plane distance (metres) from the box's footprint to each other box's footprint.

    A footprint is the object's front edge on the ground: the segment from ``X(x)`` to ``X(x + w)`` at
    distance ``Z(bottom row)`` (:func:`~pipeline.geometry.ground_distance`,
    :func:`~pipeline.geometry.lateral_offset`). The gap between two segments is ``hypot(dx, dz)`` with
    ``dx`` their lateral separation (0 when they overlap sideways) and ``dz`` the difference in distance.
    Object length along the road is not modelled; one object hidden right behind another is caught by
    the IoU filter instead. Other boxes whose bottom row is at or above the horizon get ``inf``.
    ``image_id`` picks the image's own horizon (:meth:`~pipeline.geometry.GroundModel.horizon_for`).

    Returns
    -------
    (N,) float64 ndarray
    """
    x, y, w, h = _box(box)
    o = np.asarray(others, dtype=np.float64).reshape(-1, 4)
    gaps = np.full(len(o), np.inf)
    if not len(o):
        return gaps
    bottoms = o[:, 1] + o[:, 3]
    ok = bottoms > ground.horizon_for(image_id) + 1e-9
    camera = {"camera_height_m": camera_height_m, "image_id": image_id}
    z0 = ground_distance(y + h, ground, focal_px=focal_px, **camera)
    left0, right0 = (lateral_offset(c, y + h, ground, **camera) for c in (x, x + w))
    if ok.any():
        z = ground_distance(bottoms[ok], ground, focal_px=focal_px, **camera)
        left = lateral_offset(o[ok, 0], bottoms[ok], ground, **camera)
        right = lateral_offset(o[ok, 0] + o[ok, 2], bottoms[ok], ground, **camera)
        dx = np.clip(np.maximum(left0, left) - np.minimum(right0, right), 0, None)
        gaps[ok] = np.hypot(dx, z - z0)
    return gaps


def gap(
    box: Sequence[float],
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    limits: FilterLimits,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> Verdict:
    """Is the box's footprint at least ``limits.min_gap_m`` metres from every other footprint?

    See :func:`footprint_gaps`. A box at or above the horizon fails (it has no ground position).
    """
    _, y, _, h = _box(box)
    if not y + h > ground.horizon_for(image_id):
        reason = "bottom row is at or above the horizon: no ground position"
        return Verdict("gap", False, None, limits.min_gap_m, reason)
    gaps = footprint_gaps(box, others, ground, focal_px=focal_px, camera_height_m=camera_height_m, image_id=image_id)
    nearest = float(gaps.min()) if len(gaps) else math.inf
    passed = nearest >= limits.min_gap_m
    shown = "no other object on the ground" if not math.isfinite(nearest) else f"nearest object is {nearest:.1f} m away"
    reason = f"{shown} (limit {limits.min_gap_m:g} m)"
    return Verdict("gap", passed, nearest, limits.min_gap_m, reason if passed else reason + ": objects too close")


def objects(count: int, limits: FilterLimits) -> Verdict:
    """Does the image hold at most ``limits.max_objects`` objects (``count`` after insertion)?"""
    if count < 0:
        raise ValueError(f"count must be >= 0, got {count}")
    passed = count <= limits.max_objects
    reason = f"{count} objects in the image (limit {limits.max_objects})"
    reason = reason if passed else reason + ": too busy"
    return Verdict("objects", passed, float(count), float(limits.max_objects), reason)


def check_geometry(
    box: Sequence[float],
    category: str,
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    surface_mask: np.ndarray,
    limits: FilterLimits,
    *,
    focal_px: float | None = None,
    camera_height_m: float | None = None,
    image_id: int | None = None,
    overlap_others: Sequence[Sequence[float]] | None = None,
) -> list[Verdict]:
    """Run the geometric filters (scale, surface, overlap, gap, objects) for one new box.

    Parameters
    ----------
    box : (x, y, w, h) floats
        The new object's box.
    category : str
        Its class name.
    others : (N, 4) floats
        Boxes of the objects already in the image.
    ground : GroundModel
    surface_mask : (H, W) bool ndarray
    limits : FilterLimits
    focal_px : float, optional
        Focal length for the gap filter; default the model's (:func:`~pipeline.geometry.distances.focal_length`:
        its calibration, else an assumed field of view).
    camera_height_m : float, optional
        Default: the model's estimate.
    image_id : int, optional
        The image's id: its own fitted horizon is used when the model has one (pitch varies per image).
    overlap_others : (M, 4) floats, optional
        The boxes the overlap filter compares with, when not all of ``others`` (see
        :func:`pipeline.judge.judge`).

    Returns
    -------
    list of Verdict
        In the order scale, surface, overlap, gap, objects.
    """
    focal = focal_length(ground) if focal_px is None else focal_px
    return [
        scale(box, category, ground, limits, image_id=image_id),
        surface(box, surface_mask, limits),
        overlap(box, others if overlap_others is None else overlap_others, limits),
        gap(box, others, ground, limits, focal_px=focal, camera_height_m=camera_height_m, image_id=image_id),
        objects(len(others) + 1, limits),
    ]


def _box(box: Sequence[float]) -> tuple[float, float, float, float]:
    if len(box) != 4:
        raise ValueError(f"a box is (x, y, w, h), got {len(box)} values")
    x, y, w, h = (float(v) for v in box)
    if not (w > 0 and h > 0) or not all(math.isfinite(v) for v in (x, y)):
        raise ValueError(f"box must have finite x, y and w, h > 0, got ({x:g}, {y:g}, {w:g}, {h:g})")
    return x, y, w, h
