"""Training batches of the denoiser: masked object windows (with or without an exemplar) and background windows.

Window geometry is the sampler's (:func:`.windows.context_window` around the repaint mask's bounding box,
about twice its longer side), with a little jitter in position and context, so the model is trained on
the windows it will see. A request's ``box`` at inference should therefore be its mask's bounding box.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import cv2
import numpy as np

from ..silhouette import object_silhouette, repaint_mask
from .examples import Examples
from .exemplar import augment_exemplar
from .request import BACKGROUND
from .windows import box_mask, context_window, crop_window, object_mask_box, window_mask

Silhouettes = Mapping[tuple[int, tuple[float, float, float, float]], np.ndarray]
"""Silhouette of each object, keyed by ``(scene index, box)``."""


@dataclass(frozen=True)
class Batch:
    """One training batch.

    Attributes
    ----------
    images : (B, 3, S, S) float32 ndarray in [-1, 1]
        The original windows (the target).
    masks : (B, 1, S, S) float32 ndarray of 0/1
    label_ids : (B,) int64 ndarray
        Index into the label table (before the classifier-free-guidance drop).
    exemplars : (B, 3, S, S) float32 ndarray in [-1, 1]
        Augmented copies of the windows' objects (zero where a window has no exemplar).
    alphas : (B, 1, S, S) float32 ndarray in [0, 1]
        Their silhouettes (all zero where a window has no exemplar).
    """

    images: np.ndarray
    masks: np.ndarray
    label_ids: np.ndarray
    exemplars: np.ndarray
    alphas: np.ndarray


OVERLAP_LIMIT = 0.1
"""An object whose box shares more than this part of its area with another labelled box may be partly hidden
(or hide the other): its silhouette would hold another object's pixels, so it is not used as an exemplar."""


def object_silhouettes(examples: Examples) -> dict[tuple[int, tuple[float, float, float, float]], np.ndarray]:
    """:func:`pipeline.silhouette.object_silhouette` of every object that overlaps no other labelled box by
    more than :data:`OVERLAP_LIMIT` of its area (the exemplars of training), computed once before training."""
    out = {}
    for refs in examples.objects.values():
        for ref in refs:
            key = (ref.scene, ref.box)
            if key not in out and overlap_share(ref.box, examples.occupied[ref.scene]) <= OVERLAP_LIMIT:
                out[key] = object_silhouette(examples.images[ref.scene], ref.box, segmentation=ref.segmentation).mask
    return out


def overlap_share(box, others: np.ndarray) -> float:
    """Largest share of ``box``'s area covered by one of ``others`` (the box itself excluded)."""
    x, y, w, h = box
    best = 0.0
    for ox, oy, ow, oh in others:
        if (ox, oy, ow, oh) == tuple(box):
            continue
        iw = min(x + w, ox + ow) - max(x, ox)
        ih = min(y + h, oy + oh) - max(y, oy)
        if iw > 0 and ih > 0:
            best = max(best, iw * ih / (w * h))
    return best


def make_batch(
    examples: Examples,
    labels: Sequence[str],
    rng: np.random.Generator,
    *,
    batch_size: int,
    window: int,
    background_share: float,
    mask_margin: tuple[float, float] = (0.06, 0.18),
    exemplar_share: float = 0.0,
    silhouettes: Silhouettes | None = None,
) -> Batch:
    """One training batch of windows.

    A share ``background_share`` of the windows asks for background at a free box. The other windows hold
    a real object, masked in one of two ways:

    - with an exemplar (a share ``exemplar_share`` of them, if the object has an entry in ``silhouettes``,
      see :func:`object_silhouettes`): the mask is the insert stage's exemplar
      repaint region (:func:`pipeline.silhouette.repaint_mask` of the object's silhouette), and the
      exemplar an augmented copy of the object (:func:`.exemplar.augment_exemplar`);
    - without: the mask is the box grown by a margin drawn from ``mask_margin`` (share of its width on
      each side, of its height on top) and 2 px below (:func:`.windows.object_mask_box`), so the model
      learns to draw an object standing at the bottom centre of its mask with some room around it.

    The window is centred on the mask's bounding box, as at sampling time, with jitter in position
    (+-8% of its side) and context (1.8-2.3x); half the windows are mirrored.

    Raises
    ------
    ValueError
        ``exemplar_share > 0`` without ``silhouettes``.
    """
    if exemplar_share > 0 and silhouettes is None:
        raise ValueError("exemplar_share > 0 needs the objects' silhouettes")
    images = np.empty((batch_size, 3, window, window), np.float32)
    masks = np.empty((batch_size, 1, window, window), np.float32)
    exemplars = np.zeros((batch_size, 3, window, window), np.float32)
    alphas = np.zeros((batch_size, 1, window, window), np.float32)
    label_ids = np.empty(batch_size, np.int64)
    for i in range(batch_size):
        silhouette = None
        if rng.random() < background_share:
            scene, box = examples.sample_background_box(rng)
            label = BACKGROUND
        else:
            ref = examples.sample_object(rng)
            scene, box, label = ref.scene, ref.box, ref.label
            if exemplar_share > 0 and rng.random() < exemplar_share:
                silhouette = silhouettes.get((ref.scene, ref.box))
        image = examples.images[scene]
        if silhouette is not None:
            mask = repaint_mask(silhouette, box).mask
        else:
            mask = box_mask(image.shape[:2], object_mask_box(box, margin=rng.uniform(*mask_margin)))
        win = _jittered_window(mask, image.shape[:2], rng)
        crop = crop_window(image, win, window)
        crop_mask = window_mask(mask, win, window)
        flip = rng.random() < 0.5
        if silhouette is not None:
            alpha = crop_window(silhouette.astype(np.float32), win, window, border=cv2.BORDER_CONSTANT)
            shown, alpha = augment_exemplar(crop, alpha, rng)
            if flip:
                shown, alpha = shown[:, ::-1], alpha[:, ::-1]
            exemplars[i] = shown.transpose(2, 0, 1).astype(np.float32) / 127.5 - 1.0
            alphas[i, 0] = alpha
        if flip:
            crop, crop_mask = crop[:, ::-1], crop_mask[:, ::-1]
        images[i] = crop.transpose(2, 0, 1).astype(np.float32) / 127.5 - 1.0
        masks[i, 0] = crop_mask
        label_ids[i] = labels.index(label)
    return Batch(images, masks, label_ids, exemplars, alphas)


def _jittered_window(mask: np.ndarray, image_hw: tuple[int, int], rng: np.random.Generator):
    mask_box = bounding_box(mask)
    mx, my, mw, mh = mask_box
    side = max(mw, mh)
    shifted = (mx + rng.uniform(-0.08, 0.08) * side, my + rng.uniform(-0.08, 0.08) * side, mw, mh)
    win = context_window(shifted, image_hw, scale=rng.uniform(1.8, 2.3))
    if not _contains(win, mask_box):
        win = context_window(mask_box, image_hw)
    return win


def bounding_box(mask: np.ndarray) -> tuple[float, float, float, float]:
    """COCO box ``(x, y, w, h)`` of a non-empty boolean mask's pixels."""
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    return (float(cols[0]), float(rows[0]), float(cols[-1] + 1 - cols[0]), float(rows[-1] + 1 - rows[0]))


def _contains(win, box) -> bool:
    x, y, w, h = box
    return win.x0 <= x and win.y0 <= y and x + w <= win.x0 + win.size and y + h <= win.y0 + win.size
