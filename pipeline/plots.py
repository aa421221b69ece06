"""Plots written as PNG files (matplotlib's Agg renderer; no display, no global pyplot state)."""

from __future__ import annotations

import io
import os

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .dataset import Dataset
from .files import write_bytes_atomic
from .geometry import GroundModel, is_usable, usable_boxes


def save_ground_plot(dataset: Dataset, ground: GroundModel, path: str | os.PathLike[str], *, dpi: int = 110) -> None:
    """Plot box height against bottom row per class, with the fitted lines, and write it as a PNG.

    Each class's boxes used for fitting are dots; boxes left out (touching the border, crowd) are grey
    crosses. A class's line is ``h = height_ratio * (row - horizon_row)``, solid when fitted, dashed when
    scaled from a prior height. The dotted vertical line is the horizon.
    """
    names = dataset.category_names()
    usable = usable_boxes(dataset)
    fig = Figure(figsize=(8, 5.5), dpi=dpi)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    left_out = [(a.bottom_row, a.bbox[3]) for s in dataset.scenes for a in s.annotations if not is_usable(a, s)]
    if left_out:
        rows, heights = np.asarray(left_out).T
        ax.scatter(rows, heights, marker="x", s=12, color="0.6", label=f"left out ({len(left_out)})")
    top_row = max(s.height for s in dataset.scenes)
    line_rows = np.linspace(ground.horizon_row, top_row, 50)
    for i, name in enumerate(names.values()):
        colour = f"C{i % 10}"
        rows, heights = usable[name]
        if rows.size:
            ax.scatter(rows, heights, s=9, color=colour, alpha=0.6)
        cls = ground.classes.get(name)
        if cls is None:
            continue
        ax.plot(
            line_rows,
            cls.height_ratio * (line_rows - ground.horizon_row),
            color=colour,
            linestyle="-" if cls.source == "fitted" else "--",
            label=f"{name}: H/h_cam {cls.height_ratio:.2f}, sd {cls.spread:.3f}, n {cls.n_boxes} ({cls.source})",
        )
    ax.axvline(ground.horizon_row, color="k", linestyle=":", label=f"horizon row {ground.horizon_row:.1f}")
    ax.set_xlabel("bottom row of the box (px, top-down)")
    ax.set_ylabel("box height (px)")
    ax.set_title(f"{dataset.source.name if dataset.source else 'data set'}: box height vs. ground line")
    lowest = min([ground.horizon_row, *(r.min() for r, _ in usable.values() if r.size)])
    ax.set_xlim(lowest - 10, top_row + 5)
    ax.set_ylim(0, None)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    write_bytes_atomic(path, buffer.getvalue())
