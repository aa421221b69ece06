"""Which labelled boxes the ground model may learn from, gathered as arrays for the fit."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..dataset import Annotation, Dataset, Scene

BORDER_PX = 1.0
"""A box within this many pixels of an image edge is truncated by the frame and is not used for fitting."""


@dataclass(frozen=True)
class Boxes:
    """Usable boxes as parallel arrays: bottom row, height (px), class index and image index."""

    bottom: np.ndarray
    height: np.ndarray
    cls: np.ndarray
    image: np.ndarray

    def subset(self, keep: np.ndarray) -> Boxes:
        """The boxes where ``keep`` ((N,) bool) is true; image indices unchanged."""
        return Boxes(self.bottom[keep], self.height[keep], self.cls[keep], self.image[keep])


def usable_boxes(dataset: Dataset) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Boxes fit for the ground model, per class name: ``(bottom_rows, heights)`` float64 arrays.

    Left out (see :func:`is_usable`): ``iscrowd`` regions and boxes within :data:`BORDER_PX` of an image
    edge (truncated by the frame, so their height or bottom row is not the object's).
    """
    names = dataset.category_names()
    rows: dict[str, tuple[list[float], list[float]]] = {name: ([], []) for name in names.values()}
    for scene in dataset.scenes:
        for ann in scene.annotations:
            if is_usable(ann, scene):
                rows[names[ann.category_id]][0].append(ann.bottom_row)
                rows[names[ann.category_id]][1].append(ann.bbox[3])
    return {name: (np.asarray(b, dtype=np.float64), np.asarray(h, dtype=np.float64)) for name, (b, h) in rows.items()}


def is_usable(ann: Annotation, scene: Scene) -> bool:
    """False for a crowd region or a box within :data:`BORDER_PX` of an edge of its image."""
    x, y, w, h = ann.bbox
    inside = BORDER_PX < x and BORDER_PX < y and x + w < scene.width - BORDER_PX and y + h < scene.height - BORDER_PX
    return inside and not ann.iscrowd


def collect_boxes(
    dataset: Dataset, names: list[str], group_of_image: Mapping[int, int]
) -> tuple[Boxes, list[int], np.ndarray]:
    """Usable boxes of the classes ``names`` in the images ``group_of_image`` names, as arrays.

    Returns the boxes, the image id of each image index, and the group index of each image index.
    """
    class_index = {c.id: names.index(c.name) for c in dataset.categories if c.name in names}
    image_ids: list[int] = []
    bottom, heights, cls, image = [], [], [], []
    for scene in dataset.scenes:
        if scene.id not in group_of_image:
            continue
        picked = [a for a in scene.annotations if a.category_id in class_index and is_usable(a, scene)]
        if not picked:
            continue
        for ann in picked:
            bottom.append(ann.bottom_row)
            heights.append(ann.bbox[3])
            cls.append(class_index[ann.category_id])
            image.append(len(image_ids))
        image_ids.append(scene.id)
    boxes = Boxes(
        bottom=np.asarray(bottom, dtype=np.float64),
        height=np.asarray(heights, dtype=np.float64),
        cls=np.asarray(cls, dtype=np.int64),
        image=np.asarray(image, dtype=np.int64),
    )
    return boxes, image_ids, np.asarray([group_of_image[i] for i in image_ids], dtype=np.int64)
