"""A contact sheet of labelled scenes, for looking at the seed set."""

from __future__ import annotations

import os

import cv2
import numpy as np

from ..dataset import load_dataset
from ..files import write_bytes_atomic

_BOX_COLOURS = {
    "car": (0, 200, 255),
    "van": (60, 120, 255),
    "bus": (255, 255, 0),
    "tractor": (255, 0, 255),
    "works_trailer": (255, 60, 60),
}


def contact_sheet(
    json_path: str | os.PathLike[str], out_path: str | os.PathLike[str], *, n: int = 16, columns: int = 4
) -> np.ndarray:
    """Draw ``n`` evenly spread scenes of a COCO file with their boxes and class names into one PNG.

    Returns
    -------
    (rows * H, columns * W, 3) uint8 ndarray
        The sheet as written (RGB).
    """
    if n < 1 or columns < 1:
        raise ValueError(f"n and columns must be >= 1, got {n}, {columns}")
    data = load_dataset(json_path)
    names = data.category_names()
    picks = np.linspace(0, len(data.scenes) - 1, min(n, len(data.scenes))).round().astype(int)
    tiles = []
    for i in picks:
        scene = data.scenes[int(i)]
        tile = scene.load_rgb()
        for ann in scene.annotations:
            x, y, w, h = ann.bbox
            colour = _BOX_COLOURS.get(names[ann.category_id], (255, 255, 255))
            cv2.rectangle(tile, (round(x), round(y)), (round(x + w) - 1, round(y + h) - 1), colour, 1)
            label = names[ann.category_id].replace("works_trailer", "trailer")
            cv2.putText(tile, label, (round(x), max(8, round(y) - 2)), cv2.FONT_HERSHEY_PLAIN, 0.7, colour, 1)
        tiles.append(tile)
    while len(tiles) % columns:
        tiles.append(np.zeros_like(tiles[0]))
    sheet = np.vstack([np.hstack(tiles[r : r + columns]) for r in range(0, len(tiles), columns)])
    ok, data_png = cv2.imencode(".png", cv2.cvtColor(sheet, cv2.COLOR_RGB2BGR))
    if not ok:
        raise RuntimeError("PNG encoding failed")
    write_bytes_atomic(out_path, data_png.tobytes())
    return sheet
