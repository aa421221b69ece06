"""Real class heights in metres: the built-in prior table, the user's overrides, and the data's own 3D labels.

A class's real height turns the fitted ratios (class height over camera height) into metres: the camera
height of each camera group, and the ratio of a class with too few boxes to fit. Where the data set's
boxes carry their own 3D height (see :data:`HEIGHT_KEYS`), that measured height is used before any prior.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..dataset import Annotation, Dataset

HOIEM = "Hoiem, Efros, Hebert, 'Putting Objects in Perspective', CVPR 2006 (height priors in the authors' code)"
NUSCENES = (
    "mean box height of the nuScenes labels (Caesar et al., 'nuScenes', CVPR 2020) as used by 3D detectors' "
    "anchor configs"
)
KITTI = "KITTI mean box height as used by 3D detectors' anchor configs (Geiger et al., CVPR 2012 data; from memory)"

PRIOR_HEIGHTS_M: Mapping[str, tuple[float, str]] = {
    # Cars differ by fleet: KITTI's labels average about 1.52-1.56 m, nuScenes' 1.72 m; Hoiem et al.'s prior
    # for street photos lies between them.
    "car": (1.59, HOIEM + ", car mean 1.59 m, sd 0.21"),
    "pedestrian": (1.70, HOIEM + ", pedestrian mean 1.70 m, sd 0.085"),
    "cyclist": (1.73, KITTI),
    "truck": (2.73, NUSCENES),
    "bus": (3.47, NUSCENES),
    "trailer": (3.82, NUSCENES),
    "construction_vehicle": (3.13, NUSCENES),
    "bicycle": (1.27, NUSCENES),
    "motorcycle": (1.44, NUSCENES),
    "traffic_cone": (1.06, NUSCENES),
    "barrier": (0.98, NUSCENES),
    "van": (2.2, "from memory: panel vans are about 1.9-2.6 m tall"),
    "tractor": (2.8, "from memory: farm tractors with a cab are about 2.5-3.1 m tall"),
    "works_trailer": (2.6, "from memory: road-works trailers with a raised warning board, about 2.3-3 m"),
}
"""Default real heights (metres) of classes, with where each value comes from. Names are matched after
lower-casing and turning spaces and hyphens into underscores."""

HEIGHT_KEYS: tuple[tuple[str, int | None, str], ...] = (
    ("height_m", None, "rarefill's own key: the object's real height in metres"),
    ("dim_hwl_m", 0, "3D size as [height, width, length] in metres, KITTI's label order"),
    ("bbox_cam3d", 4, "camera-frame 3D box [x, y, z, l, h, w, yaw] in mmdetection3d mono-3D COCO files (from memory)"),
    ("bbox_3d_cam", 4, "the same camera-frame 3D box under another spelling, [x, y, z, l, h, w, yaw]"),
)
"""Per-box keys read for an object's real height in metres, first match wins: ``(key, index or None, what)``.
A box without any of them (or with a value that is not a finite number > 0) has no measured height."""


@dataclass(frozen=True)
class MeasuredHeight:
    """A class's real height from the data's own 3D labels: geometric mean, log spread and box count."""

    metres: float
    log_sd: float
    n_boxes: int


def normalise_class_name(name: str) -> str:
    """Lower-case, spaces and hyphens to underscores: how class names are matched to prior heights."""
    return name.strip().lower().replace(" ", "_").replace("-", "_")


def prior_heights(priors: Mapping[str, float] | None = None) -> dict[str, float]:
    """The default :data:`PRIOR_HEIGHTS_M` table (metres) updated with ``priors`` (checked: finite, > 0)."""
    table = {name: metres for name, (metres, _) in PRIOR_HEIGHTS_M.items()}
    for name, metres in (priors or {}).items():
        if not isinstance(metres, (int, float)) or isinstance(metres, bool) or not 0 < metres < math.inf:
            raise ValueError(f"prior height of {name!r} must be a finite number of metres > 0, got {metres!r}")
        table[normalise_class_name(name)] = float(metres)
    return table


def box_height_m(ann: Annotation) -> float | None:
    """The real height (metres) a box's own 3D label gives under one of :data:`HEIGHT_KEYS`, else None."""
    for key, index, _ in HEIGHT_KEYS:
        value = ann.extra.get(key)
        if value is None:
            continue
        if index is not None:
            if not isinstance(value, (list, tuple)) or len(value) <= index:
                continue
            value = value[index]
        if isinstance(value, (int, float)) and not isinstance(value, bool) and 0 < value < math.inf:
            return float(value)
    return None


def measured_heights(dataset: Dataset) -> dict[str, MeasuredHeight]:
    """Per class name, the real height its non-crowd boxes' 3D labels give (classes without any are absent)."""
    names = dataset.category_names()
    found: dict[str, list[float]] = {}
    for ann in dataset.annotations():
        metres = None if ann.iscrowd else box_height_m(ann)
        if metres is not None:
            found.setdefault(names[ann.category_id], []).append(math.log(metres))
    return {
        name: MeasuredHeight(float(np.exp(np.mean(logs))), float(np.std(logs)), len(logs))
        for name, logs in found.items()
    }
