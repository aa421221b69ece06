"""The realism audit command: how far a run's synthetic instances are from real held-out ones."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.table import Table

from .base import ImagesOption, app, reports_errors, stderr, stdout


def print_audit(result: dict[str, Any]) -> None:
    """The per-class table of an audit result, its legend and notes."""
    from ..audit.table import COLUMNS, legend, rows

    out = stdout()
    # One column per class and one row per figure: a few classes fit an 80-column terminal.
    per_class = rows(result)
    table = Table(title=f"realism audit against {result['heldout']}")
    table.add_column("figure")
    for row in per_class:
        table.add_column(row[0], justify="right")
    for i, title in enumerate(COLUMNS[1:], start=1):
        table.add_row(title, *(row[i] for row in per_class))
    out.print(table)
    out.print(legend(result))
    for name, figures in result["classes"].items():
        for note in figures["notes"]:
            out.print(f"[bold yellow]{name}:[/] {note}", markup=True)


@app.command()
@reports_errors
def audit(
    ctx: typer.Context,
    run_dir: Annotated[Path, typer.Argument(metavar="RUN_DIR", help="A run folder written by `rarefill run`.")],
    real: Annotated[
        Path,
        typer.Option("--real", metavar="HELDOUT.json", help="Real split no synthetic image was made from (e.g. test)."),
    ],
    images: ImagesOption = None,
    train: Annotated[
        Path | None,
        typer.Option(
            "--train",
            metavar="TRAIN.json",
            help="The run's real training split (default: the COCO file beside --real holding the run's sources).",
        ),
    ] = None,
    train_images: Annotated[Path | None, typer.Option("--train-images", help="Image folder of --train.")] = None,
    classes: Annotated[
        str | None, typer.Option("--classes", metavar="a,b", help="Classes to audit (default: all with new instances).")
    ] = None,
    seed: Annotated[int, typer.Option("--seed", help="Seeds every random choice (same seed, same figures).")] = 0,
    folds: Annotated[int, typer.Option("--folds", min=2, help="k of the k-fold cross-validation.")] = 5,
    epochs: Annotated[int, typer.Option("--epochs", min=1, help="Training passes per fold.")] = 30,
    repeats: Annotated[
        int,
        typer.Option(
            "--repeats",
            min=1,
            help="Two-sample tests per figure, each on a new subsample of the larger side; accuracies are "
            "their means (one test moves by about +-0.07 with the seed).",
        ),
    ] = 5,
    feature_steps: Annotated[
        int, typer.Option("--feature-steps", min=1, help="Training steps of the feature network.")
    ] = 300,
    threads: Annotated[int, typer.Option("--threads", min=1, help="Torch threads (1 is best on a busy machine).")] = 1,
    as_json: Annotated[bool, typer.Option("--json", help="Print the figures as JSON instead of a table.")] = False,
) -> None:
    """Measure how far a run's synthetic instances are from real ones, per class; save RUN_DIR/audit.json.

    Figures: a classifier two-sample test (real vs synthetic crops, and real vs real as the floor; for
    exemplar insertion also with each exemplar's composites held out together, and on the real exemplars
    themselves repeated as the run used them: the most the pool allows), improved precision and recall
    in features learned from the real training crops, sharpness by box height, box fit where a
    silhouette is known, and near-copies of training crops. `rarefill report`
    then shows them, with the instances the classifier found most and least real.

    Example: rarefill audit outputs/more-tractors --real seed_scenes/test.json
    """
    from ..audit import audit_run

    names = [c.strip() for c in classes.split(",") if c.strip()] if classes else None
    err = stderr()
    result = audit_run(
        run_dir,
        real,
        images=images,
        train=train,
        train_images=train_images,
        classes=names,
        seed=seed,
        folds=folds,
        epochs=epochs,
        repeats=repeats,
        feature_steps=feature_steps,
        threads=threads,
        progress=lambda line: err.print(line, markup=False),
    )
    if as_json:
        typer.echo(json.dumps(result, indent=2))
        return
    print_audit(result)
    stdout().print(f"wrote {Path(run_dir) / 'audit.json'}; `rarefill report {run_dir}` shows it")
