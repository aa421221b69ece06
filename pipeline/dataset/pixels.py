"""Read an image's pixels by the pixel rule of :mod:`pipeline.dataset`, or only its upright size."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from ..errors import DatasetError

_EXIF_ORIENTATION = 0x0112
_SWAPPING_ORIENTATIONS = {5, 6, 7, 8}


def read_rgb(path: str | os.PathLike[str]) -> np.ndarray:
    """Read an image file as ``(H, W, 3) uint8`` RGB following the pixel rule of :mod:`pipeline.dataset`.

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


def upright_size(path: Path, file: Path, where: str) -> tuple[int, int]:
    """Width and height of the image after EXIF rotation, reading only the header.

    A :class:`DatasetError` names ``file`` (the COCO file) and ``where`` (its entry) and the reason.
    """
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
