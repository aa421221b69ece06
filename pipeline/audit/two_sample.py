"""Classifier two-sample test: can a small CNN tell two sets of crops apart on crops it has not seen?

The larger set is subsampled to the size of the smaller one (balanced classes, so chance is exactly 0.5).
Both sets are split into ``folds`` stratified folds; for each fold a fresh :class:`CropNet` is trained on
the others and predicts the held-out fold, so every crop is predicted once by a network that never saw
it. The accuracy over all ``2 n`` predictions gets a Wilson score interval and a one-sided exact binomial
p-value against chance. The folds share training data, so the predictions are not quite independent
trials; the interval is the usual approximation (Lopez-Paz and Oquab use a single held-out split).

With ``groups_b``, the folds of ``b`` are whole groups (grouped cross-validation, common practice against
leakage between dependent samples): a network never predicts a crop of a group it was trained on. For
synthetic instances made from a few real exemplars, the plain test also detects that the same objects
repeat; the grouped one asks only whether the network can tell a composite of an exemplar it has never
seen from a real instance.

References
----------
Lopez-Paz, Oquab, "Revisiting classifier two-sample tests", ICLR 2017: accuracy of a classifier on
held-out samples as the test statistic, 0.5 under the null hypothesis that both samples share one
distribution.
Wilson, "Probable inference, the law of succession, and statistical inference", JASA 22, 1927: the score
interval.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Hashable, Sequence
from dataclasses import dataclass
from fractions import Fraction
from statistics import NormalDist

import numpy as np
import torch
from torch import nn

from ..generator.verifier import CropNet, crops_to_tensor

CHANNELS = (16, 32, 64)
"""Widths of the test network's three conv stages (the verifier's architecture)."""


@dataclass(frozen=True)
class TwoSampleResult:
    """Outcome of :func:`two_sample_test`.

    Attributes
    ----------
    accuracy : float
        Share of held-out predictions that were right, in [0, 1] (mean over the repeats).
    low, high : float
        Wilson score interval of the accuracy at ``confidence``.
    correct, trials : int
        ``trials = 2 n`` (one test's), ``correct`` the mean accuracy's count of them.
    p_value : float
        One-sided exact binomial P(at least ``correct`` right | chance 0.5).
    index_a, index_b : int64 ndarray
        Which crops of ``a`` and ``b`` took part (the subsamples of all repeats).
    score_b : float64 ndarray
        Held-out probability that each used crop of ``b`` belongs to ``b`` (low = "looks like ``a``").
    accuracies : tuple of float
        Each repeat's accuracy.
    """

    accuracy: float
    low: float
    high: float
    correct: int
    trials: int
    p_value: float
    index_a: np.ndarray
    index_b: np.ndarray
    score_b: np.ndarray
    accuracies: tuple[float, ...] = ()

    def to_dict(self) -> dict:
        keys = ("accuracy", "low", "high", "correct", "trials", "p_value")
        return {**{k: getattr(self, k) for k in keys}, "repeats": list(self.accuracies)}


@dataclass(frozen=True)
class TwoSampleSettings:
    """How the audit runs its two-sample tests (see :func:`two_sample_test`)."""

    folds: int = 5
    epochs: int = 30
    repeats: int = 1

    def run(
        self, a: np.ndarray, b: np.ndarray, rng: np.random.Generator, groups_b: Sequence[Hashable] | None = None
    ) -> TwoSampleResult:
        """:func:`two_sample_test` of ``a`` and ``b`` with these settings."""
        return two_sample_test(
            a, b, folds=self.folds, epochs=self.epochs, repeats=self.repeats, rng=rng, groups_b=groups_b
        )


def wilson_interval(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion.

    Parameters
    ----------
    successes, trials : int
        ``0 <= successes <= trials``, ``trials >= 1``.
    confidence : float
        In (0, 1).

    Returns
    -------
    (low, high) : tuple of float

    References
    ----------
    Wilson, JASA 22, 1927; worked examples in Newcombe, "Two-sided confidence intervals for the single
    proportion: comparison of seven methods", Statistics in Medicine 17, 1998.
    """
    if trials < 1 or not 0 <= successes <= trials:
        raise ValueError(f"need 0 <= successes <= trials and trials >= 1, got {successes}/{trials}")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    p = successes / trials
    denominator = 1 + z * z / trials
    centre = (p + z * z / (2 * trials)) / denominator
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / denominator
    return max(0.0, centre - half), min(1.0, centre + half)


def binomial_tail(successes: int, trials: int) -> float:
    """P(X >= successes) for X ~ Binomial(trials, 1/2), exact."""
    if trials < 0 or not 0 <= successes <= trials:
        raise ValueError(f"need 0 <= successes <= trials, got {successes}/{trials}")
    return float(Fraction(sum(math.comb(trials, k) for k in range(successes, trials + 1)), 2**trials))


def _train(crops: np.ndarray, labels: np.ndarray, *, epochs: int, batch_size: int, seed: int) -> CropNet:
    rng = np.random.default_rng(seed)
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        net = CropNet(2, CHANNELS)
    optimizer = torch.optim.Adam(net.parameters(), lr=2e-3)
    x_all, y_all = crops_to_tensor(crops), torch.from_numpy(labels)
    net.train()
    for _ in range(epochs):
        order = rng.permutation(len(crops))
        for start in range(0, len(order), batch_size):
            picked = order[start : start + batch_size]
            x = x_all[picked]
            flip = torch.from_numpy(rng.random(len(picked)) < 0.5)
            # Mirror images are equally likely on both sides, so flipping teaches nothing false.
            x = torch.where(flip[:, None, None, None], x.flip(3), x)
            loss = nn.functional.cross_entropy(net(x), y_all[picked])
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            optimizer.step()
    net.eval()
    return net


def two_sample_test(
    a: np.ndarray,
    b: np.ndarray,
    *,
    folds: int = 5,
    epochs: int = 30,
    batch_size: int = 32,
    confidence: float = 0.95,
    rng: np.random.Generator | int | None = None,
    groups_b: Sequence[Hashable] | None = None,
    repeats: int = 1,
) -> TwoSampleResult:
    """Held-out accuracy of a CNN telling crops of ``a`` from crops of ``b`` (k-fold cross-validation).

    Parameters
    ----------
    a, b : (N, S, S, 3) and (M, S, S, 3) uint8 ndarray
        Crops of one geometry; ``min(N, M) >= folds``.
    folds : int
        k of the k-fold cross-validation, >= 2.
    epochs : int
        Passes over each fold's training crops.
    batch_size : int
    confidence : float
        Level of the Wilson interval.
    rng : Generator, int or None
        Seeds the subsample, the folds, the initial weights and every batch.
    groups_b : sequence, optional
        One group key per crop of ``b`` (say, the exemplar it was made from); each group is held out
        whole. The subsample of ``b`` must hold at least ``folds`` groups.
    repeats : int
        Whole tests, each on a new subsample of the larger side and new folds; the accuracy is their
        mean. With 45 real crops against 200 synthetic ones a single test sees a fifth of the synthetic
        set and its accuracy moves by about +-0.07 with the seed; repeats use more of the set and steady
        the figure. The repeats share the smaller side, so they are not independent: the interval and
        p-value are those of one test's ``2 n`` trials at the mean accuracy (conservative).

    Returns
    -------
    TwoSampleResult
        ``score_b`` is each used crop's mean held-out score over the repeats that used it.

    Raises
    ------
    ValueError
        Shapes differ, the arrays are not uint8 crops, a side has fewer crops than ``folds``, or
        ``groups_b`` does not match ``b`` or holds too few groups.
    """
    for name, crops in (("a", a), ("b", b)):
        if not isinstance(crops, np.ndarray) or crops.dtype != np.uint8 or crops.ndim != 4 or crops.shape[3] != 3:
            raise ValueError(f"{name} must be an (N, S, S, 3) uint8 array, got {getattr(crops, 'shape', crops)}")
    if a.shape[1:] != b.shape[1:]:
        raise ValueError(f"a and b must share one crop geometry, got {a.shape[1:]} and {b.shape[1:]}")
    if folds < 2 or epochs < 1 or batch_size < 1 or repeats < 1:
        raise ValueError(
            f"need folds >= 2, epochs >= 1, batch_size >= 1, repeats >= 1, got {folds}, {epochs}, {batch_size}, "
            f"{repeats}"
        )
    n = min(len(a), len(b))
    if n < folds:
        raise ValueError(f"each side needs at least {folds} crops (one per fold), got {len(a)} and {len(b)}")
    if groups_b is not None and len(groups_b) != len(b):
        raise ValueError(f"groups_b needs one key per crop of b: {len(groups_b)} keys for {len(b)} crops")
    rng = np.random.default_rng(rng)
    accuracies = []
    used_a = np.zeros(len(a), bool)
    score_sum, score_count = np.zeros(len(b)), np.zeros(len(b))
    for _ in range(repeats):
        index_a, index_b, right, scores = _one_test(a, b, n, folds, epochs, batch_size, rng, groups_b)
        accuracies.append(right / (2 * n))
        used_a[index_a] = True
        score_sum[index_b] += scores
        score_count[index_b] += 1
    accuracy = float(np.mean(accuracies))
    mean_correct = round(accuracy * 2 * n)
    low, high = wilson_interval(mean_correct, 2 * n, confidence)
    index_b = np.flatnonzero(score_count)
    return TwoSampleResult(
        accuracy=accuracy,
        low=low,
        high=high,
        correct=mean_correct,
        trials=2 * n,
        p_value=binomial_tail(mean_correct, 2 * n),
        index_a=np.flatnonzero(used_a),
        index_b=index_b,
        score_b=score_sum[index_b] / score_count[index_b],
        accuracies=tuple(accuracies),
    )


def _one_test(
    a: np.ndarray,
    b: np.ndarray,
    n: int,
    folds: int,
    epochs: int,
    batch_size: int,
    rng: np.random.Generator,
    groups_b: Sequence[Hashable] | None,
) -> tuple[np.ndarray, np.ndarray, int, np.ndarray]:
    """One k-fold test on ``n`` crops of each side: the subsample's indices, the right predictions, and
    the held-out scores of ``b``'s crops."""
    index_a = np.sort(rng.permutation(len(a))[:n])
    index_b = np.sort(rng.permutation(len(b))[:n])
    crops = np.concatenate([a[index_a], b[index_b]])
    labels = np.repeat(np.array([0, 1], np.int64), n)
    fold_a = rng.permutation(n) % folds
    if groups_b is None:
        fold_b = rng.permutation(n) % folds
    else:
        fold_b = group_folds([groups_b[i] for i in index_b], folds, rng)
    fold_of = np.concatenate([fold_a, fold_b])
    scores = np.zeros(2 * n, np.float64)
    for fold in range(folds):
        train, held = fold_of != fold, fold_of == fold
        net = _train(crops[train], labels[train], epochs=epochs, batch_size=batch_size, seed=int(rng.integers(2**62)))
        with torch.no_grad():
            scores[held] = torch.softmax(net(crops_to_tensor(crops[held])), dim=1)[:, 1].double().numpy()
    correct = int(np.sum((scores > 0.5) == (labels == 1)))
    return index_a, index_b, correct, scores[n:]


def group_folds(keys: Sequence[Hashable], folds: int, rng: np.random.Generator) -> np.ndarray:
    """The fold of each crop whose group is ``keys[i]``: the groups, shuffled, dealt to the folds largest
    first, each to the fold with the fewest crops so far (balanced folds)."""
    distinct = list(dict.fromkeys(keys))
    if len(distinct) < folds:
        raise ValueError(f"a grouped test needs at least {folds} groups, got {len(distinct)}")
    counts = Counter(keys)
    shuffled = [distinct[i] for i in rng.permutation(len(distinct))]
    load = np.zeros(folds, np.int64)
    fold_of_group = {}
    for key in sorted(shuffled, key=lambda k: -counts[k]):
        fold = int(np.argmin(load))
        fold_of_group[key] = fold
        load[fold] += counts[key]
    return np.array([fold_of_group[k] for k in keys], np.int64)
