"""Real class heights in metres: the built-in prior table and the user's overrides."""

from __future__ import annotations

import math
from collections.abc import Mapping

PRIOR_HEIGHTS_M: Mapping[str, tuple[float, str]] = {
    "car": (1.72, "nuScenes anchor mean height (3D detectors' anchor configs)"),
    "truck": (2.73, "nuScenes anchor mean height"),
    "bus": (3.47, "nuScenes anchor mean height"),
    "trailer": (3.82, "nuScenes anchor mean height"),
    "construction_vehicle": (3.13, "nuScenes anchor mean height"),
    "pedestrian": (1.76, "nuScenes anchor mean height"),
    "bicycle": (1.27, "nuScenes anchor mean height"),
    "motorcycle": (1.44, "nuScenes anchor mean height"),
    "van": (2.2, "from memory: panel vans are about 1.9-2.6 m tall"),
    "tractor": (2.8, "from memory: farm tractors with a cab are about 2.5-3.1 m tall"),
    "works_trailer": (2.6, "from memory: road-works trailers with a raised warning board, about 2.3-3 m"),
}
"""Default real heights (metres) of classes, with where each value comes from. Names are matched after
lower-casing and turning spaces and hyphens into underscores."""


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
