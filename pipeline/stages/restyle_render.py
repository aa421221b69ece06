"""The restyle renderers: (image, geometry, options, category names, rng) -> Rendered, one per condition.

Each draws one condition with :mod:`pipeline.weather` over the scene's distance map
(:mod:`pipeline.stages.restyle_scene`). Colours of the air (the fog's airlight, the rain's streaks, the
snow's veil, the night sky) are read from the photo (dark channel prior; He, Sun and Tang, CVPR 2009),
never fixed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import cv2
import numpy as np

from ..dataset import Annotation
from ..weather import colour, fog, night, rain, snow
from ..weather.distance import Source
from .restyle_scene import Geometry

LAMP_KINDS = {"car": "road", "van": "road", "bus": "road", "truck": "road", "tractor": "road", "works_trailer": "amber"}
"""Classes that carry lamps at dusk and night. ``"road"``: head lamps when oncoming (box centre left of
the image centre: right-hand traffic, the camera car in the right lane), tail lamps otherwise; ``"amber"``:
warning beacons on top. Other classes get no lamps."""

RAIN_STREAK_OPACITY = 0.08
"""Brightness of a fully covered streak pixel; drops refract the bright sky (tuned by eye)."""

SNOW_FLAKE_DIAMETER_M = 0.006
"""Typical snowflake (aggregate) diameter: a few millimetres to about a centimetre (from memory)."""

SNOW_FALL_SPEED_M_S = 1.0
"""Snowflakes fall at about 0.5-1.5 m/s (from memory)."""


@dataclass(frozen=True)
class Rendered:
    """A restyled image. Conditions that veil the scene (fog, snow) give their extinction coefficient ``beta``
    and ``veiled``, the attenuated image before particles are drawn, on which object contrast is measured."""

    image: np.ndarray
    beta: float | None = None
    veiled: np.ndarray | None = None
    details: dict[str, Any] = field(default_factory=dict)


def airlight(image: np.ndarray, geometry: Geometry) -> np.ndarray:
    """The airlight of ``image`` by the dark channel prior, searched in the sky where there is one, else
    above the horizon, else anywhere (sRGB 0..1)."""
    height = image.shape[0]
    above = np.zeros(image.shape[:2], bool)
    above[: int(np.clip(math.floor(geometry.horizon_row), 0, height))] = True
    where = geometry.sky if np.count_nonzero(geometry.sky) >= 20 else above
    return fog.estimate_airlight(image, where)


def render_fog(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Koschmieder fog of the recipe's visibility, airlight from the image (half its tint kept)."""
    visibility_m = options["visibility_m"]
    beta = fog.extinction_coefficient(visibility_m)
    air = _half_grey(airlight(image, geometry))
    t = fog.transmission(geometry.distance, beta)
    fogged = fog.apply_fog(image, t, air)
    details = {
        "visibility_m": visibility_m,
        "beta_per_m": round(beta, 6),
        "airlight_rgb": [round(float(v) * 255, 1) for v in air],
    }
    return Rendered(fogged, beta, fogged, details)


def render_rain(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Wet dark ground with faint reflections on the road, a duller sky, and depth-layered streaks.

    Rain wets every ground pixel (pavements and verges too), so the darkening follows the ground of the
    distance map, feathered, not the outline of a drivable surface that may only be estimated.
    """
    rate = options["rain_mm_per_h"]
    wet = rain.wetness(rate)
    on_road = [
        (a.bbox, m)
        for a, m in zip(geometry.annotations, geometry.mattes, strict=True)
        if _stands_on(a, geometry.drivable)
    ]
    ground = np.isin(geometry.distance_map.source, [int(Source.GROUND), int(Source.GROUND_GIVEN)])
    out = rain.wet_road(image, _feather(ground | geometry.drivable, 2.0), wetness_level=wet)
    out = rain.road_reflections(out, geometry.drivable, on_road, strength=0.3 * wet)
    out = colour.scale_hsv(out, saturation=1.0 - 0.3 * wet, value=1.0 - 0.15 * wet)
    density = rain.visible_drop_density(rate)
    diameter_mm = rain.mean_visible_diameter_mm(rate)
    layers = rain.particle_layers(
        image.shape[:2], focal_px=geometry.focal_px, density_per_m3=density, near_m=1.0, far_m=15.0,
        n_layers=5, rng=rng,
    )  # fmt: skip
    angle = float(rng.uniform(-12.0, 12.0))
    alpha = rain.particle_alpha(
        geometry.distance, layers, focal_px=geometry.focal_px, diameter_m=diameter_mm / 1000,
        fall_speed_m_s=rain.terminal_velocity(diameter_mm), angle_deg=angle, opacity=RAIN_STREAK_OPACITY,
        defocus_px_m=0.6, rng=rng,
    )  # fmt: skip
    out = colour.over(out, alpha, np.clip(airlight(out, geometry) * 1.1, 0, 1))
    details = {
        "rain_mm_per_h": rate,
        "wetness": round(wet, 3),
        "streak_drops_per_m3": round(density, 1),
        "mean_drop_diameter_mm": round(diameter_mm, 2),
        "fall_speed_m_s": round(rain.terminal_velocity(diameter_mm), 2),
        "streak_angle_deg": round(angle, 1),
        "drops_drawn": sum(layer.count for layer in layers),
    }
    return Rendered(out, None, None, details)


def render_snow(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Snow-covered verges and crowns, slushy road, a veil of the snowfall's visibility, and flakes."""
    intensity = options["snow_intensity"]
    height, width = image.shape[:2]
    objects = _union(geometry.regions, (height, width))
    below = (np.arange(height)[:, None] + 0.5 > geometry.horizon_row) & np.ones((1, width), bool)
    off_road = below & ~geometry.drivable & ~objects
    plants = snow.vegetation_mask(image) & ~off_road & ~geometry.drivable & ~objects
    out = snow.snow_cover(image, ground=off_road, vegetation=plants, cover=0.55 + 0.4 * intensity, rng=rng)
    out = rain.wet_road(out, geometry.drivable, wetness_level=0.5)
    out = colour.scale_hsv(out, saturation=0.7, value=0.95)
    visibility_m = snow.snow_visibility_m(intensity)
    beta = fog.extinction_coefficient(visibility_m)
    air = _half_grey(airlight(image, geometry))
    veiled = fog.apply_fog(out, fog.transmission(geometry.distance, beta), air)
    density = 40.0 + 360.0 * intensity  # flakes per m^3, tuned by eye (common practice)
    layers = rain.particle_layers(
        image.shape[:2], focal_px=geometry.focal_px, density_per_m3=density, near_m=0.4, far_m=2.5,
        n_layers=3, rng=rng,
    )  # fmt: skip
    alpha = rain.particle_alpha(
        geometry.distance, layers, focal_px=geometry.focal_px, diameter_m=SNOW_FLAKE_DIAMETER_M,
        fall_speed_m_s=SNOW_FALL_SPEED_M_S, angle_deg=float(rng.uniform(-20.0, 20.0)), opacity=0.9,
        defocus_px_m=0.8, rng=rng,
    )  # fmt: skip
    out = colour.over(veiled, alpha, np.clip(0.5 * air + 0.5 * air.max(), 0, 1))
    details = {
        "snow_intensity": intensity,
        "visibility_m": round(visibility_m, 1),
        "beta_per_m": round(beta, 6),
        "airlight_rgb": [round(float(v) * 255, 1) for v in air],
        "flakes_per_m3": density,
        "flakes_drawn": sum(layer.count for layer in layers),
    }
    return Rendered(out, beta, veiled, details)


def render_low_light(image, geometry: Geometry, options, names, rng) -> Rendered:
    """The low-light curve ``b (a I)^g``, a colour cast, a night sky read from the image, lamps and noise."""
    condition = options["condition"]
    params = night.sample_low_light(condition, rng)
    dark = night.low_light_curve(image, a=params.a, b=params.b, g=params.g)
    # day-for-night: night light is bluish, dusk light warm (common practice)
    cast = {"night": (0.78, 0.88, 1.12), "dusk": (1.06, 0.93, 0.84)}[condition]
    dark = dark * np.asarray(cast, np.float32)
    height = image.shape[0]
    ground = (np.arange(height)[:, None] + 0.5 > geometry.horizon_row) & ~_union(geometry.regions, image.shape[:2])
    air = airlight(image, geometry) * np.asarray(cast)
    if condition == "night":
        # the sky mask stops a pixel or two short of leaves and roofs; those bright rims darken with it
        rim = cv2.dilate(geometry.sky.astype(np.uint8), np.ones((5, 5), np.uint8)).astype(bool)
        bright = image.min(axis=2) >= np.percentile(image[geometry.sky].min(axis=1), 10) if geometry.sky.any() else rim
        weight = _feather(geometry.sky | (rim & bright), 1.5)
        dark = night.night_sky(dark, weight, ground, np.clip(air, 1e-3, 1.0))
    lamps = []
    width = image.shape[1]
    for ann in geometry.annotations:
        kind = LAMP_KINDS.get(names[ann.category_id])
        if kind is None:
            continue
        x, _, w, _ = ann.bbox
        if kind == "road":
            kind = "head" if x + w / 2 < width / 2 else "tail"
        lamps += [(c, r, radius, kind) for c, r, radius in night.lamp_positions(ann.bbox, kind)]
    brightness = {"night": 1.0, "dusk": 0.6}[condition]
    lit = dark + night.lamp_light(image.shape[:2], lamps, brightness=brightness)
    noisy = night.poisson_gaussian_noise(
        np.clip(lit, 0, 1), photons=params.photons, read_sigma=params.read_sigma, rng=rng
    )
    out = np.clip(np.rint(noisy * 255), 0, 255).astype(np.uint8)
    details = {
        "curve": {"a": round(params.a, 4), "b": round(params.b, 4), "g": round(params.g, 4)},
        "noise": {"photons": round(params.photons, 1), "read_sigma": round(params.read_sigma, 5)},
        "colour_cast": list(cast),
        "lamps": len(lamps),
    }
    return Rendered(out, None, None, details)


RENDERERS = {
    "fog": render_fog,
    "rain": render_rain,
    "snow": render_snow,
    "dusk": render_low_light,
    "night": render_low_light,
}


def _half_grey(tint: np.ndarray) -> np.ndarray:
    """Half-way between a colour and its grey: fog droplets scatter all wavelengths about equally (Mie
    scattering; from memory), so a dusk sky's strong tint would overstate the fog's colour."""
    return 0.5 * tint + 0.5 * float(tint.mean())


def _feather(mask: np.ndarray, sigma_px: float) -> np.ndarray:
    """A bool mask as a soft weight in [0, 1] (a hard outline of an estimated region is itself an artefact)."""
    return cv2.GaussianBlur(mask.astype(np.float32), (0, 0), sigma_px)


def _union(regions, shape) -> np.ndarray:
    out = np.zeros(shape, dtype=bool)
    for region in regions:
        out |= region
    return out


def _stands_on(ann: Annotation, drivable: np.ndarray) -> bool:
    x, _, w, _ = ann.bbox
    row = min(drivable.shape[0] - 1, max(0, int(ann.bottom_row) - 1))
    c0, c1 = max(0, int(x)), min(drivable.shape[1], int(math.ceil(x + w)))
    return c1 > c0 and drivable[row, c0:c1].mean() >= 0.5
