"""Insert stage, ``appearance = "exemplar"``: new objects made from real instances of the class.

For each new object: a target height drawn from the class's real box heights (kept for every attempt of
the job, so retries on other scenes do not bias the heights toward those that fit easily), an exemplar
from the bank that reaches that height within the upscale limit (round-robin over the job slots), a row
where the ground model expects that height and a column where the class's real instances stand across
the road (``across_road = "real"``, :mod:`pipeline.across_road`; anywhere on the surface with
``"anywhere"``; :func:`~pipeline.placement.place_at_height`), then :func:`~pipeline.compose.place_exemplar`.
A generator that takes exemplars repaints the grown silhouette and shadow band in context
(:func:`~pipeline.silhouette.repaint_mask`) and the exemplar's detail is put back
(:func:`~pipeline.compose.keep_detail`); otherwise, or with ``harmonise = false``, the exemplar is pasted
with a light feather. The label is the placed silhouette:
box from its bounds, segmentation as COCO RLE.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import replace

import cv2
import numpy as np

from ..compose import Placed, detail_levels, feathered_paste, keep_detail, place_exemplar
from ..dataset import Annotation, Scene
from ..exemplars import ExemplarBank
from ..generator import InpaintRequest
from ..geometry import ground_for
from ..height_draws import draw_height
from ..placement import NoPlacement, place_at_height
from ..plan import Job, derive_seed
from ..recipe import StageSpec
from ..relight import light_gain, relit
from ..rle import encode as encode_rle
from ..silhouette import RepaintRegion, box_pixels, object_silhouette, repaint_mask, segmentation_mask
from .base import Candidate, Draft, Failure, NewObject, StageContext, takes_objects

PLACEMENT_TRIES = 8
"""Placements drawn per object until nearer objects hide little enough of it and its repainted region
leaves the other new objects alone."""

MAX_HIDDEN_SHARE = 0.45
"""Largest share of a new object's silhouette that nearer objects may hide. Real rare objects are often
partly hidden, never mostly: in the seed scenes 28-35% of tractors and trailers are more than 20% hidden,
none more than 45% (their rendered visibility, train, val and test splits)."""

PLACEMENT_HIDDEN_BOX_SHARE = 0.8
"""Box-level pre-check in placement: nearer boxes covering more of the new box than this hide more than
:data:`MAX_HIDDEN_SHARE` of its silhouette (boxes cover more than the pixels an object hides: on the
seed scenes about twice, against their rendered visibility)."""

MIN_VISIBLE_SHARE = 0.25
"""A farther object keeps its label, its box clipped to what stays visible, while at least this share of
its pixels (segmentation, else box) stays visible; less, and it leaves the labels (listed in provenance)."""

SCENE_TRIES = 4
"""Scenes an attempt looks at, its planned one first, until one has room for the new objects."""

NO_ROOM = ("placement", "occlusion")
"""Failures that show a scene has no room for the objects (found before anything is drawn)."""

HEIGHT_DRAWS = 100
"""Target heights drawn until one an exemplar can reach within the upscale limit: the target distribution
is the real one cut where the bank's tallest instance ends (a taller one would fail every attempt) and
below the smallest real height (see :func:`target_height`)."""


def bank_for(spec: StageSpec, ctx: StageContext) -> ExemplarBank:
    """The stage's exemplar bank (built by the runner)."""
    bank = ctx.exemplars.get(spec.index)
    if bank is None:
        raise ValueError(f"stage[{spec.index}] inserts exemplars but the context holds no exemplar bank for it")
    return bank


def target_height(spec: StageSpec, bank: ExemplarBank, job: Job, index: int) -> float:
    """The box height object ``index`` of ``job`` is made at: the same for every attempt of the job.

    With ``heights = "real"`` the kernel density estimate is cut below the smallest real box height: a
    data set's labels often stop at some size (annotators skip tiny objects), and below its smallest real
    instance nothing says what the class looks like or whether it would be labelled. (In the seed scenes the
    kernel's tail reached 11 px trailers against 16.5 px for the smallest real one of any split, and the
    verifier turned down two of three of those.) A recipe's own ``heights = [low, high]`` is taken as given.
    """
    rng = np.random.default_rng(derive_seed(job.seed, "height", index))
    wanted = spec.options["heights"]
    for _ in range(HEIGHT_DRAWS):
        if wanted == "real":
            height = draw_height(bank.heights, bank.bandwidth, rng)
            if height < bank.heights.min():
                continue
        else:
            height = float(math.exp(rng.uniform(math.log(wanted[0]), math.log(wanted[1]))))
        if bank.usable_for(height):
            break
    return height


def exemplar_slot(job_slot: int, index: int, per_image: int) -> int:
    """The round-robin position of object ``index`` of job ``job_slot`` when images get up to ``per_image``.

    Positions are consecutive over the stage's objects (``job_slot * per_image + index``), so the objects
    cycle through the usable exemplars evenly whatever their number; a stride that shares a factor with it
    (8 per job, say, with 4 or 8 usable exemplars) would give every one-object job the same exemplar.
    """
    return job_slot * per_image + index


def draft(job: Job, attempt: int, spec: StageSpec, ctx: StageContext, wanted: int, low: int) -> Draft | Failure:
    """Place ``wanted`` exemplars (at least ``low``) into the attempt's scene; requests when harmonising.

    A scene with no room for the objects (no plausible column at the row their height needs, or nearer
    objects would hide too much of them) is found before anything is drawn; the attempt then moves to
    another scene (:func:`scenes_to_try`), up to :data:`SCENE_TRIES` in all, so that an attempt is a
    composite drawn and judged. The scenes passed over are listed in the draft's provenance.
    """
    bank = bank_for(spec, ctx)
    if not bank.exemplars:
        return Failure("exemplar", f"no usable real {spec.target_class} to insert ({bank.summary()['left_out']})")
    passed_over: list[dict] = []
    for k, scene in enumerate(scenes_to_try(job, attempt, spec, ctx)):
        # The planned scene keeps the attempt's own seed: an attempt that finds room there is unchanged.
        seed = job.attempt_seed(attempt) if k == 0 else derive_seed(job.attempt_seed(attempt), "scene", k)
        made = _draft_in(scene, job, attempt, seed, spec, ctx, bank, wanted, low)
        if not (isinstance(made, Failure) and made.filter in NO_ROOM):
            break
        passed_over.append({"image_id": scene.id, "filter": made.filter, "reason": made.reason})
    if isinstance(made, Failure):
        return replace(made, details={**made.details, "scenes_without_room": passed_over})
    if passed_over:
        made = replace(made, state={**made.state, "scenes_without_room": passed_over})
    return made


def scenes_to_try(job: Job, attempt: int, spec: StageSpec, ctx: StageContext) -> Iterator[Scene]:
    """The attempt's planned scene, then up to ``SCENE_TRIES - 1`` others drawn from the attempt's seed
    among the scenes that can take the stage's objects (same seed, same scenes). The others are looked
    for only when asked for: most attempts find room in their planned scene."""
    first = job.sources[attempt][0]
    yield ctx.dataset.scenes[first]
    least = spec.options["objects_per_image"][0]
    room = [i for i, scene in enumerate(ctx.dataset.scenes) if i != first and takes_objects(scene, least, ctx.limits)]
    rng = np.random.default_rng(derive_seed(job.attempt_seed(attempt), "scenes"))
    for k in rng.permutation(len(room))[: SCENE_TRIES - 1]:
        yield ctx.dataset.scenes[room[k]]


def _draft_in(
    scene: Scene,
    job: Job,
    attempt: int,
    seed: int,
    spec: StageSpec,
    ctx: StageContext,
    bank: ExemplarBank,
    wanted: int,
    low: int,
) -> Draft | Failure:
    """The draft of the attempt in ``scene``, its placements drawn from ``seed``."""
    rng = np.random.default_rng(seed)
    image = scene.load_rgb()
    surface = ctx.surface(scene)
    boxes = [a.bbox for a in scene.annotations if not a.iscrowd]
    taken = np.zeros(image.shape[:2], dtype=bool)
    objects: list[dict] = []
    cache: dict = {}
    for i in range(wanted):
        made = _one_object(job, spec, ctx, bank, i, scene, image, surface, boxes, taken, rng, cache)
        if isinstance(made, Failure):
            if len(objects) >= low:
                break
            return made
        objects.append(made)
        boxes.append(made["placed"].box)
        taken |= made["region"].mask
    harmonise = spec.options["harmonise"] and ctx.generator.accepts_exemplar
    requests = []
    if harmonise:
        for i, obj in enumerate(objects):
            region = obj["region"].mask
            seed = derive_seed(job.attempt_seed(attempt), "object", i)
            placed = obj["placed"]
            requests.append(
                InpaintRequest(
                    image, region, _bounds(region), spec.target_class, seed, None, placed.composite, placed.alpha
                )
            )
    return Draft(spec, scene, image, tuple(requests), {"mode": "exemplar", "objects": objects, "harmonise": harmonise})


def _one_object(job, spec, ctx, bank, index, scene, image, surface, boxes, taken, rng, cache) -> dict | Failure:
    height = target_height(spec, bank, job, index)
    exemplar = bank.pick(height, exemplar_slot(job.slot, index, spec.options["objects_per_image"][1]))
    if exemplar is None:
        tallest = max(e.height for e in bank.exemplars)
        reason = f"no exemplar reaches {height:.0f} px within {bank.max_upscale:g}x (tallest {tallest} px)"
        return Failure("exemplar", reason)
    gain = light_gain(exemplar, image, spec.options["light_match"])
    exemplar = relit(exemplar, gain)
    x0, y0, x1, y1 = exemplar.bounds
    aspect = (x1 - x0) / (y1 - y0)
    last: Failure | None = None
    for _ in range(PLACEMENT_TRIES):
        placement = place_at_height(
            scene, spec.target_class, height, aspect, ground_for(ctx.ground, scene), surface, rng, ctx.limits,
            existing_boxes=boxes, exact_pixels=True, max_hidden=PLACEMENT_HIDDEN_BOX_SHARE,
            laterals=bank.laterals if spec.options["across_road"] == "real" else None,
        )  # fmt: skip
        if isinstance(placement, NoPlacement):
            return Failure("placement", placement.reason, {"failures": dict(placement.failures)})
        mirror = bool(rng.random() < spec.options["mirror"])
        hue = float(rng.uniform(-1.0, 1.0) * spec.options["hue_shift_deg"])
        # The row is rounded to a pixel edge, so the model's height there may pass the target by a
        # fraction of a pixel; the exemplar reaches the target, and is never enlarged beyond the limit.
        placed_height = min(placement.expected_height, exemplar.height * bank.max_upscale)
        placed = place_exemplar(
            image, exemplar, bottom_row=int(placement.bottom_row), centre_col=placement.centre_col,
            height_px=placed_height, mirror=mirror, hue_deg=hue,
        )  # fmt: skip
        if placed is None:
            last = Failure("placement", "the placed exemplar would leave the image")
            continue
        region = repaint_mask(placed.silhouette, placed.box)
        protected = _nearer_pixels(region.mask, placed.box, scene, image, cache)
        hidden = float((placed.silhouette & protected).sum()) / float(placed.silhouette.sum())
        if hidden > MAX_HIDDEN_SHARE:
            last = Failure("occlusion", f"nearer objects would hide {hidden:.0%} of the new object")
            continue
        amodal = [float(v) for v in placed.box]
        if protected.any():
            placed, region = _behind(placed, protected, image)
        if (region.mask & taken).any():
            last = Failure("overlap", "the new object's repainted region would cover another new object")
            continue
        extra = {
            "exemplar": exemplar.describe(),
            "scale": round(placed.scale, 4),
            "mirrored": mirror,
            "hue_shift_deg": round(hue, 2),
            "light_gain": [round(float(g), 3) for g in gain],
            "target_height_px": round(height, 2),
            "expected_height_px": round(placement.expected_height, 2),
            "amodal_bbox": amodal,
            "hidden_share": round(hidden, 3),
        }
        return {"placed": placed, "region": region, "placement": placement, "extra": extra}
    return last if last is not None else Failure("placement", "no placement")


def _nearer_pixels(region: np.ndarray, box: Sequence[float], scene, image: np.ndarray, cache: dict) -> np.ndarray:
    """Pixels of the objects standing nearer than ``box`` whose boxes ``region`` touches, grown by 1 px.

    Each object's pixels are its silhouette (segmentation, else GrabCut; cached per annotation in
    ``cache``): a new object standing behind it is composited behind those pixels, never over them.
    """
    bottom = box[1] + box[3]
    out = np.zeros(region.shape, dtype=bool)
    for ann in scene.annotations:
        if ann.iscrowd or ann.bottom_row <= bottom:
            continue
        c0, r0, c1, r1 = box_pixels(ann.bbox, region.shape)
        if c1 <= c0 or r1 <= r0 or not region[r0:r1, c0:c1].any():
            continue
        if ann.id not in cache:
            cache[ann.id] = object_silhouette(image, ann.bbox, segmentation=ann.segmentation).mask
        out |= cache[ann.id]
    if out.any():
        out = cv2.dilate(out.astype(np.uint8), np.ones((3, 3), np.uint8)).astype(bool)
    return out


def _behind(placed: Placed, protected: np.ndarray, image: np.ndarray) -> tuple[Placed, RepaintRegion]:
    """The placed exemplar with the nearer objects' pixels left alone, and the region it then repaints
    (the visible silhouette grown, and the shadow band of the whole object, outside those pixels)."""
    keep = ~protected
    composite = np.where(protected[..., None], image, placed.composite)
    silhouette = placed.silhouette & keep
    region = repaint_mask(silhouette, placed.box)
    moved = replace(
        placed, composite=composite, alpha=placed.alpha * keep, silhouette=silhouette, box=_bounds(silhouette)
    )
    return moved, RepaintRegion(region.mask & keep, region.grown & keep, region.band & keep)


def _bounds(mask: np.ndarray) -> tuple[float, float, float, float]:
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return (float(cols[0]), float(rows[0]), float(cols[-1] + 1 - cols[0]), float(rows[-1] + 1 - rows[0]))


def complete(draft_: Draft, frames: Sequence[np.ndarray], ctx: StageContext) -> Candidate | Failure:
    """Harmonised frames with the exemplar's detail kept (or feathered pastes); exact labels."""
    objects = draft_.state["objects"]
    out = draft_.image.copy()
    changed = np.zeros(out.shape[:2], dtype=bool)
    window = int(ctx.generator.info().get("window") or 64)
    for i, obj in enumerate(objects):
        placed, region = obj["placed"], obj["region"]
        if draft_.state["harmonise"]:
            levels = detail_levels(max(placed.box[2], placed.box[3]), window)
            made = keep_detail(draft_.image, frames[i], placed, region.mask, levels=levels)
            out[region.mask] = made[region.mask]
            changed |= region.mask
        else:
            made = feathered_paste(draft_.image, placed, region.grown)
            out[region.grown] = made[region.grown]
            changed |= region.grown
    category_id = ctx.dataset.category_by_name(draft_.stage.target_class).id
    new = []
    for obj in objects:
        placed = obj["placed"]
        extra = {**obj["extra"], "harmonised": bool(draft_.state["harmonise"])}
        new.append(NewObject(category_id, placed.box, obj["placement"].box, extra, encode_rle(placed.silhouette)))
    covers = [(o["placed"].silhouette, o["placement"].bottom_row) for o in objects]
    kept, dropped, clipped = hide_behind(draft_.scene.annotations, covers, out.shape[:2])
    details = {"objects": len(new), "appearance": "exemplar", "harmonised": bool(draft_.state["harmonise"])}
    if draft_.state.get("scenes_without_room"):
        details["scenes_without_room"] = draft_.state["scenes_without_room"]
    if clipped:
        details["clipped"] = clipped
    checked = tuple(-1 - i for i in range(len(new)))
    return Candidate(out, draft_.scene, tuple(kept), tuple(new), changed, checked, tuple(dropped), details)


def hide_behind(annotations: Sequence[Annotation], covers: Sequence[tuple[np.ndarray, float]], shape: tuple[int, int]):
    """Real labels under new objects: farther ones lose the hidden part, or the label when too little remains.

    ``covers`` holds each new object's visible silhouette ((H, W) bool) and the row its bottom edge stands on.

    Returns
    -------
    (kept annotations, [(annotation, reason)] dropped, [clip records])
        A kept farther object whose pixels a new silhouette covers gets its box clipped to the bounds of
        its visible pixels (its segmentation where given, else its box) and, with a segmentation, the
        visible part as its new segmentation (RLE).
    """
    kept, dropped, clipped = [], [], []
    for ann in annotations:
        if ann.iscrowd:
            kept.append(ann)
            continue
        cover = np.zeros(shape, dtype=bool)
        for silhouette, bottom in covers:
            if ann.bottom_row < bottom:
                cover |= silhouette
        c0, r0, c1, r1 = box_pixels(ann.bbox, shape)
        if not cover[r0:r1, c0:c1].any():
            kept.append(ann)
            continue
        own = _pixels_of(ann, shape)
        visible = own & ~cover
        share = float(visible.sum()) / max(int(own.sum()), 1)
        if share < MIN_VISIBLE_SHARE:
            dropped.append((ann, f"hidden behind an inserted object ({share:.0%} of it stays visible)"))
            continue
        box = _bounds(visible)
        changes: dict = {}
        if box != box_pixels_box(ann.bbox, shape):
            changes.update(bbox=box, area=box[2] * box[3])
        if ann.segmentation is not None:
            changes.update(segmentation=encode_rle(visible), area=float(visible.sum()))
        if changes:
            record = {
                "annotation_id": ann.id,
                "bbox_before": list(ann.bbox),
                "bbox": list(changes.get("bbox", ann.bbox)),
            }
            clipped.append({**record, "visible_share": round(share, 3)})
            ann = replace(ann, **changes)
        kept.append(ann)
    return kept, dropped, clipped


def box_pixels_box(box: Sequence[float], shape: tuple[int, int]) -> tuple[float, float, float, float]:
    """The pixel bounds of a box as an ``(x, y, w, h)`` box."""
    c0, r0, c1, r1 = box_pixels(box, shape)
    return (float(c0), float(r0), float(c1 - c0), float(r1 - r0))


def _pixels_of(ann: Annotation, shape: tuple[int, int]) -> np.ndarray:
    c0, r0, c1, r1 = box_pixels(ann.bbox, shape)
    inside = np.zeros(shape, dtype=bool)
    inside[r0:r1, c0:c1] = True
    if ann.segmentation is not None:
        decoded = segmentation_mask(ann.segmentation, *shape) & inside
        if decoded.any():
            return decoded
    return inside
