"""Make the jobs of a chunk, in this process or in worker processes: draft, denoise in one batch, judge, record.

Each round drafts the open jobs' next attempt, denoises all their windows together and judges the
candidates; a job leaves the round when accepted or out of attempts. Accepted images go to ``images/``,
thumbnails of rejected ones to ``rejects/``; the chunk's job records are returned for the writer to commit.
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import ModelError, RecipeError
from .generator import Generator
from .job_record import attempt_entry, attempt_scene, output_entry
from .judge import judge
from .plan import Job
from .recipe import Recipe
from .stages import Candidate, Draft, Failure, StageContext, stage_module
from .surface import surface_cache
from .writer import RunFolder

if TYPE_CHECKING:
    from .runner import Setup

Outcome = tuple[Candidate | Failure, list]
"""What one attempt came to: the candidate (or why none was made) and its verdicts."""


def accepted(outcome: Outcome) -> bool:
    """Whether an attempt's candidate passed every filter."""
    candidate, verdicts = outcome
    return isinstance(candidate, Candidate) and all(verdicts)


def open_model(recipe: Recipe) -> tuple[Generator, Any]:
    """The recipe's generator and its verifier (None for a user's own pipeline, which has none).

    Raises
    ------
    ModelError
        The model folder is missing, incomplete or unreadable.
    """
    from .generator import load
    from .generator.verifier import load_verifier

    generator = load(recipe.model, prompts=dict(recipe.prompts) or None)
    try:
        verifier = load_verifier(recipe.model)
    except ModelError:
        verifier = None  # a user's own pipeline has no verifier: the "present" filter is skipped
    return generator, verifier


def check_model_classes(recipe: Recipe, generator: Generator) -> None:
    """Refuse, before anything is made, an insert stage whose class the model cannot be asked for.

    The class is the model's conditioning label where it draws the object (``appearance = "generated"``)
    or repaints a placed exemplar (``harmonise``, with a model that takes exemplars); a model trained on
    other data does not know the data set's class names.

    Raises
    ------
    RecipeError
        Naming the recipe, the stage and the model's classes, and what to do instead.
    """
    known = tuple(getattr(generator, "classes", ()))
    for spec in recipe.stages:
        if spec.kind != "insert" or spec.target_class in known:
            continue
        exemplar = spec.options["appearance"] == "exemplar"
        if exemplar and not (spec.options["harmonise"] and getattr(generator, "accepts_exemplar", False)):
            continue  # pasted: the model is not asked
        fix = "set harmonise = false to paste the exemplars, " if exemplar else ""
        raise RecipeError(
            recipe.path,
            f"stage[{spec.index}].class",
            f"the model {recipe.model} does not know {spec.target_class!r} (its classes: {', '.join(known) or 'none'})",
            hint=f"train a model on this data set with `rarefill fit`, {fix}or rename the class to one it knows",
        )


def stage_context(setup: Setup, generator: Generator, verifier: Any) -> StageContext:
    """What every stage reads during the run."""
    return StageContext(
        dataset=setup.dataset,
        generator=generator,
        ground=setup.ground,
        limits=setup.limits,
        surface=surface_cache(setup.dataset),
        aspect_ratios=setup.ratios,
        footprint_rows=setup.footprint_rows,
        verifier=verifier,
        steps=setup.recipe.steps,
        guidance=setup.recipe.guidance,
        exemplars=setup.exemplars,
    )


def made_chunks(
    setup: Setup,
    todo: Sequence[int],
    workers: int,
    root: Path,
    generator,
    verifier,
    on_job: Callable[[dict], None] | None = None,
) -> Iterator[tuple[int, list[dict]]]:
    """``(chunk, job records)`` for every chunk of ``todo``, in this process or in a pool of ``workers``.

    ``on_job`` is called with each job's record once the job is done: as soon as it is, in this process;
    when its chunk arrives, from workers.
    """
    if not todo:
        return
    if workers == 1 or len(todo) == 1:
        maker = ChunkMaker(setup, root, threads=None, generator=generator, verifier=verifier)
        for chunk in todo:
            yield chunk, maker.make(chunk, on_job=on_job)
        return
    threads = max(1, (os.cpu_count() or 1) // workers)
    context = multiprocessing.get_context("spawn")
    initargs = (setup, root, threads, generator, verifier)
    with context.Pool(workers, initializer=_worker_init, initargs=initargs) as pool:
        for chunk, records in pool.imap_unordered(_worker_make, todo):
            for record in records if on_job else ():
                on_job(record)
            yield chunk, records


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
        if generator is None:
            generator, verifier = open_model(setup.recipe)
        self.setup = setup
        self.generator = generator
        self.model_info = generator.info()
        self.ctx = stage_context(setup, generator, verifier)
        self.folder = RunFolder(root)

    def make(self, chunk: int, *, on_job: Callable[[dict], None] | None = None) -> list[dict]:
        """Run every job of ``chunk`` until accepted or out of attempts; write images; return job records.

        ``on_job`` is called with each job's record as soon as the job is done (for progress).
        """
        plan = self.setup.plan
        jobs = [plan.jobs[i] for i in plan.chunks[chunk]]
        records = {job.key: {"key": job.key, "stage": job.stage, "slot": job.slot, "attempts": []} for job in jobs}
        outputs: dict[str, dict | None] = {job.key: None for job in jobs}
        for job, attempt, outcome in self.outcomes(chunk):
            entry, output = self._record(job, attempt, outcome)
            records[job.key]["attempts"].append(entry)
            if output is not None:
                outputs[job.key] = output
            if on_job is not None and (output is not None or attempt == plan.attempts - 1):
                on_job({**records[job.key], "output": output})
        return [{**records[job.key], "output": outputs[job.key]} for job in jobs]

    def outcomes(self, chunk: int) -> Iterator[tuple[Job, int, Outcome]]:
        """``(job, attempt, outcome)`` of every attempt of ``chunk``, round by round, in job order per round.

        A job takes part in the next round until a candidate of it is accepted (every verdict passed);
        nothing is written here.
        """
        plan = self.setup.plan
        open_jobs = [plan.jobs[i] for i in plan.chunks[chunk]]
        for attempt in range(plan.attempts):
            if not open_jobs:
                break
            results = self.attempt_round(open_jobs, attempt)
            for job, outcome in zip(open_jobs, results, strict=True):
                yield job, attempt, outcome
            open_jobs = [job for job, outcome in zip(open_jobs, results, strict=True) if not accepted(outcome)]

    def attempt_round(self, jobs: Sequence[Job], attempt: int) -> list[Outcome]:
        """Attempt ``attempt`` of every job in ``jobs``: draft all, denoise their windows in one batch, judge."""
        specs = self.setup.recipe.stages
        drafts: list[Draft | Failure] = [
            stage_module(specs[job.stage].kind).draft(job, attempt, specs[job.stage], self.ctx) for job in jobs
        ]
        requests = [r for d in drafts if isinstance(d, Draft) for r in d.requests]
        made = self.generator.inpaint(requests, steps=self.ctx.steps, guidance=self.ctx.guidance) if requests else []
        frames = iter(made)
        results: list[Outcome] = []
        for job, drafted in zip(jobs, drafts, strict=True):
            if isinstance(drafted, Failure):
                results.append((drafted, []))
                continue
            mine = [next(frames) for _ in drafted.requests]
            candidate = stage_module(specs[job.stage].kind).complete(drafted, mine, self.ctx)
            verdicts = judge(candidate, self.ctx) if isinstance(candidate, Candidate) else []
            results.append((candidate, verdicts))
        return results

    def _record(self, job: Job, attempt: int, result: Outcome) -> tuple[dict, dict | None]:
        """The attempt's manifest entry, with its image written; and its output if it was accepted."""
        outcome, verdicts = result
        recipe = self.setup.recipe
        scene = attempt_scene(job, attempt, outcome, self.setup.dataset)
        spec = recipe.stages[job.stage]
        target = self.setup.dataset.category_by_name(spec.target_class).id
        entry = attempt_entry(job, attempt, scene, outcome, verdicts, target_category_id=target)
        if isinstance(outcome, Failure):
            return entry, None
        name = f"{recipe.name}_{job.key}"
        if not entry["accepted"]:
            entry["reject"] = self.folder.write_reject(f"{name}_a{attempt}.jpg", outcome.image, entry["boxes"])
            return entry, None
        file_name = self.folder.write_image(f"{name}.png", outcome.image)
        entry["file_name"] = file_name
        output = output_entry(
            job,
            attempt,
            spec,
            outcome,
            entry,
            file_name,
            recipe_name=recipe.name,
            recipe_sha256=recipe.sha256,
            model_info=self.model_info,
            limits=self.setup.limits,
        )
        return entry, output
