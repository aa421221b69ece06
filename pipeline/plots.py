"""Plots written as PNG files (matplotlib's Agg renderer; no display, no global pyplot state)."""

from __future__ import annotations

import io
import os

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .dataset import Dataset
from .files import write_bytes_atomic
from .geometry import GroundModel, is_usable


def save_ground_plot(dataset: Dataset, ground: GroundModel, path: str | os.PathLike[str], *, dpi: int = 110) -> None:
    """Plot box height against bottom row per class, with the fitted lines, and write it as a PNG.

    Left: the boxes as labelled, with the data set's horizon. Right: each bottom row moved by its image's
    horizon offset (``row - (image horizon - horizon_row)``), which is what the fit explains when the
    camera pitches. Boxes used for fitting are dots; boxes left out (touching the border, crowd) are grey
    crosses. A class's line is ``h = height_ratio * (row - horizon_row)``, solid when fitted, dashed when
    scaled from a prior height; the dotted vertical line is the horizon.
    """
    names = dataset.category_names()
    points: dict[str, list[tuple[float, float, float]]] = {name: [] for name in names.values()}
    left_out = []
    for scene in dataset.scenes:
        shift = ground.horizon_for(scene.id) - ground.horizon_row
        for ann in scene.annotations:
            if is_usable(ann, scene):
                points[names[ann.category_id]].append((ann.bottom_row, ann.bottom_row - shift, ann.bbox[3]))
            else:
                left_out.append((ann.bottom_row, ann.bbox[3]))
    rows_seen = [p[0] for values in points.values() for p in values] + [p[0] for p in left_out]
    low = min([ground.horizon_row, *rows_seen]) - 8
    high = max(rows_seen, default=ground.image_height) + 8
    line_rows = np.linspace(ground.horizon_row, high, 50)

    fig = Figure(figsize=(12, 5.5), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2, sharey=True)
    titles = ("as labelled", "bottom row moved by the image's horizon offset")
    for panel, (ax, title) in enumerate(zip(axes, titles, strict=True)):
        if left_out and panel == 0:
            rows, heights = np.asarray(left_out).T
            ax.scatter(rows, heights, marker="x", s=12, color="0.6", label=f"left out ({len(left_out)})")
        for i, (name, values) in enumerate(points.items()):
            colour = f"C{i % 10}"
            if values:
                data = np.asarray(values)
                ax.scatter(data[:, panel], data[:, 2], s=9, color=colour, alpha=0.6)
            cls = ground.classes.get(name)
            if cls is not None:
                ax.plot(
                    line_rows,
                    cls.height_ratio * (line_rows - ground.horizon_row),
                    color=colour,
                    linestyle="-" if cls.source == "fitted" else "--",
                    label=f"{name}: H/h_cam {cls.height_ratio:.2f}, sd {cls.spread:.3f}, n {cls.n_boxes}, {cls.source}",
                )
        ax.axvline(ground.horizon_row, color="k", linestyle=":", label=f"horizon row {ground.horizon_row:.1f}")
        ax.set_xlim(low, high)
        ax.set_ylim(0, None)
        ax.set_xlabel("bottom row of the box (px, top-down)")
        ax.set_title(title, fontsize=10)
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("box height (px)")
    axes[0].legend(fontsize=7, loc="upper left")
    name = dataset.source.name if dataset.source else "data set"
    fig.suptitle(f"{name}: box height vs. ground line (per-image horizon sd {ground.horizon_sd_px:.1f} px)")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    write_bytes_atomic(path, buffer.getvalue())
