"""What a recipe would do, checked and writing nothing: the plan per stage (`rarefill run --dry-run`).

Everything a run checks before it writes is checked here too: the recipe, the data set, the plan and shard,
the model folder (opened), the drivable surface of every source scene the plan uses, and the output folder
(new, an earlier start of the same run, or another run: an error).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .chunk_maker import check_model_classes, open_model
from .dataset import Dataset
from .generator import Generator
from .geometry import CameraGroups, ground_for
from .recipe import Recipe, StageSpec
from .runner import Setup, prepare, run_identity
from .surface import mask_for
from .writer import RunFolder


@dataclass(frozen=True)
class StagePreview:
    """One stage of the plan.

    Attributes
    ----------
    index, kind, target_class : the stage as the recipe gives it
    jobs, chunks : int
        Jobs (one accepted output wanted from each) and chunks of this stage in the run or shard.
    sources : int
        Distinct source scenes its jobs start from, over every attempt.
    sizes_px : (float, float) or None
        Range of object heights in pixels: for new objects the ground model's expected height over the
        rows where real objects stand; for kept objects the heights of the real instances in the sources.
    sizes_from : str
        Which of the two ``sizes_px`` is.
    """

    index: int
    kind: str
    target_class: str
    jobs: int
    chunks: int
    sources: int
    sizes_px: tuple[float, float] | None
    sizes_from: str


@dataclass(frozen=True)
class PlanPreview:
    """A checked recipe's plan: per stage, and where it would write."""

    recipe: Recipe
    shard: tuple[int, int]
    stages: tuple[StagePreview, ...]
    attempts_per_output: int
    output: Path
    chunks_done: int | None
    surfaces_checked: int
    surfaces_estimated: int
    model: dict[str, Any]


def preview_recipe(
    recipe: Recipe, *, shard: tuple[int, int] = (0, 1), generator: Generator | None = None
) -> PlanPreview:
    """Check ``recipe`` as :func:`pipeline.runner.run_recipe` would and describe its plan; write nothing.

    Raises
    ------
    RecipeError, DatasetError, UsageError, ModelError, RunError
        What the run would raise before writing.
    """
    setup = prepare(recipe)
    mine = setup.plan.shard(*shard)
    if generator is None:
        generator, _ = open_model(recipe)
    check_model_classes(recipe, generator)
    done = RunFolder.inspect(recipe.output, run_identity(setup, shard))

    jobs = [setup.plan.jobs[i] for c in mine for i in setup.plan.chunks[c]]
    scenes = sorted({scene for job in jobs for scene, _ in job.sources})
    estimated = sum(mask_for(setup.dataset.scenes[i], dataset=setup.dataset).estimated for i in scenes)
    stages = tuple(_stage_preview(setup, spec, mine) for spec in recipe.stages)
    return PlanPreview(
        recipe=recipe,
        shard=shard,
        stages=stages,
        attempts_per_output=recipe.attempts_per_output,
        output=recipe.output,
        chunks_done=None if done is None else len(done & set(mine)),
        surfaces_checked=len(scenes),
        surfaces_estimated=estimated,
        model=generator.info(),
    )


def _stage_preview(setup: Setup, spec: StageSpec, mine: list[int]) -> StagePreview:
    plan = setup.plan
    chunks = [c for c in mine if plan.jobs[plan.chunks[c][0]].stage == spec.index]
    jobs = [plan.jobs[i] for c in chunks for i in plan.chunks[c]]
    sources = {scene for job in jobs for scene, _ in job.sources}
    if spec.kind == "insert":
        scenes = [setup.dataset.scenes[i] for i in sorted(sources)]
        sizes = _expected_sizes(setup.ground, scenes, spec.target_class, setup.footprint_rows)
        sizes_from = "expected by the ground model where real objects stand"
    else:
        sizes = _real_sizes(setup.dataset, spec.target_class, sources)
        sizes_from = "real instances in the source scenes"
    return StagePreview(
        index=spec.index,
        kind=spec.kind,
        target_class=spec.target_class,
        jobs=len(jobs),
        chunks=len(chunks),
        sources=len(sources),
        sizes_px=sizes,
        sizes_from=sizes_from,
    )


def _expected_sizes(
    ground: CameraGroups, scenes: list, name: str, rows: tuple[float, float]
) -> tuple[float, float] | None:
    heights = []
    for scene in scenes:
        model = ground_for(ground, scene)
        horizon = model.horizon_for(scene.id)
        heights += [model.expected_height(name, r, image_id=scene.id).expected for r in rows if r > horizon + 1]
    if not heights:
        return None
    return (min(heights), max(heights))


def _real_sizes(dataset: Dataset, name: str, sources: set[int]) -> tuple[float, float] | None:
    category = dataset.category_by_name(name).id
    heights = [
        a.bbox[3] for i in sources for a in dataset.scenes[i].annotations if a.category_id == category and not a.iscrowd
    ]
    if not heights:
        return None
    return (float(np.min(heights)), float(np.max(heights)))
