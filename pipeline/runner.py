"""Run a recipe: plan, make candidates chunk by chunk (batched, in workers), judge, write, resume, shard.

``run_recipe`` is the main job. Everything it writes goes below the recipe's output folder, through
:mod:`pipeline.writer`; a killed run started again with the same command skips the chunks it committed
and ends with the same bytes as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from .dataset import Annotation, Dataset, Scene, category_entry, load_dataset
from .errors import ModelError, UsageError
from .filters import FilterLimits, phash
from .generator import Generator
from .geometry import CameraGroups, fit_cameras
from .judge import judge
from .placement import aspect_ratios
from .plan import Job, Plan, make_plan
from .provenance import KEY, file_sha256, image_provenance, kept_annotation_provenance, new_annotation_provenance
from .recipe import Recipe
from .stages import Candidate, Draft, Failure, StageContext, stage_module
from .surface import Surface, mask_for, warn_missing_masks
from .writer import RUN_FORMAT, RunFolder, assemble, read_chunks


@dataclass(frozen=True)
class Setup:
    """What every worker needs, computed once: the data set, the ground model, the plan, the limits."""

    recipe: Recipe
    dataset: Dataset
    ground: CameraGroups
    limits: FilterLimits
    plan: Plan
    ratios: dict[str, np.ndarray]
    footprint_rows: tuple[float, float]


@dataclass
class Progress:
    """Running totals, handed to the progress callback after each chunk."""

    wanted: int
    chunks_total: int
    chunks_done: int = 0
    accepted: int = 0
    attempted: int = 0
    rejections: Counter = field(default_factory=Counter)


@dataclass(frozen=True)
class RunSummary:
    """What a run (or shard) made."""

    output: Path
    wanted: int
    accepted: int
    attempted: int
    annotations: int
    rejections: dict[str, int]
    chunks_skipped: int
    shard: tuple[int, int]


def prepare(recipe: Recipe) -> Setup:
    """Load the data set, fit the ground model, decide eligible sources and build the plan."""
    dataset = load_dataset(recipe.dataset, recipe.images)
    warn_missing_masks(dataset)
    names = set(dataset.category_names().values())
    for spec in recipe.stages:
        if spec.target_class not in names:
            raise UsageError(
                f"{recipe.path}: stage[{spec.index}].class: {spec.target_class!r} is not a category of "
                f"{recipe.dataset.name} (known: {', '.join(sorted(names))})"
            )
    try:
        limits = FilterLimits(**recipe.filters)
    except ValueError as exc:
        raise UsageError(f"{recipe.path}: filters: {exc}") from None
    ground = fit_cameras(dataset, priors=dict(recipe.height_priors) or None)
    # An image whose camera group has too few boxes for a ground model cannot be a source.
    sources = [
        [
            s
            for s in stage_module(spec.kind).eligible(dataset, spec, limits)
            if ground.has_image(dataset.scenes[s[0]].id)
        ]
        for spec in recipe.stages
    ]
    plan = make_plan(recipe, sources)
    return Setup(recipe, dataset, ground, limits, plan, aspect_ratios(dataset), footprint_rows(dataset))


def footprint_rows(dataset: Dataset) -> tuple[float, float]:
    """The band of bottom rows where the data set's objects stand (1st to 99th percentile)."""
    rows = [a.bottom_row for a in dataset.annotations() if not a.iscrowd]
    if not rows:
        return (0.0, float(max(s.height for s in dataset.scenes)))
    low, high = np.percentile(rows, [1, 99])
    return (float(low), float(high))


def run_identity(setup: Setup, shard: tuple[int, int]) -> dict[str, Any]:
    """What a run folder holds; a rerun must match it exactly to resume."""
    recipe = setup.recipe
    fingerprint = hashlib.sha256(
        json.dumps([[j.stage, j.slot, j.seed, j.chunk, j.sources] for j in setup.plan.jobs]).encode()
    ).hexdigest()
    return {
        "format": RUN_FORMAT,
        "recipe": {"name": recipe.name, "sha256": recipe.sha256, "seed": recipe.seed},
        "counts": [s.count for s in recipe.stages],
        "plan_sha256": fingerprint,
        "chunks": len(setup.plan.chunks),
        "shard": f"{shard[0]}/{shard[1]}",
        "categories": [category_entry(c) for c in setup.dataset.categories],
    }


def run_recipe(
    recipe: Recipe,
    *,
    workers: int = 1,
    shard: tuple[int, int] = (0, 1),
    progress: Callable[[Progress], None] | None = None,
    generator: Generator | None = None,
    verifier: Any = None,
) -> RunSummary:
    """Run ``recipe`` (or one shard of it) to completion, resuming a previous attempt of the same run.

    Parameters
    ----------
    recipe : Recipe
    workers : int
        Processes that make candidates in parallel; each gets ``cpu_count // workers`` torch threads.
    shard : (index, count)
        Run only chunks ``index, index + count, ...`` of the plan (0-based index).
    progress : callable, optional
        Called with a :class:`Progress` after each committed chunk.
    generator, verifier : optional
        Use these instead of loading the recipe's model folder (tests pass small fakes; they must pickle
        when ``workers > 1``).
    """
    if workers < 1:
        raise UsageError(f"--workers must be >= 1, got {workers}")
    setup = prepare(recipe)
    mine = setup.plan.shard(*shard)
    identity = run_identity(setup, shard)
    folder = RunFolder.claim(recipe.output, identity)
    todo = [c for c in mine if c not in folder.committed()]
    folder.log(f"start: {len(todo)} of {len(mine)} chunks to make, {workers} worker(s), shard {shard[0]}/{shard[1]}")
    wanted = sum(len(setup.plan.chunks[c]) for c in mine)
    state = Progress(wanted=wanted, chunks_total=len(mine), chunks_done=len(mine) - len(todo))
    _count_committed(folder, [c for c in mine if c not in todo], state)
    if progress:
        progress(state)

    for chunk, records in _made_chunks(setup, todo, workers, folder.root, generator, verifier):
        folder.commit(chunk, records)
        state.chunks_done += 1
        _count(records, state)
        if progress:
            progress(state)

    counts = assemble(folder.root, mine, categories=identity["categories"], info=_info(recipe, shard))
    folder.log(f"done: {counts['accepted']} accepted of {counts['attempted']} attempts")
    return RunSummary(
        output=folder.root,
        wanted=wanted,
        accepted=counts["accepted"],
        attempted=counts["attempted"],
        annotations=counts["annotations"],
        rejections=dict(state.rejections + Counter(duplicate=counts["duplicates"])),
        chunks_skipped=len(mine) - len(todo),
        shard=shard,
    )


def _info(recipe: Recipe, shard: tuple[int, int]) -> dict[str, Any]:
    return {
        "description": f"rarefill synthetic images of recipe {recipe.name}",
        "recipe_sha256": recipe.sha256,
        "shard": f"{shard[0]}/{shard[1]}",
    }


def _count(records: Sequence[dict], state: Progress) -> None:
    for job in records:
        state.accepted += job["output"] is not None
        for attempt in job["attempts"]:
            state.attempted += 1
            if not attempt["accepted"]:
                state.rejections.update(attempt["rejected_by"])


def _count_committed(folder: RunFolder, chunks: Sequence[int], state: Progress) -> None:
    for record in read_chunks(folder.root, chunks):
        _count(record["jobs"], state)


# --------------------------------------------------------------------------------------------------
# making chunks, in this process or in workers


def _made_chunks(setup: Setup, todo: Sequence[int], workers: int, root: Path, generator, verifier):
    if not todo:
        return
    if workers == 1 or len(todo) == 1:
        maker = ChunkMaker(setup, root, threads=None, generator=generator, verifier=verifier)
        for chunk in todo:
            yield chunk, maker.make(chunk)
        return
    threads = max(1, (os.cpu_count() or 1) // workers)
    context = multiprocessing.get_context("spawn")
    initargs = (setup, root, threads, generator, verifier)
    with context.Pool(workers, initializer=_worker_init, initargs=initargs) as pool:
        yield from pool.imap_unordered(_worker_make, todo)


_WORKER: dict[str, ChunkMaker] = {}  # one ChunkMaker per worker process, built by the pool's initializer


def _worker_init(setup: Setup, root: Path, threads: int, generator, verifier) -> None:
    _WORKER["maker"] = ChunkMaker(setup, root, threads=threads, generator=generator, verifier=verifier)


def _worker_make(chunk: int) -> tuple[int, list[dict]]:
    return chunk, _WORKER["maker"].make(chunk)


class ChunkMaker:
    """Makes the jobs of one chunk: each round drafts the open jobs' next attempt and denoises them together."""

    def __init__(
        self, setup: Setup, root: Path, *, threads: int | None, generator: Generator | None, verifier: Any
    ) -> None:
        if threads is not None:
            import torch

            torch.set_num_threads(threads)
        from .generator import load
        from .generator.verifier import load_verifier

        recipe = setup.recipe
        self.setup = setup
        self.root = Path(root)
        if generator is None:
            generator = load(recipe.model, prompts=dict(recipe.prompts) or None)
            try:
                verifier = load_verifier(recipe.model)
            except ModelError:
                verifier = None  # a user's own pipeline has no verifier: the "present" filter is skipped
        self.generator = generator
        self.model_info = self.generator.info()
        self.ctx = StageContext(
            dataset=setup.dataset,
            generator=self.generator,
            ground=setup.ground,
            limits=setup.limits,
            surface=_surface_cache(setup.dataset),
            aspect_ratios=setup.ratios,
            footprint_rows=setup.footprint_rows,
            verifier=verifier,
            steps=recipe.steps,
            guidance=recipe.guidance,
        )
        self.folder = RunFolder(root)

    def make(self, chunk: int) -> list[dict]:
        """Run every job of ``chunk`` until accepted or out of attempts; write images; return job records."""
        plan = self.setup.plan
        jobs = [plan.jobs[i] for i in plan.chunks[chunk]]
        records = {job.key: {"key": job.key, "stage": job.stage, "slot": job.slot, "attempts": []} for job in jobs}
        outputs: dict[str, dict | None] = {job.key: None for job in jobs}
        open_jobs = list(jobs)
        for attempt in range(plan.attempts):
            if not open_jobs:
                break
            results = self._round(open_jobs, attempt)
            still_open = []
            for job, result in zip(open_jobs, results, strict=True):
                entry, output = self._record(job, attempt, result)
                records[job.key]["attempts"].append(entry)
                if output is not None:
                    outputs[job.key] = output
                else:
                    still_open.append(job)
            open_jobs = still_open
        return [{**records[job.key], "output": outputs[job.key]} for job in jobs]

    def _round(self, jobs: Sequence[Job], attempt: int) -> list[tuple[Candidate | Failure, list]]:
        specs = self.setup.recipe.stages
        drafts: list[Draft | Failure] = [
            stage_module(specs[job.stage].kind).draft(job, attempt, specs[job.stage], self.ctx) for job in jobs
        ]
        requests = [r for d in drafts if isinstance(d, Draft) for r in d.requests]
        made = self.generator.inpaint(requests, steps=self.ctx.steps, guidance=self.ctx.guidance) if requests else []
        frames = iter(made)
        results = []
        for job, drafted in zip(jobs, drafts, strict=True):
            if isinstance(drafted, Failure):
                results.append((drafted, []))
                continue
            mine = [next(frames) for _ in drafted.requests]
            candidate = stage_module(specs[job.stage].kind).complete(drafted, mine, self.ctx)
            verdicts = judge(candidate, self.ctx) if isinstance(candidate, Candidate) else []
            results.append((candidate, verdicts))
        return results

    def _record(self, job: Job, attempt: int, result: tuple) -> tuple[dict, dict | None]:
        outcome, verdicts = result
        spec = self.setup.recipe.stages[job.stage]
        scene = self.setup.dataset.scenes[job.sources[attempt][0]]
        entry: dict[str, Any] = {
            "attempt": attempt,
            "seed": job.attempt_seed(attempt),
            "source_image_id": scene.id,
            "verdicts": [v.to_dict() for v in verdicts],
        }
        if isinstance(outcome, Failure):
            entry.update(accepted=False, rejected_by=[outcome.filter], reason=outcome.reason)
            return entry, None
        failed = [v.name for v in verdicts if not v]
        entry.update(accepted=not failed, rejected_by=sorted(set(failed)))
        name = f"{self.setup.recipe.name}_{job.key}"
        if failed:
            entry["reject"] = self.folder.write_reject(f"{name}_a{attempt}.jpg", outcome.image)
            return entry, None
        file_name = self.folder.write_image(f"{name}.png", outcome.image)
        entry["file_name"] = file_name
        return entry, self._output(job, attempt, spec, outcome, entry, file_name)

    def _output(self, job: Job, attempt: int, spec, candidate: Candidate, entry: dict, file_name: str) -> dict:
        recipe = self.setup.recipe
        scene = candidate.scene
        details = dict(candidate.details)
        if candidate.dropped:
            details["dropped"] = [{"annotation_id": a.id, "reason": why} for a, why in candidate.dropped]
        provenance = image_provenance(
            recipe_name=recipe.name,
            recipe_sha256=recipe.sha256,
            stage={"index": spec.index, "kind": spec.kind, "class": spec.target_class, "options": _plain(spec.options)},
            source_image_id=scene.id,
            source_file=scene.file_name,
            source_sha256=_scene_sha256(scene),
            job_key=job.key,
            attempt=attempt,
            seed=entry["seed"],
            model=self.model_info,
            verdicts=entry["verdicts"],
            details=details,
        )
        image = {
            "file_name": file_name.removeprefix("images/"),
            "width": int(candidate.image.shape[1]),
            "height": int(candidate.image.shape[0]),
            KEY: provenance,
        }
        annotations = [_kept(a) for a in candidate.kept]
        for obj in candidate.new:
            x, y, w, h = obj.bbox
            annotations.append(
                {
                    "category_id": obj.category_id,
                    "bbox": [x, y, w, h],
                    "area": w * h,
                    "iscrowd": 0,
                    KEY: new_annotation_provenance(obj.requested, spec.kind, obj.extra),
                }
            )
        return {"image": image, "annotations": annotations, "dedupe": self._dedupe_mark(candidate)}

    def _dedupe_mark(self, candidate: Candidate) -> dict:
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
            "limit": self.setup.limits.min_hash_distance,
        }


def _kept(ann: Annotation) -> dict:
    out = {"category_id": ann.category_id, "bbox": list(ann.bbox), "area": ann.area, "iscrowd": ann.iscrowd}
    if ann.segmentation is not None:
        out["segmentation"] = ann.segmentation
    out.update({k: v for k, v in ann.extra.items() if k != KEY})
    out[KEY] = kept_annotation_provenance(ann.id)
    return out


@lru_cache(maxsize=4096)
def _scene_sha256_cached(path: str) -> str:
    return file_sha256(path)


def _scene_sha256(scene: Scene) -> str:
    return _scene_sha256_cached(str(scene.path))


def _surface_cache(dataset: Dataset) -> Callable[[Scene], Surface]:
    scenes = {s.id: s for s in dataset.scenes}

    @lru_cache(maxsize=256)
    def surface(scene_id: int) -> Surface:
        return mask_for(scenes[scene_id], dataset=dataset)

    return lambda scene: surface(scene.id)


def _plain(value: Any) -> Any:
    if isinstance(value, dict) or hasattr(value, "items"):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value
