"""Edge strength of crops by box-height band, and how tightly boxes fit a known silhouette.

Sharpness depends on size (a small box holds fewer, softer edges), so synthetic and real instances are
compared only within the same box-height band; a band needs :data:`MIN_PER_BAND` instances on each
side, else it is shown but marked and left out of the overall ratio.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import cv2
import numpy as np

from ..silhouette import segmentation_mask

BAND_EDGES = (12.0, 24.0, 36.0, 48.0, 64.0, math.inf)
"""Box-height bands in pixels: [12, 24), [24, 36), ..., [64, inf)."""
MIN_PER_BAND = 5
"""Fewest instances per side for a band to count."""


def edge_strength(pixels: np.ndarray) -> float:
    """Mean gradient magnitude of an image patch (grey levels per pixel).

    The Sobel derivatives of the grey image (ITU-R BT.601 luma, as OpenCV's RGB2GRAY) are divided by
    8, so a ramp that rises ``s`` grey levels per pixel gives ``s``; the magnitude is averaged over the
    patch (border pixels reflect).

    Parameters
    ----------
    pixels : (H, W, 3) uint8 ndarray
        RGB, at least 1x1.

    Returns
    -------
    float

    References
    ----------
    The gradient-magnitude ("Tenengrad") focus measure: Krotkov, "Focusing", IJCV 1(3), 1987; compared
    with others in Pertuz, Puig, Garcia, "Analysis of focus measure operators for shape-from-focus",
    Pattern Recognition 46(5), 2013 (from memory).
    """
    grey = cv2.cvtColor(np.ascontiguousarray(pixels), cv2.COLOR_RGB2GRAY).astype(np.float32)
    gx = cv2.Sobel(grey, cv2.CV_32F, 1, 0, ksize=3, borderType=cv2.BORDER_REFLECT) / 8.0
    gy = cv2.Sobel(grey, cv2.CV_32F, 0, 1, ksize=3, borderType=cv2.BORDER_REFLECT) / 8.0
    return float(np.mean(np.sqrt(gx * gx + gy * gy)))


def compare_sharpness(
    synthetic: np.ndarray, synthetic_heights: np.ndarray, real: np.ndarray, real_heights: np.ndarray
) -> dict[str, Any]:
    """Median edge strength per box-height band, synthetic over real.

    Parameters
    ----------
    synthetic, real : (N,) float ndarray
        :func:`edge_strength` per instance.
    synthetic_heights, real_heights : (N,) float ndarray
        Box heights in pixels.

    Returns
    -------
    dict
        ``bands``: per band ``low``, ``high`` (``None`` for no upper end), ``n_synthetic``, ``n_real``,
        medians ``synthetic``, ``real``, their ``ratio`` (``None`` where a side is empty) and ``counts``
        (both sides have at least :data:`MIN_PER_BAND`); ``ratio``: the geometric mean of the counted
        bands' ratios weighted by their synthetic counts (``None`` if no band counts). Below 1 means
        the synthetic instances are softer than real ones of the same height.
    """
    bands = []
    logs, weights = [], []
    for low, high in zip(BAND_EDGES[:-1], BAND_EDGES[1:], strict=True):
        s = synthetic[(synthetic_heights >= low) & (synthetic_heights < high)]
        r = real[(real_heights >= low) & (real_heights < high)]
        s_med = float(np.median(s)) if len(s) else None
        r_med = float(np.median(r)) if len(r) else None
        ratio = s_med / r_med if s_med is not None and r_med else None
        counts = len(s) >= MIN_PER_BAND and len(r) >= MIN_PER_BAND and ratio is not None and ratio > 0
        if counts:
            logs.append(math.log(ratio))
            weights.append(len(s))
        bands.append(
            {
                "low": low,
                "high": None if math.isinf(high) else high,
                "n_synthetic": int(len(s)),
                "n_real": int(len(r)),
                "synthetic": s_med,
                "real": r_med,
                "ratio": ratio,
                "counts": counts,
            }
        )
    overall = math.exp(float(np.average(logs, weights=weights))) if logs else None
    return {"bands": bands, "ratio": overall}


def silhouette_fit(segmentation: Any, box: Sequence[float], image_size: tuple[int, int]) -> tuple[float, float]:
    """How tightly ``box`` fits the silhouette ``segmentation``.

    Parameters
    ----------
    segmentation : COCO polygon list or RLE dict
    box : (x, y, w, h)
    image_size : (width, height)

    Returns
    -------
    (fill, beyond) : tuple of float
        ``fill``: share of the box's area the silhouette covers; ``beyond``: share of the box's area
        outside the silhouette's own bounding box (0 for a tight box, whatever the object's shape).

    Raises
    ------
    ValueError
        The segmentation cannot be decoded or is empty.
    """
    width, height = image_size
    try:
        silhouette = segmentation_mask(segmentation, height, width)
    except (TypeError, ValueError, KeyError, IndexError) as exc:
        raise ValueError(f"segmentation cannot be decoded ({exc})") from None
    rows, cols = np.nonzero(silhouette)
    if len(rows) == 0:
        raise ValueError("segmentation is empty")
    x, y, w, h = (float(v) for v in box)
    inside = silhouette[max(int(y), 0) : int(math.ceil(y + h)), max(int(x), 0) : int(math.ceil(x + w))]
    fill = float(inside.sum()) / (w * h)
    sx0, sy0, sx1, sy1 = cols.min(), rows.min(), cols.max() + 1.0, rows.max() + 1.0
    overlap = max(0.0, min(x + w, sx1) - max(x, sx0)) * max(0.0, min(y + h, sy1) - max(y, sy0))
    return min(fill, 1.0), 1.0 - overlap / (w * h)


def box_fit(instances: Sequence[Any]) -> dict[str, Any] | None:
    """Median :func:`silhouette_fit` of the instances that carry a silhouette; ``None`` if none does.

    Returns
    -------
    dict or None
        ``n`` (instances with a usable silhouette), ``fill`` and ``beyond`` (medians).
    """
    fits = []
    for item in instances:
        if item.segmentation is None:
            continue
        try:
            fits.append(silhouette_fit(item.segmentation, item.box, item.image_size))
        except ValueError:
            continue
    if not fits:
        return None
    fill, beyond = np.median(np.asarray(fits), axis=0)
    return {"n": len(fits), "fill": float(fill), "beyond": float(beyond)}
