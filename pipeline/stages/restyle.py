"""Restyle stage: show a real scene with its rare objects under another condition, labels kept true.

Physically based renderers only (:mod:`pipeline.stages.restyle_render` over :mod:`pipeline.weather`); the
stage asks the generator for nothing, so its draft has no inpainting requests. Distances come from the
data set's depth map where given, else from the photo (:mod:`pipeline.stages.restyle_scene`): the ground
plane below the horizon, upright scenery at the distance of its ground contact, sky at the far limit, and
labelled objects at their footprint (bottom-row) distance over their silhouettes (segmentation, else a
GrabCut estimate inside the box, else a soft matte), never over whole boxes.

A learned restyle (partial noising and denoising of the whole frame under a condition label, SDEdit-style)
is not available: no generator supports a condition label yet (``InpaintRequest.condition`` must be None).

Label-aware visibility (fog, snow): an object is invisible when its transmission ``t(d)`` at its footprint
distance is below 5% (farther than the meteorological optical range, by the WMO/CIE definition) or when its
contrast measured from pixels (:func:`pipeline.weather.fog.object_contrast`, the object's pixels against a ring
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
from dataclasses import replace
from typing import Any

import numpy as np

from ..dataset import Dataset
from ..filters import FilterLimits
from ..plan import Job
from ..recipe import StageSpec
from ..weather import colour, fog
from ..weather.distance import footprint_distance
from .base import Candidate, Draft, Failure, StageContext
from .restyle_render import RENDERERS
from .restyle_scene import Geometry, scene_geometry

CONDITIONS = ("fog", "rain", "snow", "dusk", "night")


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
    # the recipe keeps this option only for the conditions that veil objects (fog, snow)
    crowd = options.get("keep_invisible_as_crowd", False)
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


def visibility(clear: np.ndarray, veiled: np.ndarray, geometry: Geometry, *, beta: float) -> list[dict[str, Any]]:
    """Per labelled object: footprint transmission, contrast before and after, invisible or not, and why."""
    before = colour.luminance(colour.srgb_to_linear(clear))
    after = colour.luminance(colour.srgb_to_linear(veiled))
    objects = np.zeros(clear.shape[:2], dtype=bool)
    for region in geometry.regions:
        objects |= region
    out = []
    for ann, region in zip(geometry.annotations, geometry.regions, strict=True):
        ring = fog.ring_mask(ann.bbox, clear.shape[:2])
        ring = ring & ~objects if (ring & ~objects).any() else ring
        distance = footprint_distance(ann.bottom_row, geometry.horizon_row, geometry.focal_px, geometry.camera_height_m)
        t = float(fog.transmission(distance, beta))
        c0 = fog.object_contrast(before, region, ring)
        c1 = fog.object_contrast(after, region, ring)
        limit = fog.MOR_CONTRAST
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
