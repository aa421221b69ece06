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
class Layout:
    """Who shares what in the joint fit of several camera groups.

    ``image_group`` (M,) gives each image's group; groups with ``free_horizon`` get their horizon fitted,
    the others keep their start (the calibrated principal row); every group but ``reference`` gets a log
    camera height relative to the reference's, and the class log ratios are the reference group's.
    ``horizon_prior`` (G, 2), where given, holds a fitted horizon's prior mean and sd (pixels; NaN: none).
    """

    n_classes: int
    image_group: np.ndarray
    free_horizon: np.ndarray
    reference: int
    horizon_prior: np.ndarray | None = None

    @property
    def n_groups(self) -> int:
        return len(self.free_horizon)

    def columns(self) -> tuple[np.ndarray, np.ndarray]:
        """Parameter column of each group's log camera height and horizon (-1: not a parameter)."""
        groups = np.arange(self.n_groups)
        camera = np.where(groups == self.reference, -1, self.n_classes + np.cumsum(groups != self.reference) - 1)
        first = self.n_classes + self.n_groups - 1
        horizon = np.where(self.free_horizon, first + np.cumsum(self.free_horizon) - 1, -1)
        return camera, horizon


@dataclass(frozen=True)
class Fit:
    """Result of the robust refinement: per group horizon, log camera height and offset spread."""

    horizons: np.ndarray
    log_ratio: np.ndarray
    log_camera: np.ndarray
    offsets: np.ndarray
    horizon_sd: np.ndarray
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


def ratio_for_horizon(boxes: Boxes, n_classes: int, horizons: np.ndarray) -> np.ndarray:
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
    """A starting horizon: the best of up to 400 lines through two boxes of one class (truncated loss)."""
    hypotheses = []
    index_by_class = [np.flatnonzero(boxes.cls == c) for c in range(n_classes)]
    weights = np.array([len(ix) if len(ix) >= 2 else 0 for ix in index_by_class], dtype=np.float64)
    if not weights.sum():
        return float(np.median(boxes.bottom - 2.0 * boxes.height))
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
    log_ratio = ratio_for_horizon(boxes, n_classes, horizons)
    residual = _residuals(boxes, horizons[:, None], np.nan_to_num(log_ratio, nan=0.0))
    cost = np.where(np.isfinite(residual), np.minimum(residual**2, _INLIER_LOG**2), _INLIER_LOG**2).sum(axis=1)
    return float(horizons[np.argmin(cost)])


def irls(
    boxes: Boxes,
    layout: Layout,
    horizons: np.ndarray,
    log_ratio: np.ndarray,
    log_camera: np.ndarray,
    *,
    image_heights: np.ndarray,
    iterations: int = 60,
) -> Fit:
    """Tukey-weighted Gauss-Newton on (class log ratios, group log camera heights, group horizons, per-image
    offsets) with a shrinkage prior on the offsets.

    Box j of class c in image i of group g has the log residual
    ``r_j = log h_j - (l_c - m_g) - log(v_b - v_g - o_i)``. Minimises
    ``sum_j w_j r_j^2 + s^2 sum_i o_i^2 / tau_g^2 + s^2 sum_g m_g^2 / M^2 + s^2 sum_g (v_g - c_g)^2 / p_g^2``:
    ``s`` the robust residual scale, ``tau_g`` the spread of group g's offsets, re-estimated each round as the
    root mean of ``o_i^2`` plus each offset's posterior variance, ``M = 1`` a weak prior on log camera-height
    differences that only keeps the system solvable when two groups share no class, and ``c_g, p_g`` a
    calibrated group's horizon prior (:attr:`Layout.horizon_prior`; none elsewhere). Each offset touches only
    its image's boxes, so the offsets are eliminated in closed form (Schur complement) and the cost grows
    linearly with the images.
    """
    horizons, log_ratio, log_camera = (np.array(v, dtype=np.float64) for v in (horizons, log_ratio, log_camera))
    group = layout.image_group[boxes.image]
    offsets = np.zeros(len(layout.image_group))
    tau = 0.02 * np.asarray(image_heights, dtype=np.float64)
    camera_col, horizon_col = layout.columns()
    for _ in range(iterations):
        state = _State(horizons, log_ratio, log_camera, offsets)
        residual, scale, weights, system = _reweighted(boxes, layout, group, state, tau)
        if system is None:
            break
        step_global, step_offsets, offset_var, _ = system
        # A step that would lift a horizon past the boxes standing below it is damped.
        step_horizon = np.where(horizon_col >= 0, step_global[np.maximum(horizon_col, 0)], 0.0)
        old_depth = boxes.bottom - horizons[group] - offsets[boxes.image]
        lift = step_horizon[group] + step_offsets[boxes.image]
        risky = (weights > 0) & (lift > 0.5 * old_depth)
        shrink = float(np.min(0.5 * old_depth[risky] / lift[risky])) if risky.any() else 1.0
        log_ratio = log_ratio + shrink * step_global[: layout.n_classes]
        log_camera = log_camera + shrink * np.where(camera_col >= 0, step_global[np.maximum(camera_col, 0)], 0.0)
        horizons = horizons + shrink * step_horizon
        offsets = offsets + shrink * step_offsets
        spread = offsets**2 + scale**2 * offset_var
        counts = np.bincount(layout.image_group, minlength=layout.n_groups)
        mean = np.bincount(layout.image_group, spread, layout.n_groups) / np.maximum(counts, 1)
        tau = np.clip(np.sqrt(mean), 0.05, np.asarray(image_heights) / 4)
        if shrink * max(np.max(np.abs(step_global)), np.max(np.abs(step_offsets), initial=0.0)) < 1e-7:
            break
    state = _State(horizons, log_ratio, log_camera, offsets)
    residual, scale, weights, system = _reweighted(boxes, layout, group, state, tau)
    leverage = system[3] if system is not None else np.zeros(len(residual))
    # Leave-one-out residuals: a box's own image offset partly absorbs its residual, which would make
    # the spread too small for a new object in that image.
    held_out = residual / np.maximum(1.0 - leverage, 1e-3)
    return Fit(horizons, log_ratio, log_camera, offsets, tau, weights, held_out)


@dataclass(frozen=True)
class _State:
    horizons: np.ndarray
    log_ratio: np.ndarray
    log_camera: np.ndarray
    offsets: np.ndarray


def _joint_residuals(boxes: Boxes, group: np.ndarray, state: _State) -> np.ndarray:
    """``log h - (l_c - m_g) - log(v_b - v_g - o_i)`` per box; NaN where the box is not below its horizon."""
    depth = boxes.bottom - state.horizons[group] - state.offsets[boxes.image]
    with np.errstate(invalid="ignore", divide="ignore"):
        log_depth = np.where(depth > 0.5, np.log(np.maximum(depth, 0.5)), np.nan)
    return np.log(boxes.height) - state.log_ratio[boxes.cls] + state.log_camera[group] - log_depth


def _tukey(residual: np.ndarray, scale: float) -> np.ndarray:
    u = np.where(np.isfinite(residual), residual, np.inf) / (_TUKEY_C * scale)
    return np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)


def _normal_system(
    boxes: Boxes,
    layout: Layout,
    state: _State,
    residual: np.ndarray,
    weights: np.ndarray,
    penalty: np.ndarray,
    ridge: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
    """One Gauss-Newton step with the per-image offsets eliminated.

    The residual's Jacobian is -1 on its class's log ratio, +1 on its group's log camera height and
    ``q = 1 / (v_b - v_g - o_i)`` on its group's horizon and on its image's offset. Normal matrix
    ``[[A, B], [B^T, D]]`` with ``D`` diagonal; the global step solves ``(A - B D^-1 B^T) x = -(g - B D^-1 g_o)``.

    Returns
    -------
    (global step (P,), offset step (M,), offset posterior variance / s^2 (M,), leverage (N,)), or None
    when the global system is singular.
    """
    valid = np.isfinite(residual)
    w = np.where(valid, weights, 0.0)
    r = np.where(valid, residual, 0.0)
    group = layout.image_group[boxes.image]
    depth = boxes.bottom - state.horizons[group] - state.offsets[boxes.image]
    q = np.where(valid, 1.0 / np.maximum(depth, 0.5), 0.0)
    camera_col, horizon_col = layout.columns()
    n_params = layout.n_classes + layout.n_groups - 1 + int(np.count_nonzero(layout.free_horizon))
    rows = np.arange(len(r))
    jac = np.zeros((len(r), n_params))
    jac[rows, boxes.cls] = -1.0
    has_camera = camera_col[group] >= 0
    jac[rows[has_camera], camera_col[group][has_camera]] = 1.0
    has_horizon = horizon_col[group] >= 0
    jac[rows[has_horizon], horizon_col[group][has_horizon]] = q[has_horizon]
    n_images = len(layout.image_group)
    prior = np.zeros(n_params)
    prior[camera_col[camera_col >= 0]] = ridge
    offset_from_prior = np.zeros(n_params)
    offset_from_prior[camera_col[camera_col >= 0]] = state.log_camera[camera_col >= 0]
    if layout.horizon_prior is not None:
        mean, sd = layout.horizon_prior.T
        has = (horizon_col >= 0) & np.isfinite(mean) & (sd > 0)
        prior[horizon_col[has]] = ridge / sd[has] ** 2
        offset_from_prior[horizon_col[has]] = state.horizons[has] - mean[has]
    wj = jac * w[:, None]
    a = wj.T @ jac + np.diag(prior)
    b = np.stack([np.bincount(boxes.image, wj[:, p] * q, n_images) for p in range(n_params)])
    d = np.bincount(boxes.image, w * q * q, n_images) + penalty
    g = wj.T @ r + prior * offset_from_prior
    g_o = np.bincount(boxes.image, w * q * r, n_images) + state.offsets * penalty
    y = b / d
    schur = a - y @ b.T
    if np.linalg.matrix_rank(schur) < n_params:
        return None
    cov_global = np.linalg.inv(schur)
    step_global = -cov_global @ (g - y @ g_o)
    step_offsets = -(g_o + b.T @ step_global) / d
    x = -cov_global @ y
    offset_var = 1.0 / d - np.einsum("ki,ki->i", y, x)
    # Leverage w_j J_j N^-1 J_j^T of each box, from the blocks of N^-1.
    quad = (
        np.einsum("np,pk,nk->n", jac, cov_global, jac)
        + 2 * q * np.einsum("np,pn->n", jac, x[:, boxes.image])
        + q * q * offset_var[boxes.image]
    )
    return step_global, step_offsets, offset_var, w * quad


def _reweighted(boxes, layout, group, state, tau):
    """One reweighting of the robust fit at ``state``: residuals, their robust scale (1.4826 MAD), the Tukey
    weights, and the normal system with each image offset's shrinkage penalty (None when singular)."""
    residual = _joint_residuals(boxes, group, state)
    scale = max(1.4826 * float(np.nanmedian(np.abs(residual))), 1e-3)
    weights = _tukey(residual, scale)
    penalty = (scale / tau[layout.image_group]) ** 2
    return residual, scale, weights, _normal_system(boxes, layout, state, residual, weights, penalty, scale**2)
