"""What every stage takes and returns.

A stage works in two steps so that the runner can denoise the windows of many jobs in one batch:
``draft(job, attempt, ctx)`` decides what to change and returns the inpainting requests it needs;
``complete(draft, frames, ctx)`` turns the generator's frames into a :class:`Candidate`. ``run`` in
``pipeline.stages`` composes both for a single job.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..dataset import Annotation, Dataset, Scene
from ..filters import FilterLimits
from ..generator import Generator, InpaintRequest
from ..geometry import CameraGroups, GroundModel
from ..recipe import StageSpec
from ..surface import Surface


def takes_objects(scene: Scene, count: int, limits: FilterLimits) -> bool:
    """Can ``scene`` take ``count`` new objects within the objects-per-image limit?"""
    return sum(not a.iscrowd for a in scene.annotations) + count <= limits.max_objects


@dataclass(frozen=True)
class StageContext:
    """Everything a stage may read; nothing in it changes during a run.

    ``surface`` returns the drivable surface of a scene (the runner caches it); ``aspect_ratios`` maps
    a class name to the width/height ratios of its real boxes; ``footprint_rows`` is the band of image
    rows where real objects stand (new ones stand there too: nearer, objects would be larger than any the
    generator learned from; farther, too small to draw); ``verifier`` may be None; ``exemplars`` maps a
    stage index to its :class:`~pipeline.exemplars.ExemplarBank` (insert stages with exemplars). ``ground`` is
    the data set's ground models by camera group; a stage gets a scene's own with
    :func:`pipeline.geometry.ground_for`.
    """

    dataset: Dataset
    generator: Generator
    ground: GroundModel | CameraGroups
    limits: FilterLimits
    surface: Callable[[Scene], Surface]
    aspect_ratios: Mapping[str, np.ndarray]
    footprint_rows: tuple[float, float]
    verifier: Any = None
    steps: int = 12
    guidance: float = 1.0
    exemplars: Mapping[int, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class NewObject:
    """An object a stage added.

    ``bbox`` is the label: re-fitted to the generated pixels, or an exemplar's placed silhouette bounds;
    ``requested`` was asked for; ``segmentation`` (COCO RLE dict) where the stage knows the object's pixels.
    """

    category_id: int
    bbox: tuple[float, float, float, float]
    requested: tuple[float, float, float, float]
    extra: Mapping[str, Any] = field(default_factory=dict)
    segmentation: Mapping[str, Any] | None = None


@dataclass(frozen=True)
class Draft:
    """A stage's plan for one attempt: the requests to inpaint and what it needs to finish."""

    stage: StageSpec
    scene: Scene
    image: np.ndarray
    requests: tuple[InpaintRequest, ...]
    state: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Candidate:
    """One synthetic image and its labels, before the filters judge it.

    Attributes
    ----------
    image : (H, W, 3) uint8 ndarray
    scene : Scene
        The real scene it was made from.
    kept : tuple of Annotation
        The source's annotations that stay labelled (boxes unchanged).
    new : tuple of NewObject
        Objects added by the stage.
    changed : (H, W) bool ndarray
        Pixels the stage generated (the seam filter looks at this region's border).
    checked : tuple of int
        Indices into ``kept`` (>= 0) or ``-1 - i`` into ``new`` of the objects the geometric filters judge.
    dropped : tuple of (Annotation, str)
        Source annotations removed from the labels, with the reason (e.g. invisible in fog).
    details : mapping
        Stage-specific provenance (options used, placements, condition values).
    """

    image: np.ndarray
    scene: Scene
    kept: tuple[Annotation, ...]
    new: tuple[NewObject, ...]
    changed: np.ndarray
    checked: tuple[int, ...]
    dropped: tuple[tuple[Annotation, str], ...] = ()
    details: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Failure:
    """An attempt that could not be drafted (no room to place an object, ...), with the reason."""

    filter: str
    reason: str
    details: Mapping[str, Any] = field(default_factory=dict)
