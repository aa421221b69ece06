"""Shared fixtures: a tiny, valid COCO data set written to a temporary folder."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

REPO = Path(__file__).resolve().parents[1]
SEED_SCENES = REPO / "seed_scenes"


def write_png(path: Path, width: int, height: int, *, mode: str = "RGB", seed: int = 0) -> None:
    rng = np.random.default_rng(seed)
    path.parent.mkdir(parents=True, exist_ok=True)
    pixels = rng.integers(0, 256, size=(height, width, 3), dtype=np.uint8)
    Image.fromarray(pixels).convert(mode).save(path)


def tiny_coco() -> dict:
    """Two 40x30 images, two categories, three boxes: the smallest data set that exercises every field."""
    return {
        "info": {"description": "tiny test set"},
        "images": [
            {"id": 1, "file_name": "a.png", "width": 40, "height": 30, "note": "kept"},
            {"id": 2, "file_name": "sub/b.png", "width": 40, "height": 30},
        ],
        "annotations": [
            {"id": 10, "image_id": 1, "category_id": 1, "bbox": [2, 3, 10, 12], "area": 120, "iscrowd": 0},
            {
                "id": 11,
                "image_id": 1,
                "category_id": 2,
                "bbox": [20.5, 4, 8, 6],
                "area": 30,
                "iscrowd": 0,
                "segmentation": [[20.5, 4, 28.5, 4, 28.5, 10, 20.5, 10]],
                "provenance": {"synthetic": True, "stage": "insert"},
            },
            {
                "id": 12,
                "image_id": 2,
                "category_id": 2,
                "bbox": [0, 0, 40, 30],
                "area": 1200,
                "iscrowd": 1,
                "segmentation": {"size": [30, 40], "counts": [0, 1200]},
            },
        ],
        "categories": [{"id": 1, "name": "car", "supercategory": "vehicle"}, {"id": 2, "name": "tractor"}],
    }


@pytest.fixture
def tiny_set(tmp_path: Path) -> tuple[Path, Path]:
    """(json path, images folder) of :func:`tiny_coco` with real PNG files."""
    images = tmp_path / "images"
    write_png(images / "a.png", 40, 30, seed=1)
    write_png(images / "sub" / "b.png", 40, 30, seed=2)
    json_path = tmp_path / "set.json"
    json_path.write_text(json.dumps(tiny_coco()))
    return json_path, images
