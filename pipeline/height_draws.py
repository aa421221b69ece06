"""Target box heights drawn around real ones (a kernel density estimate), and how close two height sets are."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np


def height_targets(heights: Sequence[float]) -> tuple[np.ndarray, float]:
    """The real box heights of a class and the log-space bandwidth to draw new heights around them.

    A new target height is a real one times ``exp(bandwidth z)``, ``z`` standard normal: a kernel density
    estimate of the log heights, so that 20 real instances give a smooth distribution rather than 20 values.

    Returns
    -------
    ((N,) float64 ndarray of heights, bandwidth)

    References
    ----------
    B. W. Silverman, "Density Estimation for Statistics and Data Analysis", 1986: the rule-of-thumb
    bandwidth ``0.9 min(sd, IQR / 1.34) n^(-1/5)`` (from memory).
    """
    values = np.asarray(heights, dtype=np.float64)
    values = values[np.isfinite(values) & (values > 0)]
    if values.size == 0:
        raise ValueError("no real box heights to draw target heights from")
    logs = np.log(values)
    if values.size < 2:
        return values, 0.0
    q75, q25 = np.percentile(logs, [75, 25])
    spread = min(float(np.std(logs, ddof=1)), float(q75 - q25) / 1.34) or float(np.std(logs, ddof=1))
    return values, 0.9 * spread * values.size ** (-0.2)


def draw_height(heights: np.ndarray, bandwidth: float, rng: np.random.Generator) -> float:
    """One target height from :func:`height_targets`' kernel density estimate."""
    base = float(heights[rng.integers(heights.size)])
    return base * math.exp(bandwidth * float(rng.standard_normal()))


def ks_distance(a: Sequence[float], b: Sequence[float]) -> float:
    """Two-sample Kolmogorov-Smirnov distance: the largest gap between the two empirical CDFs.

    References
    ----------
    N. Smirnov, "Table for estimating the goodness of fit of empirical distributions", Ann. Math.
    Statist. 19 (1948) (from memory).
    """
    x, y = np.sort(np.asarray(a, dtype=np.float64)), np.sort(np.asarray(b, dtype=np.float64))
    if x.size == 0 or y.size == 0:
        return math.nan
    grid = np.concatenate([x, y])
    fx = np.searchsorted(x, grid, side="right") / x.size
    fy = np.searchsorted(y, grid, side="right") / y.size
    return float(np.max(np.abs(fx - fy)))
