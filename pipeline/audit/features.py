"""A feature space learned from real crops; improved precision and recall in it; near-copies.

Features are the penultimate (64-wide) layer of a crop classifier trained at audit time, from scratch,
on the real training split only: its object classes against background crops of the same images, by
the verifier's own training routine (:func:`pipeline.generator.verifier.fit_verifier`, which also fixes
the crop geometry). It is a fresh network with its own seed, not the model folder's verifier, so a
generator tuned against that verifier is not judged by it.

References
----------
Kynkaanniemi, Karras, Laine, Lehtinen, Aila, "Improved Precision and Recall Metric for Assessing
Generative Models", NeurIPS 2019: each set's manifold is the union of balls around its samples with
radius the distance to the k-th nearest neighbour in the same set (k = 3); precision is the share of
generated samples inside the real manifold, recall the share of real samples inside the generated one.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from ..dataset import Dataset
from ..generator.examples import load_examples
from ..generator.verifier import CropNet, crops_to_tensor, fit_verifier

K_NEAREST = 3
"""k of the k-nearest-neighbour radii (the paper's choice)."""
FEATURE_STEPS = 300
"""Training steps of the feature network (batches of 32 crops)."""
NEAR_COPY_QUANTILE = 0.05
"""A synthetic crop is a near-copy when it is closer to its nearest training crop than this share of
held-out real crops are to theirs (so about this share of independent real instances would be flagged)."""


def train_feature_net(train: Dataset, *, steps: int = FEATURE_STEPS, rng: np.random.Generator | int | None) -> CropNet:
    """Train the feature network on ``train``'s real object and background crops (see the module)."""
    return fit_verifier(load_examples(train), steps=steps, batch_size=32, rng=rng).net


@torch.no_grad()
def embed(net: CropNet, crops: np.ndarray, *, batch_size: int = 256) -> np.ndarray:
    """Penultimate-layer features of ``(N, S, S, 3) uint8`` crops as an ``(N, 64) float64`` array."""
    net.eval()
    starts = range(0, len(crops), batch_size)
    parts = [net.embed(crops_to_tensor(crops[i : i + batch_size])).double().numpy() for i in starts]
    return np.concatenate(parts) if parts else np.zeros((0, 64), np.float64)


def _distances(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    squared = (x * x).sum(1)[:, None] + (y * y).sum(1)[None, :] - 2.0 * x @ y.T
    return np.sqrt(np.maximum(squared, 0.0))


def knn_radii(x: np.ndarray, k: int = K_NEAREST) -> np.ndarray:
    """Distance from each row of ``(N, D)`` ``x`` to its k-th nearest other row; ``N > k``."""
    if len(x) <= k:
        raise ValueError(f"need more than k = {k} samples for k-nearest-neighbour radii, got {len(x)}")
    return np.sort(_distances(x, x), axis=1)[:, k]


def precision_recall(real: np.ndarray, fake: np.ndarray, k: int = K_NEAREST) -> tuple[float, float]:
    """Improved precision and recall of ``fake`` against ``real`` (Kynkaanniemi et al., 2019).

    Parameters
    ----------
    real, fake : (N, D) and (M, D) float ndarray
        Features; ``N, M > k``.
    k : int

    Returns
    -------
    (precision, recall) : tuple of float
        ``precision``: share of ``fake`` rows within the k-NN radius of some ``real`` row;
        ``recall``: share of ``real`` rows within the k-NN radius of some ``fake`` row.
    """
    between = _distances(fake, real)
    precision = float(np.mean(np.any(between <= knn_radii(real, k)[None, :], axis=1)))
    recall = float(np.mean(np.any(between.T <= knn_radii(fake, k)[None, :], axis=1)))
    return precision, recall


def coverage(
    real: np.ndarray, fake: np.ndarray, *, k: int = K_NEAREST, repeats: int = 10, rng: np.random.Generator | int | None
) -> dict[str, Any]:
    """Precision and recall of ``fake`` against half of ``real``, with the other half as the reference.

    Each repeat splits ``real`` at random into halves A and B of ``m`` rows and draws ``m`` rows of
    ``fake``, ``m = min(len(real) // 2, len(fake))``, so that both comparisons use equal set sizes (the
    radii shrink as a set grows). Figures are means over the repeats.

    Returns
    -------
    dict
        ``precision``, ``recall`` (``fake`` against A), ``reference_precision``, ``reference_recall``
        (B against A), ``n_per_set`` (m), ``repeats``.

    Raises
    ------
    ValueError
        ``m <= k``.
    """
    rng = np.random.default_rng(rng)
    m = min(len(real) // 2, len(fake))
    if m <= k:
        raise ValueError(f"need more than {k} instances per set, got {len(real)} real and {len(fake)} synthetic")
    figures = []
    for _ in range(repeats):
        order = rng.permutation(len(real))
        half_a, half_b = real[order[:m]], real[order[m : 2 * m]]
        drawn = fake[rng.permutation(len(fake))[:m]]
        figures.append([*precision_recall(half_a, drawn, k), *precision_recall(half_a, half_b, k)])
    p, r, rp, rr = np.mean(figures, axis=0)
    return {
        "precision": float(p),
        "recall": float(r),
        "reference_precision": float(rp),
        "reference_recall": float(rr),
        "n_per_set": m,
        "repeats": repeats,
    }


def near_copies(
    fake: np.ndarray, heldout: np.ndarray, train: np.ndarray, *, quantile: float = NEAR_COPY_QUANTILE
) -> dict[str, Any]:
    """Each synthetic crop's nearest training crop, and the share closer than held-out real crops get.

    Parameters
    ----------
    fake, heldout, train : (M, D), (N, D), (T, D) float ndarray
        Features of the synthetic, held-out real and training real crops of one class; N, T >= 1.
    quantile : float
        See :data:`NEAR_COPY_QUANTILE`.

    Returns
    -------
    dict
        ``share`` of near-copies, ``threshold`` (the ``quantile`` of held-out nearest-training
        distances), ``median_distance`` and ``reference_median_distance`` (synthetic and held-out
        median distances to the nearest training crop), and arrays ``nearest`` (M,) int64 and
        ``distance`` (M,) float64 (not JSON; drop before saving).
    """
    if len(heldout) == 0 or len(train) == 0:
        raise ValueError("near-copies need at least one held-out and one training crop")
    reference = _distances(heldout, train).min(axis=1)
    threshold = float(np.quantile(reference, quantile))
    between = _distances(fake, train)
    nearest = between.argmin(axis=1)
    distance = between[np.arange(len(fake)), nearest]
    return {
        "share": float(np.mean(distance < threshold)) if len(fake) else None,
        "threshold": threshold,
        "median_distance": float(np.median(distance)) if len(fake) else None,
        "reference_median_distance": float(np.median(reference)),
        "nearest": nearest.astype(np.int64),
        "distance": distance,
    }
