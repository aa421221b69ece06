"""Rain: the Marshall-Palmer drop spectrum, falling particles drawn depth by depth, a wet road.

The particle renderer is shared with snow: particles at distance Z are ``f D / Z`` px wide and smeared over
their fall during the exposure, so near ones are long and wide, far ones short and faint.

References
----------
.. [1] J. S. Marshall, W. McK. Palmer, "The distribution of raindrops with size", J. Meteorology 5, 1948
   (``N(D) = N0 exp(-Lambda D)``, ``N0 = 8000 m^-3 mm^-1``, ``Lambda = 4.1 R^-0.21 mm^-1``; from memory).
.. [2] D. Atlas, R. C. Srivastava, R. S. Sekhon, "Doppler radar characteristics of precipitation at
   vertical incidence", Rev. Geophys. 11, 1973 (terminal velocity ``9.65 - 10.3 exp(-0.6 D)`` m/s;
   from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import cv2
import numpy as np

from .colour import check_image, scale_hsv

EXPOSURE_S = 1 / 60
"""Exposure time that sets streak lengths: a common automotive/video setting (common practice)."""


def raindrop_slope(rate_mm_per_h: float) -> float:
    """Marshall-Palmer slope ``Lambda = 4.1 R^-0.21`` per mm of drop diameter (Marshall & Palmer 1948)."""
    if not (rate_mm_per_h > 0 and math.isfinite(rate_mm_per_h)):
        raise ValueError(f"rain rate must be a finite number of mm/h > 0, got {rate_mm_per_h!r}")
    return 4.1 * rate_mm_per_h**-0.21


def visible_drop_density(rate_mm_per_h: float, *, min_diameter_mm: float = 1.0) -> float:
    """Raindrops per cubic metre with diameter >= ``min_diameter_mm`` (those that draw streaks).

    ``int_Dmin^inf N0 exp(-Lambda D) dD = (N0 / Lambda) exp(-Lambda Dmin)`` with ``N0 = 8000 m^-3 mm^-1``
    (Marshall & Palmer 1948, from memory). Increases with the rain rate: about 150 m^-3 at 5 mm/h, 470 at
    25 mm/h and 1080 at 100 mm/h. Smaller drops are below a pixel at any distance the camera resolves and
    show only as the haze of far layers.
    """
    slope = raindrop_slope(rate_mm_per_h)
    return 8000.0 / slope * math.exp(-slope * min_diameter_mm)


def mean_visible_diameter_mm(rate_mm_per_h: float, *, min_diameter_mm: float = 1.0) -> float:
    """Mean diameter (mm) of drops >= ``min_diameter_mm`` in a Marshall-Palmer spectrum: ``Dmin + 1 / Lambda``."""
    return min_diameter_mm + 1.0 / raindrop_slope(rate_mm_per_h)


def terminal_velocity(diameter_mm: float) -> float:
    """Fall speed (m/s) of a raindrop: ``9.65 - 10.3 exp(-0.6 D)`` (Atlas et al. 1973, from memory)."""
    return max(0.0, 9.65 - 10.3 * math.exp(-0.6 * diameter_mm))


def wetness(rate_mm_per_h: float) -> float:
    """How wet the road looks, 0..1: ``1 - exp(-R / 5 mm/h)``; even light rain soaks asphalt in minutes.

    A look, not a measurement (common practice): 2 mm/h gives 0.33, 10 mm/h 0.86, 25 mm/h 0.99.
    """
    if not rate_mm_per_h >= 0:
        raise ValueError(f"rain rate must be >= 0, got {rate_mm_per_h!r}")
    return 1.0 - math.exp(-rate_mm_per_h / 5.0)


@dataclass(frozen=True)
class Layer:
    """One depth slab of falling particles: its near and far distance (m) and how many particles it holds."""

    near_m: float
    far_m: float
    count: int

    @property
    def distance_m(self) -> float:
        """Representative distance: the slab's geometric mean."""
        return math.sqrt(self.near_m * self.far_m)


def particle_layers(
    shape: tuple[int, int],
    *,
    focal_px: float,
    density_per_m3: float,
    near_m: float,
    far_m: float,
    n_layers: int,
    rng: np.random.Generator | int | None,
) -> list[Layer]:
    """Split the view frustum between ``near_m`` and ``far_m`` into slabs (geometric spacing) and fill them.

    A slab from ``z0`` to ``z1`` of a frustum ``W / f`` wide and ``H / f`` high per metre of distance has
    volume ``(W / f) (H / f) (z1^3 - z0^3) / 3``; its particle count is Poisson with mean ``density x volume``.
    """
    height, width = shape
    if not (0 < near_m < far_m and n_layers >= 1 and density_per_m3 >= 0):
        raise ValueError(f"need 0 < near_m < far_m, n_layers >= 1, density >= 0; got {near_m}, {far_m}, {n_layers}")
    rng = np.random.default_rng(rng)
    edges = np.geomspace(near_m, far_m, n_layers + 1)
    area = (width / focal_px) * (height / focal_px)
    layers = []
    for z0, z1 in zip(edges[:-1], edges[1:], strict=True):
        volume = area * (z1**3 - z0**3) / 3.0
        layers.append(Layer(float(z0), float(z1), int(rng.poisson(density_per_m3 * volume))))
    return layers


def streak_kernel(length_px: float, angle_deg: float) -> np.ndarray:
    """A line kernel ``length_px`` long at ``angle_deg`` from vertical, peak 1 (a streak of uniform brightness)."""
    length = max(1.0, float(length_px))
    size = int(math.ceil(length)) | 1
    kernel = np.zeros((size, size), np.float32)
    c = size // 2
    dx = 0.5 * (length - 1) * math.sin(math.radians(angle_deg))
    dy = 0.5 * (length - 1) * math.cos(math.radians(angle_deg))
    cv2.line(kernel, (round(c - dx), round(c - dy)), (round(c + dx), round(c + dy)), 1.0, 1, cv2.LINE_AA)
    return kernel / max(float(kernel.max()), 1e-6)


def particle_alpha(
    distance: np.ndarray,
    layers: Sequence[Layer],
    *,
    focal_px: float,
    diameter_m: float,
    fall_speed_m_s: float,
    angle_deg: float,
    opacity: float,
    defocus_px_m: float,
    rng: np.random.Generator | int | None,
) -> np.ndarray:
    """Coverage (0..1) of falling particles (rain streaks or snow flakes) over the scene, depth by depth.

    Each layer's particles land at random pixels; a particle at distance Z is ``f D / Z`` px wide and is
    smeared over ``f v T / Z`` px (its fall during the exposure :data:`EXPOSURE_S`), so near particles are
    long and wide and far ones are short, thin and faint (sub-pixel ones weighted by their width). Out-of-
    focus blur of ``defocus_px_m / Z`` px (focus at infinity) softens the nearest. A layer is hidden where
    the scene is nearer than it (in proportion to the share of the slab in front of the scene).

    Parameters
    ----------
    distance : (H, W) float ndarray
        Scene distance in metres (see :func:`pipeline.weather.distance.distance_map`).
    layers : sequence of Layer
    focal_px, diameter_m, fall_speed_m_s : float
    angle_deg : float
        Fall direction from vertical (wind).
    opacity : float
        Coverage of one particle pixel that is fully covered (brightness of the particle).
    defocus_px_m : float
        Blur radius in pixels at 1 m.
    rng : numpy Generator, int or None

    Returns
    -------
    (H, W) float32 ndarray in [0, 1]
    """
    rng = np.random.default_rng(rng)
    height, width = distance.shape
    total = np.zeros((height, width), np.float32)
    for layer in layers:
        z = layer.distance_m
        size_px = focal_px * diameter_m / z
        hits = np.bincount(rng.integers(0, height * width, size=layer.count), minlength=height * width)
        seeds = hits.reshape(height, width).astype(np.float32) * (opacity * min(1.0, size_px))
        streak = cv2.filter2D(seeds, -1, streak_kernel(focal_px * fall_speed_m_s * EXPOSURE_S / z, angle_deg))
        if size_px > 1.5:
            disc = int(math.ceil(size_px))
            streak = cv2.dilate(streak, cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (disc, disc)))
        blur = defocus_px_m / z
        if blur > 0.3:
            streak = cv2.GaussianBlur(streak, (0, 0), blur)
        # only the part of the slab in front of the scene shows; layers composite as 1 - prod(1 - a)
        in_front = np.clip((distance - layer.near_m) / (layer.far_m - layer.near_m), 0.0, 1.0).astype(np.float32)
        total = 1.0 - (1.0 - total) * (1.0 - np.clip(streak, 0.0, 1.0) * in_front)
    return total


def wet_road(image: np.ndarray, drivable: np.ndarray, *, wetness_level: float) -> np.ndarray:
    """Darken and desaturate the drivable surface as water does (a wet surface absorbs more light).

    Value scaled by ``1 - 0.35 w`` and saturation by ``1 - 0.4 w`` on the mask (tuned by eye; common
    practice). Lekner & Dorf, "Why some things are darker when wet", Applied Optics 27, 1988, explain the
    darkening (from memory).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    drivable : (H, W) bool ndarray, or float weight in [0, 1] (a feathered mask)
    wetness_level : float in [0, 1]
    """
    check_image(image)
    if not 0 <= wetness_level <= 1:
        raise ValueError(f"wetness_level must be in [0, 1], got {wetness_level!r}")
    return scale_hsv(image, saturation=1.0 - 0.4 * wetness_level, value=1.0 - 0.35 * wetness_level, where=drivable)


def road_reflections(
    image: np.ndarray, drivable: np.ndarray, objects: Sequence[tuple[Sequence[float], np.ndarray]], *, strength: float
) -> np.ndarray:
    """Faint mirror images of objects on a wet road: each object's pixels flipped below its bottom edge, fading.

    Only the object's own pixels (its silhouette or soft matte, never its whole box) are mirrored, blended
    with weight ``strength x matte`` at the bottom edge falling linearly to 0 over the box height, only on
    the drivable surface and blurred vertically (a rough water film is no mirror).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    drivable : (H, W) bool ndarray
    objects : sequence of (box, (H, W) float matte in [0, 1])
    strength : float in [0, 1]
    """
    check_image(image)
    out = image.astype(np.float32)
    height, width = drivable.shape
    for box, matte in objects:
        x, y, w, h = (float(v) for v in box)
        c0, c1 = max(0, int(round(x))), min(width, int(round(x + w)))
        r0, bottom = max(0, int(round(y))), min(height, int(round(y + h)))
        span = min(bottom - r0, height - bottom)
        if c1 <= c0 or span < 2:
            continue
        mirrored = cv2.GaussianBlur(image[bottom - span : bottom, c0:c1][::-1].astype(np.float32), (1, 5), 0)
        own = cv2.GaussianBlur(np.asarray(matte, np.float32)[bottom - span : bottom, c0:c1][::-1], (1, 5), 0)
        weight = strength * np.linspace(1.0, 0.0, span, dtype=np.float32)[:, None] * own
        weight = weight * drivable[bottom : bottom + span, c0:c1]
        target = out[bottom : bottom + span, c0:c1]
        out[bottom : bottom + span, c0:c1] = target * (1 - weight[..., None]) + mirrored * weight[..., None]
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)
