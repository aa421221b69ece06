"""Where a ground point is: distance along the optical axis and sideways offset, from its image row.

References
----------
Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
"""

from __future__ import annotations

import numpy as np

from .model import GroundModel


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

    ``X = (u - c_x) Z / f = (u - c_x) h_cam / (v_b - v_h)`` with the principal point ``c_x`` assumed at
    the image centre; the focal length cancels, so only the camera height is needed. ``image_id`` as in
    :func:`ground_distance`.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
    """
    camera = _camera(ground, camera_height_m)
    horizon = ground.horizon_for(image_id)
    depth = np.asarray(bottom_row, dtype=np.float64) - horizon
    if not np.all(depth > 0):
        raise ValueError(f"bottom row(s) at or above the horizon row {horizon:.1f} have no ground position")
    x = (np.asarray(col, dtype=np.float64) - ground.image_width / 2) * camera / depth
    return float(x) if x.ndim == 0 else x


def _camera(ground: GroundModel, camera_height_m: float | None) -> float:
    camera = ground.camera_height_m if camera_height_m is None else camera_height_m
    if camera is None:
        raise ValueError("camera height unknown: the ground model has no estimate; pass camera_height_m")
    if not camera > 0:
        raise ValueError(f"camera_height_m must be > 0, got {camera}")
    return float(camera)
