"""Per-category statistics of a data set: how rare each class is and how large its boxes are."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from statistics import median

from .dataset import Dataset

SMALL_AREA_PX = 32**2
"""Upper area of a "small" object: 32^2 px (COCO detection evaluation page, cocodataset.org)."""
MEDIUM_AREA_PX = 96**2
"""Upper area of a "medium" object: 96^2 px (same source); anything larger is "large"."""


@dataclass(frozen=True)
class CategoryStats:
    """Counts and sizes for one category. Shares are fractions of the category's instances."""

    name: str
    id: int
    images: int
    instances: int
    median_box_height: float | None
    small: float
    medium: float
    large: float
    rare: bool


def category_stats(dataset: Dataset, *, rare_below: int = 50) -> list[CategoryStats]:
    """Statistics per category, in the data set's category order.

    A category is *rare* when it has fewer than ``rare_below`` instances. Size buckets use the
    annotation's ``area`` field, as COCO evaluation does (segment area when a segmentation exists).
    ``iscrowd`` regions are not counted as instances.
    """
    if rare_below < 0:
        raise ValueError(f"rare_below must be >= 0, got {rare_below}")
    result = []
    for category in dataset.categories:
        anns = [a for a in dataset.annotations() if a.category_id == category.id and not a.iscrowd]
        n = len(anns)
        areas = [a.area for a in anns]
        result.append(
            CategoryStats(
                name=category.name,
                id=category.id,
                images=len({a.image_id for a in anns}),
                instances=n,
                median_box_height=float(median(a.bbox[3] for a in anns)) if anns else None,
                small=_share(sum(x < SMALL_AREA_PX for x in areas), n),
                medium=_share(sum(SMALL_AREA_PX <= x < MEDIUM_AREA_PX for x in areas), n),
                large=_share(sum(x >= MEDIUM_AREA_PX for x in areas), n),
                rare=n < rare_below,
            )
        )
    return result


def stats_as_dict(dataset: Dataset, stats: list[CategoryStats]) -> dict:
    """A JSON-ready summary of :func:`category_stats` with the data set's totals."""
    return {
        "images": len(dataset.scenes),
        "annotations": sum(len(s.annotations) for s in dataset.scenes),
        "categories": [asdict(s) for s in stats],
    }


def _share(count: int, total: int) -> float:
    return count / total if total else 0.0
