"""Picture assets of the audit: the synthetic instances found most and least real, beside their nearest
real training crop, as small PNGs under ``RUN_DIR/report/audit/``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import cv2
import numpy as np

from ..dataset import read_rgb
from ..errors import RunError
from ..files import write_bytes_atomic
from ..generator.verifier import MARGIN, crop_box
from .instances import Instance, square_box

VIEW_PX = 96
"""Side of the example crops shown in the report (the test crop's geometry, larger)."""
EXAMPLES = 4
"""Instances shown per end (most real, least real) and class."""
ASSET_DIR = "report/audit"
"""Folder of the example crops, relative to the run folder."""


def view_crop(image: np.ndarray, item: Instance) -> np.ndarray:
    """The instance in the two-sample test's geometry at :data:`VIEW_PX` (``(S, S, 3) uint8`` RGB)."""
    return crop_box(image, square_box(item.box), size=VIEW_PX, margin=MARGIN)


def _write_png(path: Path, rgb: np.ndarray) -> None:
    ok, data = cv2.imencode(".png", np.ascontiguousarray(rgb[:, :, ::-1]))
    if not ok:
        raise RunError(f"could not encode {path}")
    write_bytes_atomic(path, data.tobytes())


def write_examples(
    root: Path,
    label: str,
    synthetic: tuple[Instance, ...],
    scores: np.ndarray,
    neighbours: list[Instance | None],
    distances: np.ndarray | None,
    images: dict[Path, np.ndarray],
) -> dict[str, list[dict[str, Any]]]:
    """Write the example crops of one class and describe them.

    Parameters
    ----------
    root : Path
        The run folder.
    label : str
        Class name (part of the file names).
    synthetic : tuple of Instance
        The synthetic instances that were scored.
    scores : (N,) float ndarray
        Held-out probability of "synthetic" per instance (low = found real).
    neighbours : list of Instance or None
        Each instance's nearest real training crop (``None`` when there is none).
    distances : (N,) float ndarray or None
        Feature distance to that neighbour.
    images : dict
        Decoded images by path (filled as needed).

    Returns
    -------
    dict
        ``most_real`` and ``least_real``: lists of ``{file_name, annotation_id, score, crop, neighbour,
        neighbour_file, distance}`` with paths relative to ``root``.
    """
    order = np.argsort(scores, kind="stable")
    ends = {"most_real": order[:EXAMPLES], "least_real": order[::-1][:EXAMPLES]}
    folder = root / ASSET_DIR
    safe = "".join(c if c.isalnum() or c in "-_" else "_" for c in label)
    out: dict[str, list[dict[str, Any]]] = {}
    for end, picked in ends.items():
        rows = []
        for rank, i in enumerate(picked):
            item = synthetic[i]
            name = f"{safe}-{end}-{rank}.png"
            _write_png(folder / name, view_crop(_image(images, item.path), item))
            row: dict[str, Any] = {
                "file_name": item.file_name,
                "annotation_id": item.annotation_id,
                "score": float(scores[i]),
                "crop": f"{ASSET_DIR}/{name}",
                "neighbour": None,
                "neighbour_file": None,
                "distance": None,
            }
            neighbour = neighbours[i]
            if neighbour is not None:
                near = f"{safe}-{end}-{rank}-nearest.png"
                _write_png(folder / near, view_crop(_image(images, neighbour.path), neighbour))
                row.update(neighbour=f"{ASSET_DIR}/{near}", neighbour_file=neighbour.file_name)
                row["distance"] = None if distances is None else float(distances[i])
            rows.append(row)
        out[end] = rows
    return out


def _image(images: dict[Path, np.ndarray], path: Path) -> np.ndarray:
    if path not in images:
        images[path] = read_rgb(path)
    return images[path]
