"""Commands that make synthetic images: run, collect, demo."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated

import typer

from .base import app, reports_errors, stderr, stdout


def _print_run_summary(summary) -> None:
    out = stdout()
    out.print(f"accepted {summary.accepted} of {summary.wanted} wanted, after {summary.attempted} attempts")
    if summary.rejections:
        reasons = ", ".join(f"{name} {n}" for name, n in sorted(summary.rejections.items(), key=lambda kv: -kv[1]))
        out.print(f"rejections by filter: {reasons}")
    if summary.chunks_skipped:
        out.print(f"resumed: {summary.chunks_skipped} chunk(s) were already done")
    out.print(f"labels:   {summary.output / 'labels.json'}")
    out.print(f"manifest: {summary.output / 'manifest.jsonl'}  (every candidate with its verdicts)")


def _run_with_progress(recipe, *, workers: int, shard: tuple[int, int]):
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    from ..runner import run_recipe

    columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=stderr(), transient=False) as bar:
        task = bar.add_task("chunks", total=None)

        def update(state) -> None:
            top = ", ".join(f"{k} {v}" for k, v in state.rejections.most_common(3)) or "none"
            bar.update(
                task,
                total=state.chunks_total,
                completed=state.chunks_done,
                description=f"accepted {state.accepted}/{state.attempted} attempted (rejected: {top})",
            )

        return run_recipe(recipe, workers=workers, shard=shard, progress=update)


@app.command()
@reports_errors
def run(
    ctx: typer.Context,
    recipe_file: Annotated[Path, typer.Argument(metavar="RECIPE", help="Recipe TOML file (see recipes/).")],
    out: Annotated[Path | None, typer.Option("--out", help="Write here instead of the recipe's output.")] = None,
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
) -> None:
    """Make synthetic images from a recipe: place, generate, judge, write labels with provenance.

    Output: labels.json (COCO), images/, manifest.jsonl (every candidate and its verdicts), rejects/.
    A run that is stopped (even killed) continues where it stopped when started again the same way.

    Example: rarefill run recipes/more-tractors.toml --limit 16
    """
    from ..recipe import load_recipe
    from ..shard import parse_shard

    part = parse_shard(shard, os.environ)
    if part.source != "command line":
        stderr().print(f"shard {part} (from {part.source})", markup=False)
    recipe = load_recipe(recipe_file)
    if out is not None:
        recipe = recipe.with_output(out)
    if limit is not None:
        recipe = recipe.with_limit(limit)
    summary = _run_with_progress(recipe, workers=workers, shard=part.pair)
    _print_run_summary(summary)


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
) -> None:
    """Run the demo recipe (recipes/demo.toml) on the shipped seed scenes with the shipped model.

    It makes a small sample of every stage kind in a few minutes on 2 cores and prints where the outputs
    are. Run it again to resume; delete the output folder to start over.

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
