"""The planar faces of an axis-aligned box standing on the ground, as the camera sees them."""

from __future__ import annotations

import numpy as np

from .camera import Camera
from .scene import Lighting
from .shapes import Face

_MIN_SIDE_PX = 0.75  # a side narrower than this on screen is not drawn


def upright_quad(camera: Camera, xa: float, xb: float, za: float, zb: float, height: float) -> np.ndarray:
    """Image corners (4, 2) of a vertical rectangle from ground point (xa, za) to (xb, zb), ``height`` tall.

    Corner order: (a, ground), (b, ground), (b, top), (a, top), matching :class:`Face`.
    """
    return np.array(
        [
            [camera.col(xa, za), camera.row(0.0, za)],
            [camera.col(xb, zb), camera.row(0.0, zb)],
            [camera.col(xb, zb), camera.row(height, zb)],
            [camera.col(xa, za), camera.row(height, za)],
        ],
        dtype=np.float64,
    )


def box_faces(
    camera: Camera,
    lighting: Lighting,
    *,
    x_m: float,
    z_m: float,
    across_m: float,
    along_m: float,
    height_m: float,
    near_end_is_rear: bool = True,
) -> tuple[Face | None, Face]:
    """``(side, near)`` faces of a box whose near face (``across_m`` wide) stands at depth ``z_m``.

    The near face's ``s`` runs left to right on screen. The side face, visible when the box lies
    wholly to one side of the camera, runs ``along_m`` metres back; its ``s`` runs from the box's
    rear to its front, where the rear is the near end when ``near_end_is_rear``.
    """
    x0, x1 = x_m - across_m / 2, x_m + across_m / 2
    near = Face(upright_quad(camera, x0, x1, z_m, z_m, height_m), across_m, height_m, lighting.facing_camera())
    if x0 > 0:
        x_side, normal = x0, -1
    elif x1 < 0:
        x_side, normal = x1, 1
    else:
        return None, near
    z_far = z_m + along_m
    if abs(float(camera.col(x_side, z_m) - camera.col(x_side, z_far))) < _MIN_SIDE_PX:
        return None, near
    z_rear, z_front = (z_m, z_far) if near_end_is_rear else (z_far, z_m)
    quad = upright_quad(camera, x_side, x_side, z_rear, z_front, height_m)
    return Face(quad, along_m, height_m, lighting.facing_side(normal)), near


def front_face(camera: Camera, lighting: Lighting, *, x0: float, x1: float, z_m: float, height_m: float) -> Face:
    """A vertical face parallel to the image plane from ``x0`` (s = 0) to ``x1`` at depth ``z_m``."""
    return Face(upright_quad(camera, x0, x1, z_m, z_m, height_m), abs(x1 - x0), height_m, lighting.facing_camera())
