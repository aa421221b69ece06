"""Merge a real training split with synthetic run outputs at a chosen ratio, never leaking held-out images.

How the merge works, in the order :func:`merge` does it, one module per step:

1. *Vocabulary* (:mod:`.vocabulary`). Categories are matched by name; the merged file keeps the real
   split's category ids. A synthetic set naming a category the real split lacks is refused unless a
   mapping file says which of our categories it is (``{"their name": "our name"}``); mapping a name to
   itself adds it as a new category (appended after the real ones), so a typo can never create a class
   silently.
2. *Leakage guard* (:mod:`.guard`, always on). Every guarded image file is hashed (SHA-256). A synthetic
   image is never merged when its source (provenance ``rarefill.source``) has the file hash of a guarded
   image, or the same ``(image_id, file_name)`` as a guarded image entry. The second key is strict on
   purpose: it also catches guarded images whose files are absent, at the price of excluding the
   synthetic images of a training image that happens to share id and file name with a held-out one (they
   are counted, and a warning says so). A real training image byte-identical to a guarded image is an
   error, not a warning: the splits themselves leak and no merge can repair that.
3. *Selection* (:mod:`.selection`), deterministic by seed, see :func:`select_synthetic`. Every real image
   is always kept. What was reached, and what was not, is summed up in :mod:`.summary`.
4. *Output* (:mod:`.output`). Image and annotation ids are renumbered 1..n (real first, then synthetic,
   each in input order). ``file_name`` is relative to the folder rarefill's loader reads the output's
   images from (``images/`` beside it if that exists, else its own folder), so the output loads back:
   hard links (``link``, the default) or copies in ``<stem>_images/`` there, or the original files
   (``relative``; a warning if that needs ``../``). Top-level ``info`` records the parameters and the
   inputs' hashes but no clock time, so equal inputs give byte-identical output.
"""

from .guard import GuardIndex, guard_index, refuse_real_leaks, synthetic_source
from .merging import merge
from .output import IMAGES_MODES
from .selection import Candidate, parse_caps, select_synthetic
from .summary import ClassCount, MergeSummary
from .vocabulary import load_mapping

__all__ = [
    "IMAGES_MODES",
    "Candidate",
    "ClassCount",
    "GuardIndex",
    "MergeSummary",
    "guard_index",
    "load_mapping",
    "merge",
    "parse_caps",
    "refuse_real_leaks",
    "select_synthetic",
    "synthetic_source",
]
