"""Run a recipe: plan, make candidates chunk by chunk (batched, in workers), judge, write, resume, shard.

``run_recipe`` is the main job. Everything it writes goes below the recipe's output folder, through
:mod:`pipeline.writer`; a killed run started again with the same command skips the chunks it committed
and ends with the same bytes as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import json
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .chunk_maker import check_model_classes, made_chunks, open_model
from .dataset import Dataset, category_entry, load_dataset
from .errors import UsageError
from .exemplars import ExemplarBank, build_bank, height_report
from .filters import FilterLimits
from .generator import Generator
from .geometry import CameraGroups, fit_cameras
from .placement import aspect_ratios
from .plan import Plan, derive_seed, make_plan
from .recipe import Recipe
from .stages import stage_module
from .surface import surface_cache, warn_missing_masks
from .tally import StageTally, read_manifest, summary_record, tally_stages
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
    exemplars: dict[int, ExemplarBank] = field(default_factory=dict)


@dataclass
class Progress:
    """Running totals of the jobs, handed to the progress callback once the run is checked and after each job.

    ``resumed`` jobs were done by an earlier start of the same run (a time estimate should leave them out).
    """

    wanted: int
    done: int = 0
    resumed: int = 0
    accepted: int = 0
    attempted: int = 0
    rejections: Counter = field(default_factory=Counter)


@dataclass(frozen=True)
class RunSummary:
    """What a run (or shard) made: totals, and per stage (see :class:`pipeline.tally.StageTally`)."""

    output: Path
    wanted: int
    accepted: int
    attempted: int
    annotations: int
    rejections: dict[str, int]
    chunks_skipped: int
    shard: tuple[int, int]
    stages: tuple[StageTally, ...] = ()
    exemplars: dict[str, dict] = field(default_factory=dict)
    heights: dict[str, dict] = field(default_factory=dict)

    @property
    def short(self) -> int:
        """Wanted outputs missing over all stages (0 when every stage reached its count)."""
        return sum(t.short for t in self.stages)


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
    surfaces = surface_cache(dataset)
    banks = {
        spec.index: build_bank(
            dataset,
            spec.target_class,
            max_upscale=spec.options["max_upscale"],
            order_seed=derive_seed(recipe.seed, "exemplars", spec.index),
            surface=surfaces,
        )  # fmt: skip
        for spec in recipe.stages
        if spec.kind == "insert" and spec.options["appearance"] == "exemplar"
    }
    return Setup(recipe, dataset, ground, limits, plan, aspect_ratios(dataset), footprint_rows(dataset), banks)


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
        "stages": [{"kind": s.kind, "class": s.target_class, "count": s.count} for s in recipe.stages],
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
        Called with a :class:`Progress` once everything is checked and the output folder claimed, then
        after each job (in this process as soon as it is done, from workers when its chunk arrives).
    generator, verifier : optional
        Use these instead of loading the recipe's model folder (tests pass small fakes; they must pickle
        when ``workers > 1``).
    """
    # 1. check everything before anything is written: recipe, data set, plan, shard, model folder
    if workers < 1:
        raise UsageError(f"--workers must be >= 1, got {workers}")
    setup = prepare(recipe)
    mine = setup.plan.shard(*shard)
    opened_here = generator is None
    if opened_here:
        generator, verifier = open_model(recipe)
    check_model_classes(recipe, generator)

    # 2. claim the output folder; chunks an earlier start committed are skipped
    identity = run_identity(setup, shard)
    folder = RunFolder.claim(recipe.output, identity)
    todo = [c for c in mine if c not in folder.committed()]
    folder.log(f"start: {len(todo)} of {len(mine)} chunks to make, {workers} worker(s), shard {shard[0]}/{shard[1]}")
    state = Progress(wanted=sum(len(setup.plan.chunks[c]) for c in mine))
    _count_committed(folder, [c for c in mine if c not in todo], state)
    state.resumed = state.done
    if progress:
        progress(state)

    # 3. make and commit the chunks; worker processes open their own copy of the model
    if opened_here and workers > 1:
        generator = verifier = None

    def job_done(record: dict) -> None:
        _count([record], state)
        if progress:
            progress(state)

    for chunk, records in made_chunks(setup, todo, workers, folder.root, generator, verifier, job_done):
        folder.commit(chunk, records)

    # 4. labels and manifest in plan order, then the tally per stage
    counts = assemble(folder.root, mine, categories=identity["categories"], info=_info(recipe, shard))
    stages = tally_stages(read_manifest(folder.root), identity["stages"])
    folder.write_summary(summary_record(stages))
    folder.log(f"done: {counts['accepted']} accepted of {counts['attempted']} attempts")
    banks = {bank.category: bank.summary() for bank in setup.exemplars.values()}
    for name, bank_summary in banks.items():
        folder.log(f"exemplars of {name}: {json.dumps(bank_summary)}")
    return RunSummary(
        output=folder.root,
        wanted=state.wanted,
        accepted=counts["accepted"],
        attempted=counts["attempted"],
        annotations=counts["annotations"],
        rejections=dict(state.rejections + Counter(duplicate=counts["duplicates"])),
        chunks_skipped=len(mine) - len(todo),
        shard=shard,
        stages=tuple(stages),
        exemplars=banks,
        heights=height_report(folder.root / "labels.json", setup.dataset, [s.target_class for s in recipe.stages]),
    )


def _info(recipe: Recipe, shard: tuple[int, int]) -> dict[str, Any]:
    return {
        "description": f"rarefill synthetic images of recipe {recipe.name}",
        "recipe_sha256": recipe.sha256,
        "shard": f"{shard[0]}/{shard[1]}",
    }


def _count(records: Sequence[dict], state: Progress) -> None:
    for job in records:
        state.done += 1
        state.accepted += job["output"] is not None
        for attempt in job["attempts"]:
            state.attempted += 1
            if not attempt["accepted"]:
                state.rejections.update(attempt["rejected_by"])


def _count_committed(folder: RunFolder, chunks: Sequence[int], state: Progress) -> None:
    for record in read_chunks(folder.root, chunks):
        _count(record["jobs"], state)
