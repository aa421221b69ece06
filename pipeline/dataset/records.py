"""The frozen records of a COCO detection data set; pixels are read only on request."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DatasetError
from .pixels import read_rgb


@dataclass(frozen=True)
class Category:
    """One COCO category."""

    id: int
    name: str
    supercategory: str | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Annotation:
    """One COCO object annotation; ``bbox`` is ``(x, y, w, h)`` in pixels from the top-left corner."""

    id: int
    image_id: int
    category_id: int
    bbox: tuple[float, float, float, float]
    area: float
    iscrowd: int = 0
    segmentation: Any = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def bottom_row(self) -> float:
        """Image row of the box's lower edge (where the object meets the ground)."""
        return self.bbox[1] + self.bbox[3]


@dataclass(frozen=True)
class Scene:
    """One image entry with its annotations. Pixels are read only when :meth:`load_rgb` is called."""

    id: int
    file_name: str
    width: int
    height: int
    path: Path
    annotations: tuple[Annotation, ...] = ()
    extra: Mapping[str, Any] = field(default_factory=dict)

    def load_rgb(self) -> np.ndarray:
        """Read the image as an ``(H, W, 3) uint8`` RGB array (see the pixel rule in :mod:`pipeline.dataset`)."""
        return read_rgb(self.path)


@dataclass(frozen=True)
class Dataset:
    """A validated COCO detection data set: scenes (images with their annotations) and categories."""

    scenes: tuple[Scene, ...]
    categories: tuple[Category, ...]
    images_dir: Path
    source: Path | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    def category_by_name(self, name: str) -> Category:
        """The category called ``name``; a :class:`DatasetError` lists the known names otherwise."""
        for category in self.categories:
            if category.name == name:
                return category
        known = ", ".join(c.name for c in self.categories)
        raise DatasetError(self.source or "<dataset>", "categories", f"no category named {name!r} (known: {known})")

    def category_names(self) -> dict[int, str]:
        """Map category id to name."""
        return {c.id: c.name for c in self.categories}

    def annotations(self) -> Iterable[Annotation]:
        """Every annotation of every scene, in file order of the scenes."""
        for scene in self.scenes:
            yield from scene.annotations
