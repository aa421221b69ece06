"""Insert stage: add 1..k new objects of the target class where they can stand, and label what was drawn.

Options (recipe ``[[stage]]`` keys):

``objects_per_image``
    An integer or ``[min, max]``: how many new objects one output gets (drawn uniformly).
``appearance``
    ``"exemplar"`` (default): each new object is a real instance of the class from the training split,
    placed at the image's own resolution and harmonised by the generator
    (:mod:`pipeline.stages.insert_exemplar`). ``"generated"``: the generator draws the object from its
    class label alone (this module), its label re-fitted to the drawn pixels.
``harmonise``
    Exemplar mode: let a generator that takes exemplars repaint the object in context (default true);
    false pastes the exemplar with a light feather (the naive-paste control).
``max_upscale``
    Exemplar mode: largest enlargement of an exemplar (default 1.5).
``mirror``
    Exemplar mode: probability of mirroring an exemplar left-right (default 0.5).
``hue_shift_deg``
    Exemplar mode: hue rotation inside the silhouette, drawn uniformly in ``[-v, v]`` (default 0: off).
``light_match``
    Exemplar mode: how far the exemplar's colours are carried from its source image's light into the
    scene's before it is placed, 0 (off) to 1 (the full ratio of the two images' mean colours; default).
``across_road``
    Exemplar mode: ``"real"`` (default) draws where each new object stands across the road from where the
    class's real instances stand (:mod:`pipeline.across_road`); ``"anywhere"`` draws a surface column.
``heights``
    Exemplar mode: ``"real"`` (default) draws each target box height from the class's real box heights;
    ``[min, max]`` draws it log-uniformly in that range (pixels).
``mask_margin``
    Generated mode: how far the inpainting mask reaches beyond the sampled box, as a share of its width
    (sides) and height (top); the generator needs room to draw the object's outline and its contact with
    the ground.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..dataset import Dataset
from ..filters import FilterLimits
from ..generator import InpaintRequest
from ..generator.windows import box_mask, object_mask_box
from ..geometry import ground_for
from ..placement import sample_box
from ..plan import Job, derive_seed
from ..recipe import StageSpec
from ..refit import refit_box
from ..surface import Surface
from . import insert_exemplar
from .base import Candidate, Draft, Failure, NewObject, StageContext, takes_objects

OCCLUSION_TRIES = 8
"""Placements drawn per object until its repainted region leaves every nearer object alone; the last one
is kept anyway and the occlusion check in :func:`complete` rejects it, with the reason."""

HIDDEN_SHARE = 0.5
"""A farther object whose box is repainted by this share or more is hidden behind the new object and
leaves the labels (listed in provenance); less hidden, it stays labelled, as partly occluded objects are
in real data."""


def eligible(dataset: Dataset, spec: StageSpec, limits: FilterLimits) -> list[tuple[int, int]]:
    """Scenes that can take the wanted number of new objects within the objects-per-image limit."""
    least = spec.options["objects_per_image"][0]
    return [(i, -1) for i, scene in enumerate(dataset.scenes) if takes_objects(scene, least, limits)]


def object_mask(box: Sequence[float], shape: tuple[int, int], margin: float) -> np.ndarray:
    """The region the generator may repaint for an object in ``box``: the box grown by ``margin``.

    Grown by ``margin`` x width on each side and ``margin`` x height on top, and by 2 px below only, so that
    the object's footprint stays where the placement put it. The generator was trained on this geometry.
    """
    return box_mask(shape, object_mask_box(box, margin=margin))


def mask_box(mask: np.ndarray) -> tuple[float, float, float, float]:
    """The ``[x, y, w, h]`` bounding box of a non-empty boolean mask."""
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return (float(cols[0]), float(rows[0]), float(cols[-1] + 1 - cols[0]), float(rows[-1] + 1 - rows[0]))


def within_rows(surface: Surface, rows: tuple[float, float]) -> Surface:
    """The part of ``surface`` whose rows lie in ``[rows[0], rows[1]]``."""
    index = np.arange(surface.mask.shape[0])[:, None]
    band = (index >= np.floor(rows[0])) & (index <= np.ceil(rows[1]))
    return Surface(surface.mask & band, surface.estimated)


def draft(job: Job, attempt: int, spec: StageSpec, ctx: StageContext) -> Draft | Failure:
    """Place the new objects and ask the generator for each one's window."""
    # 1. check inputs and pick the source scene of this attempt
    scene_index, _ = job.sources[attempt]
    scene = ctx.dataset.scenes[scene_index]
    rng = np.random.default_rng(job.attempt_seed(attempt))
    low, high = spec.options["objects_per_image"]
    wanted = int(rng.integers(low, high + 1))
    if spec.options["appearance"] == "exemplar":
        return insert_exemplar.draft(job, attempt, spec, ctx, wanted, low)

    # 2. place the objects one after another, each apart from all earlier ones, where real objects stand
    surface = within_rows(ctx.surface(scene), ctx.footprint_rows)
    boxes = [a.bbox for a in scene.annotations if not a.iscrowd]
    shape = (scene.height, scene.width)
    margin = spec.options["mask_margin"]
    placed = []
    ground = ground_for(ctx.ground, scene)
    for _ in range(wanted):
        for _ in range(OCCLUSION_TRIES):
            placement = sample_box(
                scene, spec.target_class, ground, surface, rng, ctx.limits,
                aspect_ratios=ctx.aspect_ratios, existing_boxes=boxes,
            )  # fmt: skip
            if not placement or not _paints_over_nearer(placement, scene.annotations, shape, margin):
                break
        if not placement:
            if len(placed) >= low:
                break
            return Failure("placement", placement.reason, {"failures": dict(placement.failures)})
        placed.append(placement)
        boxes.append(placement.box)

    # 3. build one mask and one request per object
    image = scene.load_rgb()
    requests = []
    for i, placement in enumerate(placed):
        mask = object_mask(placement.box, image.shape[:2], margin)
        seed = derive_seed(job.attempt_seed(attempt), "object", i)
        requests.append(InpaintRequest(image, mask, mask_box(mask), spec.target_class, seed))
    return Draft(spec, scene, image, tuple(requests), {"placements": tuple(placed)})


def _paints_over_nearer(placement, annotations, shape: tuple[int, int], margin: float) -> bool:
    """Would the new object's repainted region cover part of an object that stands nearer the camera?"""
    return _nearer_covered(object_mask(placement.box, shape, margin), placement.box, annotations) is not None


def _nearer_covered(mask: np.ndarray, box: Sequence[float], annotations):
    """The first annotation standing nearer than ``box`` (lower bottom edge) that ``mask`` covers, or None."""
    bottom = box[1] + box[3]
    return next((a for a in annotations if a.bottom_row > bottom and _covered_share(a.bbox, mask) > 0), None)


def complete(draft_: Draft, frames: Sequence[np.ndarray], ctx: StageContext) -> Candidate | Failure:
    """Compose the generated windows and re-fit each label to the object actually drawn."""
    if draft_.state.get("mode") == "exemplar":
        return insert_exemplar.complete(draft_, frames, ctx)
    # 4. assemble the result: each frame changed only pixels inside its own (disjoint) mask
    out = draft_.image.copy()
    changed = np.zeros(out.shape[:2], dtype=bool)
    for request, frame in zip(draft_.requests, frames, strict=True):
        out[request.mask] = frame[request.mask]
        changed |= request.mask

    # 5. re-fit each label to the generated pixels, not the requested box
    category_id = ctx.dataset.category_by_name(draft_.stage.target_class).id
    new = []
    for request, placement in zip(draft_.requests, draft_.state["placements"], strict=True):
        box = refit_box(draft_.image, out, request.mask, placement.box)
        if box is None:
            return Failure("present", f"nothing was generated under the requested box {_rounded(placement.box)}")
        extra = {"expected_height_px": round(placement.expected_height, 2), "height_sd": round(placement.height_sd, 3)}
        new.append(NewObject(category_id, box, placement.box, extra))

    # 6. keep the labels true under the new pixels: a new object stands in front of farther objects only
    for request, placement in zip(draft_.requests, draft_.state["placements"], strict=True):
        nearer = _nearer_covered(request.mask, placement.box, draft_.scene.annotations)
        if nearer is not None:
            share = _covered_share(nearer.bbox, request.mask)
            return Failure(
                "occlusion",
                f"the new object would be painted over nearer annotation {nearer.id} ({share:.0%} of its box)",
            )
    kept, dropped = [], []
    for ann in draft_.scene.annotations:
        hidden = _covered_share(ann.bbox, changed) if not ann.iscrowd else 0.0
        if hidden >= HIDDEN_SHARE:
            dropped.append((ann, f"hidden behind an inserted object ({hidden:.0%} of its box repainted)"))
        else:
            kept.append(ann)
    checked = tuple(-1 - i for i in range(len(new)))
    details = {"objects": len(new)}
    return Candidate(out, draft_.scene, tuple(kept), tuple(new), changed, checked, tuple(dropped), details)


def _covered_share(box: Sequence[float], mask: np.ndarray) -> float:
    """Share of the box's pixels that lie in ``mask``."""
    x, y, w, h = box
    r0, r1 = max(0, int(np.floor(y))), min(mask.shape[0], int(np.ceil(y + h)))
    c0, c1 = max(0, int(np.floor(x))), min(mask.shape[1], int(np.ceil(x + w)))
    if r1 <= r0 or c1 <= c0:
        return 0.0
    return float(mask[r0:r1, c0:c1].mean())


def _rounded(box: Sequence[float]) -> list[float]:
    return [round(float(v), 1) for v in box]
