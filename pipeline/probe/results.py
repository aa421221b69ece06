"""Summarise a probe: mean and spread per condition over seeds, as JSON, a markdown table and a plot."""

from __future__ import annotations

import io
import os
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from ..files import write_bytes_atomic, write_json_atomic
from .experiment import ProbeResult, ProbeRun, rare_ap50

_COLOURS = {"real": "black", "filtered": "tab:blue", "unfiltered": "tab:red"}


@dataclass(frozen=True)
class Spread:
    """Mean, sample standard deviation (``None`` for one value), range and count of the given values."""

    mean: float | None
    sd: float | None
    low: float | None
    high: float | None
    n: int

    def text(self) -> str:
        if self.mean is None:
            return "-"
        return f"{self.mean:.3f}" if self.sd is None else f"{self.mean:.3f} ± {self.sd:.3f}"


def spread(values: Sequence[float | None]) -> Spread:
    """:class:`Spread` of the values that are not ``None``."""
    kept = np.array([v for v in values if v is not None], np.float64)
    if kept.size == 0:
        return Spread(None, None, None, None, 0)
    sd = float(kept.std(ddof=1)) if kept.size > 1 else None
    return Spread(float(kept.mean()), sd, float(kept.min()), float(kept.max()), int(kept.size))


def summarise(result: ProbeResult) -> list[dict[str, Any]]:
    """One row per condition (``real`` first, then by kind and share) with each metric's spread over seeds.

    ``rare_ap50_gain`` pairs each run with the ``real`` run of the same seed (same initial weights and
    batch order of the real images), which removes most seed-to-seed noise from the comparison.
    """
    baseline = {r.seed: rare_ap50(r.evaluation, result.rare_classes) for r in result.runs if r.kind == "real"}
    rows = []
    for condition in dict.fromkeys(r.condition for r in result.runs):
        runs = [r for r in result.runs if r.condition == condition]
        gains = []
        for r in runs:
            ours, theirs = rare_ap50(r.evaluation, result.rare_classes), baseline.get(r.seed)
            gains.append(None if ours is None or theirs is None else ours - theirs)
        rows.append(
            {
                "condition": condition,
                "kind": runs[0].kind,
                "share": runs[0].share,
                "seeds": [r.seed for r in runs],
                "reached_share": spread([r.reached_share for r in runs]),
                "train_images": spread([r.train_images for r in runs]),
                "synthetic_images": spread([r.synthetic_images for r in runs]),
                "ap": spread([r.evaluation.ap for r in runs]),
                "ap50": spread([r.evaluation.ap50 for r in runs]),
                "rare_ap50": spread([rare_ap50(r.evaluation, result.rare_classes) for r in runs]),
                "rare_ap50_gain": spread(gains),
                "per_class_ap50": {
                    name: spread([r.evaluation.per_class_ap50.get(name) for r in runs]) for name in result.class_names
                },
            }
        )
    return rows


def markdown_table(result: ProbeResult, rows: Sequence[dict[str, Any]]) -> str:
    """The summary as a markdown table (mean ± sd over seeds); rare classes are starred."""
    classes = [f"{name}*" if name in result.rare_classes else name for name in result.class_names]
    header = ["condition", "synthetic share", "images (syn)", "AP", "AP50", "rare AP50", "rare AP50 gain", *classes]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for row in rows:
        cells = [
            row["condition"],
            f"{row['reached_share'].mean:.3f}",
            f"{row['train_images'].mean:.0f} ({row['synthetic_images'].mean:.0f})",
            row["ap"].text(),
            row["ap50"].text(),
            row["rare_ap50"].text(),
            "-" if row["kind"] == "real" else row["rare_ap50_gain"].text(),
            *(row["per_class_ap50"][name].text() for name in result.class_names),
        ]
        lines.append("| " + " | ".join(cells) + " |")
    seeds = len(result.seeds)
    lines.append("")
    lines.append(
        f"Mean ± sample sd over {seeds} seed(s); AP and AP50 by pycocotools COCOeval on the test split. "
        f"* rare (fewer than {result.inputs['rare_below']} real training instances); rare AP50 is their mean. "
        "Gain: rare AP50 minus the real-only model's of the same seed. "
        f"Every model: {result.settings.steps} steps of batch {result.settings.batch_size}."
    )
    return "\n".join(lines) + "\n"


def save_share_plot(result: ProbeResult, rows: Sequence[dict[str, Any]], path: str | os.PathLike[str]) -> None:
    """Rare-class AP50 against synthetic share: one panel for their mean and one per rare class.

    Lines join the means per kind (starting at the real-only model, share 0), drawn at the share each
    merge reached (below the requested one when too few synthetic images existed); error bars are one
    sample sd; small dots are the single seeds.
    """
    panels = [("rare classes (mean)", None), *((name, name) for name in result.rare_classes)]
    figure = Figure(figsize=(4.2 * len(panels), 3.6), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(1, len(panels), squeeze=False)[0]
    real_rows = [row for row in rows if row["kind"] == "real"]
    for ax, (title, name) in zip(axes, panels, strict=True):
        for kind in ("filtered", "unfiltered"):
            kind_rows = real_rows + [row for row in rows if row["kind"] == kind]
            if len(kind_rows) <= len(real_rows):
                continue
            _plot_kind(ax, result, kind, kind_rows, name)
        ax.set_title(title)
        ax.set_xlabel("synthetic share of training images")
        ax.set_ylabel("AP50 on the real test split")
        ax.set_xticks(sorted({row["share"] for row in rows}))
        ax.grid(alpha=0.3)
    axes[0].legend(loc="best", fontsize="small")
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110)
    write_bytes_atomic(path, buffer.getvalue())


def _plot_kind(ax, result: ProbeResult, kind: str, rows: Sequence[dict[str, Any]], name: str | None) -> None:
    def value(run: ProbeRun) -> float | None:
        return rare_ap50(run.evaluation, result.rare_classes) if name is None else run.evaluation.per_class_ap50[name]

    shares, means, sds = [], [], []
    for row in rows:
        metric = row["rare_ap50"] if name is None else row["per_class_ap50"][name]
        if metric.mean is None:
            continue
        shares.append(row["reached_share"].mean)
        means.append(metric.mean)
        sds.append(metric.sd or 0.0)
    colour = _COLOURS[kind]
    ax.errorbar(shares, means, yerr=sds, color=colour, marker="o", capsize=3, label=f"real + {kind} synthetic")
    for run in result.runs:
        if run.kind == kind and value(run) is not None:
            ax.plot(run.reached_share, value(run), ".", color=colour, alpha=0.35)
        elif run.kind == "real" and kind == "filtered" and value(run) is not None:
            ax.plot(0.0, value(run), ".", color=_COLOURS["real"], alpha=0.35)


def write_results(result: ProbeResult, out: str | os.PathLike[str]) -> dict[str, Path]:
    """Write ``results.json``, ``results.md`` and ``rare_ap50.png`` into ``out``; return their paths."""
    out = Path(out)
    rows = summarise(result)
    paths = {"json": out / "results.json", "markdown": out / "results.md", "plot": out / "rare_ap50.png"}
    write_json_atomic(
        paths["json"],
        {
            "format": "rarefill.probe/1",
            "inputs": dict(result.inputs),
            "class_names": list(result.class_names),
            "rare_classes": list(result.rare_classes),
            "shares": list(result.shares),
            "seeds": list(result.seeds),
            "settings": asdict(result.settings),
            "conditions": [_jsonable(row) for row in rows],
            "runs": [run.to_dict() for run in result.runs],
        },
        indent=1,
    )
    write_bytes_atomic(paths["markdown"], markdown_table(result, rows).encode("utf-8"))
    save_share_plot(result, rows, paths["plot"])
    return paths


def _jsonable(row: dict[str, Any]) -> dict[str, Any]:
    out = {}
    for key, value in row.items():
        if isinstance(value, Spread):
            out[key] = asdict(value)
        elif isinstance(value, dict):
            out[key] = {k: asdict(v) for k, v in value.items()}
        else:
            out[key] = value
    return out
