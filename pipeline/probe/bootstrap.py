"""Confidence intervals for probe results: a paired bootstrap over test images and seeds.

COCOeval matches every detection of a model to the ground truth once (:func:`match_images`). A
bootstrap replicate then draws the test images with replacement (each image a weight, its number of
draws) and the seeds with replacement, and recomputes the average precision from the stored matches
(:func:`average_precision`), exactly as ``COCOeval.accumulate`` would on a test set that holds each image
as often as it was drawn. Two arms are compared on the *same* draws (paired), so what the images and
seeds have in common cancels out of their difference.

References
----------
Efron and Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall, 1993: the percentile
interval (ch. 13) and resampling paired data together.
Lin et al., "Microsoft COCO: Common Objects in Context", ECCV 2014, and pycocotools' COCOeval: AP over
IoU 0.50:0.05:0.95 with 101 recall points, area "all", at most 100 detections per image.
"""

from __future__ import annotations

import contextlib
import io
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from pycocotools.cocoeval import COCOeval

from .evaluation import coco_pair

RECALL_POINTS = np.linspace(0.0, 1.0, 101)
"""COCO's 101 recall thresholds 0, 0.01, ..., 1."""


@dataclass(frozen=True)
class CategoryMatches:
    """One category's detections over the test images, in COCOeval's order (image by image).

    Detections are sorted by descending score with a stable sort, as COCOeval's mergesort.

    Attributes
    ----------
    image : (D,) int ndarray
        Index of each detection's image (into ``ImageMatches.image_ids``), in sorted order.
    true : (T, D) bool ndarray
        Matched and not ignored, per IoU threshold, in sorted order.
    false : (T, D) bool ndarray
        Unmatched and not ignored, per IoU threshold, in sorted order.
    positives : (I,) int ndarray
        Ground-truth instances per image that count (not crowd, not ignored).
    """

    image: np.ndarray
    true: np.ndarray
    false: np.ndarray
    positives: np.ndarray


@dataclass(frozen=True)
class ImageMatches:
    """What COCOeval matched for one model on one test split, per category (area "all", 100 detections)."""

    image_ids: tuple[int, ...]
    categories: Mapping[str, CategoryMatches]
    iou_thresholds: np.ndarray


@dataclass(frozen=True)
class Interval:
    """A bootstrap estimate: the value on the full data and a percentile interval."""

    estimate: float
    low: float
    high: float
    level: float
    resamples: int

    def excludes_zero(self) -> bool:
        return self.low > 0 or self.high < 0

    def text(self, digits: int = 3) -> str:
        return f"{self.estimate:+.{digits}f} [{self.low:+.{digits}f}, {self.high:+.{digits}f}]"

    def to_dict(self) -> dict[str, Any]:
        return {
            "estimate": self.estimate,
            "low": self.low,
            "high": self.high,
            "level": self.level,
            "resamples": self.resamples,
        }


def match_images(ground_truth: Mapping[str, Any], results: Sequence[Mapping[str, Any]]) -> ImageMatches:
    """Run COCOeval's per-image matching of ``results`` against ``ground_truth`` and keep what AP needs.

    Parameters
    ----------
    ground_truth : mapping
        A COCO detection object; not changed.
    results : sequence of mapping
        COCO result entries (``image_id``, ``category_id``, ``bbox``, ``score``); may be empty.
    """
    gt, dt = coco_pair(ground_truth, results)
    with contextlib.redirect_stdout(io.StringIO()):
        scorer = COCOeval(gt, dt, iouType="bbox")
        scorer.evaluate()
    params = scorer.params
    n_images, n_areas = len(params.imgIds), len(params.areaRng)
    max_det = params.maxDets[-1]
    names = {c["id"]: c["name"] for c in gt.dataset["categories"]}
    n_thresholds = len(params.iouThrs)
    categories = {}
    for k, category_id in enumerate(params.catIds):
        # evalImgs is laid out [category][area][image]; area 0 is "all"
        cells = scorer.evalImgs[k * n_areas * n_images : k * n_areas * n_images + n_images]
        scores, matched, ignored, image, positives = [], [], [], [], np.zeros(n_images, np.int64)
        for i, cell in enumerate(cells):
            if cell is None:
                continue
            scores.append(np.asarray(cell["dtScores"][:max_det], np.float64))
            matched.append(np.asarray(cell["dtMatches"][:, :max_det]) > 0)
            ignored.append(np.asarray(cell["dtIgnore"][:, :max_det]).astype(bool))
            image.append(np.full(len(scores[-1]), i, np.int64))
            positives[i] = int(np.count_nonzero(np.asarray(cell["gtIgnore"]) == 0))
        if scores:
            all_scores = np.concatenate(scores)
            order = np.argsort(-all_scores, kind="mergesort")
            hit = np.concatenate(matched, axis=1)[:, order]
            skip = np.concatenate(ignored, axis=1)[:, order]
            where = np.concatenate(image)[order]
        else:
            hit = skip = np.zeros((n_thresholds, 0), bool)
            where = np.zeros(0, np.int64)
        categories[names[category_id]] = CategoryMatches(where, hit & ~skip, ~hit & ~skip, positives)
    return ImageMatches(tuple(int(i) for i in params.imgIds), categories, np.asarray(params.iouThrs))


def average_precision(
    matches: CategoryMatches, weights: np.ndarray | None = None, *, threshold: int | None = None
) -> np.ndarray | None:
    """AP per IoU threshold of one category, each image counted ``weights[i]`` times.

    With all weights 1 this is COCOeval's ``accumulate`` (precision made monotone from the right, read
    at the 101 recall points, averaged). ``None`` when no counted ground truth is left.

    Parameters
    ----------
    matches : CategoryMatches
    weights : (I,) int ndarray, optional
        How often each test image is drawn (default: once each).
    threshold : int, optional
        Compute only this IoU threshold's row (index into ``ImageMatches.iou_thresholds``; 0 is IoU 0.5).

    Returns
    -------
    (T,) float ndarray, or (1,) with ``threshold``; None when no counted ground truth is left
    """
    n_images = len(matches.positives)
    weights = np.ones(n_images, np.int64) if weights is None else np.asarray(weights)
    positives = float(np.dot(weights, matches.positives))
    if positives == 0:
        return None
    rows = slice(None) if threshold is None else slice(threshold, threshold + 1)
    w = weights[matches.image]
    keep = w > 0
    w = w[keep].astype(np.float64)
    tp = np.cumsum(matches.true[rows, keep] * w, axis=1)
    fp = np.cumsum(matches.false[rows, keep] * w, axis=1)
    out = np.zeros(tp.shape[0])
    if tp.shape[1] == 0:
        return out
    recall = tp / positives
    precision = tp / (tp + fp + np.spacing(1))
    # the precision envelope: at each point the best precision at this recall or beyond
    precision = np.maximum.accumulate(precision[:, ::-1], axis=1)[:, ::-1]
    for t in range(tp.shape[0]):
        at = np.searchsorted(recall[t], RECALL_POINTS, side="left")
        inside = at < recall.shape[1]
        out[t] = precision[t, at[inside]].sum() / len(RECALL_POINTS)
    return out


def class_mean(
    matches: ImageMatches, weights: np.ndarray | None = None, *, names: Sequence[str], iou: str
) -> float | None:
    """Mean over ``names`` (those with counted instances) of AP50 (``iou="50"``) or AP (``iou="all"``).

    With ``names`` and ``iou`` bound (``functools.partial``) it is a metric for :func:`paired_bootstrap`.
    """
    if iou not in ("50", "all"):
        raise ValueError(f"iou must be '50' or 'all', got {iou!r}")
    values = []
    for name in names:
        ap = average_precision(matches.categories[name], weights, threshold=0 if iou == "50" else None)
        if ap is not None:
            values.append(float(ap.mean()))
    return float(np.mean(values)) if values else None


Metric = Callable[[ImageMatches, np.ndarray | None], float | None]


def paired_bootstrap(
    arm: Sequence[ImageMatches],
    baseline: Sequence[ImageMatches] | None,
    metric: Metric,
    *,
    resamples: int = 1000,
    level: float = 0.95,
    rng: np.random.Generator | int | None = None,
) -> Interval:
    """Percentile interval of the mean over seeds of ``metric(arm) - metric(baseline)``.

    Each replicate draws the seeds (with replacement) and the test images (with replacement, the same
    draw for every seed and both arms); ``baseline=None`` gives the interval of the arm's own metric.

    Parameters
    ----------
    arm, baseline : sequence of ImageMatches
        One per seed, the same seeds in the same order (seed ``s`` of the arm pairs with seed ``s`` of the
        baseline), all on the same test images.
    metric : callable
        ``metric(matches, weights) -> float or None``, e.g. a :func:`class_mean` partial.
    resamples : int
    level : float
        Coverage of the interval, in (0, 1).
    rng : numpy Generator, int or None

    Raises
    ------
    ValueError
        Empty or unpaired inputs, other test images, or options out of range.
    """
    # 1. check inputs
    if not arm:
        raise ValueError("the arm has no seeds")
    if baseline is not None and len(baseline) != len(arm):
        raise ValueError(f"the arms are not paired: {len(arm)} seeds against {len(baseline)}")
    images = arm[0].image_ids
    for m in [*arm, *(baseline or [])]:
        if m.image_ids != images:
            raise ValueError("every run must be scored on the same test images")
    if not isinstance(resamples, int) or resamples < 1:
        raise ValueError(f"resamples must be an integer >= 1, got {resamples!r}")
    if not 0 < level < 1:
        raise ValueError(f"level must be in (0, 1), got {level}")
    rng = np.random.default_rng(rng)

    def value(seeds: np.ndarray, weights: np.ndarray | None) -> float | None:
        per_seed = []
        for s in seeds:
            ours = metric(arm[s], weights)
            theirs = 0.0 if baseline is None else metric(baseline[s], weights)
            if ours is None or theirs is None:
                return None
            per_seed.append(ours - theirs)
        return float(np.mean(per_seed))

    # 2. the estimate on the full data, then the replicates
    n_seeds, n_images = len(arm), len(images)
    estimate = value(np.arange(n_seeds), None)
    if estimate is None:
        raise ValueError("the metric is undefined on the full test split (no instances of its classes)")
    replicates = []
    for _ in range(resamples):
        seeds = rng.integers(0, n_seeds, n_seeds)
        weights = np.bincount(rng.integers(0, n_images, n_images), minlength=n_images)
        v = value(seeds, weights)
        if v is not None:
            replicates.append(v)
    tail = (1 - level) / 2 * 100
    low, high = np.percentile(replicates, [tail, 100 - tail]) if replicates else (estimate, estimate)
    return Interval(estimate, float(low), float(high), level, len(replicates))
