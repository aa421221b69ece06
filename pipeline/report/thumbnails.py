"""Small JPEG thumbnails of accepted images with real and new boxes drawn in two colours."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import cv2
import numpy as np
from PIL import Image, UnidentifiedImageError

from ..dataset import Scene, read_rgb
from ..errors import RunError
from ..files import write_bytes_atomic
from ..writer import NEW_BOX_RGB, REAL_BOX_RGB
from .run_record import RunRecord, _is_synthetic

THUMB_WIDTH = 320
"""Width of accepted-image thumbnails in pixels (shown at up to 300 px)."""
ASSETS = "report"
"""Folder below the run folder that holds the report's plots, thumbnails and further pages."""


# --------------------------------------------------------------------------------------------------
# thumbnails


def annotated_thumbnail(
    image: np.ndarray,
    real_boxes: Sequence[Sequence[float]],
    new_boxes: Sequence[tuple[Sequence[float], str]],
    *,
    width: int = THUMB_WIDTH,
) -> np.ndarray:
    """A small copy of ``image`` with real boxes in :data:`REAL_BOX_RGB` and new ones in :data:`NEW_BOX_RGB`.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
        RGB.
    real_boxes : sequence of (x, y, w, h)
        COCO boxes in the image's pixels.
    new_boxes : sequence of ((x, y, w, h), label)
        New boxes with the class name written above each.
    width : int
        Thumbnail width; the height keeps the aspect ratio. Images narrower than this are not enlarged.

    Returns
    -------
    (h, w, 3) uint8 ndarray
        RGB.
    """
    if image.ndim != 3 or image.shape[2] != 3 or image.dtype != np.uint8:
        raise ValueError(f"image must be (H, W, 3) uint8, got {image.shape} {image.dtype}")
    if width < 1:
        raise ValueError(f"width must be >= 1, got {width}")
    scale = min(1.0, width / image.shape[1])
    size = (max(1, round(image.shape[1] * scale)), max(1, round(image.shape[0] * scale)))
    thumb = np.ascontiguousarray(cv2.resize(image, size, interpolation=cv2.INTER_AREA))

    def corners(box: Sequence[float]) -> tuple[tuple[int, int], tuple[int, int]]:
        x, y, w, h = (float(v) * scale for v in box)
        return (round(x), round(y)), (round(x + w) - 1, round(y + h) - 1)

    for box in real_boxes:
        cv2.rectangle(thumb, *corners(box), REAL_BOX_RGB, 1, cv2.LINE_8)
    for box, label in new_boxes:
        top_left, bottom_right = corners(box)
        cv2.rectangle(thumb, top_left, bottom_right, NEW_BOX_RGB, 2, cv2.LINE_8)
        (tw, th), base = cv2.getTextSize(label, cv2.FONT_HERSHEY_SIMPLEX, 0.35, 1)
        # The label sits above the box, or inside it when the box touches the top edge.
        y_text = top_left[1] - 3 if top_left[1] - th - base - 3 >= 0 else top_left[1] + th + 3
        cv2.rectangle(thumb, (top_left[0], y_text - th - 2), (top_left[0] + tw + 2, y_text + base), NEW_BOX_RGB, -1)
        cv2.putText(thumb, label, (top_left[0] + 1, y_text), cv2.FONT_HERSHEY_SIMPLEX, 0.35, (0, 0, 0), 1, cv2.LINE_AA)
    return thumb


def _thumbnail_name(scene: Scene) -> str:
    return f"{ASSETS}/thumbs/{Path(scene.file_name).with_suffix('.jpg').as_posix()}"


def _make_thumbnails(run: RunRecord) -> tuple[dict[int, tuple[str, int, int]], int]:
    """Thumbnail path (relative to the run folder) and size per labels image id; and how many were made.

    A thumbnail newer than both its image and labels.json is reused, so a second report of a large run
    is quick.
    """
    names = run.labels.category_names()
    labels_time = (run.root / "labels.json").stat().st_mtime
    out: dict[int, tuple[str, int, int]] = {}
    made = 0
    for scene in run.labels.scenes:
        relative = _thumbnail_name(scene)
        target = run.root / relative
        if target.is_file() and target.stat().st_mtime >= max(labels_time, scene.path.stat().st_mtime):
            with Image.open(target) as img:
                out[scene.id] = (relative, *img.size)
            continue
        real = [a.bbox for a in scene.annotations if not _is_synthetic(a, run.labels)]
        new = [(a.bbox, names[a.category_id]) for a in scene.annotations if _is_synthetic(a, run.labels)]
        thumb = annotated_thumbnail(read_rgb(scene.path), real, new)
        ok, data = cv2.imencode(".jpg", np.ascontiguousarray(thumb[:, :, ::-1]), [cv2.IMWRITE_JPEG_QUALITY, 88])
        if not ok:
            raise RunError(f"could not encode the thumbnail of {scene.path}")
        write_bytes_atomic(target, data.tobytes())
        out[scene.id] = (relative, thumb.shape[1], thumb.shape[0])
        made += 1
    return out, made


def _image_size(path: Path, where: str) -> tuple[int, int]:
    try:
        with Image.open(path) as img:
            return img.size
    except FileNotFoundError:
        raise RunError(f"{where}: image {path} not found") from None
    except (UnidentifiedImageError, OSError) as exc:
        raise RunError(f"{where}: image {path} cannot be read ({exc})") from None
