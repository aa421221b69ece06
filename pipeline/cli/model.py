"""The command that trains the domain generator: fit."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from .base import ImagesOption, app, reports_errors, stderr, stdout


@app.command("fit")
@reports_errors
def fit_command(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file of the training split.")],
    out: Annotated[Path, typer.Option("--out", help="Model folder to write; training resumes from its checkpoint.")],
    images: ImagesOption = None,
    minutes: Annotated[
        float | None, typer.Option("--minutes", min=0.01, help="Train for this much wall time (this run).")
    ] = None,
    steps: Annotated[int | None, typer.Option("--steps", min=1, help="Train until this many steps in total.")] = None,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seeds the initial weights and every batch.")] = 0,
    batch_size: Annotated[int, typer.Option("--batch-size", min=1, help="Windows per training step.")] = 16,
) -> None:
    """Train the domain generator (inpainting diffusion model + object verifier) on CPU.

    Example: rarefill fit seed_scenes/train.json --out models/default --minutes 40
    """
    import sys

    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from ..dataset import load_dataset
    from ..errors import UsageError
    from ..generator import fit

    if (minutes is None) == (steps is None):
        raise UsageError("give exactly one of --minutes and --steps")
    data = load_dataset(dataset, images)
    columns = (TextColumn("{task.description}"), BarColumn(), TextColumn("{task.fields[status]}"), TimeElapsedColumn())
    with Progress(*columns, console=stderr()) as bar:
        tasks: dict[str, Any] = {}

        def report(event: Any) -> None:
            if event.phase not in tasks:
                total = event.total if event.total is not None else minutes * 60.0
                tasks[event.phase] = bar.add_task(event.phase, total=total, status="")
            done = event.step if event.total is not None else event.elapsed_s
            bar.update(tasks[event.phase], completed=done, status=f"step {event.step}  loss {event.loss:.4f}")

        result = fit(
            data,
            out_dir=out,
            steps=steps,
            minutes=minutes,
            seed=seed,
            batch_size=batch_size,
            progress=report,
            command=["rarefill", *sys.argv[1:]],
        )
    resumed = f", resumed at step {result.resumed_from}" if result.resumed_from else ""
    stdout().print(
        f"wrote {result.out_dir}: {result.steps_done} steps{resumed}, "
        f"{result.seconds / 60:.1f} min, final loss {result.final_loss:.4f}"
    )
