"""Where across the road objects stand: a box's place as a share of the road's width at its row.

Real traffic keeps to lanes, kerbs and crossings: in the seed scenes no real tractor stands between 0.2
and 0.6 of the road's width (astride the centre line), while drawing a column uniformly over the surface
put half of the inserted ones there. The insert stage therefore draws the place across the road from the
class's real instances (:func:`real_laterals`), as it draws their heights.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np

from .dataset import Dataset, Scene
from .geometry import is_usable
from .surface import Surface

LATERAL_SD = 0.04
"""Spread of a drawn place around a real one, as a share of the road's width (a kernel density estimate
over the real places; about a sixth of a lane on a two-lane road with shoulders)."""


def road_span(mask_row: np.ndarray) -> tuple[int, int] | None:
    """The widest run of surface pixels in one mask row as ``(first, end)`` columns (end exclusive), or
    ``None`` when the row holds no surface. The widest run stands for the road; narrower ones are side
    roads, lay-bys or specks of an estimate. Ties go to the leftmost run."""
    cols = np.flatnonzero(mask_row)
    if cols.size == 0:
        return None
    breaks = np.flatnonzero(np.diff(cols) > 1)
    starts = np.concatenate([[0], breaks + 1])
    ends = np.concatenate([breaks, [cols.size - 1]])
    widest = int(np.argmax(ends - starts))
    return int(cols[starts[widest]]), int(cols[ends[widest]]) + 1


def lateral_position(box: Sequence[float], mask: np.ndarray) -> float | None:
    """A box's bottom centre as a share of the road's width at its bottom row (:func:`road_span`): 0 the
    road's left edge, 1 its right edge, beyond on the verges. ``None`` when the row has no surface."""
    x, y, w, h = (float(v) for v in box)
    row = math.ceil(y + h) - 1
    if not 0 <= row < mask.shape[0]:
        return None
    span = road_span(mask[row])
    if span is None:
        return None
    return (x + w / 2 - span[0]) / (span[1] - span[0])


def real_laterals(dataset: Dataset, category: str, surface: Callable[[Scene], Surface]) -> np.ndarray:
    """Places across the road (:func:`lateral_position`) of the class's real instances that the frame
    does not truncate (crowd regions left out: :func:`pipeline.geometry.is_usable`), in data set order."""
    category_id = dataset.category_by_name(category).id
    out = []
    for scene in dataset.scenes:
        mine = [a for a in scene.annotations if a.category_id == category_id and is_usable(a, scene)]
        if mine:
            mask = surface(scene).mask
            out += [u for u in (lateral_position(a.bbox, mask) for a in mine) if u is not None]
    return np.asarray(out, dtype=np.float64)


def draw_column(laterals: np.ndarray, span: tuple[int, int], rng: np.random.Generator) -> float:
    """A centre column on a row whose road spans ``span``: a real place of ``laterals`` plus a normal
    deviation of :data:`LATERAL_SD`, scaled to the span."""
    u = float(laterals[rng.integers(laterals.size)]) + LATERAL_SD * float(rng.standard_normal())
    return span[0] + u * (span[1] - span[0])
