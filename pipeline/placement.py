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
from .across_road import draw_column, road_span
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
        failed = _first_failure(box, surface, others, others, ground, limits, focal, scene.id)
        if failed is not None:
            failures[failed] += 1
            continue
        return Placement(box, category, bottom, centre, expected, z, aspect, attempt)
    summary = ", ".join(f"{name} {n}" for name, n in failures.most_common())
    return NoPlacement(f"no plausible box in {max_tries} tries ({summary})", dict(failures))


def place_at_height(
    scene: Scene,
    category: str,
    height_px: float,
    aspect_ratio: float,
    ground: GroundModel,
    surface: Surface,
    rng: np.random.Generator,
    limits: FilterLimits,
    *,
    existing_boxes: Sequence[Sequence[float]],
    exact_pixels: bool = False,
    max_hidden: float = 1.0,
    laterals: np.ndarray | None = None,
    focal_px: float | None = None,
    max_tries: int = 40,
) -> Placement | NoPlacement:
    """A box of (about) ``height_px`` standing where the ground model expects an object of that height.

    The bottom edge goes to the row where ``category`` is ``height_px`` tall (``horizon + h / ratio``,
    rounded to a pixel edge; the height then follows the model exactly at that row); the centre column is
    drawn from the surface pixels of that row (with ``laterals``, around real places across the road)
    until a box passes the surface, overlap and gap filters. Drawing the height first and the row from it
    keeps the heights of placed objects those asked for, however the surface's area is spread over the
    rows (far rows hold few surface pixels, so drawing a surface pixel first would make small objects
    rare).

    Parameters
    ----------
    height_px : float
        Wanted box height.
    aspect_ratio : float
        Width / height of the box.
    existing_boxes : (N, 4) floats
        Objects already in the image.
    exact_pixels : bool
        The caller composites the new object by its exact pixels behind nearer objects and in front of
        farther ones, clipping the farther labels to what stays visible (exemplar insertion). Overlapping
        boxes are then ordinary occlusion, as in real data (a quarter of the seed scenes' objects overlap
        a neighbour by IoU > 0.1), not two labels claiming the same pixels, so the overlap filter is not
        applied; the gap filter still keeps objects physically apart.
    max_hidden : float
        Largest share of the box that the boxes of nearer objects may cover (``"occlusion"`` otherwise).
    laterals : (N,) float ndarray, optional
        Real places across the road (:func:`pipeline.across_road.real_laterals`, N >= 1); each try then
        draws the centre with :func:`pipeline.across_road.draw_column` on the row's road.
    max_tries : int
        Columns drawn before giving up.

    Returns
    -------
    Placement or NoPlacement
        ``height_sd`` is 0 (the height is the model's at the row).

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006.
    """
    if not (height_px > 0 and aspect_ratio > 0):
        raise ValueError(f"height_px and aspect_ratio must be > 0, got {height_px}, {aspect_ratio}")
    cls = ground.class_ground(category)
    others = [tuple(b) for b in existing_boxes]
    if not filters.objects(len(others) + 1, limits):
        return NoPlacement(f"image already holds {len(others)} objects (limit {limits.max_objects})", {"objects": 1})
    horizon = ground.horizon_for(scene.id)
    bottom = int(round(horizon + height_px / cls.height_ratio))
    if bottom > scene.height or bottom <= math.ceil(horizon):
        where = f"row {bottom} lies outside the image ({scene.height} rows)"
        return NoPlacement(f"a {category} {height_px:.0f} px tall stands at {where}", {"outside_image": 1})
    h = cls.height_ratio * (bottom - horizon)
    w = h * aspect_ratio
    nearer = np.asarray([b for b in others if b[1] + b[3] > bottom], dtype=np.float64).reshape(-1, 4)
    cols = np.flatnonzero(surface.mask[bottom - 1])
    cols = cols[(cols + 0.5 - w / 2 >= 0) & (cols + 0.5 + w / 2 <= scene.width)]
    if cols.size == 0:
        return NoPlacement(f"no drivable surface on row {bottom} for a {w:.0f} px wide {category}", {"no_surface": 1})
    focal = filters.focal_from_fov(ground.image_width) if focal_px is None else focal_px
    failures: Counter[str] = Counter()
    # The row holds surface (cols is not empty), so it has a road span.
    span = road_span(surface.mask[bottom - 1]) if laterals is not None and laterals.size else None
    for attempt in range(1, max_tries + 1):
        if span is None:
            centre = float(cols[rng.integers(cols.size)]) + rng.random()
        else:
            centre = draw_column(laterals, span, rng)
        box = (centre - w / 2, bottom - h, w, h)
        if box[0] < 0 or box[0] + w > scene.width:
            failures["outside_image"] += 1
            continue
        if max_hidden < 1.0 and _covered(box, nearer) > max_hidden:
            failures["occlusion"] += 1
            continue
        failed = _first_failure(box, surface, () if exact_pixels else others, others, ground, limits, focal, scene.id)
        if failed is not None:
            failures[failed] += 1
            continue
        return Placement(box, category, float(bottom), centre, h, 0.0, aspect_ratio, attempt)
    summary = ", ".join(f"{name} {n}" for name, n in failures.most_common())
    return NoPlacement(f"no plausible column on row {bottom} in {max_tries} tries ({summary})", dict(failures))


def _covered(box: Sequence[float], nearer: np.ndarray) -> float:
    """Share of ``box`` covered by the union of the ``nearer`` boxes, on a 16 x 16 grid of sample points."""
    if not len(nearer):
        return 0.0
    x, y, w, h = box
    u = x + w * (np.arange(16) + 0.5) / 16
    v = y + h * (np.arange(16) + 0.5) / 16
    cu, cv = np.meshgrid(u, v)
    inside = np.zeros(cu.shape, dtype=bool)
    for bx, by, bw, bh in nearer:
        inside |= (cu >= bx) & (cu < bx + bw) & (cv >= by) & (cv < by + bh)
    return float(inside.mean())


def _truncated_normal(rng: np.random.Generator, bound: float) -> float:
    if bound == 0:
        return 0.0
    while True:
        z = float(rng.standard_normal())
        if abs(z) <= bound:
            return z


def _first_failure(box, surface, overlapping, others, ground, limits, focal: float, image_id: int) -> str | None:
    """The name of the first placement filter ``box`` fails (surface, overlap with ``overlapping``, gap), or None."""
    for verdict in (
        filters.surface(box, surface.mask, limits),
        filters.overlap(box, overlapping, limits),
        filters.gap(box, others, ground, limits, focal_px=focal, image_id=image_id),
    ):
        if not verdict:
            return verdict.name
    return None
