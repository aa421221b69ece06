"""Dusk and night: the low-light curve, sensor noise, vehicle lamps and the night sky.

References
----------
.. [1] F. Lv, Y. Li, F. Lu, "Attention Guided Low-light Image Enhancement with a Large Scale Low-light
   Simulation Dataset", IJCV 129, 2021: ``I_out = b (a I)^g``, a in [0.9, 1], b in [0.5, 1], g in [1.5, 5],
   plus Poisson-Gaussian noise.
.. [2] A. Foi, M. Trimeche, V. Katkovnik, K. Egiazarian, "Practical Poissonian-Gaussian noise modeling
   and fitting for single-image raw-data", IEEE TIP 17, 2008 (from memory).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import cv2
import numpy as np

from .colour import check_image

LAMP_COLOURS = {
    "head": (1.0, 0.95, 0.82),
    "tail": (1.0, 0.12, 0.06),
    "amber": (1.0, 0.62, 0.08),
}
"""Linear RGB colour of vehicle lamps (white-yellow head lamps, red tail lamps, amber beacons)."""


@dataclass(frozen=True)
class LowLight:
    """Parameters of the low-light curve ``b (a I)^g`` and the sensor noise."""

    a: float
    b: float
    g: float
    photons: float
    read_sigma: float


LOW_LIGHT_RANGES = {
    "dusk": {
        "a": (0.95, 1.0),
        "b": (0.75, 1.0),
        "g": (1.5, 2.2),
        "photons": (300.0, 600.0),
        "read_sigma": (0.002, 0.006),
    },
    "night": {
        "a": (0.9, 1.0),
        "b": (0.5, 0.7),
        "g": (3.0, 5.0),
        "photons": (80.0, 200.0),
        "read_sigma": (0.006, 0.015),
    },
}
"""Uniform ranges per condition. a, b, g lie inside Lv et al.'s (IJCV 2021) a in [0.9, 1], b in [0.5, 1],
g in [1.5, 5]: dusk takes the mild end, night the dark end. Photons per unit intensity (shot noise) and the
read-noise sd are common practice for small automotive sensors, tuned by eye."""


def sample_low_light(condition: str, rng: np.random.Generator | int | None) -> LowLight:
    """Draw the curve and noise parameters of ``"dusk"`` or ``"night"`` from :data:`LOW_LIGHT_RANGES`."""
    if condition not in LOW_LIGHT_RANGES:
        raise ValueError(f"condition must be one of {', '.join(LOW_LIGHT_RANGES)}, got {condition!r}")
    rng = np.random.default_rng(rng)
    return LowLight(**{k: float(rng.uniform(*v)) for k, v in LOW_LIGHT_RANGES[condition].items()})


def low_light_curve(image: np.ndarray, *, a: float, b: float, g: float) -> np.ndarray:
    """``I_out = b (a I)^g`` per channel with ``I = pixel / 255`` (Lv, Li, Lu, IJCV 2021).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    a, b : float in (0, 1]
    g : float >= 1

    Returns
    -------
    (H, W, 3) float32 ndarray in [0, 1]
    """
    check_image(image)
    if not (0 < a <= 1 and 0 < b <= 1 and g >= 1):
        raise ValueError(f"need 0 < a <= 1, 0 < b <= 1, g >= 1; got a={a!r}, b={b!r}, g={g!r}")
    return (b * np.power(a * image.astype(np.float32) / 255.0, g)).astype(np.float32)


def poisson_gaussian_noise(
    image: np.ndarray, *, photons: float, read_sigma: float, rng: np.random.Generator | int | None
) -> np.ndarray:
    """Sensor noise: ``Poisson(photons I) / photons + N(0, read_sigma^2)`` (Foi et al. 2008).

    Parameters
    ----------
    image : (H, W, 3) float ndarray in [0, 1]
    photons : float
        Photon count of a fully bright pixel (> 0): fewer photons, more shot noise.
    read_sigma : float
        Sd of the signal-independent read noise (>= 0).

    Returns
    -------
    (H, W, 3) float32 ndarray in [0, 1]
    """
    if not (photons > 0 and read_sigma >= 0):
        raise ValueError(f"need photons > 0 and read_sigma >= 0, got {photons!r}, {read_sigma!r}")
    rng = np.random.default_rng(rng)
    shot = rng.poisson(np.clip(image, 0.0, 1.0) * photons) / photons
    return np.clip(shot + rng.normal(0.0, read_sigma, image.shape), 0.0, 1.0).astype(np.float32)


def lamp_positions(box: Sequence[float], kind: str) -> list[tuple[float, float, float]]:
    """Lamp centres and radius ``(col, row, radius_px)`` on a vehicle box.

    Head and tail lamps sit near the lower corners (15% in from each side, 72% down) with a radius of 5% of
    the box's shorter side (so a long side view gets no giant lamps); amber beacons of a works trailer sit at
    the top corners of its warning board.
    """
    x, y, w, h = (float(v) for v in box)
    radius = max(0.8, 0.05 * min(w, h))
    if kind == "amber":
        return [(x + 0.12 * w, y + 0.06 * h, radius), (x + 0.88 * w, y + 0.06 * h, radius)]
    if kind not in ("head", "tail"):
        raise ValueError(f"lamp kind must be head, tail or amber, got {kind!r}")
    return [(x + 0.15 * w, y + 0.72 * h, radius), (x + 0.85 * w, y + 0.72 * h, radius)]


def lamp_light(
    shape: tuple[int, int], lamps: Sequence[tuple[float, float, float, str]], *, brightness: float
) -> np.ndarray:
    """Additive light of lamps: a bright core of each lamp's radius plus a glow 4 radii wide.

    Parameters
    ----------
    shape : (H, W)
    lamps : sequence of (col, row, radius_px, kind)
        ``kind`` a key of :data:`LAMP_COLOURS`.
    brightness : float
        Peak added intensity of a core (linear, >= 0).

    Returns
    -------
    (H, W, 3) float32 ndarray (linear light to add)
    """
    height, width = shape
    out = np.zeros((height, width, 3), np.float32)
    for col, row, radius, kind in lamps:
        core = np.zeros((height, width), np.float32)
        scale = 4
        centre = (int(round(col * scale)), int(round(row * scale)))
        cv2.circle(core, centre, max(1, int(round(radius * scale))), 1.0, -1, cv2.LINE_AA, shift=2)
        core = cv2.GaussianBlur(core, (0, 0), max(0.5, 0.4 * radius))
        glow = cv2.GaussianBlur(core, (0, 0), max(1.5, 4.0 * radius)) * 6.0
        light = brightness * (np.clip(core / max(float(core.max()), 1e-6), 0, 1) + np.clip(glow, 0, 0.6))
        out += light[..., None] * np.asarray(LAMP_COLOURS[kind], np.float32)
    return out


NIGHT_SKY_SHARE = 0.8
"""Night sky level as a share of the darkened ground's median level: an unlit sky over a road is about as
dark as the unlit ground, a little darker away from city glow (tuned by eye; common practice in
day-for-night grading)."""


def night_sky(
    dark: np.ndarray, sky_weight: np.ndarray, ground: np.ndarray, colour: np.ndarray, *, share: float = NIGHT_SKY_SHARE
) -> np.ndarray:
    """Replace the (darkened) day sky by a night sky whose level is read from the darkened image itself.

    A day sky under the low-light curve stays the brightest thing in the frame, which no night sky is. The
    night sky takes ``share`` of the median level of the darkened ``ground`` pixels, in the chromaticity of
    ``colour`` (the day's airlight: the sky keeps its own tint), blended in by ``sky_weight``.

    Parameters
    ----------
    dark : (H, W, 3) float ndarray in [0, 1]
        The image after :func:`low_light_curve` (and any colour cast).
    sky_weight : (H, W) float ndarray in [0, 1]
        How much of each pixel is sky (a feathered sky mask).
    ground : (H, W) bool ndarray
        Pixels whose level sets the sky's (unlit ground below the horizon).
    colour : (3,) float
        Tint of the sky (sRGB 0..1).

    Returns
    -------
    (H, W, 3) float32 ndarray in [0, 1]
    """
    if not 0 < share <= 2:
        raise ValueError(f"share must be in (0, 2], got {share!r}")
    level = float(np.median(dark[ground].mean(axis=1))) if ground.any() else float(np.median(dark.mean(axis=2)))
    tint = np.asarray(colour, np.float64)
    tint = tint / max(float(tint.mean()), 1e-6)
    sky = np.clip(share * level * tint, 0.0, 1.0).astype(np.float32)
    w = np.asarray(sky_weight, np.float32)[..., None]
    return (dark * (1 - w) + sky * w).astype(np.float32)
