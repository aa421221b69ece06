"""Plots written as PNG files (matplotlib's Agg renderer; no display, no global pyplot state)."""

from __future__ import annotations

import io
import os

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from .dataset import Dataset
from .files import write_bytes_atomic
from .geometry import CameraGroups, GroundModel, is_usable

_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "*", "<", ">")


def save_ground_plot(
    dataset: Dataset, ground: GroundModel | CameraGroups, path: str | os.PathLike[str], *, dpi: int = 110
) -> None:
    """Plot box height against bottom row with the fitted lines, and write it as a PNG.

    One camera: colours are classes. Left: the boxes as labelled, with the horizon. Right: each bottom row
    moved by its image's horizon offset (``row - (image horizon - horizon_row)``), which is what the fit
    explains when the camera pitches. Boxes used for fitting are dots; boxes left out (touching the
    border, crowd) are grey crosses. A class's line is ``h = height_ratio * (row - horizon_row)``, solid
    when fitted, dashed when scaled from a known height; the dotted vertical line is the horizon.

    Several camera groups (:class:`~pipeline.geometry.CameraGroups`): colours are groups, markers classes.
    Left: as labelled, each group's fitted lines and horizon in its colour. Right: rows below each image's
    own horizon against box heights scaled to the group with most boxes (``h * r_ref / r_group``), so the
    boxes of all cameras fall on one line per class: the shared real class heights.
    """
    if isinstance(ground, CameraGroups) and len(ground.groups) > 1:
        _save_groups_plot(dataset, ground, path, dpi=dpi)
        return
    model = ground if isinstance(ground, GroundModel) else next(iter(ground.groups.values()))
    names = dataset.category_names()
    points: dict[str, list[tuple[float, float, float]]] = {name: [] for name in names.values()}
    left_out = []
    for scene in dataset.scenes:
        shift = model.horizon_for(scene.id) - model.horizon_row
        for ann in scene.annotations:
            if is_usable(ann, scene):
                points[names[ann.category_id]].append((ann.bottom_row, ann.bottom_row - shift, ann.bbox[3]))
            else:
                left_out.append((ann.bottom_row, ann.bbox[3]))
    rows_seen = [p[0] for values in points.values() for p in values] + [p[0] for p in left_out]
    low = min([model.horizon_row, *rows_seen]) - 8
    high = max(rows_seen, default=model.image_height) + 8
    line_rows = np.linspace(model.horizon_row, high, 50)

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
            cls = model.classes.get(name)
            if cls is not None:
                ax.plot(
                    line_rows,
                    cls.height_ratio * (line_rows - model.horizon_row),
                    color=colour,
                    linestyle="-" if cls.source == "fitted" else "--",
                    label=f"{name}: H/h_cam {cls.height_ratio:.2f}, sd {cls.spread:.3f}, n {cls.n_boxes}, {cls.source}",
                )
        ax.axvline(model.horizon_row, color="k", linestyle=":", label=f"horizon row {model.horizon_row:.1f}")
        ax.set_xlim(low, high)
        ax.set_ylim(0, None)
        ax.set_xlabel("bottom row of the box (px, top-down)")
        ax.set_title(title, fontsize=10)
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("box height (px)")
    axes[0].legend(fontsize=7, loc="upper left")
    name = dataset.source.name if dataset.source else "data set"
    fig.suptitle(f"{name}: box height vs. ground line (per-image horizon sd {model.horizon_sd_px:.1f} px)")
    _write(fig, path)


def _save_groups_plot(dataset: Dataset, ground: CameraGroups, path: str | os.PathLike[str], *, dpi: int) -> None:
    names = list(dataset.category_names().values())
    category = dataset.category_names()
    group_names = list(ground.groups)
    reference = max(group_names, key=lambda g: sum(c.n_boxes for c in ground.groups[g].classes.values()))
    ref_model = ground.groups[reference]
    fig = Figure(figsize=(13, 6), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    left, right = fig.subplots(1, 2)
    highest = 1.0
    seen: set[str] = set()
    for g, group_name in enumerate(group_names):
        model = ground.groups[group_name]
        colour = f"C{g % 10}"
        scale = _relative_scale(ref_model, model)
        points: dict[str, list[tuple[float, float, float]]] = {}
        for scene in dataset.scenes:
            if ground.image_groups.get(scene.id) != group_name:
                continue
            horizon = model.horizon_for(scene.id)
            for ann in scene.annotations:
                if is_usable(ann, scene):
                    points.setdefault(category[ann.category_id], []).append(
                        (ann.bottom_row, ann.bottom_row - horizon, ann.bbox[3])
                    )
        seen |= set(points)
        for name, values in points.items():
            data = np.asarray(values)
            marker = _MARKERS[names.index(name) % len(_MARKERS)]
            left.scatter(data[:, 0], data[:, 2], s=10, color=colour, marker=marker, alpha=0.6)
            right.scatter(data[:, 1], data[:, 2] * scale, s=10, color=colour, marker=marker, alpha=0.6)
            highest = max(highest, float(data[:, 1].max()))
        rows = np.linspace(model.horizon_row, model.image_height, 50)
        for cls in model.classes.values():
            if cls.source == "fitted":
                left.plot(rows, cls.height_ratio * (rows - model.horizon_row), color=colour, linewidth=0.8)
        camera = "" if model.camera_height_m is None else f", camera {model.camera_height_m:.2f} m"
        label = f"{group_name}: horizon {model.horizon_row:.1f} ({model.horizon_source}){camera}"
        left.axvline(model.horizon_row, color=colour, linestyle=":", label=label)
    depth = np.linspace(0, highest, 50)
    for i, (name, cls) in enumerate(ref_model.classes.items()):
        if cls.source == "fitted":
            right.plot(
                depth, cls.height_ratio * depth, color="0.25", linestyle=("-", "--", "-.", ":")[i % 4], label=name
            )
    for name in sorted(seen, key=names.index):
        marker = _MARKERS[names.index(name) % len(_MARKERS)]
        right.scatter([], [], marker=marker, color="0.4", label=f"{name} boxes")
    left.set_title("as labelled: colour is the camera group, marker the class", fontsize=10)
    right.set_title(f"rows below the image's horizon; heights scaled to camera group {reference}", fontsize=10)
    left.set_xlabel("bottom row of the box (px, top-down)")
    right.set_xlabel("bottom row - image horizon (px)")
    for ax in (left, right):
        ax.set_ylabel("box height (px)")
        ax.set_ylim(0, None)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="upper left")
    name = dataset.source.name if dataset.source else "data set"
    fig.suptitle(f"{name}: box height vs. ground line, {len(group_names)} camera groups")
    _write(fig, path)


def _relative_scale(reference: GroundModel, model: GroundModel) -> float:
    """``r_ref / r_group`` of the classes fitted in both: how much taller the reference camera sees a box."""
    ratios = [
        reference.classes[name].height_ratio / cls.height_ratio
        for name, cls in model.classes.items()
        if cls.source == "fitted" and name in reference.classes
    ]
    return float(np.median(ratios)) if ratios else 1.0


def _write(fig: Figure, path: str | os.PathLike[str]) -> None:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    write_bytes_atomic(path, buffer.getvalue())
