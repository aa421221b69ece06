"""The robust solver behind the fit: RANSAC for a starting horizon, then Tukey-weighted Gauss-Newton.

References
----------
Fischler, Bolles, "Random Sample Consensus", CACM 24(6), 1981.
Tukey's biweight: Beaton, Tukey, "The fitting of power series", Technometrics 16(2), 1974.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .boxes import Boxes

_RANSAC_HYPOTHESES = 400
_INLIER_LOG = 0.25
_TUKEY_C = 4.685


@dataclass(frozen=True)
class Fit:
    """Result of the robust refinement."""

    horizon: float
    log_ratio: np.ndarray
    offsets: np.ndarray
    horizon_sd: float
    weights: np.ndarray
    residual: np.ndarray


def _residuals(boxes: Boxes, horizon: float | np.ndarray, log_ratio: np.ndarray) -> np.ndarray:
    """``log h - log r_c - log(v_b - v_h)``; NaN where the bottom row is not below the horizon.

    ``horizon`` is a scalar, an (N,) array (one horizon per box), or a (K, 1) array of hypotheses with
    ``log_ratio`` (K, C): the result is then (K, N).
    """
    depth = boxes.bottom - np.asarray(horizon, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_depth = np.where(depth > 0.5, np.log(np.maximum(depth, 0.5)), np.nan)
    return np.log(boxes.height) - log_ratio[..., boxes.cls] - log_depth


def _ratio_for_horizon(boxes: Boxes, n_classes: int, horizons: np.ndarray) -> np.ndarray:
    """(K, C) median log ratio of each class for each horizon hypothesis (the ratio's robust estimate)."""
    depth = boxes.bottom[None, :] - horizons[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        log_r = np.where(depth > 0.5, np.log(boxes.height) - np.log(np.maximum(depth, 0.5)), np.nan)
    out = np.full((len(horizons), n_classes), np.nan)
    for c in range(n_classes):
        own = log_r[:, boxes.cls == c]
        has = np.isfinite(own).any(axis=1)
        out[has, c] = np.nanmedian(own[has], axis=1)
    return out


def ransac_horizon(boxes: Boxes, n_classes: int, image_height: int, rng: np.random.Generator) -> float:
    hypotheses = []
    index_by_class = [np.flatnonzero(boxes.cls == c) for c in range(n_classes)]
    weights = np.array([len(ix) for ix in index_by_class], dtype=np.float64)
    # Two boxes at nearly the same row give an ill-conditioned line: ask for a 5% row difference.
    min_row_gap = 0.05 * image_height
    for _ in range(20 * _RANSAC_HYPOTHESES):
        if len(hypotheses) == _RANSAC_HYPOTHESES:
            break
        own = index_by_class[rng.choice(n_classes, p=weights / weights.sum())]
        i, j = rng.choice(own, size=2, replace=False)
        db = boxes.bottom[j] - boxes.bottom[i]
        dh = boxes.height[j] - boxes.height[i]
        if abs(db) < min_row_gap or dh * db <= 0:
            continue
        horizon = boxes.bottom[i] - boxes.height[i] * db / dh
        # Horizons far outside the frame are nonsense for a camera that sees the road.
        if -2 * image_height <= horizon < image_height:
            hypotheses.append(horizon)
    if not hypotheses:
        # All boxes at one row or with heights falling toward the camera: start from the horizon a
        # common ratio of 0.5 would give; the refinement takes it from there.
        return float(np.median(boxes.bottom - 2.0 * boxes.height))
    horizons = np.asarray(hypotheses)
    log_ratio = _ratio_for_horizon(boxes, n_classes, horizons)
    residual = _residuals(boxes, horizons[:, None], np.nan_to_num(log_ratio, nan=0.0))
    cost = np.where(np.isfinite(residual), np.minimum(residual**2, _INLIER_LOG**2), _INLIER_LOG**2).sum(axis=1)
    return float(horizons[np.argmin(cost)])


def irls(
    boxes: Boxes, n_classes: int, n_images: int, horizon: float, *, image_height: int, iterations: int = 60
) -> Fit:
    """Tukey-weighted Gauss-Newton on (log ratios, horizon, per-image offsets) with a shrinkage prior.

    Minimises ``sum_j w_j r_j^2 + s^2 sum_i o_i^2 / tau^2``: ``r_j`` the log residual of box j with its
    image's horizon ``v_h + o_i``, ``s`` the robust residual scale, ``tau`` the spread of the offsets,
    re-estimated each round as the root mean of ``o_i^2`` plus each offset's posterior variance. Each
    offset touches only its image's boxes, so the offsets are eliminated in closed form (Schur
    complement) and the cost grows linearly with the number of images.
    """
    log_ratio = np.nan_to_num(_ratio_for_horizon(boxes, n_classes, np.array([horizon]))[0], nan=0.0)
    offsets = np.zeros(n_images)
    tau = 0.02 * image_height
    for _ in range(iterations):
        residual = _residuals(boxes, horizon + offsets[boxes.image], log_ratio)
        scale = max(1.4826 * float(np.nanmedian(np.abs(residual))), 1e-3)
        weights = _tukey(residual, scale)
        system = _normal_system(boxes, n_classes, n_images, horizon, offsets, residual, weights, (scale / tau) ** 2)
        if system is None:
            break
        step_global, step_offsets, offset_var, _ = system
        # A step that would lift a horizon past the boxes standing below it is damped.
        old_depth = boxes.bottom - horizon - offsets[boxes.image]
        lift = step_global[n_classes] + step_offsets[boxes.image]
        risky = (weights > 0) & (lift > 0.5 * old_depth)
        shrink = float(np.min(0.5 * old_depth[risky] / lift[risky])) if risky.any() else 1.0
        log_ratio = log_ratio + shrink * step_global[:n_classes]
        horizon += shrink * float(step_global[n_classes])
        offsets = offsets + shrink * step_offsets
        tau = float(np.clip(np.sqrt(np.mean(offsets**2 + scale**2 * offset_var)), 0.05, image_height / 4))
        if shrink * max(np.max(np.abs(step_global)), np.max(np.abs(step_offsets), initial=0.0)) < 1e-7:
            break
    residual = _residuals(boxes, horizon + offsets[boxes.image], log_ratio)
    scale = max(1.4826 * float(np.nanmedian(np.abs(residual))), 1e-3)
    weights = _tukey(residual, scale)
    system = _normal_system(boxes, n_classes, n_images, horizon, offsets, residual, weights, (scale / tau) ** 2)
    leverage = system[3] if system is not None else np.zeros(len(residual))
    # Leave-one-out residuals: a box's own image offset partly absorbs its residual, which would make
    # the spread too small for a new object in that image.
    held_out = residual / np.maximum(1.0 - leverage, 1e-3)
    return Fit(float(horizon), log_ratio, offsets, tau, weights, held_out)


def _tukey(residual: np.ndarray, scale: float) -> np.ndarray:
    u = np.where(np.isfinite(residual), residual, np.inf) / (_TUKEY_C * scale)
    return np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)


def _normal_system(
    boxes: Boxes,
    n_classes: int,
    n_images: int,
    horizon: float,
    offsets: np.ndarray,
    residual: np.ndarray,
    weights: np.ndarray,
    penalty: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
    """One Gauss-Newton step with the per-image offsets eliminated.

    The residual's Jacobian is -1 on its class's log ratio and ``q = 1 / (v_b - v_h - o_i)`` on the horizon
    and on its image's offset. Normal matrix ``[[A, B], [B^T, D]]`` with ``D`` diagonal; the global step
    solves ``(A - B D^-1 B^T) x = -(g - B D^-1 g_o)``.

    Returns
    -------
    (global step (C+1,), offset step (M,), offset posterior variance / s^2 (M,), leverage (N,)), or None
    when the classes' and horizon's system is singular.
    """
    valid = np.isfinite(residual)
    w = np.where(valid, weights, 0.0)
    r = np.where(valid, residual, 0.0)
    q = np.where(valid, 1.0 / np.maximum(boxes.bottom - horizon - offsets[boxes.image], 0.5), 0.0)
    c, i, n_global = boxes.cls, boxes.image, n_classes + 1
    h = n_classes
    a = np.zeros((n_global, n_global))
    a[np.arange(n_classes), np.arange(n_classes)] = np.bincount(c, w, n_classes)
    a[:n_classes, h] = a[h, :n_classes] = -np.bincount(c, w * q, n_classes)
    a[h, h] = np.sum(w * q * q)
    b = np.zeros((n_global, n_images))
    b[:n_classes] = -np.bincount(c * n_images + i, w * q, n_classes * n_images).reshape(n_classes, n_images)
    b[h] = np.bincount(i, w * q * q, n_images)
    d = np.bincount(i, w * q * q, n_images) + penalty
    g = np.concatenate([-np.bincount(c, w * r, n_classes), [np.sum(w * q * r)]])
    g_o = np.bincount(i, w * q * r, n_images) + offsets * penalty
    y = b / d
    schur = a - y @ b.T
    if np.linalg.matrix_rank(schur) < n_global:
        return None
    cov_global = np.linalg.inv(schur)
    step_global = -cov_global @ (g - y @ g_o)
    step_offsets = -(g_o + b.T @ step_global) / d
    x = -cov_global @ y
    offset_var = 1.0 / d - np.einsum("ki,ki->i", y, x)
    # Leverage w_j J_j N^-1 J_j^T of each box, from the blocks of N^-1.
    quad = (
        cov_global[c, c]
        - 2 * q * cov_global[c, h]
        + q * q * cov_global[h, h]
        - 2 * q * x[c, i]
        + 2 * q * q * x[h, i]
        + q * q * offset_var[i]
    )
    return step_global, step_offsets, offset_var, w * quad
