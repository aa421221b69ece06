"""What a run records of one attempt: its manifest entry, and for an accepted one its COCO image and labels.

The records are plain JSON data. :mod:`pipeline.writer` commits them chunk by chunk and assembles
``labels.json`` and ``manifest.jsonl`` from them in plan order.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np

from .dataset import Annotation, Dataset, Scene
from .filters import FilterLimits, phash
from .plan import Job
from .provenance import KEY, file_sha256, image_provenance, kept_annotation_provenance, new_annotation_provenance
from .recipe import StageSpec
from .rle import area as mask_area
from .stages import Candidate, Failure


def attempt_scene(job: Job, attempt: int, outcome: Candidate | Failure, dataset: Dataset) -> Scene:
    """The scene an attempt was made from: the candidate's (an attempt may move on from a planned scene
    without room for its objects), else the planned one."""
    return outcome.scene if isinstance(outcome, Candidate) else dataset.scenes[job.sources[attempt][0]]


def attempt_entry(
    job: Job, attempt: int, scene: Scene, outcome: Candidate | Failure, verdicts: list, *, target_category_id: int
) -> dict:
    """The manifest entry of one attempt, without its file names: seed, source, boxes, verdicts, the decision."""
    entry: dict[str, Any] = {
        "attempt": attempt,
        "seed": job.attempt_seed(attempt),
        "source_image_id": scene.id,
        "boxes": [] if isinstance(outcome, Failure) else subject_boxes(outcome, target_category_id),
        "verdicts": [v.to_dict() for v in verdicts],
    }
    passed_over = outcome.details.get("scenes_without_room")  # scenes the attempt moved on from
    if passed_over:
        entry["scenes_without_room"] = list(passed_over)
    if isinstance(outcome, Failure):
        entry.update(accepted=False, rejected_by=[outcome.filter], reason=outcome.reason)
        return entry
    failed = [v.name for v in verdicts if not v]
    entry.update(accepted=not failed, rejected_by=sorted(set(failed)))
    return entry


def subject_boxes(candidate: Candidate, target_category_id: int) -> list[dict]:
    """The boxes of the objects an attempt is about, for the manifest (accepted or rejected alike).

    New objects with their re-fitted ``bbox`` and the ``requested_bbox`` the stage asked for; else the kept
    objects the filters judged (a rebackground's kept object); else the kept instances of the stage's class
    (a restyle). COCO ``[x, y, w, h]`` in pixels, rounded to 0.01.
    """
    boxes = [
        {"category_id": o.category_id, "bbox": _rounded(o.bbox), "requested_bbox": _rounded(o.requested), "new": True}
        for o in candidate.new
    ]
    kept = [candidate.kept[i] for i in candidate.checked if i >= 0]
    if not boxes and not kept:
        kept = [a for a in candidate.kept if a.category_id == target_category_id and not a.iscrowd]
    boxes += [{"category_id": a.category_id, "bbox": _rounded(a.bbox), "new": False} for a in kept]
    return boxes


def _rounded(box) -> list[float]:
    return [round(float(v), 2) for v in box]


def output_entry(
    job: Job,
    attempt: int,
    spec: StageSpec,
    candidate: Candidate,
    entry: dict,
    file_name: str,
    *,
    recipe_name: str,
    recipe_sha256: str,
    model_info: dict,
    limits: FilterLimits,
) -> dict:
    """An accepted attempt's COCO image entry (with provenance), its annotations and its near-duplicate mark."""
    scene = candidate.scene
    details = dict(candidate.details)
    if candidate.dropped:
        details["dropped"] = [{"annotation_id": a.id, "reason": why} for a, why in candidate.dropped]
    provenance = image_provenance(
        recipe_name=recipe_name,
        recipe_sha256=recipe_sha256,
        stage={"index": spec.index, "kind": spec.kind, "class": spec.target_class, "options": plain(spec.options)},
        source_image_id=scene.id,
        source_file=scene.file_name,
        source_sha256=scene_sha256(scene),
        job_key=job.key,
        attempt=attempt,
        seed=entry["seed"],
        model=model_info,
        verdicts=entry["verdicts"],
        details=details,
    )
    image = {
        "file_name": file_name.removeprefix("images/"),
        "width": int(candidate.image.shape[1]),
        "height": int(candidate.image.shape[0]),
        KEY: provenance,
    }
    annotations = [kept_annotation(a) for a in candidate.kept]
    for obj in candidate.new:
        x, y, w, h = obj.bbox
        annotations.append(
            {
                "category_id": obj.category_id,
                "bbox": [x, y, w, h],
                "area": w * h if obj.segmentation is None else float(mask_area(obj.segmentation)),
                "iscrowd": 0,
                **({} if obj.segmentation is None else {"segmentation": dict(obj.segmentation)}),
                KEY: new_annotation_provenance(obj.requested, spec.kind, obj.extra),
            }
        )
    return {"image": image, "annotations": annotations, "dedupe": dedupe_mark(candidate, limits)}


def dedupe_mark(candidate: Candidate, limits: FilterLimits) -> dict:
    """What the near-duplicate filter compares (see :func:`pipeline.writer.duplicate_of`)."""
    changed = candidate.changed if candidate.changed.any() else np.ones(candidate.changed.shape, dtype=bool)
    rows = np.flatnonzero(changed.any(axis=1))
    cols = np.flatnonzero(changed.any(axis=0))
    box = [int(cols[0]), int(rows[0]), int(cols[-1] + 1 - cols[0]), int(rows[-1] + 1 - rows[0])]
    region = candidate.image[box[1] : box[1] + box[3], box[0] : box[0] + box[2]]
    return {
        "source": candidate.scene.id,
        "box": box,
        "hash": f"{phash(region):016x}",
        "limit": limits.min_hash_distance,
    }


def kept_annotation(ann: Annotation) -> dict:
    """A real annotation carried over from the source image, with its provenance."""
    out = {"category_id": ann.category_id, "bbox": list(ann.bbox), "area": ann.area, "iscrowd": ann.iscrowd}
    if ann.segmentation is not None:
        out["segmentation"] = ann.segmentation
    out.update({k: v for k, v in ann.extra.items() if k != KEY})
    out[KEY] = kept_annotation_provenance(ann.id)
    return out


@lru_cache(maxsize=4096)
def _scene_sha256_cached(path: str) -> str:
    return file_sha256(path)


def scene_sha256(scene: Scene) -> str:
    """SHA-256 of a source image's file (cached: many outputs share a source)."""
    return _scene_sha256_cached(str(scene.path))


def plain(value: Any) -> Any:
    """Mappings, tuples and lists of ``value`` as JSON's dicts and lists."""
    if isinstance(value, dict) or hasattr(value, "items"):
        return {k: plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    return value
