"""Write a data set back as COCO JSON, extra keys included."""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Any

from ..files import write_json_atomic
from .records import Annotation, Category, Dataset, Scene


def to_coco(dataset: Dataset, *, file_names: Mapping[int, str] | None = None) -> dict[str, Any]:
    """The COCO JSON object of ``dataset``, extra keys included. ``file_names`` overrides per image id."""
    out: dict[str, Any] = dict(dataset.extra)
    out["images"] = [image_entry(s, file_name=(file_names or {}).get(s.id, s.file_name)) for s in dataset.scenes]
    out["annotations"] = [annotation_entry(a) for a in dataset.annotations()]
    out["categories"] = [category_entry(c) for c in dataset.categories]
    return out


def image_entry(scene: Scene, *, file_name: str | None = None) -> dict[str, Any]:
    """COCO ``images`` entry of a scene."""
    entry: dict[str, Any] = {
        "id": scene.id,
        "file_name": file_name if file_name is not None else scene.file_name,
        "width": scene.width,
        "height": scene.height,
    }
    entry.update(scene.extra)
    return entry


def annotation_entry(ann: Annotation) -> dict[str, Any]:
    """COCO ``annotations`` entry."""
    entry: dict[str, Any] = {
        "id": ann.id,
        "image_id": ann.image_id,
        "category_id": ann.category_id,
        "bbox": [_plain_number(v) for v in ann.bbox],
        "area": _plain_number(ann.area),
        "iscrowd": ann.iscrowd,
    }
    if ann.segmentation is not None:
        entry["segmentation"] = ann.segmentation
    entry.update(ann.extra)
    return entry


def category_entry(category: Category) -> dict[str, Any]:
    """COCO ``categories`` entry."""
    entry: dict[str, Any] = {"id": category.id, "name": category.name}
    if category.supercategory is not None:
        entry["supercategory"] = category.supercategory
    entry.update(category.extra)
    return entry


def save_dataset(dataset: Dataset, json_path: str | os.PathLike[str], *, indent: int | None = None) -> None:
    """Write ``dataset`` as COCO JSON atomically (temp file, fsync, rename)."""
    write_json_atomic(json_path, to_coco(dataset), indent=indent)


def _plain_number(value: float) -> int | float:
    return int(value) if float(value).is_integer() else float(value)
