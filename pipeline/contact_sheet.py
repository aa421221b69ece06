"""A contact sheet: inserted instances of a run beside real instances of the same class and about the same size.

Each pair shows the new object (left) and the real one of its class whose box height is closest (right),
both cut out with the same share of context around the box and magnified by the same whole factor
(nearest neighbour, so every image pixel stays visible as it is), with the box height written above.
Inserted instances are taken evenly over their height range, so small distant ones show as well as big
near ones.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np

from .dataset import Dataset, load_dataset
from .errors import UsageError
from .files import write_bytes_atomic
from .geometry import is_usable
from .provenance import KEY
from .writer import encode_png

CONTEXT = 0.4
"""Context around a box on each side, as a share of the box's longer side."""

TILE_PX = 120
"""Magnify each pair so the object is about this tall (never below 1x)."""


@dataclass(frozen=True)
class Instance:
    """One labelled object: where its pixels are and how tall its box is."""

    path: str
    box: tuple[float, float, float, float]
    category: str


def instances(dataset: Dataset, *, synthetic: bool | None) -> list[Instance]:
    """Labelled, untruncated objects of ``dataset``; ``synthetic`` picks new (True) or real (False) ones."""
    names = dataset.category_names()
    out = []
    for scene in dataset.scenes:
        for ann in scene.annotations:
            if ann.iscrowd or not is_usable(ann, scene):
                continue
            is_new = bool(ann.extra.get(KEY, {}).get("synthetic"))
            if synthetic is None or is_new == synthetic:
                out.append(Instance(str(scene.path), tuple(ann.bbox), names[ann.category_id]))
    return out


def _crop(path: str, box: Sequence[float], zoom: int, cache: dict) -> np.ndarray:
    if path not in cache:
        cache[path] = cv2.cvtColor(cv2.imread(path, cv2.IMREAD_COLOR), cv2.COLOR_BGR2RGB)
    image = cache[path]
    x, y, w, h = box
    pad = CONTEXT * max(w, h)
    c0, r0 = max(int(x - pad), 0), max(int(y - pad), 0)
    c1, r1 = min(int(np.ceil(x + w + pad)), image.shape[1]), min(int(np.ceil(y + h + pad)), image.shape[0])
    crop = image[r0:r1, c0:c1]
    return cv2.resize(crop, (crop.shape[1] * zoom, crop.shape[0] * zoom), interpolation=cv2.INTER_NEAREST)


def _caption(tile: np.ndarray, text: str) -> np.ndarray:
    bar = np.full((16, tile.shape[1], 3), 255, np.uint8)
    cv2.putText(bar, text, (2, 12), cv2.FONT_HERSHEY_SIMPLEX, 0.38, (0, 0, 0), 1, cv2.LINE_AA)
    return np.concatenate([bar, tile], axis=0)


def build_sheet(
    new: Sequence[Instance], real: Sequence[Instance], *, per_class: int = 12, columns: int = 4
) -> tuple[np.ndarray, int]:
    """The sheet as an ``(H, W, 3) uint8`` RGB image (see the module docstring) and the pairs it shows."""
    cache: dict = {}
    pairs = []
    for category in sorted({i.category for i in new}):
        mine = sorted((i for i in new if i.category == category), key=lambda i: i.box[3])
        theirs = [i for i in real if i.category == category]
        if not theirs:
            continue
        picks = [mine[int(k)] for k in np.unique(np.linspace(0, len(mine) - 1, min(per_class, len(mine))).round())]
        for item in picks:
            match = min(theirs, key=lambda r: abs(np.log(r.box[3] / item.box[3])))
            zoom = max(1, int(round(TILE_PX / max(item.box[3], match.box[3]))))
            left = _caption(_crop(item.path, item.box, zoom, cache), f"new {category} {item.box[3]:.0f}px")
            right = _caption(_crop(match.path, match.box, zoom, cache), f"real {match.box[3]:.0f}px")
            height = max(left.shape[0], right.shape[0])
            gap = np.full((height, 4, 3), 255, np.uint8)
            pairs.append(np.concatenate([_pad(left, height), gap, _pad(right, height)], axis=1))
    if not pairs:
        raise UsageError("no inserted instance has a real instance of its class to compare with")
    rows = []
    for start in range(0, len(pairs), columns):
        group = pairs[start : start + columns]
        height = max(p.shape[0] for p in group)
        cells = [np.pad(_pad(p, height), ((0, 0), (0, 12), (0, 0)), constant_values=200) for p in group]
        rows.append(np.concatenate(cells, axis=1))
    width = max(r.shape[1] for r in rows)
    rows = [np.pad(r, ((0, 12), (0, width - r.shape[1]), (0, 0)), constant_values=200) for r in rows]
    return np.concatenate(rows, axis=0), len(pairs)


def _pad(tile: np.ndarray, height: int) -> np.ndarray:
    return np.pad(tile, ((0, height - tile.shape[0]), (0, 0), (0, 0)), constant_values=255)


def write_sheet(
    run_dir: str | os.PathLike[str],
    real_json: str | os.PathLike[str],
    out: str | os.PathLike[str],
    *,
    real_images: str | os.PathLike[str] | None = None,
    per_class: int = 12,
) -> int:
    """Write the contact sheet PNG of a run folder against a real data set; returns the pairs shown."""
    run = Path(run_dir)
    labels = load_dataset(run / "labels.json", run / "images")
    new = instances(labels, synthetic=True)
    if not new:
        raise UsageError(f"{run}: the run holds no inserted instances")
    real = instances(load_dataset(real_json, real_images), synthetic=False)
    sheet, count = build_sheet(new, real, per_class=per_class)
    write_bytes_atomic(out, encode_png(sheet))
    return count
