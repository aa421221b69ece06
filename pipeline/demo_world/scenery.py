"""Unlabelled rural scenery drawn through the camera: trees, houses, hedges, fences and poles."""

from __future__ import annotations

import numpy as np

from .camera import Camera
from .faces import box_faces, front_face, upright_quad
from .scene import Lighting, SceneryItem
from .shapes import Polygon


def scenery_polygons(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    """Polygons of one scenery item in drawing order."""
    return _DRAWERS[item.kind](item, camera, lighting)


def _tree(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    p = item.params
    crown, height = p["crown_m"], p["height_m"]
    face = front_face(camera, lighting, x0=p["x_m"] - 2 * crown, x1=p["x_m"] + 2 * crown, z_m=item.z_m, height_m=height)
    mid = 2 * crown
    face.rect(mid - p["trunk_m"] / 2, 0.0, mid + p["trunk_m"] / 2, height - crown, (78, 62, 48))
    leaf = np.asarray(p["leaf"], dtype=np.float64)
    for ds, dv, r, k in p["blobs"]:
        lit = 1.0 + (0.18 * np.sign(ds) * lighting.sun_side if lighting.kind == "sunny" else 0.0)
        face.ellipse(
            mid + ds * crown, height - crown + dv * crown, r * crown, r * crown * p["tall"], tuple(leaf * k * lit)
        )
    return face.polygons


def _house(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    p = item.params
    wall, roof_h, width, depth = p["wall_m"], p["roof_m"], p["width_m"], p["depth_m"]
    total = wall + roof_h
    side, near = box_faces(camera, lighting, x_m=p["x_m"], z_m=item.z_m, across_m=width, along_m=depth, height_m=total)
    if side is not None:
        side.rect(0, 0, depth, wall, p["wall"])
        side.rect(0, wall, depth, wall + 0.45 * roof_h, p["roof"])
        for s in np.arange(1.2, depth - 1.0, 2.6):
            side.rect(s, 0.45 * wall, s + 0.9, 0.8 * wall, (55, 60, 70))
    near.rect(0, 0, width, wall, p["wall"])
    if p["gable"]:
        near.poly([(-0.3, wall), (width + 0.3, wall), (width / 2, total)], p["roof"])
    else:
        near.poly([(-0.3, wall), (width + 0.3, wall), (width - 1.0, total), (1.0, total)], p["roof"])
    near.rect(width * 0.72, wall, width * 0.72 + 0.6, total - 0.4, (120, 80, 70))
    for s in np.linspace(0.18, 0.82, 3) * width:
        near.rect(s - 0.5, 0.5 * wall, s + 0.5, 0.82 * wall, (235, 235, 230))
        near.rect(s - 0.4, 0.52 * wall, s + 0.4, 0.8 * wall, (55, 60, 70))
    near.rect(width / 2 - 0.5, 0.0, width / 2 + 0.5, 2.1, (90, 60, 45))
    return (side.polygons if side is not None else []) + near.polygons


def _strip(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    """A hedge or fence segment along the road from (x0, z0) to (x1, z1)."""
    p = item.params
    x0, z0, x1, z1 = p["x0"], item.z_m, p["x1"], p["z1"]
    shade = lighting.facing_side(-1 if x0 > 0 else 1)
    polygons = []
    if item.kind == "hedge":
        quad = upright_quad(camera, x0, x1, z0, z1, 1.0)
        top0, top1 = camera.row(p["h0"], z0), camera.row(p["h1"], z1)
        mid_x, mid_z = (x0 + x1) / 2, (z0 + z1) / 2
        mid = [camera.col(mid_x, mid_z), camera.row(p["hm"], mid_z)]
        pts = np.array([quad[0], quad[1], [quad[1][0], top1], mid, [quad[0][0], top0]])
        polygons.append(Polygon(pts, shade.apply(p["colour"])))
        return polygons
    wood = shade.apply((120, 98, 72))
    for v0, v1 in ((0.45, 0.55), (0.92, 1.02)):
        pts = np.array(
            [
                [camera.col(x0, z0), camera.row(v0, z0)],
                [camera.col(x1, z1), camera.row(v0, z1)],
                [camera.col(x1, z1), camera.row(v1, z1)],
                [camera.col(x0, z0), camera.row(v1, z0)],
            ]
        )
        polygons.append(Polygon(pts, wood))
    post = front_face(camera, lighting, x0=x0 - 0.06, x1=x0 + 0.06, z_m=z0, height_m=1.1)
    post.rect(0, 0, 0.12, 1.1, (105, 85, 62))
    return polygons + post.polygons


def _pole(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    p = item.params
    face = front_face(camera, lighting, x0=p["x_m"] - 0.9, x1=p["x_m"] + 0.9, z_m=item.z_m, height_m=p["height_m"])
    face.rect(0.78, 0.0, 1.02, p["height_m"], (90, 72, 55))
    face.rect(0.0, p["height_m"] - 0.7, 1.8, p["height_m"] - 0.55, (80, 65, 50))
    return face.polygons


def _marker(item: SceneryItem, camera: Camera, lighting: Lighting) -> list[Polygon]:
    """A white roadside delineator post with a black band."""
    p = item.params
    face = front_face(camera, lighting, x0=p["x_m"] - 0.06, x1=p["x_m"] + 0.06, z_m=item.z_m, height_m=1.0)
    face.rect(0.0, 0.0, 0.12, 1.0, (232, 232, 228))
    face.rect(0.0, 0.72, 0.12, 0.86, (25, 25, 25))
    return face.polygons


_DRAWERS = {"tree": _tree, "house": _house, "hedge": _strip, "fence": _strip, "pole": _pole, "marker": _marker}
SCENERY_KINDS = tuple(_DRAWERS)
