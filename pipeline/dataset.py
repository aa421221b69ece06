"""Load, validate and save COCO detection data sets.

Conventions, stated once for the whole package:

* A COCO box is ``[x, y, w, h]`` in pixels: ``(x, y)`` is the top-left corner, ``x`` counts columns
  from the left edge and ``y`` rows from the top edge (cocodataset.org, "Data format").
* Arrays are indexed ``(row, col)``; images are ``(H, W, 3) uint8`` RGB.
* Keys that COCO does not define (provenance lives there) are kept in ``extra`` and written back
  unchanged, so a load/save round trip loses nothing.

Pixel rule: every image loads as 8-bit RGB. EXIF orientation is applied first (the JSON's width and
height must describe the upright image). Palette (P), greyscale (L) and CMYK images are converted by
Pillow's colour conversion; alpha channels (LA, RGBA, PA) are dropped, not composited; 16- and 32-bit
greyscale (I;16, I) are scaled to 8 bits by keeping the high byte of the 16-bit range.
"""

from __future__ import annotations

import json
import math
import os
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from .errors import DatasetError, DatasetWarning
from .files import write_json_atomic

BOX_TOLERANCE_PX = 1.0
"""A box may stick out of its image by this much before it is an error (rounding in other tools)."""

_IMAGE_KEYS = ("id", "file_name", "width", "height")
_ANNOTATION_KEYS = ("id", "image_id", "category_id", "bbox", "area", "iscrowd", "segmentation")
_CATEGORY_KEYS = ("id", "name", "supercategory")
_EXIF_ORIENTATION = 0x0112
_SWAPPING_ORIENTATIONS = {5, 6, 7, 8}


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
        """Read the image as an ``(H, W, 3) uint8`` RGB array (see the module's pixel rule)."""
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


# --------------------------------------------------------------------------------------------------
# pixels


def read_rgb(path: str | os.PathLike[str]) -> np.ndarray:
    """Read an image file as ``(H, W, 3) uint8`` RGB following the module's pixel rule.

    Raises
    ------
    DatasetError
        The file is missing, empty or not an image Pillow can decode.
    """
    path = Path(path)
    try:
        with Image.open(path) as img:
            img.load()
            img = ImageOps.exif_transpose(img)
            return _to_rgb_array(img)
    except FileNotFoundError:
        raise DatasetError(path, "", "image file not found") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise DatasetError(path, "", f"image cannot be read ({exc})") from None


def _to_rgb_array(img: Image.Image) -> np.ndarray:
    if img.mode in ("I;16", "I;16B", "I;16L", "I;16N", "I"):
        grey = np.asarray(img).astype(np.int64)
        grey = (np.clip(grey, 0, 65535) >> 8).astype(np.uint8)
        return np.repeat(grey[:, :, None], 3, axis=2)
    if img.mode != "RGB":
        img = img.convert("RGB")
    return np.asarray(img, dtype=np.uint8).copy()


def _upright_size(path: Path, file: Path, where: str) -> tuple[int, int]:
    """Width and height of the image after EXIF rotation, reading only the header."""
    try:
        if path.stat().st_size == 0:
            raise DatasetError(file, where, f"image file {path} is empty")
        with Image.open(path) as img:
            width, height = img.size
            orientation = _header_orientation(img)
    except FileNotFoundError:
        raise DatasetError(file, where, f"image file {path} not found") from None
    except DatasetError:
        raise
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise DatasetError(file, where, f"image file {path} cannot be read ({exc})") from None
    if orientation in _SWAPPING_ORIENTATIONS:
        width, height = height, width
    return width, height


def _header_orientation(img: Image.Image) -> int:
    # Pillow's PNG getexif() decodes the whole image to find a trailing eXIf chunk; only the header's
    # chunks are looked at here, so that validation never reads pixels.
    if img.format == "PNG":
        raw = img.info.get("exif")
        if not raw:
            return 1
        exif = Image.Exif()
        exif.load(raw)
        return exif.get(_EXIF_ORIENTATION, 1)
    return img.getexif().get(_EXIF_ORIENTATION, 1)


# --------------------------------------------------------------------------------------------------
# loading


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
            size = _upright_size(path, file, f"{where}.file_name")
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
# saving


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


def _plain_number(value: float) -> int | float:
    return int(value) if float(value).is_integer() else float(value)


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
