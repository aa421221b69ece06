"""How sure is a probe? Bootstrap intervals for every condition, and for its gain over real only and the baseline.

For each condition (an arm at a share) over all seeds: its rare-class AP50 and AP with a percentile
interval, the paired difference to the real-only models of the same seeds, and, where the probe names a
baseline arm (the copy-paste control), the paired difference to that arm at the same share. See
:mod:`.bootstrap` for the resampling.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..dataset import load_dataset, to_coco
from .bootstrap import ImageMatches, Interval, class_mean, match_images, paired_bootstrap
from .experiment import ProbeResult
from .jobs import condition_name, read_detections, record_file

METRICS = ("rare_ap50", "rare_ap")
"""What is compared: the mean over the rare classes of AP50, and of AP (IoU 0.50:0.95)."""


@dataclass(frozen=True)
class Comparison:
    """One condition's intervals; ``vs_real`` and ``vs_baseline`` map a metric to the paired difference."""

    condition: str
    arm: str
    share: float
    level: Mapping[str, Interval]
    vs_real: Mapping[str, Interval] | None
    vs_baseline: Mapping[str, Interval] | None

    def to_dict(self) -> dict[str, Any]:
        def table(intervals: Mapping[str, Interval] | None) -> dict[str, Any] | None:
            return None if intervals is None else {k: v.to_dict() for k, v in intervals.items()}

        return {
            "condition": self.condition,
            "arm": self.arm,
            "share": self.share,
            "level": table(self.level),
            "vs_real": table(self.vs_real),
            "vs_baseline": table(self.vs_baseline),
        }


def compare(result: ProbeResult, *, resamples: int = 1000, level: float = 0.95, rng: int = 0) -> dict[str, Comparison]:
    """Intervals for every condition of ``result``, read from the detections its models saved.

    Parameters
    ----------
    result : ProbeResult
        As :func:`pipeline.probe.run_probe` returns it (its ``inputs`` name the test split and the folder).
    resamples : int
        Bootstrap replicates per interval.
    level : float
        Coverage of each interval.
    rng : int
        Seeds the replicates; each interval draws from its own stream, so one does not move another.

    Returns
    -------
    dict of str to Comparison
        By condition name, ``real`` first, in the order of ``result.runs``.
    """
    truth = to_coco(load_dataset(result.inputs["test"], check_images=False))
    matches = _matches_by_condition(result, truth)
    metrics: dict[str, Callable[[ImageMatches, np.ndarray | None], float | None]] = {
        "rare_ap50": functools.partial(class_mean, names=result.rare_classes, iou="50"),
        "rare_ap": functools.partial(class_mean, names=result.rare_classes, iou="all"),
    }
    baseline = result.inputs.get("baseline")
    stream = iter(range(1_000_000))

    def intervals(arm: Sequence[ImageMatches], against: Sequence[ImageMatches] | None) -> dict[str, Interval]:
        return {
            name: paired_bootstrap(
                arm, against, metric, resamples=resamples, level=level, rng=np.random.default_rng([rng, next(stream)])
            )
            for name, metric in metrics.items()
        }

    out = {}
    for condition, (arm, share) in _conditions(result).items():
        own = matches[condition]
        against_baseline = None
        if baseline is not None and arm not in ("real", baseline):
            against_baseline = intervals(own, matches[condition_name(baseline, share)])
        out[condition] = Comparison(
            condition=condition,
            arm=arm,
            share=share,
            level=intervals(own, None),
            vs_real=None if arm == "real" else intervals(own, matches["real"]),
            vs_baseline=against_baseline,
        )
    return out


def _conditions(result: ProbeResult) -> dict[str, tuple[str, float]]:
    return {run.condition: (run.arm, run.share) for run in result.runs}


def _matches_by_condition(result: ProbeResult, truth: Mapping[str, Any]) -> dict[str, list[ImageMatches]]:
    """Per condition, the matches of each seed's model, in seed order (so conditions pair by seed)."""
    out: dict[str, list[ImageMatches]] = {}
    for condition in _conditions(result):
        runs = sorted((r for r in result.runs if r.condition == condition), key=lambda r: r.seed)
        if [r.seed for r in runs] != list(result.seeds):
            raise ValueError(f"condition {condition} lacks seeds: has {[r.seed for r in runs]}, needs {result.seeds}")
        out[condition] = [
            match_images(truth, read_detections(record_file(result.inputs["out"], condition, r.seed))) for r in runs
        ]
    return out
