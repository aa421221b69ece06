"""Draw the five demo classes as shaded polygons through the camera.

Each object is a box of real size: the face nearest the camera (the end face, or the side for a
side-on vehicle) stands at depth ``z_m``, and, when the object is off to one side, its inner side
recedes in true perspective behind it. Every part lies on one of those planar faces. The tallest
part reaches the full height on the near face, so the projected box is exactly ``f H / Z`` tall with
its bottom at ``horizon + f h_cam / Z``; far parts of a side face stay inside it because every
object is taller than the camera (``H > h_cam``).

References
----------
Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole model).
"""

from __future__ import annotations

import numpy as np

from .camera import Camera
from .faces import box_faces, front_face
from .scene import Lighting, SceneObject
from .shapes import Face, Polygon


def object_faces(obj: SceneObject, camera: Camera, lighting: Lighting) -> tuple[Face | None, Face]:
    """``(side, near)``: the receding side face (or ``None``) and the face nearest the camera.

    The side face's ``s`` axis runs from the vehicle's rear to its front (for a car: from its near end);
    the near face's ``s`` axis
    runs left to right on screen (for a side-on vehicle: rear to front).
    """
    if obj.view == "side":
        x0, x1 = obj.x_m - obj.length_m / 2, obj.x_m + obj.length_m / 2
        rear, front = (x0, x1) if obj.heading > 0 else (x1, x0)
        return None, front_face(camera, lighting, x0=rear, x1=front, z_m=obj.z_m, height_m=obj.height_m)
    return box_faces(
        camera,
        lighting,
        x_m=obj.x_m,
        z_m=obj.z_m,
        across_m=obj.width_m,
        along_m=obj.length_m,
        height_m=obj.height_m,
        # a car's end face carries its roof, so its side is drawn roof-first from the near end either way
        near_end_is_rear=obj.view == "rear" or obj.category == "car",
    )


def object_box(obj: SceneObject, camera: Camera) -> tuple[float, float, float, float]:
    """The amodal COCO box ``(x, y, w, h)`` of the object's full projected extent (continuous px)."""
    side, near = object_faces(obj, camera, Lighting("overcast", 1))
    corners = near.project(np.array([[0, 0], [near.size_s, 0], [near.size_s, near.size_v], [0, near.size_v]]))
    if side is not None:
        corners = np.vstack([corners, side.project(np.array([[0, 0], [side.size_s, 0]]))])
    top = float(camera.row(obj.height_m, obj.z_m))
    bottom = float(camera.row(0.0, obj.z_m))
    x0, x1 = float(corners[:, 0].min()), float(corners[:, 0].max())
    return (x0, top, x1 - x0, bottom - top)


def object_polygons(obj: SceneObject, camera: Camera, lighting: Lighting) -> list[Polygon]:
    """Polygons of one object in drawing order (side face first, then the near face)."""
    side, near = object_faces(obj, camera, lighting)
    lamps_on = lighting.kind == "dusk"
    draw_end, draw_side = _DRAWERS[obj.category]
    if side is not None:
        draw_side(side, obj, lamps_on)
    if obj.view == "side":
        draw_side(near, obj, lamps_on)
    else:
        draw_end(near, obj, lamps_on, obj.view == "front")
    return (side.polygons if side is not None else []) + near.polygons


# --------------------------------------------------------------------------------------------------
# per-class drawings; (s, v) metres on the face, v up from the ground


def _lamp(face: Face, s0, v0, s1, v1, colour, lamps_on: bool) -> None:
    bright = tuple(min(255.0, c * 1.15 + 40) for c in colour)
    face.rect(s0, v0, s1, v1, bright if lamps_on else colour, emissive=lamps_on)


def _car_end(face: Face, obj: SceneObject, lamps_on: bool, front: bool) -> None:
    w, h, st = face.size_s, face.size_v, obj.style
    belt = 0.58 * h
    face.rect(0.1, 0.0, 0.42, 0.36, st["tyre"])
    face.rect(w - 0.42, 0.0, w - 0.1, 0.36, st["tyre"])
    face.rect(0.2, 0.06, w - 0.2, 0.3, (22, 22, 24))
    face.round_rect(0.0, 0.2, w, belt + 0.02, 0.1, st["body"])
    face.poly([(0.08, belt), (w - 0.08, belt), (w - 0.22, h), (0.22, h)], st["body"])
    inset = 0.16 if front or st["hatch"] else 0.26
    face.poly([(inset, belt + 0.04), (w - inset, belt + 0.04), (w - 0.3, h - 0.07), (0.3, h - 0.07)], st["glass"])
    face.rect(0.02, 0.2, w - 0.02, 0.34, st["trim"])
    face.rect(w / 2 - 0.26, 0.36, w / 2 + 0.26, 0.47, (232, 232, 226))
    if front:
        face.rect(0.55, belt - 0.25, w - 0.55, belt - 0.1, (35, 35, 38))
        _lamp(face, 0.06, belt - 0.24, 0.45, belt - 0.1, (225, 225, 210), lamps_on)
        _lamp(face, w - 0.45, belt - 0.24, w - 0.06, belt - 0.1, (225, 225, 210), lamps_on)
    else:
        _lamp(face, 0.04, belt - 0.2, 0.34, belt - 0.05, (190, 25, 25), lamps_on)
        _lamp(face, w - 0.34, belt - 0.2, w - 0.04, belt - 0.05, (190, 25, 25), lamps_on)


def _car_side(face: Face, obj: SceneObject, lamps_on: bool) -> None:
    length, h, st = face.size_s, face.size_v, obj.style
    belt = 0.58 * h
    face.poly([(0.0, 0.22), (length, 0.22), (length, belt - 0.1), (length - 0.2, belt), (0.0, belt)], st["body"])
    roof_front = 0.6 * length
    face.poly([(0.0, belt), (0.0, h - 0.06), (0.1, h), (roof_front, h), (0.78 * length, belt)], st["body"])
    face.poly(
        [(0.14, belt + 0.05), (0.16, h - 0.07), (roof_front - 0.05, h - 0.07), (0.76 * length - 0.12, belt + 0.05)],
        st["glass"],
    )
    face.rect(0.45 * length, belt, 0.45 * length + 0.1, h - 0.05, st["body"])
    face.rect(0.0, 0.22, length, 0.34, st["trim"])
    for cs in (0.78, length - 0.85):
        face.circle(cs, 0.33, 0.33, st["tyre"])
        face.circle(cs, 0.33, 0.18, (150, 150, 155))


def _van_end(face: Face, obj: SceneObject, lamps_on: bool, front: bool) -> None:
    w, h, st = face.size_s, face.size_v, obj.style
    face.rect(0.12, 0.0, 0.45, 0.38, st["tyre"])
    face.rect(w - 0.45, 0.0, w - 0.12, 0.38, st["tyre"])
    face.rect(0.25, 0.08, w - 0.25, 0.3, (22, 22, 24))
    face.round_rect(0.0, 0.22, w, h, 0.14, st["body"])
    face.rect(0.0, 0.22, w, 0.38, st["trim"])
    if front:
        face.poly([(0.1, 0.56 * h), (w - 0.1, 0.56 * h), (w - 0.22, 0.9 * h), (0.22, 0.9 * h)], st["glass"])
        face.rect(0.6, 0.42, w - 0.6, 0.62, (35, 35, 38))
        _lamp(face, 0.08, 0.46, 0.45, 0.6, (225, 225, 210), lamps_on)
        _lamp(face, w - 0.45, 0.46, w - 0.08, 0.6, (225, 225, 210), lamps_on)
    else:
        face.rect(0.14, 0.62 * h, w / 2 - 0.07, 0.88 * h, st["glass"])
        face.rect(w / 2 + 0.07, 0.62 * h, w - 0.14, 0.88 * h, st["glass"])
        face.rect(w / 2 - 0.015, 0.4, w / 2 + 0.015, h - 0.1, (60, 60, 62))
        face.rect(w / 2 - 0.2, 0.42, w / 2 + 0.2, 0.52, (232, 232, 226))
        _lamp(face, 0.02, 0.55, 0.12, 0.3 * h + 0.6, (190, 25, 25), lamps_on)
        _lamp(face, w - 0.12, 0.55, w - 0.02, 0.3 * h + 0.6, (190, 25, 25), lamps_on)


def _van_side(face: Face, obj: SceneObject, lamps_on: bool) -> None:
    length, h, st = face.size_s, face.size_v, obj.style
    face.poly(
        [(0.0, 0.24), (length, 0.24), (length, 0.55 * h), (length - 0.15, 0.66 * h), (length - 0.6, h), (0.0, h)],
        st["body"],
    )
    face.poly(
        [(length - 1.45, 0.62 * h), (length - 0.22, 0.62 * h), (length - 0.6, 0.93 * h), (length - 1.45, 0.93 * h)],
        st["glass"],
    )
    face.rect(length - 1.52, 0.3, length - 1.48, 0.93 * h, (70, 70, 72))
    face.rect(0.0, 0.24, length, 0.38, st["trim"])
    for cs in (0.95, length - 0.95):
        face.circle(cs, 0.36, 0.36, st["tyre"])
        face.circle(cs, 0.36, 0.2, (150, 150, 155))


def _bus_end(face: Face, obj: SceneObject, lamps_on: bool, front: bool) -> None:
    w, h, st = face.size_s, face.size_v, obj.style
    face.rect(0.15, 0.0, 0.6, 0.5, st["tyre"])
    face.rect(w - 0.6, 0.0, w - 0.15, 0.5, st["tyre"])
    face.round_rect(0.0, 0.28, w, h, 0.16, st["body"])
    face.rect(0.0, 0.22 * h, w, 0.28 * h, st["stripe"])
    face.rect(0.0, 0.28, w, 0.45, st["trim"])
    if front:
        face.rect(0.1, 0.32 * h, w - 0.1, 0.85 * h, st["glass"])
        face.rect(0.2, 0.88 * h, w - 0.2, 0.97 * h, (20, 20, 22))
        face.rect(0.4, 0.905 * h, w - 0.4, 0.945 * h, (255, 170, 40), emissive=True)
        _lamp(face, 0.1, 0.5, 0.5, 0.68, (225, 225, 210), lamps_on)
        _lamp(face, w - 0.5, 0.5, w - 0.1, 0.68, (225, 225, 210), lamps_on)
    else:
        face.rect(0.22, 0.62 * h, w - 0.22, 0.9 * h, st["glass"])
        face.rect(0.35, 0.5, w - 0.35, 0.3 * h, (45, 45, 48))
        _lamp(face, 0.04, 0.5, 0.2, 1.2, (190, 25, 25), lamps_on)
        _lamp(face, w - 0.2, 0.5, w - 0.04, 1.2, (190, 25, 25), lamps_on)


def _bus_side(face: Face, obj: SceneObject, lamps_on: bool) -> None:
    length, h, st = face.size_s, face.size_v, obj.style
    face.rect(0.0, 0.28, length, h, st["body"])
    face.rect(0.0, 0.22 * h, length, 0.28 * h, st["stripe"])
    face.rect(0.3, 0.52 * h, length - 0.2, 0.86 * h, st["glass"])
    for s in np.arange(1.6, length - 2.6, 1.45):
        face.rect(s, 0.52 * h, s + 0.12, 0.86 * h, st["body"])
    face.rect(length - 2.3, 0.35, length - 1.2, 0.86 * h, (38, 42, 48))
    face.rect(0.0, 0.28, length, 0.45, st["trim"])
    for cs in (2.8, length - 2.6):
        face.circle(cs, 0.5, 0.5, st["tyre"])
        face.circle(cs, 0.5, 0.27, (160, 160, 165))


def _tractor_end(face: Face, obj: SceneObject, lamps_on: bool, front: bool) -> None:
    w, h, st = face.size_s, face.size_v, obj.style
    radius = st["rear_wheel_m"]
    tyre_w = 0.55
    cab_glass = tuple(0.5 * g + 0.5 * c for g, c in zip(st["glass"], (150, 172, 188), strict=True))
    # rear axle housing and three-point linkage between the big rear tyres
    face.rect(tyre_w - 0.05, 0.55, w - tyre_w + 0.05, 1.15, st["body"])
    face.rect(tyre_w + 0.1, 0.3, w - tyre_w - 0.1, 0.62, (58, 58, 60))
    face.rect(w / 2 - 0.07, 0.42, w / 2 + 0.07, 0.6, (30, 30, 30))
    face.rect(tyre_w + 0.15, 0.3, tyre_w + 0.25, 0.8, (35, 35, 35))
    face.rect(w - tyre_w - 0.25, 0.3, w - tyre_w - 0.15, 0.8, (35, 35, 35))
    # cab: mostly glass in a dark frame, under a roof
    face.rect(0.42, 1.05, w - 0.42, h - 0.1, (32, 32, 34))
    face.rect(0.5, 1.2, w - 0.5, h - 0.2, cab_glass)
    face.rect(0.5, 1.2, w - 0.5, 1.32, (32, 32, 34))
    face.rect(0.32, h - 0.17, w - 0.32, h, st["roof"])
    for s0 in (0.0, w - tyre_w):
        face.round_rect(s0, 0.0, s0 + tyre_w, 2 * radius, 0.2, st["tyre"])
        for v in np.arange(0.12, 2 * radius - 0.1, 0.16):  # tread bars across the tyre
            face.rect(s0 + 0.06, v, s0 + tyre_w - 0.06, v + 0.06, (58, 58, 58))
        face.poly(
            [(s0 - 0.0, 2 * radius - 0.15), (s0 + tyre_w, 2 * radius - 0.15), (s0 + tyre_w, 2 * radius + 0.12),
             (s0 + 0.05, 2 * radius + 0.12)],
            st["body"],
        )  # fmt: skip
    _lamp(face, 0.05, 2 * radius + 0.12, 0.3, 2 * radius + 0.24, (190, 25, 25), lamps_on)
    _lamp(face, w - 0.3, 2 * radius + 0.12, w - 0.05, 2 * radius + 0.24, (190, 25, 25), lamps_on)
    face.rect(0.34, h - 0.3, 0.48, h - 0.17, (245, 150, 20), emissive=lamps_on)


def _tractor_side(face: Face, obj: SceneObject, lamps_on: bool) -> None:
    length, h, st = face.size_s, face.size_v, obj.style
    rear = st["rear_wheel_m"]
    front = rear * st["front_wheel_ratio"]
    cab0, cab1 = rear - 0.55, rear + 0.75
    face.rect(0.0, 0.55, 0.4, 0.8, (55, 55, 58))  # rear linkage
    cab_glass = tuple(0.5 * g + 0.5 * c for g, c in zip(st["glass"], (150, 172, 188), strict=True))
    face.rect(cab0, 1.0, cab1, h - 0.1, (32, 32, 34))
    face.rect(cab0 + 0.08, 1.2, cab1 - 0.08, h - 0.2, cab_glass)
    face.rect((cab0 + cab1) / 2 - 0.04, 1.2, (cab0 + cab1) / 2 + 0.04, h - 0.2, (32, 32, 34))
    face.rect(cab0 - 0.1, h - 0.16, cab1 + 0.12, h, st["roof"])
    face.rect(cab1 - 0.2, 0.5, length - 0.3, 0.95, (55, 55, 58))
    hood = min(1.55, 0.56 * h)
    face.poly([(cab1 - 0.1, 0.85), (length, 0.85), (length, hood - 0.1), (length - 0.25, hood), (cab1 - 0.1, hood)],
              st["body"])  # fmt: skip
    face.rect(length - 0.07, 0.9, length, hood - 0.12, (30, 30, 32))
    face.rect(cab1 + 0.2, hood, cab1 + 0.28, h - 0.45, (35, 35, 35))
    face.circle(length - front - 0.08, front, front, st["tyre"])
    face.circle(length - front - 0.08, front, 0.55 * front, st["rim"])
    face.circle(rear, rear, rear, st["tyre"])
    face.circle(rear, rear, 0.58 * rear, st["rim"])
    face.circle(rear, rear, 0.18 * rear, (40, 40, 40))
    # the mudguard arc stops short of the rear so it stays inside the box (s >= 0)
    face.arc_band(rear, rear, rear + 0.01, rear + 0.1, 0.55, np.pi - 0.55, st["body"])
    _lamp(face, 0.0, 1.0, 0.1, 1.15, (190, 25, 25), lamps_on)


def _trailer_end(face: Face, obj: SceneObject, lamps_on: bool, front: bool) -> None:
    w, h, st = face.size_s, face.size_v, obj.style
    board_top = h - 0.3
    face.rect(0.05, 0.0, 0.32, 0.52, st["tyre"])
    face.rect(w - 0.32, 0.0, w - 0.05, 0.52, st["tyre"])
    face.rect(0.15, 0.28, w - 0.15, 0.62, st["chassis"])
    face.rect(0.3, 0.6, 0.42, 0.95, (90, 90, 92))
    face.rect(w - 0.42, 0.6, w - 0.3, 0.95, (90, 90, 92))
    face.rect(0.0, 0.9, w, board_top, (30, 30, 30))
    face.rect(0.04, 0.94, w - 0.04, board_top - 0.04, st["board"])
    face.stripes(0.04, 0.94, w - 0.04, board_top - 0.04, width=0.17, slope=1.0, colour=st["board_stripe"],
                 chevron=st["chevron"])  # fmt: skip
    lamp_r = 0.14
    for s in np.linspace(0.22, w - 0.22, st["lamps"]):
        face.rect(s - 0.03, board_top - 0.02, s + 0.03, h - lamp_r, (40, 40, 40))
        face.circle(s, h - lamp_r, lamp_r, (255, 185, 30), emissive=lamps_on)


def _trailer_side(face: Face, obj: SceneObject, lamps_on: bool) -> None:
    length, h, st = face.size_s, face.size_v, obj.style
    face.rect(0.0, 0.9, 0.08, h - 0.3, (30, 30, 30))
    face.rect(0.0, 0.28, 1.9, 0.62, st["chassis"])
    face.rect(0.05, 0.6, 0.15, 0.95, (90, 90, 92))
    face.poly([(1.85, 0.36), (length, 0.44), (length, 0.52), (1.85, 0.56)], (60, 60, 62))
    face.circle(1.0, 0.26, 0.26, st["tyre"])
    face.circle(1.0, 0.26, 0.13, (150, 150, 150))


_DRAWERS = {
    "car": (_car_end, _car_side),
    "van": (_van_end, _van_side),
    "bus": (_bus_end, _bus_side),
    "tractor": (_tractor_end, _tractor_side),
    "works_trailer": (_trailer_end, _trailer_side),
}
