"""Fog: Koschmieder's law, the meteorological optical range, the airlight, and the contrast of an object.

References
----------
.. [1] H. Koschmieder, "Theorie der horizontalen Sichtweite", Beitr. Phys. freien Atm. 12, 1924 (via [2]).
.. [2] C. Sakaridis, D. Dai, L. Van Gool, "Semantic Foggy Scene Understanding with Synthetic Data",
   IJCV 126, 2018: ``I = J t + A (1 - t)``, ``t = exp(-beta d)``, beta 0.005-0.02 per metre.
.. [3] WMO Guide to Meteorological Instruments and Methods of Observation (WMO-No. 8), and CIE: the
   meteorological optical range is the distance at which a beam's contrast falls to 5%.
.. [4] K. He, J. Sun, X. Tang, "Single Image Haze Removal Using Dark Channel Prior", CVPR 2009.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import cv2
import numpy as np

from .colour import check_image, colour_linear, linear_to_srgb, srgb_to_linear

MOR_CONTRAST = 0.05
"""Contrast threshold of the meteorological optical range (WMO/CIE): at distance V a beam keeps 5%."""


def extinction_coefficient(visibility_m: float, *, contrast: float = MOR_CONTRAST) -> float:
    """Extinction coefficient ``beta = -ln(contrast) / V`` (per metre); ``ln(20) / V`` for the MOR.

    Parameters
    ----------
    visibility_m : float
        Meteorological optical range V in metres (> 0).
    contrast : float
        Contrast threshold that defines V: 0.05 for the MOR (WMO/CIE), 0.02 for the older
        meteorological range.

    References
    ----------
    WMO-No. 8 (MOR definition); Koschmieder 1924.
    """
    if not (visibility_m > 0 and math.isfinite(visibility_m)):
        raise ValueError(f"visibility_m must be a finite number > 0, got {visibility_m!r}")
    if not 0 < contrast < 1:
        raise ValueError(f"contrast must be in (0, 1), got {contrast!r}")
    return -math.log(contrast) / visibility_m


def transmission(distance_m: np.ndarray | float, beta: float) -> np.ndarray:
    """Koschmieder transmission ``t = exp(-beta d)``; 0 at infinite distance, 1 at d = 0.

    Parameters
    ----------
    distance_m : float or ndarray
        Distances in metres (>= 0, may be ``inf``).
    beta : float
        Extinction coefficient per metre (>= 0).

    Returns
    -------
    float64 ndarray of the same shape
    """
    if not beta >= 0:
        raise ValueError(f"beta must be >= 0, got {beta!r}")
    d = np.asarray(distance_m, dtype=np.float64)
    if np.any(d < 0):
        raise ValueError("distances must be >= 0")
    with np.errstate(invalid="ignore"):
        return np.where(np.isinf(d), 0.0 if beta > 0 else 1.0, np.exp(-beta * np.where(np.isinf(d), 0.0, d)))


def dark_channel(image: np.ndarray, *, patch_px: int = 15) -> np.ndarray:
    """Minimum over RGB and over a ``patch_px`` square around each pixel (He et al. 2009): (H, W) uint8."""
    check_image(image)
    return cv2.erode(image.min(axis=2), np.ones((patch_px, patch_px), np.uint8))


def estimate_airlight(
    image: np.ndarray, where: np.ndarray | None = None, *, share: float = 0.001, patch_px: int = 15
) -> np.ndarray:
    """Atmospheric light from the image: mean colour of the pixels whose dark channel is brightest.

    The dark channel of a haze-free scene is near zero except where light from the atmosphere fills every
    channel; its top ``share`` (0.1%) of pixels are the most haze-opaque (He et al. 2009). Among them the
    mean colour is taken (steadier than the single brightest pixel on a small image). ``where`` restricts the
    search (for example to the sky); with fewer than 20 pixels there the whole image is used.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    where : (H, W) bool ndarray, optional
    share : float in (0, 1]
    patch_px : int
        Side of the dark channel's square (He et al. use 15 px).

    Returns
    -------
    (3,) float64 ndarray
        sRGB in [0, 1].

    References
    ----------
    He, Sun, Tang, "Single Image Haze Removal Using Dark Channel Prior", CVPR 2009.
    """
    check_image(image)
    if not 0 < share <= 1:
        raise ValueError(f"share must be in (0, 1], got {share!r}")
    dark = dark_channel(image, patch_px=patch_px).ravel()
    pixels = image.reshape(-1, 3)
    if where is not None and np.count_nonzero(where) >= 20:
        keep = np.flatnonzero(np.asarray(where, bool).ravel())
        dark, pixels = dark[keep], pixels[keep]
    count = max(1, int(round(share * dark.size)))
    top = np.argpartition(dark, dark.size - count)[dark.size - count :]
    return pixels[top].astype(np.float64).mean(axis=0) / 255.0


def apply_fog(image: np.ndarray, transmission_map: np.ndarray, airlight: np.ndarray) -> np.ndarray:
    """Koschmieder's law ``I = J t + A (1 - t)`` per pixel, in linear light.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
        The clear scene J (sRGB).
    transmission_map : (H, W) float ndarray in [0, 1]
    airlight : (3,) float
        A, sRGB in [0, 1] (see :func:`estimate_airlight`).

    Returns
    -------
    (H, W, 3) uint8 ndarray

    References
    ----------
    Sakaridis, Dai, Van Gool, IJCV 2018; Koschmieder 1924.
    """
    check_image(image)
    t = np.asarray(transmission_map, dtype=np.float32)
    if t.shape != image.shape[:2] or np.any((t < 0) | (t > 1)):
        raise ValueError(f"transmission_map must be an {image.shape[:2]} array in [0, 1], got {t.shape}")
    try:
        a = colour_linear(airlight)
    except ValueError:
        raise ValueError(f"airlight must be 3 sRGB values in [0, 1], got {airlight!r}") from None
    linear = srgb_to_linear(image) * t[..., None] + a * (1.0 - t[..., None])
    return linear_to_srgb(linear)


def ring_mask(
    box: Sequence[float], shape: tuple[int, int], *, width_share: float = 0.25, min_px: int = 3
) -> np.ndarray:
    """The ring around a box: the box grown by ``width_share`` of its shorter side (>= ``min_px``), minus it.

    Returns
    -------
    (H, W) bool ndarray (clipped to the image)
    """
    x, y, w, h = (float(v) for v in box)
    grow = max(min_px, int(math.ceil(width_share * min(w, h))))
    inner = box_pixels(shape, (x, y, w, h))
    outer = box_pixels(shape, (x - grow, y - grow, w + 2 * grow, h + 2 * grow))
    return outer & ~inner


def box_pixels(shape: tuple[int, int], box: Sequence[float]) -> np.ndarray:
    """Pixels a COCO box ``(x, y, w, h)`` touches, clipped to the image: (H, W) bool."""
    height, width = shape
    x, y, w, h = (float(v) for v in box)
    mask = np.zeros(shape, dtype=bool)
    c0, r0 = max(0, int(math.floor(x))), max(0, int(math.floor(y)))
    c1, r1 = min(width, int(math.ceil(x + w))), min(height, int(math.ceil(y + h)))
    mask[r0:r1, c0:c1] = True
    return mask


def object_contrast(luminance_map: np.ndarray, region: np.ndarray, ring: np.ndarray) -> float:
    """Apparent contrast of an object against its surroundings: mean ``|L - L_b| / L_b`` over its pixels.

    ``L_b`` is the mean luminance of the ring around it. For a uniform object this is the Weber contrast
    ``|L_o - L_b| / L_b`` of mean luminances; averaging the absolute value per pixel keeps a two-tone object
    (light body, dark windows) from cancelling to zero. Under fog it falls as ``C0 t(d)`` when the ring lies
    at the object's distance (Koschmieder).

    Parameters
    ----------
    luminance_map : (H, W) float ndarray
        Linear relative luminance (see :func:`pipeline.weather.colour.luminance`).
    region, ring : (H, W) bool ndarray
        The object's pixels and its surroundings (both non-empty).

    Returns
    -------
    float
        ``inf`` when the surroundings are black.
    """
    if not region.any() or not ring.any():
        raise ValueError("region and ring must both hold pixels")
    background = float(luminance_map[ring].mean())
    if background <= 0:
        return math.inf
    return float(np.abs(luminance_map[region] - background).mean() / background)
