"""The run report's plots, written as PNG files (matplotlib's Agg renderer; no display, no pyplot state).

Each function takes plain arrays per class name, so the report decides what counts as "real" (a given
data set, or the kept annotations of the run) and the plots only draw.
"""

from __future__ import annotations

import io
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FormatStrFormatter, LogLocator, NullFormatter

from .files import write_bytes_atomic
from .geometry import GroundModel
from .height_draws import ks_distance

Boxes = Mapping[str, np.ndarray]
"""Per class name, an ``(N, 4) float`` array of COCO boxes ``(x, y, w, h)`` in pixels."""

REAL_COLOUR = "#4c72b0"
NEW_COLOUR = "#dd8452"


def _new_figure(width: float, height: float, dpi: int) -> Figure:
    fig = Figure(figsize=(width, height), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, path: str | os.PathLike[str]) -> None:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    write_bytes_atomic(path, buffer.getvalue())


def _class_colour(names: Sequence[str], name: str) -> str:
    return f"C{list(names).index(name) % 10}"


def save_scale_plot(
    real: Boxes,
    new: Boxes,
    path: str | os.PathLike[str],
    *,
    ground: GroundModel | None,
    image_height: int,
    note: str = "",
    dpi: int = 90,
    groups: Sequence[ScalePanel] = (),
) -> None:
    """Box height against bottom row: real boxes as small dots, new instances as large outlined markers.

    With a ``ground`` model each class's line ``h = height_ratio * (row - horizon_row)`` is drawn (solid
    when fitted, dashed when scaled from a prior height) with the horizon as a dotted vertical line, so a
    new instance far from its class's line is visibly out of scale.

    Parameters
    ----------
    real, new : mapping of str to (N, 4) float ndarray
        COCO boxes per class name.
    ground : GroundModel or None
        The fitted model; None draws the boxes only (``note`` says why).
    image_height : int
        Rows of the images (the x axis ends there).
    note : str
        A line under the title (where the ground model came from, or why there is none).
    groups : sequence of ScalePanel, optional
        Several camera groups: one panel each (its name, its boxes, its model, its image height); then
        ``real``, ``new``, ``ground`` and ``image_height`` are not used.

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006 (box height linear in the bottom
    row for a level camera over a ground plane).
    """
    title = "Scale: box height vs. bottom row (dots real, diamonds new)" + (f"\n{note}" if note else "")
    if not groups:
        fig = _new_figure(9.4, 4.8, dpi)
        ax = fig.add_subplot()
        handles = _draw_scale(ax, real, new, ground, image_height)
        ax.set_title(title, fontsize=10)
        fig.legend(handles=handles, fontsize=8, loc="outside right upper", frameon=False)
        _save(fig, path)
        return
    columns = min(3, len(groups))
    rows = -(-len(groups) // columns)
    fig = _new_figure(5.2 * columns, 4.2 * rows, dpi)
    axes = np.atleast_1d(fig.subplots(rows, columns, squeeze=False)).ravel()
    for ax, panel in zip(axes, groups, strict=False):
        handles = _draw_scale(ax, panel.real, panel.new, panel.ground, panel.image_height)
        ax.set_title(f"camera {panel.name}", fontsize=9)
        ax.legend(handles=handles, fontsize=6, loc="upper left")
    for ax in axes[len(groups) :]:
        ax.set_visible(False)
    fig.suptitle(title, fontsize=10)
    _save(fig, path)


@dataclass(frozen=True)
class ScalePanel:
    """One camera group's panel of the scale plot: its name, real and new boxes, model and image height."""

    name: str
    real: Boxes
    new: Boxes
    ground: GroundModel | None
    image_height: int


def _draw_scale(ax, real: Boxes, new: Boxes, ground: GroundModel | None, image_height: int) -> list[Line2D]:
    """Draw the scale plot's boxes, lines and horizon on ``ax``; return the legend handles."""
    names = sorted(set(real) | set(new))
    rows_seen = [float(image_height)]
    # One legend entry per class (dot and line together), one per class with new instances, the horizon.
    handles: list[Line2D] = []
    for name in names:
        colour = _class_colour(names, name)
        boxes = real.get(name, np.empty((0, 4)))
        if len(boxes):
            ax.scatter(boxes[:, 1] + boxes[:, 3], boxes[:, 3], s=14, color=colour, alpha=0.6, linewidths=0, zorder=2.5)
            rows_seen.append(float((boxes[:, 1] + boxes[:, 3]).min()))
        cls = ground.classes.get(name) if ground is not None else None
        line_style = "none"
        if cls is not None:
            line_rows = np.linspace(ground.horizon_row, image_height, 50)
            line_style = "-" if cls.source == "fitted" else "--"
            ax.plot(line_rows, cls.height_ratio * (line_rows - ground.horizon_row), color=colour, linestyle=line_style)
        line_text = f", line {cls.source}" if cls is not None else ", no line"
        handles.append(
            Line2D(
                [],
                [],
                color=colour,
                marker="o",
                markersize=4,
                linestyle=line_style,
                label=f"{name}: {len(boxes)} real{line_text}",
            )
        )
    for name in names:
        added = new.get(name, np.empty((0, 4)))
        if not len(added):
            continue
        colour = _class_colour(names, name)
        ax.scatter(
            added[:, 1] + added[:, 3],
            added[:, 3],
            s=46,
            marker="D",
            color=colour,
            edgecolors="black",
            linewidths=0.8,
            zorder=3,
        )
        rows_seen.append(float((added[:, 1] + added[:, 3]).min()))
        handles.append(
            Line2D(
                [],
                [],
                color=colour,
                marker="D",
                markeredgecolor="black",
                linestyle="none",
                label=f"{name}: {len(added)} new",
            )
        )
    if ground is not None:
        ax.axvline(ground.horizon_row, color="black", linestyle=":")
        handles.append(Line2D([], [], color="black", linestyle=":", label=f"horizon row {ground.horizon_row:.1f}"))
        rows_seen.append(ground.horizon_row)
    ax.set_xlim(min(rows_seen) - 10, image_height + 5)
    ax.set_ylim(0, None)
    ax.set_xlabel("bottom row of the box (px, top-down)")
    ax.set_ylabel("box height (px)")
    ax.grid(alpha=0.3)
    return handles


def save_size_histograms(real: Boxes, new: Boxes, path: str | os.PathLike[str], *, dpi: int = 90) -> None:
    """Per class, histograms of box height (log-spaced bins): real against new instances.

    Each histogram is a density (area 1) so that a few hundred real boxes and a few new ones compare by
    shape; the legend gives the counts, the title both medians and the two-sample Kolmogorov-Smirnov
    distance (:func:`pipeline.height_draws.ks_distance`).
    """
    names = sorted(set(real) | set(new))
    columns = min(3, max(1, len(names)))
    grid_rows = max(1, -(-len(names) // columns))
    fig = _new_figure(3.6 * columns, 2.7 * grid_rows, dpi)
    axes = fig.subplots(grid_rows, columns, squeeze=False).ravel()
    for ax, name in zip(axes, names, strict=False):
        sizes_real = np.asarray(real.get(name, np.empty((0, 4))), dtype=np.float64).reshape(-1, 4)[:, 3]
        sizes_new = np.asarray(new.get(name, np.empty((0, 4))), dtype=np.float64).reshape(-1, 4)[:, 3]
        both = np.concatenate([sizes_real, sizes_new])
        low, high = max(1.0, float(both.min()) * 0.9), float(both.max()) * 1.1
        bins = np.geomspace(low, max(high, low * 1.5), 16)
        if sizes_real.size:
            ax.hist(
                sizes_real, bins=bins, density=True, color=REAL_COLOUR, alpha=0.55, label=f"real ({sizes_real.size})"
            )
        if sizes_new.size:
            ax.hist(
                sizes_new,
                bins=bins,
                density=True,
                histtype="step",
                linewidth=2,
                color=NEW_COLOUR,
                label=f"new ({sizes_new.size})",
            )
        ax.set_xscale("log")
        # Plain numbers (20, 50, 100) read better than 2x10^1 on a short log axis.
        ax.xaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(FormatStrFormatter("%g"))
        ax.xaxis.set_minor_formatter(NullFormatter())
        title = name
        if sizes_real.size and sizes_new.size:
            ks = ks_distance(sizes_new, sizes_real)
            title += f": median {np.median(sizes_real):.0f} real, {np.median(sizes_new):.0f} new px; KS {ks:.2f}"
        ax.set_title(title, fontsize=8)
        ax.set_xlabel("box height (px)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.set_yticks([])
        ax.legend(fontsize=7)
    for ax in axes[len(names) :]:
        ax.set_visible(False)
    fig.suptitle("Box height per class: real vs. new (densities)", fontsize=11)
    _save(fig, path)


def save_class_counts(
    before: Mapping[str, int],
    kept: Mapping[str, int],
    new: Mapping[str, int],
    path: str | os.PathLike[str],
    *,
    before_label: str,
    dpi: int = 90,
) -> None:
    """Instances per class before the run and after adding its images, as grouped bars.

    The "after" bar stacks the real instances, the real instances copied along in the synthetic images
    (``kept``) and the new instances, each labelled with its total.
    """
    names = list(dict.fromkeys([*before, *kept, *new]))
    x = np.arange(len(names), dtype=np.float64)
    b = np.array([before.get(n, 0) for n in names], dtype=np.float64)
    k = np.array([kept.get(n, 0) for n in names], dtype=np.float64)
    w = np.array([new.get(n, 0) for n in names], dtype=np.float64)
    fig = _new_figure(max(4.5, 0.9 * len(names) + 1.5), 4.6, dpi)
    ax = fig.add_subplot()
    ax.bar(x - 0.2, b, width=0.38, color="0.65", label=before_label)
    ax.bar(x + 0.2, b, width=0.38, color=REAL_COLOUR, label="after: real")
    ax.bar(x + 0.2, k, width=0.38, bottom=b, color=REAL_COLOUR, alpha=0.45, label="after: real copies in new images")
    ax.bar(x + 0.2, w, width=0.38, bottom=b + k, color=NEW_COLOUR, label="after: new instances")
    top = max(float((b + k + w).max(initial=0)), 1.0)
    for i in range(len(names)):
        ax.text(x[i] - 0.2, b[i] + 0.01 * top, f"{int(b[i])}", ha="center", va="bottom", fontsize=8)
        extra = f"\n+{int(w[i])} new" if w[i] else ""
        ax.text(
            x[i] + 0.2,
            b[i] + k[i] + w[i] + 0.01 * top,
            f"{int(b[i] + k[i] + w[i])}{extra}",
            ha="center",
            va="bottom",
            fontsize=8,
        )
    ax.set_xticks(x, names)
    ax.set_ylim(0, top * 1.22)
    ax.set_ylabel("instances")
    ax.set_title("Instances per class, before and after")
    fig.legend(fontsize=8, loc="outside lower center", ncols=2, frameon=False)
    ax.grid(axis="y", alpha=0.3)
    _save(fig, path)
