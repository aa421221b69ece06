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
        float | None,
        typer.Option(
            "--minutes",
            min=0.01,
            help="Wall time for this run, both phases: the verifier first (when missing; a fixed number of "
            "steps), then the denoiser for the rest.",
        ),
    ] = None,
    steps: Annotated[int | None, typer.Option("--steps", min=1, help="Train until this many steps in total.")] = None,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Seeds the initial weights and every batch.")] = 0,
    batch_size: Annotated[int, typer.Option("--batch-size", min=1, help="Windows per training step.")] = 16,
    init: Annotated[
        Path | None,
        typer.Option(
            "--init",
            help="Warm start from this model folder (same classes and size); a model without exemplar "
            "channels gains them at zero weight, so it keeps what it drew and training is short.",
        ),
    ] = None,
    exemplar: Annotated[
        bool,
        typer.Option(
            "--exemplar/--no-exemplar",
            help="Train the exemplar-conditioned model (default: it repaints a placed real instance in "
            "context and also draws from the class label alone) or the label-only kind of older versions.",
        ),
    ] = True,
) -> None:
    """Train the domain generator (inpainting diffusion model + object verifier) on CPU.

    The model learns by self-supervision on your own images: a real object is masked (its silhouette
    grown by a few pixels plus a shadow band under it), an altered copy of it (colour, brightness,
    blur, a few per cent of shift and scale) is given as the exemplar, and the model learns to redraw
    the original in its scene. Half the object windows get no exemplar and background windows are
    mixed in, so the same model also draws objects from their class alone and fills backgrounds.

    Two phases, each with its own progress bar: the object verifier (a fixed number of steps, skipped
    when the folder already holds one for this data), then the denoiser (--steps, or what is left of
    --minutes).

    Example: rarefill fit seed_scenes/train.json --out models/default --minutes 40

    Warm start: rarefill fit seed_scenes/train.json --out models/new --init models/default --minutes 30
    """
    import sys
    import time

    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from ..dataset import load_dataset
    from ..errors import UsageError
    from ..generator import fit
    from ..generator.model import DenoiserConfig

    if (minutes is None) == (steps is None):
        raise UsageError("give exactly one of --minutes and --steps")
    data = load_dataset(dataset, images)
    columns = (TextColumn("{task.description}"), BarColumn(), TextColumn("{task.fields[status]}"), TimeElapsedColumn())
    with Progress(*columns, console=stderr()) as bar:
        tasks: dict[str, Any] = {}
        started = time.monotonic()

        def report(event: Any) -> None:
            if event.phase not in tasks:
                # a time-limited phase fills what is left of the budget when it starts
                left = minutes * 60.0 - (time.monotonic() - started - event.elapsed_s) if minutes else None
                total = event.total if event.total is not None else left
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
            config=DenoiserConfig(exemplar=exemplar),
            init=init,
        )
    resumed = f", resumed at step {result.resumed_from}" if result.resumed_from else ""
    stdout().print(
        f"wrote {result.out_dir}: {result.steps_done} steps{resumed}, {(time.monotonic() - started) / 60:.1f} min "
        f"in all ({result.seconds / 60:.1f} min for the denoiser), final loss {result.final_loss:.4f}"
    )
