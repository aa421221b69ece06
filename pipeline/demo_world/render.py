"""Rasterise a :class:`SceneSpec`: background, ground shadows, then scenery and objects back to front.

Objects and scenery are drawn in the painter's order of their near depth, so a nearer object
covers a farther one. Alongside the colour image (supersampled, anti-aliased) an owner buffer at
full resolution records which labelled object, if any, each pixel shows, and an amodal mask per
object records all the pixels it would cover on its own.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from .background import drivable_mask, render_background
from .camera import Camera
from .scene import SceneSpec
from .scenery import scenery_polygons
from .shapes import Polygon
from .vehicles import object_box, object_polygons

SCENERY_OWNER = -1
"""Owner value of pixels showing scenery; 0 is sky or ground, ``k >= 1`` is object ``k - 1``."""

_SHIFT = 4  # fixed-point bits for sub-pixel polygon vertices
_LIMIT = 1e6  # vertex coordinates are clamped so fixed-point values fit in int32


@dataclass(frozen=True)
class DrawItem:
    """One thing drawn at ``depth`` metres: ``owner`` >= 1 for labelled objects, else :data:`SCENERY_OWNER`."""

    depth: float
    owner: int
    polygons: tuple[Polygon, ...]


@dataclass(frozen=True)
class RenderedScene:
    """A rendered scene.

    Attributes
    ----------
    image : (H, W, 3) uint8 ndarray, RGB
    drivable : (H, W) bool ndarray, road and shoulders
    owner : (H, W) int16 ndarray, who each pixel shows (see :data:`SCENERY_OWNER`)
    amodal : tuple of (H, W) bool ndarrays, each object's pixels before occlusion
    boxes : tuple of (x, y, w, h), each object's projected box in continuous pixels
    visible_fraction : tuple of float, visible share of each object's amodal pixels
    """

    image: np.ndarray
    drivable: np.ndarray
    owner: np.ndarray
    amodal: tuple[np.ndarray, ...]
    boxes: tuple[tuple[float, float, float, float], ...]
    visible_fraction: tuple[float, ...]


def draw_items(spec: SceneSpec) -> list[DrawItem]:
    """Scenery and objects as draw items, farthest first (ties keep their listed order)."""
    items = [
        DrawItem(s.z_m, SCENERY_OWNER, tuple(scenery_polygons(s, spec.camera, spec.lighting))) for s in spec.scenery
    ]
    items += [
        DrawItem(o.z_m, i + 1, tuple(object_polygons(o, spec.camera, spec.lighting)))
        for i, o in enumerate(spec.objects)
    ]
    order = sorted(range(len(items)), key=lambda i: (-items[i].depth, i))
    return [items[i] for i in order]


def _fixed(points: np.ndarray, scale: int) -> np.ndarray:
    # continuous coordinate c is pixel-centre coordinate c - 0.5 in OpenCV's convention
    pts = np.clip(points * scale - 0.5, -_LIMIT, _LIMIT)
    return np.round(pts * (1 << _SHIFT)).astype(np.int32)


def fill(canvas: np.ndarray, polygons, value, *, scale: int = 1, antialias: bool = False) -> None:
    """Fill ``polygons`` (iterable of :class:`Polygon`) into ``canvas`` in place with one ``value``."""
    line = cv2.LINE_AA if antialias else cv2.LINE_8
    for poly in polygons:
        cv2.fillPoly(canvas, [_fixed(poly.points, scale)], value, lineType=line, shift=_SHIFT)


def owner_buffers(camera: Camera, items: list[DrawItem], n_objects: int) -> tuple[np.ndarray, list[np.ndarray]]:
    """The owner buffer and each object's amodal mask, both at full resolution."""
    owner = np.zeros((camera.height, camera.width), dtype=np.int16)
    amodal = [np.zeros((camera.height, camera.width), dtype=np.uint8) for _ in range(n_objects)]
    for item in items:
        fill(owner, item.polygons, item.owner)
        if item.owner > 0:
            fill(amodal[item.owner - 1], item.polygons, 1)
    return owner, [m.astype(bool) for m in amodal]


def _shadows(spec: SceneSpec, scale: int) -> np.ndarray:
    """Darkening factor ``(H*scale, W*scale) float32`` from objects and trees on the ground."""
    cam, light = spec.camera, spec.lighting
    mask = np.zeros((cam.height * scale, cam.width * scale), dtype=np.uint8)
    sunny = light.kind == "sunny"
    for obj in spec.objects:
        x0, x1, z0, z1 = obj.footprint()
        if sunny:  # the sun is high and to one side: the shadow falls away from it
            reach = 0.35 * obj.height_m
            x0, x1 = (x0 - reach, x1) if light.sun_side > 0 else (x0, x1 + reach)
        ground = np.array([[x0, z0], [x1, z0], [x1, z1], [x0, z1]])
        pts = np.c_[cam.col(ground[:, 0], ground[:, 1]), cam.row(0.0, ground[:, 1])]
        fill(mask, [Polygon(pts, (0, 0, 0))], 255, scale=scale, antialias=True)
    for item in spec.scenery:
        if item.kind != "tree" or not sunny:
            continue
        r = item.params["crown_m"] * 1.1
        t = np.linspace(0, 2 * np.pi, 20, endpoint=False)
        gx = item.params["x_m"] - light.sun_side * r * 0.8 + r * np.cos(t)
        gz = np.maximum(item.z_m + 0.6 * r * np.sin(t), 0.5)
        fill(mask, [Polygon(np.c_[cam.col(gx, gz), cam.row(0.0, gz)], (0, 0, 0))], 255, scale=scale, antialias=True)
    soft = cv2.GaussianBlur(mask.astype(np.float32) / 255.0, (0, 0), 0.5 * scale)
    strength = {"sunny": 0.5, "overcast": 0.3, "dusk": 0.3}[light.kind]
    return 1.0 - strength * soft


def render_scene(spec: SceneSpec, *, scale: int = 2) -> RenderedScene:
    """Draw ``spec``; the same spec always gives the same bytes.

    Parameters
    ----------
    spec : SceneSpec
    scale : int
        Supersampling factor for the colour image (the owner buffer and masks are full resolution).

    Returns
    -------
    RenderedScene
    """
    if scale < 1:
        raise ValueError(f"scale must be >= 1, got {scale}")
    cam = spec.camera
    # 1. background and ground shadows, supersampled
    canvas = render_background(spec, scale=scale)
    canvas *= _shadows(spec, scale)[..., None]
    canvas = np.clip(np.round(canvas), 0, 255).astype(np.uint8)
    # 2. scenery and objects back to front, anti-aliased
    items = draw_items(spec)
    for item in items:
        for poly in item.polygons:
            fill(canvas, [poly], poly.colour, scale=scale, antialias=True)
    image = cv2.resize(canvas, (cam.width, cam.height), interpolation=cv2.INTER_AREA) if scale > 1 else canvas
    # 3. labels: who owns each pixel, amodal masks and boxes
    owner, amodal = owner_buffers(cam, items, len(spec.objects))
    boxes = tuple(object_box(o, cam) for o in spec.objects)
    visible = tuple(float((owner == i + 1).sum() / max(1, m.sum())) for i, m in enumerate(amodal))
    return RenderedScene(image, drivable_mask(cam, spec.road), owner, tuple(amodal), boxes, visible)
