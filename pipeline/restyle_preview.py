"""Restyle previews: a scene's input, its distance map and its restyled versions side by side.

So a user can see why a scene looks as it does under a condition: the distance map is colour-mapped on a
log scale (near red, far blue), the pixels whose distance is a guess are hatched, and the contact line
where upright scenery meets the ground is drawn in white. One row per scene, one panel per condition.

The ground model is fitted per image size (a data set may mix cameras); a size with too few boxes for a
fit gets a level camera with the horizon at the principal row where intrinsics are given, else at the
image middle, and the preview says so.
"""

from __future__ import annotations

import dataclasses
import io
import math
import os
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import cv2
import numpy as np
from PIL import Image

from .dataset import Dataset, Scene
from .errors import DatasetError, DatasetWarning, RarefillError, UsageError
from .files import write_bytes_atomic
from .filters import FilterLimits
from .geometry import GroundModel, fit_ground
from .recipe import STAGE_OPTIONS
from .stages.base import StageContext
from .stages.restyle_render import RENDERERS
from .stages.restyle_scene import Geometry, scene_geometry
from .surface import mask_for
from .weather.distance import FAR_LIMIT_M, DistanceMap

DEFAULT_SHEET = ("fog:80", "fog:300", "rain:25", "night")
"""Conditions of a default sheet: thick and light fog, a 25 mm/h shower, night."""

KNOBS = {"fog": "visibility_m", "rain": "rain_mm_per_h", "snow": "snow_intensity"}
"""The one recipe option each condition's number in ``"fog:80"`` sets."""


@dataclass(frozen=True)
class Condition:
    """One condition to preview: its restyle options and a short label."""

    options: dict[str, Any]
    label: str


def parse_condition(text: str) -> Condition:
    """``"fog:80"``, ``"rain:25"``, ``"snow:0.7"``, ``"night"`` or ``"dusk"`` as full restyle options.

    Raises
    ------
    UsageError
        An unknown condition, or a value its recipe option refuses.
    """
    name, _, value = text.partition(":")
    schema = STAGE_OPTIONS["restyle"]
    options = {key: default for key, (_, default) in schema.items() if default is not None}
    try:
        options["condition"] = schema["condition"][0](name)
        if value:
            if name not in KNOBS:
                raise ValueError(f"{name} takes no value")
            options[KNOBS[name]] = schema[KNOBS[name]][0](float(value))
    except ValueError as exc:
        hint = 'write e.g. "fog:80", "rain:25", "snow:0.5", "night" or "dusk"'
        raise UsageError(f"condition {text!r}: {exc}", hint=hint) from None
    unit = {"fog": " m", "rain": " mm/h", "snow": ""}.get(name, "")
    label = f"{name} {options[KNOBS[name]]:g}{unit}" if name in KNOBS else name
    return Condition(options, label)


def preview_contexts(dataset: Dataset, *, camera_height_m: float | None = None) -> dict[tuple[int, int], StageContext]:
    """One stage context per image size: its own ground model and the scenes' drivable surfaces.

    ``camera_height_m`` replaces the fitted camera height (the labels alone often cannot tell it).
    """
    contexts = {}
    for size in sorted({(s.width, s.height) for s in dataset.scenes}):
        group = dataclasses.replace(dataset, scenes=tuple(s for s in dataset.scenes if (s.width, s.height) == size))
        try:
            ground = fit_ground(group)
        except (ValueError, RarefillError):
            ground = GroundModel(size[1] / 2, {}, None, image_width=size[0], image_height=size[1])
            reason = "too few boxes to fit a ground model; horizon at mid-height unless intrinsics say otherwise"
            warnings.warn(DatasetWarning(f"{size[0]}x{size[1]} images: {reason}"), stacklevel=2)
        if camera_height_m is not None:
            ground = dataclasses.replace(ground, camera_height_m=float(camera_height_m))
        contexts[size] = StageContext(
            dataset=group, generator=None, ground=ground, limits=FilterLimits(), surface=_surfaces(group),
            aspect_ratios={}, footprint_rows=(0.0, math.inf),
        )  # fmt: skip
    return contexts


def find_scene(dataset: Dataset, ref: str) -> Scene:
    """The scene whose id, file name or file name's last part is ``ref``; ``DatasetError`` otherwise."""
    for scene in dataset.scenes:
        if ref in (str(scene.id), scene.file_name, os.path.basename(scene.file_name)):
            return scene
    shown = ", ".join(os.path.basename(s.file_name) for s in dataset.scenes[:3])
    raise DatasetError(dataset.source, "images", f"no image with id or file name {ref!r} (e.g. {shown})")


def preview_row(scene: Scene, ctx: StageContext, conditions: Sequence[Condition], *, seed: int = 0) -> list:
    """``[(label, image), ...]``: the input, its distance map, then each condition's output."""
    image = scene.load_rgb()
    geometry = scene_geometry(image, scene, ctx)
    names = ctx.dataset.category_names()
    panels = [
        (os.path.basename(scene.file_name), image),
        (_distance_label(geometry), distance_panel(geometry.distance_map)),
    ]
    for i, condition in enumerate(conditions):
        rng = np.random.default_rng([seed, scene.id, i])
        rendered = RENDERERS[condition.options["condition"]](image, geometry, condition.options, names, rng)
        panels.append((condition.label, rendered.image))
    return panels


def distance_panel(dmap: DistanceMap, *, far_m: float = FAR_LIMIT_M) -> np.ndarray:
    """The distance map as an RGB image: log scale from 1 m (red) to ``far_m`` (blue), guesses hatched,
    the contact line white."""
    d = np.clip(dmap.distance, 1.0, far_m)
    level = np.rint(255 * (1.0 - np.log(d) / math.log(far_m))).astype(np.uint8)
    rgb = cv2.cvtColor(cv2.applyColorMap(level, cv2.COLORMAP_TURBO), cv2.COLOR_BGR2RGB).astype(np.float32)
    height, width = d.shape
    rows, cols = np.mgrid[0:height, 0:width]
    stripe = ((rows + cols) // max(3, width // 200)) % 4 == 0
    rgb[dmap.guessed & stripe] *= 0.45
    out = rgb.astype(np.uint8)
    contact = np.clip(dmap.contact_row.astype(int), 0, height - 1)
    thick = max(1, width // 600)
    for dy in range(-thick, thick + 1):
        out[np.clip(contact + dy, 0, height - 1), np.arange(width)] = 255
    return out


def compose_sheet(rows: Sequence[Sequence[tuple[str, np.ndarray]]], *, panel_width: int = 480) -> np.ndarray:
    """Stack preview rows into one RGB sheet, every panel ``panel_width`` px wide with its label on top."""
    lines = []
    for row in rows:
        scaled = []
        for label, panel in row:
            h = max(1, int(round(panel.shape[0] * panel_width / panel.shape[1])))
            tile = cv2.resize(panel, (panel_width, h), interpolation=cv2.INTER_AREA)
            bar = np.full((22, panel_width, 3), 24, np.uint8)
            cv2.putText(bar, label[:60], (4, 16), cv2.FONT_HERSHEY_SIMPLEX, 0.45, (235, 235, 235), 1, cv2.LINE_AA)
            scaled.append(np.vstack([bar, tile]))
        tallest = max(t.shape[0] for t in scaled)
        scaled = [np.vstack([t, np.zeros((tallest - t.shape[0], panel_width, 3), np.uint8)]) for t in scaled]
        lines.append(np.hstack([np.pad(t, ((0, 4), (0, 4), (0, 0))) for t in scaled]))
    width = max(line.shape[1] for line in lines)
    return np.vstack([np.pad(line, ((0, 0), (0, width - line.shape[1]), (0, 0))) for line in lines])


def write_preview(
    dataset: Dataset,
    refs: Sequence[str],
    conditions: Sequence[Condition],
    out: str | os.PathLike[str],
    *,
    camera_height_m: float | None = None,
    panel_width: int = 480,
    seed: int = 0,
    progress: Callable[[Scene], None] | None = None,
) -> int:
    """Write the preview sheet of the scenes ``refs`` (all scenes when empty) as a PNG; returns the row count."""
    scenes = [find_scene(dataset, r) for r in refs] if refs else list(dataset.scenes)
    contexts = preview_contexts(dataset, camera_height_m=camera_height_m)
    rows = []
    for scene in scenes:
        rows.append(preview_row(scene, contexts[(scene.width, scene.height)], conditions, seed=seed))
        if progress is not None:
            progress(scene)
    buffer = io.BytesIO()
    Image.fromarray(compose_sheet(rows, panel_width=panel_width)).save(buffer, format="PNG")
    write_bytes_atomic(out, buffer.getvalue())
    return len(rows)


def _distance_label(geometry: Geometry) -> str:
    guessed = float(geometry.distance_map.guessed.mean())
    cam = geometry.camera
    return (
        f"distance 1 m-1 km (log), hatched: guessed {guessed:.0%}; h {cam.camera_height_m:.2f} m, f {cam.focal_px:.0f}"
    )


def _surfaces(group: Dataset) -> Callable[[Scene], Any]:
    cache: dict[int, Any] = {}

    def surface(scene: Scene):
        if scene.id not in cache:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # an estimated surface is the norm here; the panel hatches it
                cache[scene.id] = mask_for(scene, dataset=group)
        return cache[scene.id]

    return surface
