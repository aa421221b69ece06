"""COCO run-length encoding of boolean masks, through pycocotools (the COCO project's reference code)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from pycocotools import mask as mask_utils


def encode(mask: np.ndarray) -> dict[str, Any]:
    """Compressed COCO RLE of an ``(H, W)`` bool mask, JSON-ready: ``{"size": [H, W], "counts": str}``."""
    rle = mask_utils.encode(np.asfortranarray(mask.astype(np.uint8)))
    return {"size": [int(v) for v in rle["size"]], "counts": rle["counts"].decode("ascii")}


def area(rle: Mapping[str, Any]) -> int:
    """Pixel count of a compressed RLE from :func:`encode` (COCO: an annotation's area is its mask's)."""
    return int(mask_utils.area({"size": list(rle["size"]), "counts": str(rle["counts"]).encode("ascii")}))
