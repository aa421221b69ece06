"""Plausibility filters for synthetic composites: each is a small function returning a :class:`Verdict`.

A verdict carries the measured value, the limit and a reason, and is falsy when the candidate is rejected,
so ``all(verdicts)`` accepts. Geometric filters look at one new box against the scene's other boxes (see
:func:`check_geometry`); image filters look at pixels (blend seam) or at outputs already accepted
(near-duplicates via a perceptual hash).

Boxes are COCO ``(x, y, w, h)`` in pixels from the top-left corner.

One module per job:

``verdict``
    :class:`Verdict`, the outcome of one filter.
``limits``
    :class:`FilterLimits`, every filter's limit with the reason for its default.
``geometric``
    Scale, surface, overlap, gap and object count of one new box (:func:`check_geometry` runs them all).
``image``
    The blend seam, the perceptual hash and the near-duplicate index.
"""

# The focal-length helpers live with the distances; the filters have always offered them too.
from ..geometry.distances import ASSUMED_HFOV_DEG, focal_from_fov
from .geometric import box_iou, check_geometry, footprint_gaps, gap, objects, overlap, scale, surface
from .image import DuplicateIndex, hamming, near_duplicate, phash, seam, seam_strength
from .limits import FilterLimits
from .verdict import Verdict

__all__ = [
    "ASSUMED_HFOV_DEG",
    "DuplicateIndex",
    "FilterLimits",
    "Verdict",
    "box_iou",
    "check_geometry",
    "focal_from_fov",
    "footprint_gaps",
    "gap",
    "hamming",
    "near_duplicate",
    "objects",
    "overlap",
    "phash",
    "scale",
    "seam",
    "seam_strength",
    "surface",
]
