"""Restyle stage: show a real scene with its rare objects under another condition, labels kept true.

Physically based renderers only (:mod:`pipeline.weather`); the stage asks the generator for nothing, so its
draft has no inpainting requests. Distances come from the fitted ground model: ground pixels from their
row, labelled objects at their footprint (bottom-row) distance over their pixels (segmentation, else a
GrabCut estimate inside the box), sky at infinity, and trees or houses rising above the horizon at the
distance where a 10 m tall thing would reach their top row. The focal length is not in the labels: it is taken
from the image's calibration when its camera group has one, else an assumed 60-degree horizontal field of view
(:func:`pipeline.geometry.focal_length`); the horizon and camera height from the image's own camera group
(:func:`pipeline.geometry.ground_for`; camera height else :data:`pipeline.weather.DEFAULT_CAMERA_HEIGHT_M`).

A learned restyle (partial noising and denoising of the whole frame under a condition label, SDEdit-style)
is not available: no generator supports a condition label yet (``InpaintRequest.condition`` must be None).

Label-aware visibility (fog, snow): an object is invisible when its transmission ``t(d)`` at its footprint
distance is below 5% (farther than the meteorological optical range, by the WMO/CIE definition) or when its
contrast measured from pixels (:func:`pipeline.weather.object_contrast`, the object's pixels against a ring
around its box, in linear luminance) falls below 5% while it was at least 5% in the clear image. An invisible
object leaves the labels and is listed in ``Candidate.dropped`` with both values, or, with
``keep_invisible_as_crowd``, stays as an ``iscrowd = 1`` region (ignored by COCO evaluation).

Options (recipe ``[[stage]]`` keys); each condition reads only its own knob:

``condition``
    ``"fog"``, ``"rain"``, ``"snow"``, ``"dusk"`` or ``"night"`` (required).
``visibility_m``
    Fog: meteorological optical range V in metres; ``beta = ln(20) / V``. Sakaridis et al. (IJCV 2018) used
    beta 0.005, 0.01, 0.02 per metre: V about 600, 300 and 150 m.
``rain_mm_per_h``
    Rain rate; sets the density of streak-drawing drops (Marshall-Palmer) and how wet the road looks.
``snow_intensity``
    0..1; sets visibility in falling snow (1000 m to 200 m), flake density and ground cover.
``keep_invisible_as_crowd``
    Keep invisible objects as crowd regions instead of removing them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .. import weather
from ..dataset import Annotation, Dataset, Scene
from ..filters import FilterLimits
from ..geometry import focal_length, ground_for
from ..plan import Job
from ..recipe import StageSpec
from .base import Candidate, Draft, Failure, StageContext
from .rebackground import object_pixels

CONDITIONS = ("fog", "rain", "snow", "dusk", "night")

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


def eligible(dataset: Dataset, spec: StageSpec, limits: FilterLimits) -> list[tuple[int, int]]:
    """Every scene holding at least one non-crowd instance of the target class."""
    category_id = dataset.category_by_name(spec.target_class).id
    return [
        (i, -1)
        for i, scene in enumerate(dataset.scenes)
        if any(a.category_id == category_id and not a.iscrowd for a in scene.annotations)
    ]


def draft(job: Job, attempt: int, spec: StageSpec, ctx: StageContext) -> Draft:
    """Nothing to inpaint: the draft carries the source image and the attempt's seed."""
    scene_index, _ = job.sources[attempt]
    scene = ctx.dataset.scenes[scene_index]
    return Draft(spec, scene, scene.load_rgb(), (), {"seed": job.attempt_seed(attempt)})


@dataclass(frozen=True)
class Rendered:
    """A restyled image. Conditions that veil the scene (fog, snow) give their extinction coefficient ``beta``
    and ``veiled``, the attenuated image before particles are drawn, on which object contrast is measured."""

    image: np.ndarray
    beta: float | None = None
    veiled: np.ndarray | None = None
    details: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Geometry:
    """What the renderers know about the scene: distances, object pixels, road, camera."""

    distance: np.ndarray
    regions: tuple[np.ndarray, ...]
    annotations: tuple[Annotation, ...]
    drivable: np.ndarray
    horizon_row: float
    focal_px: float
    camera_height_m: float


def complete(draft_: Draft, frames: Sequence[np.ndarray], ctx: StageContext) -> Candidate | Failure:
    """Render the condition, then drop (or crowd) the labels it made invisible."""
    # 1. check inputs: a restyle asks for no generated frames
    if frames:
        raise ValueError(f"restyle drafts have no inpainting requests, got {len(frames)} frames")
    options = draft_.stage.options
    image, scene = draft_.image, draft_.scene
    rng = np.random.default_rng(draft_.state["seed"])

    # 2. scene geometry from the ground model
    geometry = scene_geometry(image, scene, ctx)

    # 3. render the condition
    condition = options["condition"]
    rendered = RENDERERS[condition](image, geometry, options, ctx.dataset.category_names(), rng)

    # 4. labels: invisible objects leave (or become crowd regions)
    verdicts = []
    if rendered.veiled is not None:
        verdicts = visibility(image, rendered.veiled, geometry, beta=rendered.beta)
    crowd = options.get("keep_invisible_as_crowd", False)  # only fog and snow take it (see recipe.OPTION_APPLIES)
    invisible = {v["annotation_id"]: v for v in verdicts if v["invisible"]}
    kept, dropped = [], []
    for ann in scene.annotations:
        found = invisible.get(ann.id)
        if found is None:
            kept.append(ann)
        elif crowd:
            kept.append(replace(ann, iscrowd=1))
        else:
            dropped.append((ann, found["reason"]))
    target_id = ctx.dataset.category_by_name(draft_.stage.target_class).id
    if not any(a.category_id == target_id and not a.iscrowd for a in kept):
        return Failure("visibility", f"every {draft_.stage.target_class} in the scene is invisible under {condition}")

    # 5. assemble: nothing was generated, so no seam to judge and no object to re-check
    details = {
        "condition": condition,
        "focal_px": round(geometry.focal_px, 2),
        "camera_height_m": round(geometry.camera_height_m, 3),
        "horizon_row": round(geometry.horizon_row, 2),
        **rendered.details,
        "visibility": [{k: v for k, v in item.items() if k != "reason"} for item in verdicts],
        "invisible_action": ("crowd" if crowd else "dropped") if invisible else None,
    }
    changed = np.zeros(image.shape[:2], dtype=bool)
    return Candidate(rendered.image, scene, tuple(kept), (), changed, (), tuple(dropped), details)


def scene_geometry(image: np.ndarray, scene: Scene, ctx: StageContext) -> Geometry:
    """Distances per pixel (see :func:`pipeline.weather.scene_distance`) and each labelled object's pixels."""
    ground = ground_for(ctx.ground, scene)
    height, width = image.shape[:2]
    focal = focal_length(ground)
    camera = ground.camera_height_m or weather.DEFAULT_CAMERA_HEIGHT_M
    horizon = ground.horizon_for(scene.id)
    labelled = tuple(a for a in scene.annotations if not a.iscrowd)
    regions = tuple(object_pixels(image, a)[0] for a in labelled)
    distance = weather.scene_distance(
        (height, width),
        horizon_row=horizon,
        focal_px=focal,
        camera_height_m=camera,
        objects=[(region, a.bottom_row) for region, a in zip(regions, labelled, strict=True)],
        scenery=~weather.sky_mask(image, horizon),
    )
    return Geometry(distance, regions, labelled, ctx.surface(scene).mask, horizon, focal, camera)


def visibility(clear: np.ndarray, veiled: np.ndarray, geometry: Geometry, *, beta: float) -> list[dict[str, Any]]:
    """Per labelled object: footprint transmission, contrast before and after, invisible or not, and why."""
    before = weather.luminance(weather.srgb_to_linear(clear))
    after = weather.luminance(weather.srgb_to_linear(veiled))
    objects = np.zeros(clear.shape[:2], dtype=bool)
    for region in geometry.regions:
        objects |= region
    out = []
    for ann, region in zip(geometry.annotations, geometry.regions, strict=True):
        ring = weather.ring_mask(ann.bbox, clear.shape[:2])
        ring = ring & ~objects if (ring & ~objects).any() else ring
        distance = weather.footprint_distance(
            ann.bottom_row, geometry.horizon_row, geometry.focal_px, geometry.camera_height_m
        )
        t = float(weather.transmission(distance, beta))
        c0 = weather.object_contrast(before, region, ring)
        c1 = weather.object_contrast(after, region, ring)
        limit = weather.MOR_CONTRAST
        invisible = t < limit or (c1 < limit <= c0)
        reason = (
            f"invisible: transmission {t:.3f} at {distance:.0f} m, contrast {c1:.3f} (clear {c0:.3f}); limit {limit:g}"
        )
        out.append(
            {
                "annotation_id": ann.id,
                "distance_m": round(float(distance), 1) if math.isfinite(distance) else None,
                "transmission": round(t, 4),
                "contrast_clear": round(c0, 4) if math.isfinite(c0) else None,
                "contrast": round(c1, 4) if math.isfinite(c1) else None,
                "invisible": bool(invisible),
                "reason": reason,
            }
        )
    return out


# --------------------------------------------------------------------------------------------------
# renderers: (image, geometry, options, category names, rng) -> Rendered


def render_fog(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Koschmieder fog of the recipe's visibility, airlight from the sky (half its tint kept)."""
    visibility_m = options["visibility_m"]
    beta = weather.extinction_coefficient(visibility_m)
    airlight = _half_grey(weather.estimate_airlight(image, geometry.horizon_row))
    t = weather.transmission(geometry.distance, beta)
    fogged = weather.apply_fog(image, t, airlight)
    details = {
        "visibility_m": visibility_m,
        "beta_per_m": round(beta, 6),
        "airlight_rgb": [round(float(v) * 255, 1) for v in airlight],
    }
    return Rendered(fogged, beta, fogged, details)


def render_rain(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Wet dark road with faint reflections, a duller sky, and depth-layered streaks."""
    rate = options["rain_mm_per_h"]
    wet = weather.wetness(rate)
    on_road = [a.bbox for a in geometry.annotations if _stands_on(a, geometry.drivable)]
    out = weather.wet_road(image, geometry.drivable, wetness_level=wet)
    out = weather.road_reflections(out, geometry.drivable, on_road, strength=0.3 * wet)
    out = weather.scale_hsv(out, saturation=1.0 - 0.3 * wet, value=1.0 - 0.15 * wet)
    density = weather.visible_drop_density(rate)
    diameter_mm = weather.mean_visible_diameter_mm(rate)
    layers = weather.particle_layers(
        image.shape[:2], focal_px=geometry.focal_px, density_per_m3=density, near_m=1.0, far_m=15.0,
        n_layers=5, rng=rng,
    )  # fmt: skip
    angle = float(rng.uniform(-12.0, 12.0))
    alpha = weather.particle_alpha(
        geometry.distance, layers, focal_px=geometry.focal_px, diameter_m=diameter_mm / 1000,
        fall_speed_m_s=weather.terminal_velocity(diameter_mm), angle_deg=angle, opacity=RAIN_STREAK_OPACITY,
        defocus_px_m=0.6, rng=rng,
    )  # fmt: skip
    colour = np.clip(weather.estimate_airlight(out, geometry.horizon_row) * 1.1, 0, 1)
    out = _over(out, alpha, colour)
    details = {
        "rain_mm_per_h": rate,
        "wetness": round(wet, 3),
        "streak_drops_per_m3": round(density, 1),
        "mean_drop_diameter_mm": round(diameter_mm, 2),
        "fall_speed_m_s": round(weather.terminal_velocity(diameter_mm), 2),
        "streak_angle_deg": round(angle, 1),
        "drops_drawn": sum(layer.count for layer in layers),
    }
    return Rendered(out, None, None, details)


def render_snow(image, geometry: Geometry, options, names, rng) -> Rendered:
    """Snow-covered verges and crowns, slushy road, a veil of the snowfall's visibility, and flakes."""
    intensity = options["snow_intensity"]
    height, width = image.shape[:2]
    objects = np.zeros((height, width), dtype=bool)
    for region in geometry.regions:
        objects |= region
    below = (np.arange(height)[:, None] + 0.5 > geometry.horizon_row) & np.ones((1, width), bool)
    off_road = below & ~geometry.drivable & ~objects
    plants = weather.vegetation_mask(image) & ~off_road & ~geometry.drivable & ~objects
    out = weather.snow_cover(image, ground=off_road, vegetation=plants, cover=0.55 + 0.4 * intensity, rng=rng)
    out = weather.wet_road(out, geometry.drivable, wetness_level=0.5)
    out = weather.scale_hsv(out, saturation=0.7, value=0.95)
    visibility_m = weather.snow_visibility_m(intensity)
    beta = weather.extinction_coefficient(visibility_m)
    airlight = 0.5 * weather.estimate_airlight(image, geometry.horizon_row) + 0.5 * np.array([0.86, 0.88, 0.9])
    veiled = weather.apply_fog(out, weather.transmission(geometry.distance, beta), airlight)
    density = 40.0 + 360.0 * intensity  # flakes per m^3, tuned by eye (common practice)
    layers = weather.particle_layers(
        image.shape[:2], focal_px=geometry.focal_px, density_per_m3=density, near_m=0.4, far_m=2.5,
        n_layers=3, rng=rng,
    )  # fmt: skip
    alpha = weather.particle_alpha(
        geometry.distance, layers, focal_px=geometry.focal_px, diameter_m=SNOW_FLAKE_DIAMETER_M,
        fall_speed_m_s=SNOW_FALL_SPEED_M_S, angle_deg=float(rng.uniform(-20.0, 20.0)), opacity=0.9,
        defocus_px_m=0.8, rng=rng,
    )  # fmt: skip
    out = _over(veiled, alpha, np.array([0.95, 0.96, 0.98]))
    details = {
        "snow_intensity": intensity,
        "visibility_m": round(visibility_m, 1),
        "beta_per_m": round(beta, 6),
        "airlight_rgb": [round(float(v) * 255, 1) for v in airlight],
        "flakes_per_m3": density,
        "flakes_drawn": sum(layer.count for layer in layers),
    }
    return Rendered(out, beta, veiled, details)


def render_low_light(image, geometry: Geometry, options, names, rng) -> Rendered:
    """The low-light curve ``b (a I)^g``, a colour cast, lamps on vehicles and sensor noise."""
    condition = options["condition"]
    params = weather.sample_low_light(condition, rng)
    dark = weather.low_light_curve(image, a=params.a, b=params.b, g=params.g)
    # day-for-night: night light is bluish, dusk light warm (common practice)
    cast = {"night": (0.78, 0.88, 1.12), "dusk": (1.06, 0.93, 0.84)}[condition]
    dark = dark * np.asarray(cast, np.float32)
    lamps = []
    width = image.shape[1]
    for ann in geometry.annotations:
        kind = LAMP_KINDS.get(names[ann.category_id])
        if kind is None:
            continue
        x, _, w, _ = ann.bbox
        if kind == "road":
            kind = "head" if x + w / 2 < width / 2 else "tail"
        lamps += [(c, r, radius, kind) for c, r, radius in weather.lamp_positions(ann.bbox, kind)]
    brightness = {"night": 1.0, "dusk": 0.6}[condition]
    lit = dark + weather.lamp_light(image.shape[:2], lamps, brightness=brightness)
    noisy = weather.poisson_gaussian_noise(
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


def _over(image: np.ndarray, alpha: np.ndarray, colour: np.ndarray) -> np.ndarray:
    """Composite a particle layer of ``colour`` (sRGB 0..1) with coverage ``alpha`` over ``image``, in linear light."""
    linear = weather.srgb_to_linear(image)
    paint = weather.srgb_to_linear(np.rint(np.asarray(colour) * 255).astype(np.uint8).reshape(1, 1, 3))
    return weather.linear_to_srgb(linear * (1 - alpha[..., None]) + paint * alpha[..., None])


def _half_grey(colour: np.ndarray) -> np.ndarray:
    """Half-way between a colour and its grey: fog droplets scatter all wavelengths about equally (Mie
    scattering; from memory), so a dusk sky's strong tint would overstate the fog's colour."""
    return 0.5 * colour + 0.5 * float(colour.mean())


def _stands_on(ann: Annotation, drivable: np.ndarray) -> bool:
    x, _, w, _ = ann.bbox
    row = min(drivable.shape[0] - 1, max(0, int(ann.bottom_row) - 1))
    c0, c1 = max(0, int(x)), min(drivable.shape[1], int(math.ceil(x + w)))
    return c1 > c0 and drivable[row, c0:c1].mean() >= 0.5
