"""Sample a box for a new object: standing on the surface, at the right scale, apart from the others.

A candidate's footprint centre is drawn uniformly from the surface pixels low enough for the class to be
at least ``min_height_px`` tall; its height is the ground model's expectation times ``exp(spread z)`` with
``z`` a standard normal truncated to ``+-max_sd``; its width is the height times an aspect ratio drawn
from the class's boxes in the data. A candidate is kept when it lies inside the image and passes the
surface, overlap and gap filters (:mod:`pipeline.filters`); otherwise another is drawn, up to
``max_tries``, and a :class:`NoPlacement` counts the reasons.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from . import filters
from .dataset import Dataset, Scene
from .filters import FilterLimits
from .geometry import GroundModel, focal_length
from .surface import Surface


@dataclass(frozen=True)
class Placement:
    """A sampled box and the values drawn to make it.

    Attributes
    ----------
    box : (x, y, w, h) floats
        COCO box in pixels, inside the image.
    category : str
    bottom_row, centre_col : float
        The footprint point drawn (pixels).
    expected_height : float
        The ground model's height (px) at ``bottom_row``.
    height_sd : float
        The drawn deviation ``z``: height = expected * exp(log_sd * z), ``log_sd`` from
        :meth:`~pipeline.geometry.GroundModel.log_sd` (the class's spread in a fitted image).
    aspect_ratio : float
        Width / height drawn from the class's boxes.
    tries : int
        Candidates drawn until this one passed.
    """

    box: tuple[float, float, float, float]
    category: str
    bottom_row: float
    centre_col: float
    expected_height: float
    height_sd: float
    aspect_ratio: float
    tries: int


@dataclass(frozen=True)
class NoPlacement:
    """No box found. Falsy. ``failures`` counts each reason over the tries made."""

    reason: str
    failures: Mapping[str, int] = field(default_factory=dict)

    def __bool__(self) -> bool:
        return False


def aspect_ratios(dataset: Dataset) -> dict[str, np.ndarray]:
    """Width / height of every non-crowd box, per class name: ``{name: (N,) float64}`` (N may be 0)."""
    names = dataset.category_names()
    out: dict[str, list[float]] = {name: [] for name in names.values()}
    for ann in dataset.annotations():
        if not ann.iscrowd:
            out[names[ann.category_id]].append(ann.bbox[2] / ann.bbox[3])
    return {name: np.asarray(values, dtype=np.float64) for name, values in out.items()}


def sample_box(
    scene: Scene,
    category: str,
    ground: GroundModel,
    surface: Surface,
    rng: np.random.Generator | int | None,
    limits: FilterLimits,
    *,
    aspect_ratios: Mapping[str, np.ndarray],
    existing_boxes: Sequence[Sequence[float]] | None = None,
    focal_px: float | None = None,
    min_height_px: float = 12.0,
    max_sd: float = 2.0,
    max_tries: int = 200,
) -> Placement | NoPlacement:
    """Sample a plausible box for a new ``category`` object in ``scene``.

    Parameters
    ----------
    scene : Scene
    category : str
        Class name known to ``ground`` and present in ``aspect_ratios``.
    ground : GroundModel
        The model of the scene's camera (:func:`pipeline.geometry.ground_for`).
    surface : Surface
        The scene's drivable surface.
    rng : numpy Generator, int or None
    limits : FilterLimits
        Surface, IoU, gap and objects-per-image limits that the box must meet.
    aspect_ratios : mapping of str to (N,) float ndarray
        From :func:`aspect_ratios`.
    existing_boxes : (N, 4) floats, optional
        Objects already in the image; default the scene's annotation boxes.
    focal_px : float, optional
        For the gap filter; default the model's (:func:`pipeline.geometry.focal_length`).
    min_height_px : float
        Smallest box height: smaller objects are too few pixels for the generator to draw (12 px is the
        smallest object size with recognisable structure for our 64 px generator windows).
    max_sd : float
        Truncation of the drawn height deviation, in spreads; below ``limits.scale_k_sd`` so every
        sampled box passes the scale filter.
    max_tries : int

    Returns
    -------
    Placement or NoPlacement
        NoPlacement when the image is full, no surface lies low enough, or ``max_tries`` candidates failed.
    """
    # 1. check inputs
    ratios = np.asarray(aspect_ratios.get(category, ()), dtype=np.float64)
    if ratios.size == 0:
        raise ValueError(f"no boxes of class {category!r} to take aspect ratios from")
    cls = ground.class_ground(category)
    if surface.mask.shape != (scene.height, scene.width):
        size = (scene.height, scene.width)
        raise ValueError(f"surface mask shape {surface.mask.shape} differs from the scene's {size}")
    if not 0 <= max_sd <= limits.scale_k_sd:
        raise ValueError(f"max_sd must be in [0, scale_k_sd={limits.scale_k_sd}], got {max_sd}")
    if max_tries < 1 or min_height_px <= 0:
        raise ValueError(f"max_tries must be >= 1 and min_height_px > 0, got {max_tries}, {min_height_px}")
    rng = np.random.default_rng(rng)
    others = [tuple(b) for b in (existing_boxes if existing_boxes is not None else (a.bbox for a in scene.annotations))]
    if not filters.objects(len(others) + 1, limits):
        return NoPlacement(f"image already holds {len(others)} objects (limit {limits.max_objects})", {"objects": 1})
    focal = focal_length(ground) if focal_px is None else focal_px

    # 2. footprint rows where the class is tall enough (the scene's own horizon when the fit saw it)
    horizon = ground.horizon_for(scene.id)
    lowest_row = horizon + min_height_px / cls.height_ratio
    rows, cols = np.nonzero(surface.mask)
    low_enough = rows + 1.0 > lowest_row
    rows, cols = rows[low_enough], cols[low_enough]
    if rows.size == 0:
        where = f"below row {lowest_row:.0f}, where a {category} is {min_height_px:g} px tall"
        return NoPlacement(f"no drivable surface {where}", {"no_surface": 1})

    # 3. draw candidates until one passes
    failures: Counter[str] = Counter()
    for attempt in range(1, max_tries + 1):
        i = rng.integers(rows.size)
        bottom = max(float(rows[i]) + rng.random(), lowest_row)
        centre = float(cols[i]) + rng.random()
        z = _truncated_normal(rng, max_sd)
        expected = cls.height_ratio * (bottom - horizon)
        h = expected * math.exp(ground.log_sd(category, bottom, image_id=scene.id) * z)
        aspect = float(ratios[rng.integers(ratios.size)])
        w = h * aspect
        box = (centre - w / 2, bottom - h, w, h)
        if box[0] < 0 or box[1] < 0 or box[0] + w > scene.width or bottom > scene.height:
            failures["outside_image"] += 1
            continue
        failed = next(
            (
                v.name
                for v in (
                    filters.surface(box, surface.mask, limits),
                    filters.overlap(box, others, limits),
                    filters.gap(box, others, ground, limits, focal_px=focal, image_id=scene.id),
                )
                if not v
            ),
            None,
        )
        if failed is not None:
            failures[failed] += 1
            continue
        return Placement(box, category, bottom, centre, expected, z, aspect, attempt)
    summary = ", ".join(f"{name} {n}" for name, n in failures.most_common())
    return NoPlacement(f"no plausible box in {max_tries} tries ({summary})", dict(failures))


def _truncated_normal(rng: np.random.Generator, bound: float) -> float:
    if bound == 0:
        return 0.0
    while True:
        z = float(rng.standard_normal())
        if abs(z) <= bound:
            return z
