"""Snow: visibility in falling snow, snow cover on the ground and on plants."""

from __future__ import annotations

import cv2
import numpy as np

from .colour import check_image, linear_to_srgb, luminance, srgb_to_linear


def snow_visibility_m(intensity: float) -> float:
    """Visibility in falling snow from an intensity knob in [0, 1]: ``1000 m x 0.2^intensity``.

    Log-linear from 1000 m (0: the light/moderate snow boundary) to 200 m (1: heavy snow); the US National
    Weather Service grades snowfall by visibility: light >= 5/8 mile (1 km), heavy <= 1/4 mile (400 m)
    (from memory).
    """
    if not 0 <= intensity <= 1:
        raise ValueError(f"snow intensity must be in [0, 1], got {intensity!r}")
    return 1000.0 * 0.2**intensity


def snow_cover(
    image: np.ndarray,
    *,
    ground: np.ndarray,
    vegetation: np.ndarray,
    cover: float,
    rng: np.random.Generator | int | None,
) -> np.ndarray:
    """Whiten snow-covered ground and the tops of trees, keeping their texture as shading.

    Covered pixels become ``white x shade`` with ``shade = 0.8 + 0.2 L / mean(L)`` (their own relative
    luminance), blended by ``cover`` on ``ground`` and by ``0.6 cover`` times a smooth random pattern on
    ``vegetation`` (snow sits on parts of a crown). Tuned by eye (common practice).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    ground, vegetation : (H, W) bool ndarray
        Off-road ground and tree/hedge pixels to whiten.
    cover : float in [0, 1]
    rng : numpy Generator, int or None
    """
    check_image(image)
    if not 0 <= cover <= 1:
        raise ValueError(f"cover must be in [0, 1], got {cover!r}")
    rng = np.random.default_rng(rng)
    height, width = ground.shape
    linear = srgb_to_linear(image)
    lum = luminance(linear)
    typical = float(lum[ground | vegetation].mean()) if (ground | vegetation).any() else 1.0
    shade = np.clip(0.8 + 0.2 * lum / max(typical, 1e-4), 0.6, 1.1)
    white = np.array([0.82, 0.85, 0.9], np.float32)
    snow = white * shade[..., None]
    pattern = cv2.resize(rng.random((max(2, height // 6), max(2, width // 6))).astype(np.float32), (width, height))
    weight = cover * ground + 0.6 * cover * vegetation * np.clip(1.6 * pattern - 0.3, 0.0, 1.0)
    mixed = linear * (1.0 - weight[..., None]) + snow * weight[..., None]
    return linear_to_srgb(mixed)


def vegetation_mask(image: np.ndarray, *, min_excess_green: float = 12.0) -> np.ndarray:
    """Pixels that look like plants: excess green ``2G - R - B`` above ``min_excess_green`` (0-255 scale).

    Woebbecke et al., "Color indices for weed identification under various soil, residue, and lighting
    conditions", Trans. ASAE 38, 1995 (from memory).
    """
    check_image(image)
    rgb = image.astype(np.int16)
    return (2 * rgb[..., 1] - rgb[..., 0] - rgb[..., 2]) > min_excess_green
