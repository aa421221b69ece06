"""Summarise a probe: per condition the spread over seeds and bootstrap intervals, as JSON, markdown and a plot."""

from __future__ import annotations

import io
import os
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from ..files import write_bytes_atomic, write_json_atomic
from .compare import Comparison, compare
from .experiment import ProbeResult, ProbeRun, rare_ap50

_PALETTE = ("tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple", "tab:brown", "tab:pink", "tab:olive")


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
    """One row per condition (``real`` first, then by arm and share) with each metric's spread over seeds.

    ``rare_ap50_gain`` pairs each run with the ``real`` run of the same seed (same initial weights and
    batch order of the real images), which removes most seed-to-seed noise from the comparison.
    """
    baseline = {r.seed: rare_ap50(r.evaluation, result.rare_classes) for r in result.runs if r.arm == "real"}
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
                "arm": runs[0].arm,
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


def markdown_table(
    result: ProbeResult, rows: Sequence[dict[str, Any]], comparisons: Mapping[str, Comparison] | None = None
) -> str:
    """The summary as markdown: a table of means over seeds, and one of bootstrap intervals where given."""
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
            "-" if row["arm"] == "real" else row["rare_ap50_gain"].text(),
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
    if comparisons:
        lines += ["", *_interval_table(result, comparisons)]
    return "\n".join(lines) + "\n"


def _interval_table(result: ProbeResult, comparisons: Mapping[str, Comparison]) -> list[str]:
    baseline = result.inputs.get("baseline")
    first = next(iter(comparisons.values())).level["rare_ap50"]
    header = ["condition", "rare AP50", "rare AP", "rare AP50 - real", "rare AP - real"]
    if baseline:
        header += [f"rare AP50 - {baseline}", f"rare AP - {baseline}"]
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for c in comparisons.values():
        cells = [c.condition, _level(c.level["rare_ap50"]), _level(c.level["rare_ap"])]
        cells += [_difference(c.vs_real, m) for m in ("rare_ap50", "rare_ap")]
        if baseline:
            cells += [_difference(c.vs_baseline, m) for m in ("rare_ap50", "rare_ap")]
        lines.append("| " + " | ".join(cells) + " |")
    lines += [
        "",
        f"Estimate on all test images and seeds [{first.level:.0%} interval]: paired bootstrap "
        f"({first.resamples} replicates) that draws the test images and the seeds with replacement, the same "
        "draw for both sides of a difference (Efron and Tibshirani, An Introduction to the Bootstrap, 1993). "
        "A difference whose interval excludes 0 is marked **.",
    ]
    return lines


def _level(interval) -> str:
    return f"{interval.estimate:.3f} [{interval.low:.3f}, {interval.high:.3f}]"


def _difference(intervals: Mapping[str, Any] | None, metric: str) -> str:
    if intervals is None:
        return "-"
    interval = intervals[metric]
    return f"**{interval.text()}**" if interval.excludes_zero() else interval.text()


def save_share_plot(
    result: ProbeResult,
    rows: Sequence[dict[str, Any]],
    path: str | os.PathLike[str],
    comparisons: Mapping[str, Comparison] | None = None,
) -> None:
    """Rare-class AP50 against synthetic share: one panel for their mean and one per rare class.

    Lines join each arm's means (starting at the real-only model, share 0), drawn at the share each merge
    reached (below the requested one when too few synthetic images existed); on the first panel, error
    bars are the bootstrap intervals where given, else one sample sd; small dots are the single seeds.
    """
    panels = [("rare classes (mean)", None), *((name, name) for name in result.rare_classes)]
    figure = Figure(figsize=(4.2 * len(panels), 3.6), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(1, len(panels), squeeze=False)[0]
    real_rows = [row for row in rows if row["arm"] == "real"]
    arms = list(dict.fromkeys(row["arm"] for row in rows if row["arm"] != "real"))
    for ax, (title, name) in zip(axes, panels, strict=True):
        for k, arm in enumerate(arms):
            arm_rows = real_rows + [row for row in rows if row["arm"] == arm]
            colour = _PALETTE[k % len(_PALETTE)]
            _plot_arm(ax, result, arm, arm_rows, name, colour, comparisons if name is None else None)
        ax.set_title(title)
        ax.set_xlabel("synthetic share of training images")
        ax.set_ylabel("AP50 on the real test split")
        ax.set_xticks(sorted({row["share"] for row in rows}))
        ax.grid(alpha=0.3)
    axes[0].legend(loc="best", fontsize="small")
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110)
    write_bytes_atomic(path, buffer.getvalue())


def _plot_arm(
    ax,
    result: ProbeResult,
    arm: str,
    rows: Sequence[dict[str, Any]],
    name: str | None,
    colour: str,
    comparisons: Mapping[str, Comparison] | None,
) -> None:
    def value(run: ProbeRun) -> float | None:
        return rare_ap50(run.evaluation, result.rare_classes) if name is None else run.evaluation.per_class_ap50[name]

    shares, means, below, above = [], [], [], []
    for row in rows:
        metric = row["rare_ap50"] if name is None else row["per_class_ap50"][name]
        if metric.mean is None:
            continue
        shares.append(row["reached_share"].mean)
        means.append(metric.mean)
        if comparisons is not None and row["condition"] in comparisons:
            interval = comparisons[row["condition"]].level["rare_ap50"]
            below.append(max(0.0, metric.mean - interval.low))
            above.append(max(0.0, interval.high - metric.mean))
        else:
            below.append(metric.sd or 0.0)
            above.append(metric.sd or 0.0)
    ax.errorbar(shares, means, yerr=[below, above], color=colour, marker="o", capsize=3, label=f"real + {arm}")
    for run in result.runs:
        if run.arm == arm and value(run) is not None:
            ax.plot(run.reached_share, value(run), ".", color=colour, alpha=0.35)
        elif run.arm == "real" and value(run) is not None:
            ax.plot(0.0, value(run), ".", color="black", alpha=0.35)


def write_results(
    result: ProbeResult, out: str | os.PathLike[str], *, resamples: int = 1000, level: float = 0.95
) -> dict[str, Path]:
    """Write ``results.json``, ``results.md`` and ``rare_ap50.png`` into ``out``; return their paths.

    The bootstrap intervals (``resamples`` replicates; 0 leaves them out) are computed from the detections
    the probe's models saved below ``result.inputs["out"]``.
    """
    out = Path(out)
    rows = summarise(result)
    comparisons = compare(result, resamples=resamples, level=level) if resamples > 0 else None
    paths = {"json": out / "results.json", "markdown": out / "results.md", "plot": out / "rare_ap50.png"}
    write_json_atomic(
        paths["json"],
        {
            "format": "rarefill.probe/2",
            "inputs": dict(result.inputs),
            "class_names": list(result.class_names),
            "rare_classes": list(result.rare_classes),
            "shares": list(result.shares),
            "seeds": list(result.seeds),
            "settings": asdict(result.settings),
            "conditions": [_jsonable(row) for row in rows],
            "intervals": None if comparisons is None else [c.to_dict() for c in comparisons.values()],
            "runs": [run.to_dict() for run in result.runs],
        },
        indent=1,
    )
    write_bytes_atomic(paths["markdown"], markdown_table(result, rows, comparisons).encode("utf-8"))
    save_share_plot(result, rows, paths["plot"], comparisons)
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
