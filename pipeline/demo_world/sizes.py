"""Real-world sizes and looks of each demo class, sampled per instance.

Heights decide the geometry truth (box height = f H / Z), so each range names its source.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class SizeRange:
    """Uniform ranges (metres) for height, width (across) and length (along)."""

    height: tuple[float, float]
    width: tuple[float, float]
    length: tuple[float, float]


SIZES: dict[str, SizeRange] = {
    # Height: Hoiem, Efros, Hebert, "Putting Objects in Perspective", 2006, car mean 1.59 m (sd 0.21);
    # KITTI anchor 1.56 m, nuScenes anchor 1.72 m (FACTS.md). Kept above the camera height (see
    # layout.CAMERA_HEIGHT_M) so no roof is seen from above. Width and length: from memory.
    "car": SizeRange(height=(1.42, 1.72), width=(1.70, 1.90), length=(3.9, 4.7)),
    # Panel van about 2.0 m high: from memory (the task brief's value); width, length from memory.
    "van": SizeRange(height=(1.90, 2.20), width=(1.90, 2.05), length=(4.9, 5.9)),
    # Bus: nuScenes anchor mean 3.47 m (FACTS.md); width near the 2.55 m EU limit and length: from memory.
    "bus": SizeRange(height=(3.25, 3.60), width=(2.45, 2.55), length=(10.0, 12.0)),
    # Farm tractor cab roof 2.5-3.0 m: from memory (the nuScenes construction-vehicle anchor, 3.13 m,
    # is the nearest published class, FACTS.md). Width and length: from memory.
    "tractor": SizeRange(height=(2.50, 3.00), width=(2.00, 2.40), length=(3.8, 4.6)),
    # Road-works trailer, warning board top with lamps about 2.5 m: from memory; board width from memory.
    "works_trailer": SizeRange(height=(2.30, 2.70), width=(1.80, 2.20), length=(2.6, 3.4)),
}

_CAR_COLOURS = [
    (200, 200, 205), (30, 30, 35), (235, 235, 232), (150, 25, 30), (30, 60, 130), (95, 100, 108),
    (40, 85, 60), (20, 35, 75), (170, 160, 140), (210, 120, 30),
]  # fmt: skip
_VAN_COLOURS = [(238, 238, 236), (238, 238, 236), (200, 202, 206), (30, 70, 140), (180, 30, 30), (60, 60, 65)]
_BUS_COLOURS = [(235, 235, 230), (30, 120, 70), (25, 70, 150), (190, 35, 35), (235, 190, 40), (110, 40, 110)]
_TRACTOR_COLOURS = [(40, 120, 50), (200, 40, 30), (30, 80, 160), (225, 110, 20), (60, 140, 60), (200, 40, 30)]
_RIM_COLOURS = [(235, 190, 30), (200, 40, 30), (200, 200, 200), (235, 190, 30)]
_BOARDS = [((240, 240, 240), (210, 25, 30)), ((250, 205, 20), (20, 20, 20))]  # red/white, yellow/black


def sample_size(category: str, rng: np.random.Generator) -> tuple[float, float, float]:
    """``(height, width, length)`` in metres for one instance of ``category``."""
    if category not in SIZES:
        raise ValueError(f"unknown category {category!r}; known: {sorted(SIZES)}")
    size = SIZES[category]
    return tuple(float(rng.uniform(*r)) for r in (size.height, size.width, size.length))


def _pick(rng: np.random.Generator, options: list) -> Any:
    return options[int(rng.integers(len(options)))]


def sample_style(category: str, rng: np.random.Generator) -> dict[str, Any]:
    """Colours and part sizes for one instance (JSON-friendly values)."""
    glass = tuple(float(c) for c in rng.uniform([40, 50, 60], [80, 95, 110]))
    style: dict[str, Any] = {"glass": glass, "tyre": (26.0, 26.0, 28.0), "trim": (45.0, 45.0, 48.0)}
    jitter = rng.uniform(0.9, 1.08, size=3)
    if category == "car":
        style["body"] = tuple(float(min(255, c * j)) for c, j in zip(_pick(rng, _CAR_COLOURS), jitter, strict=True))
        style["hatch"] = bool(rng.random() < 0.5)
    elif category == "van":
        style["body"] = tuple(float(min(255, c * j)) for c, j in zip(_pick(rng, _VAN_COLOURS), jitter, strict=True))
    elif category == "bus":
        style["body"] = tuple(float(min(255, c * j)) for c, j in zip(_pick(rng, _BUS_COLOURS), jitter, strict=True))
        style["stripe"] = tuple(float(c) for c in _pick(rng, _BUS_COLOURS))
    elif category == "tractor":
        style["body"] = tuple(float(min(255, c * j)) for c, j in zip(_pick(rng, _TRACTOR_COLOURS), jitter, strict=True))
        style["rim"] = tuple(float(c) for c in _pick(rng, _RIM_COLOURS))
        style["roof"] = (235.0, 235.0, 232.0) if rng.random() < 0.4 else style["body"]
        style["rear_wheel_m"] = float(rng.uniform(0.72, 0.85))  # rear tyre radius, from memory
        style["front_wheel_ratio"] = float(rng.uniform(0.55, 0.68))
    elif category == "works_trailer":
        background, stripe = _BOARDS[int(rng.integers(len(_BOARDS)))]
        style["board"] = tuple(float(c) for c in background)
        style["board_stripe"] = tuple(float(c) for c in stripe)
        style["chevron"] = bool(rng.random() < 0.5)
        style["chassis"] = tuple(float(c) for c in _pick(rng, [(250, 200, 30), (235, 120, 20), (150, 150, 150)]))
        style["lamps"] = int(rng.integers(2, 4))
    return style
