"""The description of one demo scene: camera, light, road, scenery and objects (plain frozen data).

A :class:`SceneSpec` fixes every pixel: :func:`pipeline.demo_world.render.render_scene` draws it with
no randomness of its own beyond ``texture_seed``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .camera import Camera
from .shapes import Shade

CATEGORIES: tuple[str, ...] = ("car", "van", "bus", "tractor", "works_trailer")
"""Category names; COCO ids are their position + 1 (1 car ... 5 works_trailer)."""

RARE: tuple[str, ...] = ("tractor", "works_trailer")
VIEWS = ("rear", "front", "side")
LIGHTING_KINDS = ("sunny", "overcast", "dusk")


@dataclass(frozen=True)
class Lighting:
    """Scene light: ``kind`` in :data:`LIGHTING_KINDS`; ``sun_side`` -1 (sun on the left) or +1."""

    kind: str
    sun_side: int

    def __post_init__(self) -> None:
        if self.kind not in LIGHTING_KINDS:
            raise ValueError(f"lighting kind must be one of {LIGHTING_KINDS}, got {self.kind!r}")
        if self.sun_side not in (-1, 1):
            raise ValueError(f"sun_side must be -1 or 1, got {self.sun_side}")

    @property
    def tint(self) -> tuple[float, float, float]:
        return {"sunny": (1.0, 1.0, 1.0), "overcast": (0.95, 0.97, 1.0), "dusk": (1.0, 0.82, 0.72)}[self.kind]

    @property
    def ambient(self) -> float:
        return {"sunny": 1.0, "overcast": 0.82, "dusk": 0.55}[self.kind]

    def facing_camera(self) -> Shade:
        """Shade of a face whose normal points at the camera."""
        return Shade(self.ambient * (0.92 if self.kind == "sunny" else 1.0), self.tint)

    def facing_side(self, normal_x: int) -> Shade:
        """Shade of a face whose normal points along ``normal_x`` (-1 left, +1 right)."""
        if self.kind == "sunny":
            return Shade(1.05 if normal_x == self.sun_side else 0.62, self.tint)
        return Shade(self.ambient * 0.85, self.tint)


@dataclass(frozen=True)
class Road:
    """A two-lane road with shoulders; the camera car drives in the right lane.

    The road's centre line lies at ``X = offset_m + curvature / 2 * Z**2`` (a gentle parabolic bend).
    """

    offset_m: float
    curvature: float
    lane_width_m: float
    shoulder_left_m: float
    shoulder_right_m: float
    centre_line: bool
    asphalt: tuple[float, float, float]
    shoulder: tuple[float, float, float]

    def centre_x(self, z_m: np.ndarray | float) -> np.ndarray:
        return self.offset_m + 0.5 * self.curvature * np.asarray(z_m, dtype=np.float64) ** 2

    def lane_centre_x(self, z_m: float, lane: int) -> float:
        """Centre of lane ``+1`` (right, ours) or ``-1`` (left, oncoming) at depth ``z_m``."""
        return float(self.centre_x(z_m)) + lane * self.lane_width_m / 2

    def shoulder_centre_x(self, z_m: float, side: int) -> float:
        width = self.shoulder_right_m if side > 0 else self.shoulder_left_m
        return float(self.centre_x(z_m)) + side * (self.lane_width_m + width / 2)

    def edge_x(self, z_m: np.ndarray | float, side: int) -> np.ndarray:
        """Outer edge of the drivable surface (lanes + shoulder) on ``side`` (-1 left, +1 right)."""
        width = self.shoulder_right_m if side > 0 else self.shoulder_left_m
        return self.centre_x(z_m) + side * (self.lane_width_m + width)


@dataclass(frozen=True)
class SceneObject:
    """A labelled object standing on the ground.

    ``x_m`` is the lateral centre, ``z_m`` the depth of the face nearest the camera (the end face for
    ``view`` "rear"/"front", the side for "side"). ``width_m`` is across the vehicle, ``length_m``
    along it. ``heading`` (+1/-1) says which way a side-on vehicle's front points. ``style`` holds the
    class's colours and part sizes.
    """

    category: str
    x_m: float
    z_m: float
    height_m: float
    width_m: float
    length_m: float
    view: str
    heading: int = 1
    style: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.category not in CATEGORIES:
            raise ValueError(f"category must be one of {CATEGORIES}, got {self.category!r}")
        if self.view not in VIEWS:
            raise ValueError(f"view must be one of {VIEWS}, got {self.view!r}")
        if min(self.z_m, self.height_m, self.width_m, self.length_m) <= 0:
            raise ValueError(f"z_m and sizes must be > 0, got {self}")

    def footprint(self) -> tuple[float, float, float, float]:
        """Ground rectangle ``(x0, x1, z0, z1)`` in metres."""
        across, along = (self.length_m, self.width_m) if self.view == "side" else (self.width_m, self.length_m)
        return (self.x_m - across / 2, self.x_m + across / 2, self.z_m, self.z_m + along)

    @property
    def face_width_m(self) -> float:
        """Width of the face nearest the camera."""
        return self.length_m if self.view == "side" else self.width_m


@dataclass(frozen=True)
class SceneryItem:
    """Unlabelled scenery (tree, house, hedge or fence segment, pole) drawn at depth ``z_m``."""

    kind: str
    z_m: float
    params: Mapping[str, Any]


@dataclass(frozen=True)
class SceneSpec:
    """Everything that decides one rendered image."""

    camera: Camera
    lighting: Lighting
    road: Road
    fields: Mapping[str, Any]
    scenery: tuple[SceneryItem, ...]
    objects: tuple[SceneObject, ...]
    texture_seed: int
