"""The pool's own limit: the real exemplars themselves, repeated as often as a run used them.

An exemplar-based run repeats a few real instances (14 tractors make 200 composites). The plain
two-sample test then detects the repetition as well as the compositing: a network that has seen some of
an exemplar's composites recognises the others. The reference set here is what a flawless compositor would
give with the same pool: for every audited instance, the real training instance it was made from, in its
own real scene, mirrored as the composite was, its crop box shifted and scaled a little at random (so no
two copies are pixel-identical, which a network would match exactly). Tested against the held-out real
instances like the synthetic ones, it shows how far the pool alone lets the plain test go: composites at
or below it add variety to their exemplars; only more exemplars bring the plain test lower.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from .instances import Instance

SHIFT_SD = 0.05
"""Standard deviation of a copy's box shift, as a share of the box's width and height."""
LOG_SCALE_SD = 0.08
"""Standard deviation of the natural log of a copy's box scale (about +-8%)."""


def jittered(box: Sequence[float], rng: np.random.Generator) -> tuple[float, float, float, float]:
    """``box`` (COCO ``x, y, w, h``) scaled about its centre by ``exp(LOG_SCALE_SD z)`` and shifted by
    ``SHIFT_SD`` of its size times standard normals."""
    x, y, w, h = (float(v) for v in box)
    scale = math.exp(LOG_SCALE_SD * float(rng.standard_normal()))
    dx, dy = SHIFT_SD * rng.standard_normal(2)
    cx, cy = x + w / 2 + dx * w, y + h / 2 + dy * h
    return (cx - w * scale / 2, cy - h * scale / 2, w * scale, h * scale)


def exemplar_copies(
    synthetic: Sequence[Instance], train: Sequence[Instance], rng: np.random.Generator
) -> tuple[list[Instance], np.ndarray] | None:
    """One jittered copy of each synthetic instance's exemplar, in order (see the module).

    Returns
    -------
    (copies, mirrored) or None
        ``copies``: the training :class:`Instance` of each exemplar with a :func:`jittered` box;
        ``mirrored``: (N,) bool, the composites' mirroring, for the copies' crops to follow.
        ``None`` when an instance names no exemplar, or one that ``train`` does not hold.
    """
    by_id = {(item.image_id, item.annotation_id): item for item in train}
    sources = [by_id.get(item.exemplar) if item.exemplar is not None else None for item in synthetic]
    if not sources or any(source is None for source in sources):
        return None
    copies = [replace(source, box=jittered(source.box, rng)) for source in sources]
    return copies, np.array([item.mirrored for item in synthetic], dtype=bool)
