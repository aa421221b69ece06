"""Training examples drawn from a data set: object windows and background windows.

Shared by the denoiser's training (:mod:`.train`) and the verifier's (:mod:`.verifier`). Everything is
drawn from one ``rng``, so a step's batch depends only on (seed, step) and a resumed run sees the same
batches as an uninterrupted one.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..dataset import Dataset, to_coco
from ..errors import DatasetError
from .request import BACKGROUND


@dataclass(frozen=True)
class ObjectRef:
    """One labelled object: its scene (index into ``Examples.images``), box, class name and COCO
    segmentation (``None`` when the data set gives none)."""

    scene: int
    box: tuple[float, float, float, float]
    label: str
    segmentation: Any = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class Examples:
    """Pixels and boxes of a data set, loaded once.

    Attributes
    ----------
    images : tuple of (H, W, 3) uint8 ndarray
    occupied : tuple of (K, 4) float64 ndarray
        Every labelled box per image (COCO ``x, y, w, h``), whatever its class.
    objects : dict of str -> tuple of ObjectRef
        Objects per class name (crowd regions excluded).
    classes : tuple of str
        Category names in the data set's order.
    """

    images: tuple[np.ndarray, ...]
    occupied: tuple[np.ndarray, ...]
    objects: dict[str, tuple[ObjectRef, ...]]
    classes: tuple[str, ...]

    def sample_object(self, rng: np.random.Generator) -> ObjectRef:
        """A class chosen uniformly among classes with objects (so rare classes are oversampled), then
        one of its objects uniformly."""
        present = [c for c in self.classes if self.objects[c]]
        pool = self.objects[present[rng.integers(len(present))]]
        return pool[rng.integers(len(pool))]

    def sample_background_box(
        self, rng: np.random.Generator, *, margin_px: float = 2.0, tries: int = 50
    ) -> tuple[int, tuple[float, float, float, float]]:
        """A box shaped like a random real object, placed where it overlaps no labelled box.

        Returns
        -------
        (scene index, (x, y, w, h))
            The size of a random real object (scaled by 0.7-1.3), at a uniform position in a random
            image, at least ``margin_px`` from every labelled box. Falls back to the last try when no
            free place is found in ``tries`` attempts (crowded images).
        """
        refs = [r for c in self.classes for r in self.objects[c]]
        for _ in range(tries):
            scene = int(rng.integers(len(self.images)))
            ref = refs[rng.integers(len(refs))]
            height, width = self.images[scene].shape[:2]
            factor = rng.uniform(0.7, 1.3)
            w = min(max(ref.box[2] * factor, 4.0), width - 1.0)
            h = min(max(ref.box[3] * factor, 4.0), height - 1.0)
            box = (float(rng.uniform(0, width - w)), float(rng.uniform(0, height - h)), float(w), float(h))
            if not _overlaps(box, self.occupied[scene], margin_px):
                return scene, box
        return scene, box


def _overlaps(box: Sequence[float], others: np.ndarray, margin: float) -> bool:
    if len(others) == 0:
        return False
    x, y, w, h = box
    ox, oy, ow, oh = others.T
    return bool(np.any((x - margin < ox + ow) & (ox < x + w + margin) & (y - margin < oy + oh) & (oy < y + h + margin)))


def load_examples(dataset: Dataset) -> Examples:
    """Read every image of ``dataset`` and index its objects by class.

    Raises
    ------
    DatasetError
        The data set has no scenes or no non-crowd object, or an image's pixels disagree with its size.
    """
    source = dataset.source or "<dataset>"
    if not dataset.scenes:
        raise DatasetError(source, "images", "no images to train on")
    names = dataset.category_names()
    if BACKGROUND in names.values():
        raise DatasetError(source, "categories", f"a category may not be called {BACKGROUND!r} (reserved)")
    images, occupied = [], []
    objects: dict[str, list[ObjectRef]] = {c.name: [] for c in dataset.categories}
    for index, scene in enumerate(dataset.scenes):
        rgb = scene.load_rgb()
        if rgb.shape[:2] != (scene.height, scene.width):
            raise DatasetError(
                source,
                f"images[{index}]",
                f"pixels are {rgb.shape[1]}x{rgb.shape[0]}, entry says {scene.width}x{scene.height}",
            )
        images.append(rgb)
        occupied.append(np.array([a.bbox for a in scene.annotations], dtype=np.float64).reshape(-1, 4))
        for ann in scene.annotations:
            if not ann.iscrowd and ann.bbox[2] >= 2 and ann.bbox[3] >= 2:
                objects[names[ann.category_id]].append(
                    ObjectRef(index, ann.bbox, names[ann.category_id], ann.segmentation)
                )
    if not any(objects.values()):
        raise DatasetError(source, "annotations", "no usable (non-crowd, at least 2x2 px) object to train on")
    return Examples(
        images=tuple(images),
        occupied=tuple(occupied),
        objects={k: tuple(v) for k, v in objects.items()},
        classes=tuple(c.name for c in dataset.categories),
    )


def dataset_hash(dataset: Dataset) -> str:
    """sha256 of the data set's labels (canonical JSON) and of every image file's bytes, in scene order."""
    digest = hashlib.sha256()
    coco = to_coco(dataset)
    digest.update(json.dumps(coco, sort_keys=True, separators=(",", ":")).encode("utf-8"))
    for scene in dataset.scenes:
        digest.update(hashlib.sha256(scene.path.read_bytes()).digest())
    return digest.hexdigest()
