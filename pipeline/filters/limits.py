"""The limits of the plausibility filters, each default with its reason; a recipe may override each."""

from __future__ import annotations

import math
from dataclasses import dataclass, fields


@dataclass(frozen=True)
class FilterLimits:
    """Limits of the plausibility filters (a recipe may override each).

    Attributes
    ----------
    scale_k_sd : float
        2.5. Largest ``|log(h / expected)|`` in units of the class's fitted spread: 2.5 sd keeps about 99%
        of real boxes (normal log heights), while a box at 0.5x or 2x is |log 2| = 0.69 away, many sd for
        the 0.05-0.15 spreads real classes show.
    min_surface_share : float
        0.8. Least share of the footprint strip on the drivable surface: a wheel may touch the verge,
        most of the object must stand on the road or shoulder.
    max_iou : float
        0.1. Largest IoU with any other object: an inserted object painted over a labelled one would erase
        pixels that the kept label still claims, so only slight overlap is allowed.
    min_gap_m : float
        1.0. Least ground-plane distance in metres between the front edges (footprints) of two objects:
        vehicles keep about a metre apart even when parked (from memory).
    max_objects : int
        12. Most objects in one image after insertion: a rural road scene rarely shows more than about a
        dozen vehicles; busier scenes would train the detector on an unlikely scene.
    max_seam_ratio : float
        2.5. Largest ratio of mean gradient magnitude on the blend-mask border to that of its surroundings
        (:func:`~pipeline.filters.seam_strength`). Measured on the 190 train and val seed scenes with the insert stage's
        masks around their 696 real objects: untouched images score a median 1.14 (99th percentile 2.35,
        0.4% above 2.5); the same masks filled hard with another scene's pixels score a median 3.4 (79%
        above 2.5), feathered with a 2.5 px Gaussian 1.4 (1% above).
    min_hash_distance : int
        6. Least Hamming distance (of 64 bits) between the pHash of a new output and every accepted one:
        re-encoded or slightly noised copies differ by 0-4 bits, unrelated scenes by about 32.
    min_present_probability : float
        0.5. Least probability the verifier (trained on real crops) gives the wanted class in a new
        object's box: at 0.5 the wanted class is more likely than all other classes and background
        together. The verifier filter itself lives in :mod:`pipeline.judge`.
    """

    scale_k_sd: float = 2.5
    min_surface_share: float = 0.8
    max_iou: float = 0.1
    min_gap_m: float = 1.0
    max_objects: int = 12
    max_seam_ratio: float = 2.5
    min_hash_distance: int = 6
    min_present_probability: float = 0.5

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
                raise ValueError(f"FilterLimits.{item.name} must be a finite number, got {value!r}")
        unit = {
            "min_surface_share": self.min_surface_share,
            "max_iou": self.max_iou,
            "min_present_probability": self.min_present_probability,
        }
        for name, value in unit.items():
            if not 0 <= value <= 1:
                raise ValueError(f"FilterLimits.{name} must be in [0, 1], got {value}")
        for name in ("scale_k_sd", "min_gap_m", "max_seam_ratio"):
            if getattr(self, name) < 0:
                raise ValueError(f"FilterLimits.{name} must be >= 0, got {getattr(self, name)}")
        if not isinstance(self.max_objects, int) or self.max_objects < 1:
            raise ValueError(f"FilterLimits.max_objects must be an integer >= 1, got {self.max_objects!r}")
        if not isinstance(self.min_hash_distance, int) or not 0 <= self.min_hash_distance <= 64:
            raise ValueError(
                f"FilterLimits.min_hash_distance must be an integer in [0, 64], got {self.min_hash_distance!r}"
            )
