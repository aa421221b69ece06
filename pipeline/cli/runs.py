"""Commands that make synthetic images: run, collect, demo."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated

import typer

from .base import app, reports_errors, stderr, stdout


def _stage_lines(tally) -> list[str]:
    short = f" ({tally.short} short)" if tally.short else ""
    lines = [
        f"stage {tally.index} {tally.kind} {tally.target_class}: accepted {tally.accepted} of {tally.wanted} "
        f"wanted{short}, after {tally.attempted} attempts"
    ]
    if tally.rejected_by:
        lines.append("    rejected by: " + ", ".join(f"{name} {n}" for name, n in tally.rejected_by.items()))
    if tally.bands:
        lines.append("    accepted by size: " + ", ".join(f"{b} {a}/{n}" for b, (a, n) in tally.bands.items()))
    return lines


def _print_run_summary(summary) -> None:
    out = stdout()
    out.print(f"accepted {summary.accepted} of {summary.wanted} wanted, after {summary.attempted} attempts")
    for tally in summary.stages:
        for line in _stage_lines(tally):
            out.print(line, markup=False, soft_wrap=True)
    if summary.chunks_skipped:
        out.print(f"resumed: {summary.chunks_skipped} chunk(s) were already done")
    out.print(f"labels:   {summary.output / 'labels.json'}")
    out.print(f"manifest: {summary.output / 'manifest.jsonl'}  (every candidate with its verdicts)")


def _exit_if_short(summary, allow_short: bool) -> None:
    from ..errors import EXIT_SHORT

    if not summary.short:
        return
    stages = sum(1 for t in summary.stages if t.short)
    err = stderr()
    err.print(
        f"short: {summary.short} of {summary.wanted} wanted outputs missing in {stages} stage(s)",
        markup=False,
        soft_wrap=True,
    )
    if not allow_short:
        err.print(
            f"hint: exit code {EXIT_SHORT} means the run finished short; --allow-short exits 0",
            markup=False,
            soft_wrap=True,
        )
        raise typer.Exit(EXIT_SHORT)


def _run_with_progress(recipe, *, workers: int, shard: tuple[int, int]):
    import time

    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    from ..runner import run_recipe

    columns = (TextColumn("jobs"), BarColumn(bar_width=24), MofNCompleteColumn(), TextColumn("{task.description}"))
    bar = Progress(*columns, TimeElapsedColumn(), TextColumn("{task.fields[eta]}"), console=stderr())
    task = None
    started = 0.0

    def update(state) -> None:
        # the first call comes once the recipe, data set and model are checked: the bar starts then
        nonlocal task, started
        if task is None:
            bar.start()
            started = time.monotonic()
            task = bar.add_task("", total=state.wanted, completed=state.done, eta="eta --")
        made = state.done - state.resumed
        eta = "eta --"
        if made:
            eta = f"eta {_clock((time.monotonic() - started) / made * (state.wanted - state.done))}"
        description = f"accepted {state.accepted}, {state.attempted} attempts"
        bar.update(task, completed=state.done, description=description, eta=eta)

    try:
        return run_recipe(recipe, workers=workers, shard=shard, progress=update)
    finally:
        bar.stop()


def _clock(seconds: float) -> str:
    minutes, secs = divmod(int(round(seconds)), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


def _print_preview(preview) -> None:
    out = stdout()
    shard = f", shard {preview.shard[0]}/{preview.shard[1]}" if preview.shard != (0, 1) else ""
    out.print(f"plan of {preview.recipe.name}{shard}: checked, nothing written", markup=False, soft_wrap=True)
    for stage in preview.stages:
        sizes = "no sizes" if stage.sizes_px is None else f"{stage.sizes_px[0]:.0f}-{stage.sizes_px[1]:.0f} px tall"
        out.print(
            f"stage {stage.index} {stage.kind} {stage.target_class}: {stage.jobs} jobs in {stage.chunks} chunk(s), "
            f"up to {preview.attempts_per_output} attempts each, from {stage.sources} source scenes; "
            f"objects {sizes} ({stage.sizes_from})",
            markup=False,
            soft_wrap=True,
        )
    estimated = f", {preview.surfaces_estimated} estimated" if preview.surfaces_estimated else ""
    out.print(f"surfaces: {preview.surfaces_checked} source scenes checked{estimated}", markup=False, soft_wrap=True)
    out.print(f"model:    {preview.recipe.model} ({preview.model.get('kind', '?')})", markup=False, soft_wrap=True)
    if preview.chunks_done is None:
        state = "new"
    else:
        total = sum(stage.chunks for stage in preview.stages)
        state = f"an earlier start of this run: {preview.chunks_done} of {total} chunks done, they would be skipped"
    out.print(f"output:   {preview.output} ({state})", markup=False, soft_wrap=True)


def _run_one_job(recipe, key: str, out: Path | None) -> None:
    from ..single_job import run_job, scratch_folder

    result = run_job(recipe, key, out if out is not None else scratch_folder(recipe, key))
    console = stdout()
    for entry in result.attempts:
        verdict = "accepted" if entry["accepted"] else "rejected by " + ", ".join(entry["rejected_by"])
        image = entry.get("image", "no image (failed before generation)")
        console.print(f"attempt {entry['attempt']}: {verdict}: {image}", markup=False, soft_wrap=True)
    outcome = "accepted" if result.accepted else f"not accepted in {len(result.attempts)} attempts"
    console.print(
        f"job {result.key}: {outcome}; every attempt in {result.folder} (job.json)", markup=False, soft_wrap=True
    )


@app.command()
@reports_errors
def run(
    ctx: typer.Context,
    recipe_file: Annotated[Path, typer.Argument(metavar="RECIPE", help="Recipe TOML file (see recipes/).")],
    out: Annotated[
        Path | None,
        typer.Option("--out", help="Write here instead of the recipe's output (with --job: the scratch folder)."),
    ] = None,
    limit: Annotated[
        int | None, typer.Option("--limit", min=1, help="Cap each stage's wanted count (a quick trial).")
    ] = None,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Worker processes (CPU cores to use).")] = 1,
    shard: Annotated[
        str,
        typer.Option(
            "--shard",
            help="Run slice i of N of the plan, e.g. 0/4; `auto` takes it from a Slurm job array, `auto/N` from "
            "a Kubernetes Indexed Job of N completions (see the README).",
        ),
    ] = "0/1",
    dry_run: Annotated[
        bool,
        typer.Option(
            "--dry-run",
            help="Check the recipe, data set, model folder and surfaces, print the plan per stage; write nothing.",
        ),
    ] = False,
    job: Annotated[
        str | None,
        typer.Option(
            "--job",
            metavar="KEY",
            help="Make only this job (a manifest 'job' key, e.g. s0-000004) into a scratch folder, keeping "
            "every attempt: image, mask, boxes, verdicts. Default folder: <output>-job-<KEY>.",
        ),
    ] = None,
    allow_short: Annotated[
        bool,
        typer.Option("--allow-short", help="Exit 0, not 3, when a stage accepted fewer outputs than wanted."),
    ] = False,
) -> None:
    """Make synthetic images from a recipe: place, generate, judge, write labels with provenance.

    Output: labels.json (COCO), images/, manifest.jsonl (every candidate and its verdicts), rejects/.
    A run that is stopped (even killed) continues where it stopped when started again the same way.
    Exit codes: 0 done, 3 finished short (a stage accepted fewer than wanted), 2 bad input, 1 other failure.

    Example: rarefill run recipes/more-tractors.toml --dry-run, then --limit 16 for a quick trial; a job that
    went wrong: rarefill run recipes/more-tractors.toml --job s0-000004
    """
    from ..errors import UsageError
    from ..recipe import load_recipe
    from ..shard import parse_shard

    if dry_run and job is not None:
        raise UsageError("--dry-run and --job exclude each other: preview the plan, or make one job")
    if job is not None and (workers != 1 or shard != "0/1"):
        raise UsageError("--job makes one job in this process: --workers and --shard do not apply to it")
    part = parse_shard(shard, os.environ)
    if part.source != "command line":
        stderr().print(f"shard {part} (from {part.source})", markup=False)
    recipe = load_recipe(recipe_file)
    if out is not None and job is None:
        recipe = recipe.with_output(out)
    if limit is not None:
        recipe = recipe.with_limit(limit)
    if dry_run:
        from ..preview import preview_recipe

        _print_preview(preview_recipe(recipe, shard=part.pair))
        return
    if job is not None:
        _run_one_job(recipe, job, out)
        return
    summary = _run_with_progress(recipe, workers=workers, shard=part.pair)
    _print_run_summary(summary)
    _exit_if_short(summary, allow_short)


@app.command()
@reports_errors
def collect(
    ctx: typer.Context,
    shards: Annotated[list[Path], typer.Argument(help="The shard output folders (all N of one run).")],
    out: Annotated[Path, typer.Option("--out", help="Folder for the combined run (new).")],
) -> None:
    """Combine the outputs of `rarefill run --shard i/N` into one labelled set, identical to a single run.

    Example: rarefill collect outputs/part-0 outputs/part-1 --out outputs/whole
    """
    from ..collect import collect as collect_shards

    counts = collect_shards(shards, out)
    stdout().print(f"collected {counts['accepted']} images from {len(shards)} shards into {out / 'labels.json'}")


@app.command()
@reports_errors
def demo(
    ctx: typer.Context,
    out: Annotated[Path | None, typer.Option("--out", help="Output folder (default: outputs/demo).")] = None,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Worker processes.")] = 1,
    allow_short: Annotated[
        bool,
        typer.Option("--allow-short", help="Exit 0, not 3, when a stage accepted fewer outputs than wanted."),
    ] = False,
) -> None:
    """Run the demo recipe (recipes/demo.toml) on the shipped seed scenes with the shipped model.

    It makes a small sample of every stage kind in a few minutes on 2 cores and prints where the outputs
    are. Run it again to resume; delete the output folder to start over. Exit code 3 when a stage fell short.

    Example: rarefill demo
    """
    from ..demo import demo_recipe

    recipe = demo_recipe()
    if out is not None:
        recipe = recipe.with_output(out)
    summary = _run_with_progress(recipe, workers=workers, shard=(0, 1))
    _print_run_summary(summary)
    stdout().print(f"images:   {summary.output / 'images'}")
    stdout().print(f"look at it: rarefill report {summary.output}")
    _exit_if_short(summary, allow_short)
