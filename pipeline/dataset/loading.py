"""Read and validate a COCO detection file into a :class:`~pipeline.dataset.Dataset`.

Every refusal is a :class:`~pipeline.errors.DatasetError` naming the file, the JSON path
(``annotations[12].bbox``) and the reason.
"""

from __future__ import annotations

import json
import math
import os
import warnings
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

from ..errors import DatasetError, DatasetWarning
from .pixels import upright_size
from .records import Annotation, Category, Dataset, Scene

BOX_TOLERANCE_PX = 1.0
"""A box may stick out of its image by this much before it is an error (rounding in other tools)."""

_IMAGE_KEYS = ("id", "file_name", "width", "height")
_ANNOTATION_KEYS = ("id", "image_id", "category_id", "bbox", "area", "iscrowd", "segmentation")
_CATEGORY_KEYS = ("id", "name", "supercategory")


def default_images_dir(json_path: str | os.PathLike[str]) -> Path:
    """The folder a COCO file's ``file_name`` entries are relative to when none is given: ``images/``
    beside the file if it exists, else the file's own folder."""
    folder = Path(json_path).parent
    return folder / "images" if (folder / "images").is_dir() else folder


def load_dataset(
    json_path: str | os.PathLike[str],
    images_dir: str | os.PathLike[str] | None = None,
    *,
    check_images: bool = True,
    clip_boxes: bool = False,
) -> Dataset:
    """Load and validate a COCO detection file.

    Parameters
    ----------
    json_path : path
        The COCO JSON file.
    images_dir : path, optional
        Folder that ``file_name`` entries are relative to. Default: ``images/`` beside the JSON file
        if it exists, else the JSON file's own folder.
    check_images : bool
        Open each image's header to check that it exists, is readable and has the stated size.
        Pixels are never read here.
    clip_boxes : bool
        Clip boxes that leave their image by more than 1 px, with a :class:`DatasetWarning` per box,
        instead of refusing the file.

    Returns
    -------
    Dataset

    Raises
    ------
    DatasetError
        Naming the file, the JSON path (``annotations[12].bbox``) and the reason.
    """
    json_path = Path(json_path)
    try:
        text = json_path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DatasetError(json_path, "", "file not found", hint="check the path to the COCO JSON file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DatasetError(json_path, "", f"cannot be read ({exc})") from None
    try:
        raw = json.loads(text)
    except json.JSONDecodeError as exc:
        reason = f"malformed JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}"
        raise DatasetError(json_path, "", reason) from None
    except RecursionError:
        raise DatasetError(json_path, "", "malformed JSON: nested too deeply") from None
    if images_dir is None:
        images_dir = default_images_dir(json_path)
    return parse_dataset(raw, Path(images_dir), source=json_path, check_images=check_images, clip_boxes=clip_boxes)


def parse_dataset(
    raw: Any,
    images_dir: Path,
    *,
    source: Path | None = None,
    check_images: bool = True,
    clip_boxes: bool = False,
) -> Dataset:
    """Validate an already decoded COCO object (see :func:`load_dataset`)."""
    file = source or Path("<memory>")
    if not isinstance(raw, dict):
        raise DatasetError(file, "", f"top level must be a JSON object, got {_type_name(raw)}")
    for key in ("images", "annotations", "categories"):
        if key not in raw:
            raise DatasetError(file, key, "required key is missing")
        if not isinstance(raw[key], list):
            raise DatasetError(file, key, f"must be a list, got {_type_name(raw[key])}")

    categories = _parse_categories(raw["categories"], file)
    images = _parse_images(raw["images"], file, images_dir, check_images)
    by_image = _parse_annotations(raw["annotations"], file, images, {c.id for c in categories}, clip_boxes)
    scenes = tuple(replace(scene, annotations=tuple(by_image[scene.id])) for scene in images.values())
    extra = {k: v for k, v in raw.items() if k not in ("images", "annotations", "categories")}
    return Dataset(scenes=scenes, categories=categories, images_dir=images_dir, source=source, extra=extra)


def _parse_categories(items: list, file: Path) -> tuple[Category, ...]:
    categories: list[Category] = []
    seen_ids: set[int] = set()
    seen_names: set[str] = set()
    for i, item in enumerate(items):
        where = f"categories[{i}]"
        entry = _require_object(item, file, where)
        cid = _require_int(entry, "id", file, where)
        name = _require_str(entry, "name", file, where)
        if cid in seen_ids:
            raise DatasetError(file, f"{where}.id", f"duplicate category id {cid}")
        if name in seen_names:
            raise DatasetError(file, f"{where}.name", f"duplicate category name {name!r}")
        supercategory = entry.get("supercategory")
        if supercategory is not None and not isinstance(supercategory, str):
            raise DatasetError(file, f"{where}.supercategory", f"must be a string, got {_type_name(supercategory)}")
        seen_ids.add(cid)
        seen_names.add(name)
        categories.append(Category(cid, name, supercategory, _extra(entry, _CATEGORY_KEYS)))
    return tuple(categories)


def _parse_images(items: list, file: Path, images_dir: Path, check_images: bool) -> dict[int, Scene]:
    root = images_dir.resolve()
    scenes: dict[int, Scene] = {}
    for i, item in enumerate(items):
        where = f"images[{i}]"
        entry = _require_object(item, file, where)
        iid = _require_int(entry, "id", file, where)
        file_name = _require_str(entry, "file_name", file, where)
        width = _require_int(entry, "width", file, where, positive=True)
        height = _require_int(entry, "height", file, where, positive=True)
        if iid in scenes:
            raise DatasetError(file, f"{where}.id", f"duplicate image id {iid}")
        path = _resolve_inside(file_name, root, file, f"{where}.file_name")
        if check_images:
            size = upright_size(path, file, f"{where}.file_name")
            if size != (width, height):
                raise DatasetError(
                    file,
                    where,
                    f"image {file_name} is {size[0]}x{size[1]} px but the entry says {width}x{height}",
                    hint="correct width/height in the JSON (they describe the image after EXIF rotation)",
                )
        scenes[iid] = Scene(iid, file_name, width, height, path, (), _extra(entry, _IMAGE_KEYS))
    return scenes


def _resolve_inside(file_name: str, root: Path, file: Path, where: str) -> Path:
    if not file_name or "\x00" in file_name:
        raise DatasetError(file, where, "must be a non-empty file name")
    if Path(file_name).is_absolute() or file_name.startswith(("/", "\\")) or ":" in Path(file_name).parts[0]:
        raise DatasetError(file, where, f"{file_name!r} is absolute; file names must be relative to the image folder")
    try:
        resolved = (root / file_name).resolve()
    except (OSError, RuntimeError) as exc:
        raise DatasetError(file, where, f"{file_name!r} cannot be resolved ({exc})") from None
    if not resolved.is_relative_to(root):
        raise DatasetError(file, where, f"{file_name!r} resolves outside the image folder {root}")
    return resolved


def _parse_annotations(
    items: list, file: Path, images: dict[int, Scene], category_ids: set[int], clip_boxes: bool
) -> dict[int, list[Annotation]]:
    by_image: dict[int, list[Annotation]] = {iid: [] for iid in images}
    seen: set[int] = set()
    for i, item in enumerate(items):
        where = f"annotations[{i}]"
        entry = _require_object(item, file, where)
        aid = _require_int(entry, "id", file, where)
        image_id = _require_int(entry, "image_id", file, where)
        category_id = _require_int(entry, "category_id", file, where)
        if aid in seen:
            raise DatasetError(file, f"{where}.id", f"duplicate annotation id {aid}")
        if image_id not in images:
            raise DatasetError(file, f"{where}.image_id", f"no image has id {image_id}")
        if category_id not in category_ids:
            raise DatasetError(file, f"{where}.category_id", f"no category has id {category_id}")
        scene = images[image_id]
        bbox = _parse_bbox(entry.get("bbox"), "bbox" in entry, scene, file, f"{where}.bbox", clip_boxes)
        area = entry.get("area", bbox[2] * bbox[3])
        if not _is_number(area) or not math.isfinite(area) or area < 0:
            raise DatasetError(file, f"{where}.area", f"must be a finite number >= 0, got {area!r}")
        iscrowd = entry.get("iscrowd", 0)
        if iscrowd not in (0, 1) or isinstance(iscrowd, bool):
            raise DatasetError(file, f"{where}.iscrowd", f"must be 0 or 1, got {iscrowd!r}")
        segmentation = entry.get("segmentation")
        if segmentation is not None and not isinstance(segmentation, (list, dict)):
            reason = f"must be a polygon list or an RLE object, got {_type_name(segmentation)}"
            raise DatasetError(file, f"{where}.segmentation", reason)
        seen.add(aid)
        extra = _extra(entry, _ANNOTATION_KEYS)
        by_image[image_id].append(
            Annotation(aid, image_id, category_id, bbox, float(area), iscrowd, segmentation, extra)
        )
    return by_image


def _parse_bbox(
    value: Any, present: bool, scene: Scene, file: Path, where: str, clip_boxes: bool
) -> tuple[float, float, float, float]:
    if not present:
        raise DatasetError(file, where, "required key is missing")
    if not isinstance(value, list) or len(value) != 4 or not all(_is_number(v) and math.isfinite(v) for v in value):
        raise DatasetError(file, where, f"must be 4 finite numbers [x, y, width, height], got {_short(value)}")
    x, y, w, h = (float(v) for v in value)
    if w <= 0 or h <= 0:
        raise DatasetError(file, where, f"width and height must be > 0, got {w:g} x {h:g}")
    tol = BOX_TOLERANCE_PX
    inside = x >= -tol and y >= -tol and x + w <= scene.width + tol and y + h <= scene.height + tol
    if inside:
        return (x, y, w, h)
    if not clip_boxes:
        raise DatasetError(
            file,
            where,
            f"box [{x:g}, {y:g}, {w:g}, {h:g}] leaves its {scene.width}x{scene.height} image by more than {tol:g} px",
            hint="fix the box, or load with clipping (--clip-boxes) to cut it to the image",
        )
    clipped = clip_box((x, y, w, h), scene.width, scene.height)
    if clipped is None:
        raise DatasetError(file, where, f"box [{x:g}, {y:g}, {w:g}, {h:g}] lies wholly outside its image")
    warnings.warn(DatasetWarning(f"{file}: {where}: box clipped to its image: {_short(list(clipped))}"), stacklevel=2)
    return clipped


def clip_box(bbox: Sequence[float], width: int, height: int) -> tuple[float, float, float, float] | None:
    """Clip an ``[x, y, w, h]`` box to a ``width`` x ``height`` image; ``None`` if nothing is left."""
    x0, y0 = max(0.0, bbox[0]), max(0.0, bbox[1])
    x1, y1 = min(float(width), bbox[0] + bbox[2]), min(float(height), bbox[1] + bbox[3])
    if x1 <= x0 or y1 <= y0:
        return None
    return (x0, y0, x1 - x0, y1 - y0)


# --------------------------------------------------------------------------------------------------
# small validators


def _require_object(item: Any, file: Path, where: str) -> dict:
    if not isinstance(item, dict):
        raise DatasetError(file, where, f"must be a JSON object, got {_type_name(item)}")
    return item


def _require_int(entry: dict, key: str, file: Path, where: str, *, positive: bool = False) -> int:
    if key not in entry:
        raise DatasetError(file, f"{where}.{key}", "required key is missing")
    value = entry[key]
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    if not isinstance(value, int) or isinstance(value, bool):
        raise DatasetError(file, f"{where}.{key}", f"must be an integer, got {_short(value)}")
    if positive and value <= 0:
        raise DatasetError(file, f"{where}.{key}", f"must be > 0, got {value}")
    return value


def _require_str(entry: dict, key: str, file: Path, where: str) -> str:
    if key not in entry:
        raise DatasetError(file, f"{where}.{key}", "required key is missing")
    value = entry[key]
    if not isinstance(value, str) or not value:
        raise DatasetError(file, f"{where}.{key}", f"must be a non-empty string, got {_short(value)}")
    return value


def _extra(entry: dict, known: Sequence[str]) -> dict[str, Any]:
    return {k: v for k, v in entry.items() if k not in known}


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _type_name(value: Any) -> str:
    names = {dict: "an object", list: "a list", str: "a string", bool: "a boolean", type(None): "null"}
    return names.get(type(value), "a number")


def _short(value: Any) -> str:
    text = json.dumps(value) if _jsonable(value) else repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _jsonable(value: Any) -> bool:
    try:
        json.dumps(value)
    except (TypeError, ValueError, RecursionError):
        return False
    return True
