"""Make one job of a recipe alone, into a scratch folder, keeping every attempt: for debugging a recipe.

The job's chunk is replayed round by round as the full run makes it (its windows are denoised in the same
batches, so its pixels are the same bytes), but only this job's attempts are kept, each in full: the
candidate image (PNG, lossless, as ``images/`` holds it), the mask of generated pixels, the requested and
re-fitted boxes and every verdict. The replay stops as soon as the job is accepted. The near-duplicate
filter compares outputs of the whole run, so it is not applied here.

Layout of the scratch folder::

    job.json                  the job, its attempts (manifest entries) and, if accepted, its COCO output
    <run>_<job>_a<N>.png      attempt N's candidate image
    <run>_<job>_a<N>_mask.png its generated pixels (255) against kept ones (0)
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .chunk_maker import ChunkMaker, accepted, check_model_classes, open_model
from .errors import UsageError
from .files import write_bytes_atomic, write_json_atomic
from .generator import Generator
from .job_record import attempt_entry, attempt_scene, output_entry
from .plan import Job, Plan
from .recipe import Recipe
from .runner import prepare
from .stages import Failure
from .writer import encode_png

JOB_RECORD = "job.json"


@dataclass(frozen=True)
class JobResult:
    """What :func:`run_job` kept: the folder, the job record, and whether an attempt was accepted."""

    folder: Path
    key: str
    attempts: tuple[dict[str, Any], ...]
    accepted: bool


def find_job(plan: Plan, key: str) -> Job:
    """The job called ``key`` (``s<stage>-<slot>``, as in the manifest); a :class:`UsageError` otherwise."""
    for job in plan.jobs:
        if job.key == key:
            return job
    last: dict[int, int] = {}
    for job in plan.jobs:
        last[job.stage] = job.slot
    known = ", ".join(f"s{stage}-000000 .. s{stage}-{slot:06d}" for stage, slot in sorted(last.items()))
    raise UsageError(f"--job: no job {key!r} in the plan (jobs: {known})", hint="take a job key from manifest.jsonl")


def run_job(
    recipe: Recipe, key: str, out: Path, *, generator: Generator | None = None, verifier: Any = None
) -> JobResult:
    """Make job ``key`` of ``recipe`` alone into ``out``, keeping every attempt.

    Parameters
    ----------
    recipe : Recipe
    key : str
        The job's key, ``s<stage>-<slot>`` (see the ``job`` field of ``manifest.jsonl``).
    out : path
        The scratch folder: new, empty, or the scratch folder of an earlier ``run_job`` (overwritten).
    generator, verifier : optional
        Use these instead of loading the recipe's model folder.

    Raises
    ------
    UsageError
        No such job; ``out`` holds other files.
    RecipeError, DatasetError, ModelError
        As for :func:`pipeline.runner.run_recipe`; nothing is written then.
    """
    # 1. check everything before anything is written
    setup = prepare(recipe)
    job = find_job(setup.plan, key)
    if generator is None:
        generator, verifier = open_model(recipe)
    check_model_classes(recipe, generator)
    out = Path(out)
    _check_scratch(out)

    # 2. replay the job's chunk until this job is done
    maker = ChunkMaker(setup, out, threads=None, generator=generator, verifier=verifier)
    spec = recipe.stages[job.stage]
    target = setup.dataset.category_by_name(spec.target_class).id
    name = f"{recipe.name}_{job.key}"
    entries: list[dict[str, Any]] = []
    output = None
    for other, attempt, outcome in maker.outcomes(job.chunk):
        if other.key != job.key:
            continue
        candidate, verdicts = outcome
        scene = attempt_scene(job, attempt, candidate, setup.dataset)
        entry = attempt_entry(job, attempt, scene, candidate, verdicts, target_category_id=target)
        if not isinstance(candidate, Failure):
            entry["image"] = _write_png(out / f"{name}_a{attempt}.png", candidate.image)
            entry["mask"] = _write_png(out / f"{name}_a{attempt}_mask.png", _mask_image(candidate.changed))
        entries.append(entry)
        if accepted(outcome):
            output = output_entry(
                job,
                attempt,
                spec,
                candidate,
                entry,
                f"images/{name}.png",
                recipe_name=recipe.name,
                recipe_sha256=recipe.sha256,
                model_info=maker.model_info,
                limits=setup.limits,
            )
            break

    # 3. the record of the job
    record = {
        "job": job.key,
        "stage": {"index": spec.index, "kind": spec.kind, "class": spec.target_class},
        "seed": job.seed,
        "chunk": job.chunk,
        "attempts": entries,
        "output": None if output is None else {k: v for k, v in output.items() if k != "dedupe"},
    }
    write_json_atomic(out / JOB_RECORD, record, indent=2)
    return JobResult(out, job.key, tuple(entries), output is not None)


def _check_scratch(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise UsageError(f"{out}: exists and is not a folder", hint="give a new folder with --out")
    if out.is_dir() and any(out.iterdir()) and not (out / JOB_RECORD).is_file():
        raise UsageError(
            f"{out}: not empty and not a job folder (no {JOB_RECORD})",
            hint="give a new or empty folder with --out; a job's scratch folder is replaced",
        )
    if out.is_dir():
        for stale in out.glob("*.png"):
            stale.unlink()


def _mask_image(mask: np.ndarray) -> np.ndarray:
    grey = np.where(mask, 255, 0).astype(np.uint8)
    return np.repeat(grey[:, :, None], 3, axis=2)


def _write_png(path: Path, image: np.ndarray) -> str:
    write_bytes_atomic(path, encode_png(image))
    return path.name


def scratch_folder(recipe: Recipe, key: str) -> Path:
    """Default scratch folder of job ``key``: beside the run's output folder, ``<output>-job-<key>``."""
    return recipe.output.parent / f"{recipe.output.name}-job-{key}"
