"""Which instances the audit compares, and their crops.

*Audited (synthetic) instances* of a run are the annotations of its ``labels.json`` that show generated
pixels: every annotation whose provenance (:data:`pipeline.provenance.KEY`) says ``synthetic: true`` (an
object a stage inserted), and every annotation of an image whose stage regenerated or restyled the whole
scene (``rebackground``, ``restyle``): a real object kept in a regenerated scene, or seen through
rendered fog, is still a synthetic image of an object. The real objects an ``insert`` image carries
along are real pixels and are not audited.

*Real instances* are the annotations of the same class in a held-out split that no synthetic image was
made from (see :func:`check_heldout`), and, for near-copies, of the run's training split.

Crops, one fixed geometry per use:

* the two-sample test crop (:data:`TEST_CROP_PX` square): the box grown to a square on its longer side
  (so the object keeps its aspect; the short side is filled with the object's own surroundings, not
  with a constant), then grown by :data:`~pipeline.generator.verifier.MARGIN` on every side and
  resized with :func:`~pipeline.generator.verifier.crop_box`;
* the feature crop: the verifier's geometry (``crop_box`` at ``CROP_PX``, aspect not kept), because the
  feature network is trained by the verifier's own training routine (:mod:`.features`);
* sharpness is measured on the box at its native size (no resampling).

Boxes less than :data:`MIN_HEIGHT_PX` tall are skipped on both sides and counted: at that size a crop
is mostly interpolation, and the real data set has almost none.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..dataset import Dataset, read_rgb
from ..errors import DatasetError, RunError
from ..generator.verifier import CROP_PX, MARGIN, crop_box
from ..merge import guard_index
from ..provenance import KEY
from .sharpness import edge_strength

TEST_CROP_PX = 32
"""Side of the two-sample test's square crops in pixels."""
MIN_HEIGHT_PX = 12.0
"""Boxes lower than this (pixels) are left out of the audit and counted."""
WHOLE_IMAGE_STAGES = frozenset({"rebackground", "restyle"})
"""Stages that regenerate or restyle the whole image: all of their images' objects are audited."""


@dataclass(frozen=True)
class Instance:
    """One object to crop: its image file, COCO box, class name, ids and silhouette (or ``None``), and for
    an inserted object the real instance it was made from (``exemplar``: ``(image_id, annotation_id)`` of
    the training split, ``None`` otherwise) and whether it was placed mirrored."""

    path: Path
    box: tuple[float, float, float, float]
    label: str
    image_id: int
    annotation_id: int
    file_name: str
    segmentation: Any = None
    image_size: tuple[int, int] = (0, 0)
    exemplar: tuple[int, int] | None = None
    mirrored: bool = False


@dataclass(frozen=True)
class Crops:
    """The crops and native measures of a list of instances (same order).

    Attributes
    ----------
    instances : tuple of Instance
    test : (N, TEST_CROP_PX, TEST_CROP_PX, 3) uint8 ndarray
    feature : (N, CROP_PX, CROP_PX, 3) uint8 ndarray
    sharpness : (N,) float64 ndarray
        :func:`~pipeline.audit.sharpness.edge_strength` of the box at its native size.
    heights : (N,) float64 ndarray
        Box heights in pixels.
    """

    instances: tuple[Instance, ...]
    test: np.ndarray
    feature: np.ndarray
    sharpness: np.ndarray
    heights: np.ndarray

    def __len__(self) -> int:
        return len(self.instances)

    def subset(self, index: Sequence[int] | np.ndarray) -> Crops:
        """The crops at ``index`` (in that order)."""
        index = np.asarray(index, dtype=np.int64)
        return Crops(
            tuple(self.instances[i] for i in index),
            self.test[index],
            self.feature[index],
            self.sharpness[index],
            self.heights[index],
        )


def _stage_kind(scene_extra: Mapping[str, Any]) -> str | None:
    record = scene_extra.get(KEY)
    stage = record.get("stage") if isinstance(record, Mapping) else None
    return stage.get("kind") if isinstance(stage, Mapping) else None


def _annotation_synthetic(extra: Mapping[str, Any], labels: Dataset, ann_id: int) -> bool:
    record = extra.get(KEY)
    if not isinstance(record, Mapping) or not isinstance(record.get("synthetic"), bool):
        raise RunError(
            f"{labels.source}: annotation {ann_id}: needs the provenance key {KEY!r} with 'synthetic' true or false",
            hint="audit a folder written by `rarefill run` (its labels carry provenance)",
        )
    return record["synthetic"]


def synthetic_instances(labels: Dataset) -> list[Instance]:
    """The audited instances of a run's labels (see the module docstring), crowd regions excluded.

    Raises
    ------
    RunError
        An annotation lacks its provenance.
    """
    names = labels.category_names()
    out = []
    for scene in labels.scenes:
        whole = _stage_kind(scene.extra) in WHOLE_IMAGE_STAGES
        for ann in scene.annotations:
            if ann.iscrowd or not (_annotation_synthetic(ann.extra, labels, ann.id) or whole):
                continue
            out.append(_instance(scene, ann, names))
    return out


def real_instances(dataset: Dataset) -> list[Instance]:
    """Every non-crowd annotation of a real data set as an :class:`Instance`."""
    names = dataset.category_names()
    return [_instance(s, a, names) for s in dataset.scenes for a in s.annotations if not a.iscrowd]


def _instance(scene, ann, names: Mapping[int, str]) -> Instance:
    return Instance(
        scene.path,
        ann.bbox,
        names[ann.category_id],
        scene.id,
        ann.id,
        scene.file_name,
        ann.segmentation,
        (scene.width, scene.height),
        _exemplar_of(ann.extra),
        _mirrored(ann.extra),
    )


def _exemplar_of(extra: Mapping[str, Any]) -> tuple[int, int] | None:
    """``(image_id, annotation_id)`` of the exemplar an inserted object's provenance names, else ``None``."""
    record = extra.get(KEY)
    exemplar = record.get("exemplar") if isinstance(record, Mapping) else None
    if not isinstance(exemplar, Mapping):
        return None
    image_id, ann_id = exemplar.get("image_id"), exemplar.get("annotation_id")
    return (image_id, ann_id) if isinstance(image_id, int) and isinstance(ann_id, int) else None


def _mirrored(extra: Mapping[str, Any]) -> bool:
    record = extra.get(KEY)
    return isinstance(record, Mapping) and record.get("mirrored") is True


def by_class(instances: Iterable[Instance]) -> dict[str, list[Instance]]:
    """Instances grouped by class name, in first-seen order."""
    groups: dict[str, list[Instance]] = {}
    for item in instances:
        groups.setdefault(item.label, []).append(item)
    return groups


def split_tiny(instances: Sequence[Instance]) -> tuple[list[Instance], int]:
    """The instances at least :data:`MIN_HEIGHT_PX` tall, and how many were shorter."""
    kept = [i for i in instances if i.box[3] >= MIN_HEIGHT_PX]
    return kept, len(instances) - len(kept)


def check_heldout(labels: Dataset, heldout: Dataset) -> None:
    """Refuse a held-out split that a synthetic image of the run was made from.

    Compares each run image's provenance source hash with the file hashes of the held-out images (the
    merge's leakage guard, :func:`pipeline.merge.guard_index`).

    Raises
    ------
    DatasetError
        A run image's source has the file hash of a held-out image.
    """
    hashes, _ = guard_index([heldout])
    for i, scene in enumerate(labels.scenes):
        record = scene.extra.get(KEY)
        source = record.get("source") if isinstance(record, Mapping) else None
        digest = source.get("sha256") if isinstance(source, Mapping) else None
        if isinstance(digest, str) and digest in hashes:
            raise DatasetError(
                heldout.source or "<held-out>",
                "images",
                f"held-out image {hashes[digest]} is the source of the run's image {scene.file_name} "
                f"(labels images[{i}]): the split is not held out from this run",
                hint="audit against a split no synthetic image was made from (e.g. the test split)",
            )


def square_box(box: Sequence[float]) -> tuple[float, float, float, float]:
    """The square of side ``max(w, h)`` centred on ``box`` (COCO ``x, y, w, h``)."""
    x, y, w, h = (float(v) for v in box)
    side = max(w, h)
    return (x + w / 2 - side / 2, y + h / 2 - side / 2, side, side)


def native_box(image: np.ndarray, box: Sequence[float]) -> np.ndarray:
    """The pixels inside ``box`` at native size (clipped to the image, at least 1x1)."""
    height, width = image.shape[:2]
    x, y, w, h = box
    c0, r0 = min(max(int(x), 0), width - 1), min(max(int(y), 0), height - 1)
    c1, r1 = max(min(int(np.ceil(x + w)), width), c0 + 1), max(min(int(np.ceil(y + h)), height), r0 + 1)
    return image[r0:r1, c0:c1]


def crop_instances(instances: Sequence[Instance], *, images: dict[Path, np.ndarray] | None = None) -> Crops:
    """Read each instance's image (once per file) and cut its crops.

    Parameters
    ----------
    instances : sequence of Instance
    images : dict, optional
        A cache of decoded images by path, filled as images are read (share it between calls).

    Raises
    ------
    DatasetError
        An image cannot be read.
    """
    cache = {} if images is None else images
    test = np.zeros((len(instances), TEST_CROP_PX, TEST_CROP_PX, 3), np.uint8)
    feature = np.zeros((len(instances), CROP_PX, CROP_PX, 3), np.uint8)
    sharp = np.zeros(len(instances), np.float64)
    for i, item in enumerate(instances):
        if item.path not in cache:
            cache[item.path] = read_rgb(item.path)
        image = cache[item.path]
        test[i] = crop_box(image, square_box(item.box), size=TEST_CROP_PX, margin=MARGIN)
        feature[i] = crop_box(image, item.box, size=CROP_PX, margin=MARGIN)
        sharp[i] = edge_strength(native_box(image, item.box))
    heights = np.array([i.box[3] for i in instances], np.float64)
    return Crops(tuple(instances), test, feature, sharp, heights)
