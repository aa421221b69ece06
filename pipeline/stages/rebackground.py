"""Rebackground stage: keep a real rare object's pixels exactly and regenerate the scene around it.

The road is the object's ground: it is never repainted (except where a removed object stood, from road
context), so the drivable-surface mask and the ground model of the source scene stay true and the kept
object still stands where it stood, at its real scale. What changes is the surroundings: several square
windows of fields, verges, trees and sky are regenerated with the generator's background label, each
surrounded by original context so that it blends in; optionally the other labelled objects are removed
by background inpainting as well (and dropped from the labels).

Options (recipe ``[[stage]]`` keys):

``windows``
    How many off-road windows to regenerate (at most; fewer when the scene has no room).
``other_objects``
    ``"keep"``: the other labelled objects stay, pixels and labels untouched. ``"remove"``: each one whose
    grown box touches nothing that stays (the kept object, crowd regions, objects that must stay because they
    touch those) is inpainted over with background, whole, and listed in ``Candidate.dropped``. With the
    default CPU-trained model a removed car leaves a visible smudge that neither the verifier (it calls the
    smudge background) nor the seam filter catches, so ``"keep"`` is the default.
``max_unlabelled_probability``
    Each regenerated window (and its four quadrants) is shown to the verifier; if it gives any object class
    more than this, the new surroundings hold an unlabelled object and the candidate fails ``"unlabelled"``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import cv2
import numpy as np

from ..dataset import Annotation, Dataset
from ..errors import ModelError
from ..filters import FilterLimits
from ..generator import BACKGROUND, InpaintRequest
from ..plan import Job, derive_seed
from ..recipe import StageSpec
from ..silhouette import box_pixels, grabcut_in_box, segmentation_mask
from .base import Candidate, Draft, Failure, StageContext

SEAM_CLEARANCE_PX = 4
"""Pixels between any regenerated region and a kept object or the road edge. The seam filter measures the
gradient on a 2 px ring around the generated region (plus 1 px of Sobel support); a ring lying on a real
edge (an object's outline, the road's border) would read as a seam."""

KEEP_MARGIN_SHARE = 0.1
"""The kept object's protected region is its estimated pixels grown by this share of its shorter box side
(at least :data:`SEAM_CLEARANCE_PX`), so that a foreground estimate a little too tight never lets a window
repaint the object's edge."""

WINDOW_SIDE_SHARE = (0.1, 0.2)
"""Side of an off-road window as a share of the image height. The generator sees twice the side as context,
resized to its own window (64 px for the default model): near that size it draws sharp texture, while
windows of 0.15-0.3 of the height came out as blurred smudges on the seed scenes. More, smaller windows
change the scene as much with less visible damage."""

MIN_FREE_SHARE = 0.5
"""Least share of a window that must be free to repaint (off the road, away from objects)."""

WINDOW_GAP_PX = 6
"""Least distance between two regenerated windows: each one's border must be original context, or two
independent samples would meet at a seam."""

GRABCUT_SHARE = (0.3, 0.97)
"""A GrabCut foreground covering less or more of the box than this is not trusted; the whole box is kept."""

REMOVE_MARGIN = 0.15
"""A removed object's inpainting mask is its box grown by this share of its size (outline, shadow)."""


def eligible(dataset: Dataset, spec: StageSpec, limits: FilterLimits) -> list[tuple[int, int]]:
    """Every non-crowd annotation of the target class: ``(scene index, annotation index)``."""
    category_id = dataset.category_by_name(spec.target_class).id
    return [
        (i, j)
        for i, scene in enumerate(dataset.scenes)
        for j, ann in enumerate(scene.annotations)
        if ann.category_id == category_id and not ann.iscrowd
    ]


# --------------------------------------------------------------------------------------------------
# the object's own pixels


def object_pixels(image: np.ndarray, ann: Annotation, *, iterations: int = 4) -> tuple[np.ndarray, str]:
    """The pixels of a labelled object: its segmentation, else a GrabCut estimate inside its box.

    GrabCut starts with the box as "probably foreground" and a ring around it as sure background. An
    estimate covering less than 30% or more than 97% of the box (a failed cut, or a box too small to model
    colours in) is replaced by the whole box.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    ann : Annotation
    iterations : int
        GrabCut iterations.

    Returns
    -------
    mask : (H, W) bool ndarray
    source : {"segmentation", "grabcut", "box"}

    References
    ----------
    C. Rother, V. Kolmogorov, A. Blake, "GrabCut: interactive foreground extraction using iterated graph
    cuts", SIGGRAPH 2004 (OpenCV's ``cv2.grabCut``).
    """
    height, width = image.shape[:2]
    if ann.segmentation is not None:
        mask = segmentation_mask(ann.segmentation, height, width)
        if mask.any():
            return mask, "segmentation"
    x, y, w, h = ann.bbox
    c0, r0, c1, r1 = box_pixels(ann.bbox, (height, width))
    box = np.zeros((height, width), dtype=bool)
    box[r0:r1, c0:c1] = True
    if min(c1 - c0, r1 - r0) < 6:
        return box, "box"
    grow = max(4, int(math.ceil(0.3 * max(w, h))))
    mask = grabcut_in_box(image, (c0, r0, c1, r1), grow=grow, iterations=iterations)
    share = mask.sum() / box.sum()
    if not GRABCUT_SHARE[0] <= share <= GRABCUT_SHARE[1]:
        return box, "box"
    return mask, "grabcut"


def _grow(mask: np.ndarray, px: int) -> np.ndarray:
    if px <= 0:
        return mask.copy()
    kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * px + 1, 2 * px + 1))
    return cv2.dilate(mask.astype(np.uint8), kernel).astype(bool)


def _box_region(shape: tuple[int, int], box: Sequence[float], grow: float = 0.0) -> np.ndarray:
    height, width = shape
    x, y, w, h = box
    mask = np.zeros(shape, dtype=bool)
    c0, r0 = max(0, int(math.floor(x - grow))), max(0, int(math.floor(y - grow)))
    c1, r1 = min(width, int(math.ceil(x + w + grow))), min(height, int(math.ceil(y + h + grow)))
    mask[r0:r1, c0:c1] = True
    return mask


def _mask_box(mask: np.ndarray) -> tuple[float, float, float, float]:
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return (float(cols[0]), float(rows[0]), float(cols[-1] + 1 - cols[0]), float(rows[-1] + 1 - rows[0]))


# --------------------------------------------------------------------------------------------------


def draft(job: Job, attempt: int, spec: StageSpec, ctx: StageContext) -> Draft | Failure:
    """Protect the kept object, pick the objects to remove and the off-road windows, ask for background."""
    # 1. check inputs: the source annotation of this attempt
    scene_index, ann_index = job.sources[attempt]
    scene = ctx.dataset.scenes[scene_index]
    target = scene.annotations[ann_index]
    if target.iscrowd or ctx.dataset.category_names()[target.category_id] != spec.target_class:
        raise ValueError(f"source annotation {target.id} is not a {spec.target_class} instance")
    rng = np.random.default_rng(job.attempt_seed(attempt))
    image = scene.load_rgb()
    shape = image.shape[:2]

    # 2. the kept object's pixels, grown so no repainted pixel and no seam ring touches them
    pixels, source = object_pixels(image, target)
    _, _, w, h = target.bbox
    keep = _grow(pixels, max(SEAM_CLEARANCE_PX, int(math.ceil(KEEP_MARGIN_SHARE * min(w, h)))))

    # 3. the other objects: removed (background over their grown box) or kept (their box is off limits). An
    # object is removed only whole: one whose region touches anything kept stays, which may keep more.
    others = [a for a in scene.annotations if a is not target]
    regions = {a.id: _box_region(shape, a.bbox, grow=REMOVE_MARGIN * max(a.bbox[2], a.bbox[3])) for a in others}
    removable = [a for a in others if not a.iscrowd] if spec.options["other_objects"] == "remove" else []
    untouchable = keep.copy()
    changed_mind = True
    while changed_mind:
        changed_mind = False
        for ann in [a for a in others if a not in removable]:
            untouchable |= _box_region(shape, ann.bbox, grow=SEAM_CLEARANCE_PX)
        for ann in list(removable):
            if (regions[ann.id] & untouchable).any():
                removable.remove(ann)
                changed_mind = True
    removed = removable
    remove_masks = [regions[a.id] for a in removed]

    # 4. off-road windows: not on the road (nor within the seam clearance of its edge), not near objects
    road = _grow(ctx.surface(scene).mask, SEAM_CLEARANCE_PX)
    taken = np.zeros(shape, dtype=bool)
    for region in remove_masks:
        taken |= _grow(region, WINDOW_GAP_PX)
    free = ~(road | untouchable)
    windows = _pick_windows(free, taken, spec.options["windows"], rng)
    if not windows and not removed:
        return Failure("placement", "no off-road room to regenerate around the kept object")

    # 5. one background request per window and per removed object
    seed = job.attempt_seed(attempt)
    requests = []
    for i, (box, region) in enumerate(windows):
        requests.append(InpaintRequest(image, region, box, BACKGROUND, derive_seed(seed, "window", i)))
    for ann, region in zip(removed, remove_masks, strict=True):
        requests.append(
            InpaintRequest(image, region, _mask_box(region), BACKGROUND, derive_seed(seed, "remove", ann.id))
        )
    state = {
        "target": target,
        "keep": keep,
        "keep_source": source,
        "removed": tuple(removed),
        "windows": tuple(box for box, _ in windows),
    }
    return Draft(spec, scene, image, tuple(requests), state)


def _pick_windows(
    free: np.ndarray, taken: np.ndarray, wanted: int, rng: np.random.Generator
) -> list[tuple[tuple[float, float, float, float], np.ndarray]]:
    """Up to ``wanted`` square windows, mostly free and apart from each other: ``(box, mask)`` pairs."""
    height, width = free.shape
    integral = cv2.integral(free.astype(np.uint8))
    taken = taken.copy()
    picked = []
    for _ in range(30 * wanted):
        if len(picked) == wanted:
            break
        side = int(round(rng.uniform(*WINDOW_SIDE_SHARE) * height))
        side = min(side, height, width)
        c0, r0 = int(rng.integers(0, width - side + 1)), int(rng.integers(0, height - side + 1))
        c1, r1 = c0 + side, r0 + side
        share = (integral[r1, c1] - integral[r0, c1] - integral[r1, c0] + integral[r0, c0]) / side**2
        if share < MIN_FREE_SHARE or taken[r0:r1, c0:c1].any():
            continue
        region = np.zeros_like(free)
        region[r0:r1, c0:c1] = free[r0:r1, c0:c1]
        picked.append(((float(c0), float(r0), float(side), float(side)), region))
        taken[max(0, r0 - WINDOW_GAP_PX) : r1 + WINDOW_GAP_PX, max(0, c0 - WINDOW_GAP_PX) : c1 + WINDOW_GAP_PX] = True
    return picked


def complete(draft_: Draft, frames: Sequence[np.ndarray], ctx: StageContext) -> Candidate | Failure:
    """Compose the regenerated regions, prove the kept object untouched, look for unlabelled objects."""
    # 1. assemble: each frame changed only pixels inside its own (disjoint) mask; its content goes in by
    # Poisson blending, because a regenerated patch of sky or field drifts in colour from its surroundings
    out = draft_.image.copy()
    changed = np.zeros(out.shape[:2], dtype=bool)
    for request, frame in zip(draft_.requests, frames, strict=True):
        out = poisson_paste(out, frame, request.mask)
        changed |= request.mask
    state = draft_.state
    keep = state["keep"]
    if not np.array_equal(out[keep], draft_.image[keep]):
        raise ModelError("the generator changed pixels outside its request masks: the kept object was touched")

    # 2. the new surroundings must not hold an object of a labelled class
    boxes = [r.box for r in draft_.requests]
    worst, worst_class, checked_boxes = _unlabelled(out, boxes, ctx)
    limit = draft_.stage.options["max_unlabelled_probability"]
    if worst is not None and worst > limit:
        return Failure(
            "unlabelled",
            f"verifier sees a {worst_class} ({worst:.2f} > {limit:g}) in a regenerated window: an unlabelled object",
            {"probability": round(worst, 3), "class": worst_class},
        )

    # 3. labels: the kept object first (the geometric filters judge it), removed objects dropped
    target = state["target"]
    removed = state["removed"]
    kept = (target, *(a for a in draft_.scene.annotations if a is not target and a not in removed))
    dropped = tuple((a, "removed by background inpainting") for a in removed)
    details = {
        "kept_annotation_id": target.id,
        "keep_source": state["keep_source"],
        "windows": [[round(v, 1) for v in box] for box in state["windows"]],
        "removed_annotation_ids": [a.id for a in removed],
        "regenerated_share": round(float(changed.mean()), 4),
        "unlabelled_check": (
            "skipped: no verifier"
            if worst is None
            else {"boxes": checked_boxes, "max_object_probability": round(worst, 3)}
        ),
    }
    return Candidate(out, draft_.scene, kept, (), changed, (0,), dropped, details)


def poisson_paste(base: np.ndarray, frame: np.ndarray, mask: np.ndarray, *, pad: int = 4) -> np.ndarray:
    """``frame``'s content inside ``mask`` blended into ``base`` in the gradient domain.

    Inside the mask the result has ``frame``'s gradients and meets ``base`` on the mask's border (OpenCV's
    ``seamlessClone``, normal cloning); the frames are padded by reflection so a mask may touch the image
    edge. Pixels outside ``mask`` are copied from ``base`` bit for bit.

    Parameters
    ----------
    base, frame : (H, W, 3) uint8 ndarray
    mask : (H, W) bool ndarray, not empty

    Returns
    -------
    (H, W, 3) uint8 ndarray

    References
    ----------
    P. Perez, M. Gangnet, A. Blake, "Poisson Image Editing", SIGGRAPH 2003.
    """
    padded_base = cv2.copyMakeBorder(base, pad, pad, pad, pad, cv2.BORDER_REFLECT)
    padded_frame = cv2.copyMakeBorder(frame, pad, pad, pad, pad, cv2.BORDER_REFLECT)
    padded_mask = (np.pad(mask, pad) * 255).astype(np.uint8)
    rows, cols = np.nonzero(padded_mask)
    # seamlessClone centres the mask's bounding box on ``centre``: this centre keeps it in place
    centre = (int((cols.min() + cols.max() + 1) // 2), int((rows.min() + rows.max() + 1) // 2))
    cloned = cv2.seamlessClone(padded_frame, padded_base, padded_mask, centre, cv2.NORMAL_CLONE)
    out = base.copy()
    out[mask] = cloned[pad:-pad, pad:-pad][mask]
    return out


def _unlabelled(
    image: np.ndarray, boxes: Sequence[Sequence[float]], ctx: StageContext
) -> tuple[float | None, str | None, int]:
    """Highest object-class probability the verifier gives a window or one of its quadrants."""
    if ctx.verifier is None or not boxes:
        return None, None, 0
    probe = []
    for x, y, w, h in boxes:
        probe.append((x, y, w, h))
        probe += [(x + dx * w / 2, y + dy * h / 2, w / 2, h / 2) for dy in (0, 1) for dx in (0, 1)]
    probabilities = np.asarray(ctx.verifier.probabilities(image, probe))
    objects = [i for i, c in enumerate(ctx.verifier.classes) if c != BACKGROUND]
    scores = probabilities[:, objects]
    row, col = np.unravel_index(int(np.argmax(scores)), scores.shape)
    return float(scores[row, col]), ctx.verifier.classes[objects[col]], len(probe)
