"""Where a ground point is: distance along the optical axis and sideways offset, from its image row.

References
----------
Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
"""

from __future__ import annotations

import math

import numpy as np

from .model import GroundModel

ASSUMED_HFOV_DEG = 60.0
"""Horizontal field of view assumed when the focal length is not given: forward vehicle cameras span
about 50-90 degrees (from memory); the focal length only scales distances along the road in the gap
filter, never the scale or surface filters."""


def focal_from_fov(width: int, *, hfov_deg: float = ASSUMED_HFOV_DEG) -> float:
    """Focal length (px) of an image ``width`` px wide with horizontal field of view ``hfov_deg``.

    ``f = (W / 2) / tan(hfov / 2)`` (pinhole; Hartley & Zisserman 2004).
    """
    if not 0 < hfov_deg < 180:
        raise ValueError(f"hfov_deg must be in (0, 180), got {hfov_deg}")
    return (width / 2) / math.tan(math.radians(hfov_deg) / 2)


def focal_length(ground: GroundModel) -> float:
    """Vertical focal length (px) of the model's camera: its calibration's ``fy``, else assumed from the
    field of view (:func:`focal_from_fov`). Box height against row does not need it (it cancels); ground
    distances do."""
    if ground.intrinsics is not None:
        return ground.intrinsics.fy
    return focal_from_fov(ground.image_width)


def ground_distance(
    bottom_row: float | np.ndarray,
    ground: GroundModel,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> float | np.ndarray:
    """Distance ``Z`` (metres, along the optical axis) of the ground point imaged at ``bottom_row``.

    ``Z = f h_cam / (v_b - v_h)``.

    Parameters
    ----------
    bottom_row : float or (N,) float ndarray
        Image row(s), top-down; must lie below the horizon.
    ground : GroundModel
    focal_px : float
        Focal length in pixels (boxes alone cannot tell it).
    camera_height_m : float, optional
        Default: the model's estimate ``ground.camera_height_m``.
    image_id : int, optional
        Use this fitted image's own horizon (:meth:`GroundModel.horizon_for`).

    Raises
    ------
    ValueError
        A row at or above the horizon, ``focal_px <= 0``, or no camera height.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
    """
    camera = _camera(ground, camera_height_m)
    if not focal_px > 0:
        raise ValueError(f"focal_px must be > 0, got {focal_px}")
    horizon = ground.horizon_for(image_id)
    depth = np.asarray(bottom_row, dtype=np.float64) - horizon
    if not np.all(depth > 0):
        raise ValueError(f"bottom row(s) at or above the horizon row {horizon:.1f} have no ground distance")
    z = focal_px * camera / depth
    return float(z) if z.ndim == 0 else z


def lateral_offset(
    col: float | np.ndarray,
    bottom_row: float | np.ndarray,
    ground: GroundModel,
    *,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> float | np.ndarray:
    """Sideways position ``X`` (metres, right positive) of the ground point at image ``(bottom_row, col)``.

    ``X = (u - c_x) Z / f_x = (u - c_x) (f_y / f_x) h_cam / (v_b - v_h)`` with the principal point ``c_x``
    from the model's calibration, else at the image centre (and ``f_x = f_y``); the focal length
    otherwise cancels, so only the camera height is needed. ``image_id`` as in :func:`ground_distance`.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
    """
    camera = _camera(ground, camera_height_m)
    horizon = ground.horizon_for(image_id)
    depth = np.asarray(bottom_row, dtype=np.float64) - horizon
    if not np.all(depth > 0):
        raise ValueError(f"bottom row(s) at or above the horizon row {horizon:.1f} have no ground position")
    centre, aspect = ground.image_width / 2, 1.0
    if ground.intrinsics is not None:
        centre, aspect = ground.intrinsics.cx, ground.intrinsics.fy / ground.intrinsics.fx
    x = (np.asarray(col, dtype=np.float64) - centre) * aspect * camera / depth
    return float(x) if x.ndim == 0 else x


def _camera(ground: GroundModel, camera_height_m: float | None) -> float:
    camera = ground.camera_height_m if camera_height_m is None else camera_height_m
    if camera is None:
        raise ValueError("camera height unknown: the ground model has no estimate; pass camera_height_m")
    if not camera > 0:
        raise ValueError(f"camera_height_m must be > 0, got {camera}")
    return float(camera)
