"""Where an object may stand: the drivable-surface mask of a scene, given as a file or estimated.

A scene names its mask in the image entry's extra key ``"drivable_mask"``: a single-channel PNG (0 and
255, or 0 and 1) of the image's size, with a path relative to the data set's image folder. Without one,
the surface is estimated from where the labelled objects of the whole data set stand (their footprints);
:func:`warn_missing_masks` says so once per data set, with the count, rather than once per image.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import cv2
import numpy as np
from PIL import Image, UnidentifiedImageError

from .dataset import Dataset, Scene
from .errors import DatasetError, DatasetWarning

MASK_KEY = "drivable_mask"
"""Image-entry extra key holding the mask path (relative to the image folder)."""

FOOTPRINT_STRIP_PX = 2
"""Height of the strip at a box's bottom edge that counts as its footprint: 2 rows so that a bottom
edge on a fractional row still covers the pixel row the object stands on."""

ESTIMATE_DILATE_PX = 5
"""Growth of an estimated surface beyond the footprints seen: objects are seen only where traffic was,
so the road reaches a little further than the labels."""


@dataclass(frozen=True)
class Surface:
    """Where objects may stand in one image.

    Attributes
    ----------
    mask : (H, W) bool ndarray
        True on the drivable surface.
    estimated : bool
        True when guessed from label footprints rather than read from a mask file.
    """

    mask: np.ndarray
    estimated: bool


def mask_for(scene: Scene, *, dataset: Dataset | None = None) -> Surface:
    """The drivable surface of ``scene``: its mask file, else an estimate (``Surface.estimated``).

    It does not warn about an estimate: a data set of thousands of images without masks would print as
    many lines; :func:`warn_missing_masks` says it once per data set.

    Parameters
    ----------
    scene : Scene
    dataset : Dataset, optional
        Gives the image folder the mask path is relative to (default: the scene image's folder) and the
        footprints an estimate is made from (default: the scene's own boxes).

    Returns
    -------
    Surface

    Raises
    ------
    DatasetError
        The mask path resolves outside the image folder, is missing or unreadable, is not a single-channel
        image of the scene's size, or holds values other than 0/255 (or 0/1); or no mask is named and there
        are no boxes to estimate one from.
    """
    name = scene.extra.get(MASK_KEY)
    where = f"images[id={scene.id}].{MASK_KEY}"
    source = (dataset.source if dataset is not None else None) or scene.path
    if name is not None:
        root = (dataset.images_dir if dataset is not None else scene.path.parent).resolve()
        return Surface(_read_mask(name, root, scene, source, where), estimated=False)
    scenes = dataset.scenes if dataset is not None else (scene,)
    mask = estimate_surface(scenes, width=scene.width, height=scene.height)
    if not mask.any():
        raise DatasetError(source, where, "no mask named and no boxes of this image size to estimate a surface from")
    return Surface(mask, estimated=True)


def surface_cache(dataset: Dataset, *, size: int = 256) -> Callable[[Scene], Surface]:
    """:func:`mask_for` of the data set's scenes, the last ``size`` of them kept in memory."""
    scenes = {s.id: s for s in dataset.scenes}

    @lru_cache(maxsize=size)
    def surface(scene_id: int) -> Surface:
        return mask_for(scenes[scene_id], dataset=dataset)

    return lambda scene: surface(scene.id)


def warn_missing_masks(dataset: Dataset) -> int:
    """Issue one :class:`DatasetWarning` if images of ``dataset`` name no drivable mask, and say what follows.

    Returns
    -------
    int
        How many images name no mask (0: no warning).
    """
    missing = sum(scene.extra.get(MASK_KEY) is None for scene in dataset.scenes)
    if missing:
        warnings.warn(
            DatasetWarning(
                f"{dataset.source}: {missing} of {len(dataset.scenes)} images name no drivable mask; their surface "
                "is estimated from where the labelled objects stand, so new objects are placed, and the surface "
                "filter judges them, only where objects were already seen. To give masks, add "
                f'"{MASK_KEY}": "FILE.png" to each image entry (a 0/255 single-channel PNG of the image\'s size, '
                "relative to the image folder)"
            ),
            stacklevel=2,
        )
    return missing


def resolve_inside(name: object, root: Path, source: object, where: str) -> Path:
    """The file an image entry's extra key names: a relative path that must stay inside ``root``.

    Raises
    ------
    DatasetError
        Not a non-empty relative file name, or resolving outside ``root`` (naming ``where``).
    """
    if not isinstance(name, str) or not name or Path(name).is_absolute():
        raise DatasetError(source, where, f"must be a relative file name, got {name!r}")
    path = (root / name).resolve()
    if not path.is_relative_to(root):
        raise DatasetError(source, where, f"{name!r} resolves outside the image folder {root}")
    return path


def _read_mask(name: object, root: Path, scene: Scene, source: object, where: str) -> np.ndarray:
    path = resolve_inside(name, root, source, where)
    try:
        with Image.open(path) as img:
            img.load()
            if img.mode not in ("1", "L", "P"):
                raise DatasetError(source, where, f"mask {name} must be single-channel, got mode {img.mode}")
            values = np.asarray(img.convert("L") if img.mode == "P" else img, dtype=np.uint8)
    except FileNotFoundError:
        raise DatasetError(source, where, f"mask file {path} not found") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise DatasetError(source, where, f"mask file {path} cannot be read ({exc})") from None
    if values.shape != (scene.height, scene.width):
        raise DatasetError(
            source,
            where,
            f"mask {name} is {values.shape[1]}x{values.shape[0]} px but the image is {scene.width}x{scene.height}",
        )
    found = set(np.unique(values).tolist())
    if not (found <= {0, 255} or found <= {0, 1}):
        shown = sorted(found)[:6]
        raise DatasetError(source, where, f"mask {name} must hold only 0 and 255 (or 0 and 1), found {shown}")
    return values > 0


def estimate_surface(
    scenes: Sequence[Scene], *, width: int, height: int, dilate_px: int = ESTIMATE_DILATE_PX
) -> np.ndarray:
    """Estimate the drivable surface from the footprints of all labelled objects in images of one size.

    The surface is the convex hull of every non-crowd box's bottom edge together with those edges
    projected to the image's bottom row (the road runs on toward the camera), grown by ``dilate_px``.

    Returns
    -------
    (height, width) bool ndarray
        All False when no scene of that size has a box.
    """
    points = []
    for scene in scenes:
        if (scene.width, scene.height) != (width, height):
            continue
        for ann in scene.annotations:
            if ann.iscrowd:
                continue
            x, y, w, h = ann.bbox
            bottom = y + h
            points += [(x, bottom), (x + w, bottom), (x, height - 1), (x + w, height - 1)]
    mask = np.zeros((height, width), dtype=np.uint8)
    if not points:
        return mask.astype(bool)
    hull = cv2.convexHull(np.round(np.asarray(points, dtype=np.float32)).astype(np.int32))
    cv2.fillConvexPoly(mask, hull, 1)
    if dilate_px > 0:
        kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * dilate_px + 1, 2 * dilate_px + 1))
        mask = cv2.dilate(mask, kernel)
    return mask.astype(bool)


def footprint_share(box: Sequence[float], mask: np.ndarray, *, strip_px: int = FOOTPRINT_STRIP_PX) -> float:
    """Share of a box's footprint (a ``strip_px`` rows strip at its bottom edge) that lies on the surface.

    Parameters
    ----------
    box : (x, y, w, h) floats
        COCO box in pixels; the part outside the image counts as off the surface.
    mask : (H, W) bool ndarray
    strip_px : int
        Rows of the strip, ending at the bottom edge.

    Returns
    -------
    float in [0, 1]
    """
    x, y, w, h = (float(v) for v in box)
    if not (w > 0 and h > 0):
        raise ValueError(f"box width and height must be > 0, got {w:g} x {h:g}")
    rows_total = mask.shape[0]
    bottom = y + h
    # Pixel columns whose centres lie inside [x, x + w); at least one column for a sliver of a box.
    c0 = math.floor(x + 0.5)
    c1 = max(math.ceil(x + w - 0.5), c0 + 1)
    r1 = math.ceil(bottom)
    r0 = min(r1 - 1, math.floor(max(y, bottom - strip_px)))
    cols_in = np.arange(max(c0, 0), min(c1, mask.shape[1]))
    rows_in = np.arange(max(r0, 0), min(r1, rows_total))
    on = int(mask[np.ix_(rows_in, cols_in)].sum()) if len(cols_in) and len(rows_in) else 0
    return on / ((c1 - c0) * (r1 - r0))
