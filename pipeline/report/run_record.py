"""A finished run folder as the report reads it: labels, manifest, identity; the funnel; which boxes are new."""

from __future__ import annotations

import json
import os
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..dataset import Annotation, Category, Dataset, Scene, load_dataset
from ..errors import RunError, RunInputError
from ..geometry import is_usable
from ..provenance import KEY


@dataclass(frozen=True)
class RunRecord:
    """A finished run folder as the report reads it.

    Attributes
    ----------
    root : Path
    identity : mapping
        ``run.json`` (recipe name, hash, shard); empty when the folder has none.
    labels : Dataset
        ``labels.json`` with image paths below ``root / "images"``.
    manifest : tuple of mapping
        ``manifest.jsonl``, one entry per candidate in plan order.
    """

    root: Path
    identity: Mapping[str, Any]
    labels: Dataset
    manifest: tuple[Mapping[str, Any], ...]


@dataclass(frozen=True)
class Funnel:
    """How many candidates were tried, accepted and rejected by each filter.

    Attributes
    ----------
    jobs : int
        Images wanted (one job each).
    filled : int
        Jobs that ended with an accepted image.
    attempted, accepted : int
        Candidates tried and accepted (a job tries again after a rejection).
    rejected_by : dict of str to int
        Candidates each filter rejected, most first. A candidate failing two filters counts for both,
        so these may add up to more than ``attempted - accepted``.
    """

    jobs: int
    filled: int
    attempted: int
    accepted: int
    rejected_by: dict[str, int]

    @property
    def rejected(self) -> int:
        return self.attempted - self.accepted


# --------------------------------------------------------------------------------------------------
# reading a run


def read_run(run_dir: str | os.PathLike[str]) -> RunRecord:
    """Read ``labels.json``, ``manifest.jsonl`` and (if present) ``run.json`` of a finished run folder.

    Raises
    ------
    RunError
        The folder is not a finished run (no labels or manifest), a manifest line is malformed, or the
        accepted lines of the manifest and the images of the labels disagree.
    DatasetError
        ``labels.json`` is not valid COCO or an image it names is missing.
    """
    root = Path(run_dir)
    labels_path, manifest_path = root / "labels.json", root / "manifest.jsonl"
    for path in (labels_path, manifest_path):
        if not path.is_file():
            raise RunInputError(
                f"{path}: not found; {root} is not a finished rarefill run folder",
                hint="give the folder `rarefill run` wrote to (its labels.json appears when the run ends)",
            )
    identity: dict[str, Any] = {}
    if (root / "run.json").is_file():
        identity = _read_json_object(root / "run.json")
    labels = load_dataset(labels_path, root / "images")
    manifest = tuple(_read_manifest(manifest_path))
    accepted = {line["file_name"] for line in manifest if line["accepted"]}
    listed = {f"images/{scene.file_name}" for scene in labels.scenes}
    if accepted != listed:
        odd = sorted(accepted ^ listed)[:3]
        raise RunError(
            f"{manifest_path}: accepted candidates and {labels_path.name} images disagree (e.g. {', '.join(odd)})",
            hint="the run was changed after it finished; run the recipe again to rebuild labels and manifest",
        )
    return RunRecord(root=root, identity=identity, labels=labels, manifest=manifest)


def _read_json_object(path: Path) -> dict[str, Any]:
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise RunError(f"{path}: unreadable ({exc})") from None
    if not isinstance(value, dict):
        raise RunError(f"{path}: must hold a JSON object")
    return value


def _read_manifest(path: Path) -> Iterable[dict[str, Any]]:
    with open(path, encoding="utf-8") as handle:
        for number, text in enumerate(handle, start=1):
            if not text.strip():
                continue
            where = f"{path}: line {number}"
            try:
                line = json.loads(text)
            except json.JSONDecodeError as exc:
                raise RunError(f"{where}: malformed JSON ({exc.msg})") from None
            if not isinstance(line, dict):
                raise RunError(f"{where}: must be a JSON object")
            _check_manifest_line(line, where)
            yield line


def _check_manifest_line(line: Mapping[str, Any], where: str) -> None:
    if not isinstance(line.get("accepted"), bool):
        raise RunError(f"{where}: 'accepted' must be true or false, got {line.get('accepted')!r}")
    if not isinstance(line.get("job"), str):
        raise RunError(f"{where}: 'job' must be the job's key (a string)")
    if not isinstance(line.get("verdicts"), list) or not all(isinstance(v, dict) for v in line["verdicts"]):
        raise RunError(f"{where}: 'verdicts' must be a list of objects")
    if line["accepted"]:
        if not isinstance(line.get("file_name"), str):
            raise RunError(f"{where}: an accepted candidate needs 'file_name' (images/...)")
        return
    if not isinstance(line.get("rejected_by"), list) or not line["rejected_by"]:
        raise RunError(f"{where}: a rejected candidate needs 'rejected_by' (the filters that failed)")
    if "reject" in line and not isinstance(line["reject"], str):
        raise RunError(f"{where}: 'reject' must be a path (rejects/...)")


def funnel(manifest: Sequence[Mapping[str, Any]]) -> Funnel:
    """Count jobs, candidates, acceptances and rejections per filter in manifest entries."""
    jobs = {line["job"] for line in manifest}
    filled = {line["job"] for line in manifest if line["accepted"]}
    rejected_by = Counter(name for line in manifest if not line["accepted"] for name in set(line["rejected_by"]))
    return Funnel(
        jobs=len(jobs),
        filled=len(filled),
        attempted=len(manifest),
        accepted=sum(1 for line in manifest if line["accepted"]),
        rejected_by=dict(sorted(rejected_by.items(), key=lambda kv: (-kv[1], kv[0]))),
    )


# --------------------------------------------------------------------------------------------------
# which boxes are real and which are new


def _is_synthetic(ann: Annotation, labels: Dataset) -> bool:
    record = ann.extra.get(KEY)
    if not isinstance(record, Mapping) or not isinstance(record.get("synthetic"), bool):
        raise RunError(
            f"{labels.source}: annotation {ann.id}: needs the provenance key {KEY!r} with 'synthetic' true or false"
        )
    return record["synthetic"]


def real_from_labels(labels: Dataset) -> Dataset:
    """The real annotations a run carried along (``synthetic: false``), once per source image.

    Several outputs may come from one source image: its annotations are kept once, by their source
    annotation id, so that the ground model is not fitted on copies. Scenes take the id and file name of
    the source image from the image provenance; their ``path`` is the run's output image (no pixels
    are read).

    Raises
    ------
    RunError
        An image or annotation lacks its provenance.
    """
    scenes: dict[int, tuple[Scene, dict[int, Annotation]]] = {}
    for scene in labels.scenes:
        source = scene.extra.get(KEY, {}).get("source") if isinstance(scene.extra.get(KEY), Mapping) else None
        if not isinstance(source, Mapping) or not isinstance(source.get("image_id"), int):
            raise RunError(f"{labels.source}: image {scene.file_name}: provenance lacks {KEY}.source.image_id")
        sid = source["image_id"]
        if sid not in scenes:
            real_scene = Scene(
                sid, str(source.get("file_name", scene.file_name)), scene.width, scene.height, scene.path
            )
            scenes[sid] = (real_scene, {})
        kept = scenes[sid][1]
        for ann in scene.annotations:
            if not _is_synthetic(ann, labels):
                aid = ann.extra[KEY].get("source_annotation_id", ann.id)
                kept.setdefault(aid, Annotation(aid, sid, ann.category_id, ann.bbox, ann.area, ann.iscrowd))
    built = tuple(Scene(s.id, s.file_name, s.width, s.height, s.path, tuple(a.values())) for s, a in scenes.values())
    return Dataset(scenes=built, categories=labels.categories, images_dir=labels.images_dir, source=labels.source)


def _boxes_by_class(
    items: Iterable[tuple[Annotation, Scene]], categories: Sequence[Category], *, usable_only: bool = False
) -> dict[str, np.ndarray]:
    names = {c.id: c.name for c in categories}
    rows: dict[str, list] = {}
    for ann, scene in items:
        if ann.iscrowd or (usable_only and not is_usable(ann, scene)):
            continue
        rows.setdefault(names[ann.category_id], []).append(ann.bbox)
    return {name: np.asarray(boxes, dtype=np.float64).reshape(-1, 4) for name, boxes in rows.items()}


def _pairs(dataset: Dataset) -> list[tuple[Annotation, Scene]]:
    return [(a, s) for s in dataset.scenes for a in s.annotations]
