"""Commands for after a run: merge, report, probe."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from .base import app, reports_errors, stderr, stdout


def _print_merge_summary(summary) -> None:
    out = stdout()
    table = Table(title=f"{summary.out}: {summary.real_images} real + {summary.synthetic_selected} synthetic images")
    for column in ("category", "real", "synthetic", "total", "cap", ""):
        table.add_column(column, justify="left" if column in ("category", "") else "right")
    for c in summary.classes:
        cap = "-" if c.cap is None else str(c.cap)
        table.add_row(c.name, str(c.real), str(c.synthetic), str(c.total), cap, "[bold red]rare[/]" if c.rare else "")
    out.print(table)
    wanted = "" if summary.synthetic_wanted is None else f" (wanted {summary.synthetic_wanted})"
    used = f"used {summary.synthetic_selected} of {summary.synthetic_available} available synthetic images"
    out.print(f"synthetic share {summary.share:.4f}: {used}{wanted}")
    groups = ", ".join(f"{g} {s}/{a}" for g, (a, s) in summary.groups.items()) or "none"
    out.print(f"by target class (used/available): {groups}")
    out.print(
        f"left out by the leakage guard: {summary.excluded['hash']} (same file hash), "
        f"{summary.excluded['id+file_name']} (same id and file name)"
    )
    for message in summary.shortfalls:
        out.print(f"[bold yellow]not met:[/] {message}")


@app.command("merge")
@reports_errors
def merge_command(
    ctx: typer.Context,
    real: Annotated[Path, typer.Argument(metavar="REAL.json", help="COCO file of the real training split.")],
    out: Annotated[Path, typer.Option("--out", help="Merged COCO file to write.")],
    synthetic: Annotated[
        list[Path], typer.Option("--synthetic", metavar="RUN_DIR", help="A run folder of `rarefill run` (repeat).")
    ],
    guard: Annotated[
        list[Path] | None,
        typer.Option("--guard", metavar="HELDOUT.json", help="A held-out split to protect (repeat; at least one)."),
    ] = None,
    real_images: Annotated[
        Path | None, typer.Option("--real-images", help="Image folder of REAL.json (default: images/ beside it).")
    ] = None,
    synthetic_share: Annotated[
        float | None, typer.Option("--synthetic-share", help="Fraction of merged images that are synthetic, [0, 1).")
    ] = None,
    rare_target: Annotated[
        int | None, typer.Option("--rare-target", help="Add synthetic images until each rare class has N instances.")
    ] = None,
    cap: Annotated[
        list[str] | None, typer.Option("--cap", metavar="CLASS=N", help="At most N synthetic instances (repeat).")
    ] = None,
    rare_below: Annotated[
        int, typer.Option("--rare-below", help="Classes with fewer real instances than this are rare.")
    ] = 50,
    mapping: Annotated[
        Path | None, typer.Option("--mapping", help='JSON {"their name": "our name"} for other vocabularies.')
    ] = None,
    images_mode: Annotated[
        str,
        typer.Option(
            "--images-mode",
            help="link (hard links) or copy: the images go to <out stem>_images/ beside the output; relative: "
            "file_name points at the original files (may need ../, which `rarefill stats` refuses).",
        ),
    ] = "link",
    seed: Annotated[int, typer.Option("--seed", help="Seeds which synthetic images are chosen.")] = 0,
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON instead of a table.")] = False,
) -> None:
    """Mix real and synthetic images at a chosen ratio into one COCO file, never leaking held-out images.

    All real images are kept. Synthetic images made from an image of a --guard split (same file hash,
    or same id and file name) are always left out and counted. Give --synthetic-share or --rare-target.

    Example: rarefill merge seed_scenes/train.json --synthetic outputs/more-tractors
    --guard seed_scenes/val.json --guard seed_scenes/test.json --synthetic-share 0.3 --out merged/train.json
    """
    from ..merge import merge, parse_caps

    summary = merge(
        real,
        synthetic=synthetic,
        guards=guard or [],
        out=out,
        real_images=real_images,
        synthetic_share=synthetic_share,
        rare_target=rare_target,
        caps=parse_caps(cap or []),
        rare_below=rare_below,
        mapping=mapping,
        images_mode=images_mode,
        seed=seed,
    )
    if as_json:
        typer.echo(json.dumps(summary.to_dict(), indent=2))
        return
    _print_merge_summary(summary)


@app.command()
@reports_errors
def report(
    ctx: typer.Context,
    run_dir: Annotated[Path, typer.Argument(metavar="RUN_DIR", help="A run folder written by `rarefill run`.")],
    real: Annotated[
        Path | None,
        typer.Option(
            "--real",
            help="The real COCO data set of the run: fit the ground model on it and count 'before' from it "
            "(default: the run's kept real annotations).",
        ),
    ] = None,
    real_images: Annotated[
        Path | None, typer.Option("--real-images", help="Image folder of --real (links each output to its source).")
    ] = None,
    page_size: Annotated[int, typer.Option("--page-size", min=1, help="Thumbnails per gallery page.")] = 200,
) -> None:
    """Write RUN_DIR/report.html: funnel, plots, thumbnails of accepted and rejected candidates, provenance.

    The page needs no network; open it in any browser. Assets go to RUN_DIR/report/.

    Example: rarefill report outputs/more-tractors --real seed_scenes/train.json
    """
    from ..dataset import load_dataset
    from ..errors import UsageError
    from ..report import write_report

    if real_images is not None and real is None:
        raise UsageError("--real-images needs --real (the data set whose images they are)")
    data = load_dataset(real, real_images, check_images=False) if real is not None else None
    result = write_report(run_dir, real=data, page_size=page_size)
    f = result.funnel
    stdout().print(f"{f.accepted} accepted, {f.rejected} rejected of {f.attempted} candidates; {result.ground_note}")
    stdout().print(f"wrote {result.path} ({result.pages} page(s), {result.thumbnails_made} new thumbnails)")


@app.command()
@reports_errors
def probe(
    ctx: typer.Context,
    real: Annotated[Path, typer.Option("--real", metavar="TRAIN.json", help="COCO file of the real training split.")],
    test: Annotated[Path, typer.Option("--test", metavar="TEST.json", help="Real held-out split to score on.")],
    arm: Annotated[
        list[str],
        typer.Option(
            "--arm",
            metavar="NAME=RUN_DIR",
            help="An arm and a run folder of `rarefill run` whose images it adds (repeat; repeat a name to "
            "give an arm several folders).",
        ),
    ],
    out: Annotated[Path, typer.Option("--out", help="Folder for results.md/json, rare_ap50.png, sets/, runs/.")],
    guard: Annotated[
        list[Path] | None,
        typer.Option("--guard", metavar="HELDOUT.json", help="Another held-out split to keep out (repeat)."),
    ] = None,
    baseline: Annotated[
        str | None,
        typer.Option("--baseline", metavar="NAME", help="Also compare every other arm with this one (e.g. paste)."),
    ] = None,
    quick: Annotated[
        bool, typer.Option("--quick", help="A rough answer: fewer seeds, shares, epochs and bootstrap replicates.")
    ] = False,
    shares: Annotated[
        str | None, typer.Option("--shares", help="Synthetic shares to try; 0 is real only. [default: 0,0.25,0.5]")
    ] = None,
    seeds: Annotated[int | None, typer.Option("--seeds", min=1, help="Repeats (seeds 0..N-1). [default: 5]")] = None,
    epochs: Annotated[
        float | None,
        typer.Option("--epochs", help="Steps per model = epochs x real images / batch size. [default: 30]"),
    ] = None,
    minutes: Annotated[
        float | None, typer.Option("--minutes", help="Training wall time per model instead of --epochs.")
    ] = None,
    resamples: Annotated[
        int | None, typer.Option("--resamples", min=0, help="Bootstrap replicates per interval. [default: 1000]")
    ] = None,
    input_scale: Annotated[
        float, typer.Option("--input-scale", help="Scale images by this before the detector, (0, 1].")
    ] = 0.5,
    batch_size: Annotated[int, typer.Option("--batch-size", min=1, help="Images per training step.")] = 8,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Models trained side by side (processes).")] = 2,
    threads: Annotated[
        int | None, typer.Option("--threads", min=1, help="Torch threads per model (default: cores / workers).")
    ] = None,
) -> None:
    """Does the synthetic data help a detector on real held-out data, and which kind helps most? Train a
    compact CenterNet per condition and seed, score it with COCOeval on --test, and compare rare-class
    AP50 and AP with paired bootstrap intervals.

    Conditions: real only; real + each arm at each share. Make the arms from one plan (recipes/probe-*.toml)
    so that only the tested thing differs. The defaults (5 seeds, 30 epochs, 2 workers) take about 40
    minutes for four arms on 2 cores; --quick (3 seeds, share 0.5, 15 epochs) about 10.

    Example: rarefill probe --real seed_scenes/train.json --test seed_scenes/test.json
    --guard seed_scenes/val.json --arm paste=outputs/probe-paste --arm exemplar=outputs/probe-exemplar
    --baseline paste --out outputs/probe
    """
    from ..errors import UsageError
    from ..probe import TrainSettings, run_probe, write_results
    from ..probe.experiment import parse_arms, parse_shares, preset

    if not 0 < input_scale <= 1:
        raise UsageError(f"--input-scale must be in (0, 1], got {input_scale:g}")
    if epochs is not None and minutes is not None:
        raise UsageError("give at most one of --epochs and --minutes")
    chosen = preset(quick)
    err = stderr()
    result = run_probe(
        real,
        test_json=test,
        guards=guard or [],
        arms=parse_arms(arm),
        baseline=baseline,
        out=out,
        shares=parse_shares(shares) if shares is not None else chosen.shares,
        seeds=seeds if seeds is not None else chosen.seeds,
        epochs=None if minutes is not None else (epochs if epochs is not None else chosen.epochs),
        minutes=minutes,
        settings=TrainSettings(steps=1, batch_size=batch_size, input_scale=input_scale),
        workers=workers,
        threads=threads,
        progress=lambda line: err.print(line, markup=False),
    )
    err.print("bootstrap intervals ...", markup=False)
    paths = write_results(result, out, resamples=resamples if resamples is not None else chosen.resamples)
    stdout().print(paths["markdown"].read_text(encoding="utf-8"), markup=False)
    stdout().print(f"wrote {paths['markdown']}, {paths['json']} and {paths['plot']}")


@app.command()
@reports_errors
def sheet(
    ctx: typer.Context,
    run_dir: Annotated[Path, typer.Argument(metavar="RUN_DIR", help="A run folder written by `rarefill run`.")],
    real: Annotated[Path, typer.Option("--real", help="A real COCO data set to compare with (e.g. a held-out split).")],
    out: Annotated[Path, typer.Option("--out", help="PNG file to write.")],
    real_images: Annotated[
        Path | None, typer.Option("--real-images", help="Image folder of --real (default: images/ beside it).")
    ] = None,
    per_class: Annotated[int, typer.Option("--per-class", min=1, help="Inserted instances shown per class.")] = 12,
) -> None:
    """Write a contact sheet: inserted instances beside real ones of the same class and about the same size.

    Instances are taken evenly over their box heights; each pair shares one whole-number magnification
    (nearest neighbour), so both show their pixels as they are.

    Example: rarefill sheet outputs/more-tractors --real seed_scenes/test.json --out sheet.png
    """
    from ..contact_sheet import write_sheet

    pairs = write_sheet(run_dir, real, out, real_images=real_images, per_class=per_class)
    stdout().print(f"wrote {out}: {pairs} pairs of inserted and real instances")
