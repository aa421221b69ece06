"""The `rarefill` command line: parse arguments, call the library, print results and errors.

No logic lives here. Library errors (pipeline.errors) become one line on stderr plus a hint, with exit
code 2 for bad input and 1 for other failures; `--debug` shows the traceback instead.
"""

from __future__ import annotations

import functools
import json
import traceback
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, TypeVar

import typer
from rich.console import Console
from rich.table import Table

from . import __version__
from .errors import RarefillError

app = typer.Typer(
    name="rarefill",
    help=(
        "Expand rare classes of a COCO detection data set with synthetic, filtered, labelled images.\n\n"
        "Typical session: `rarefill stats` to see which classes are rare, `rarefill fit` to train the "
        "domain generator, `rarefill run RECIPE` to make images, `rarefill merge` to mix them with real data."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

F = TypeVar("F", bound=Callable[..., Any])


def _stdout() -> Console:
    return Console(highlight=False)


def _stderr() -> Console:
    return Console(stderr=True, highlight=False, soft_wrap=True)


def reports_errors(command: F) -> F:
    """Turn library errors into one line plus a hint, and warnings into `warning:` lines on stderr.

    The command must take ``ctx: typer.Context`` (keyword) so the global ``--debug`` flag reaches it.
    """

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        debug = bool((kwargs["ctx"].obj or {}).get("debug"))
        err = _stderr()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                return command(*args, **kwargs)
            except RarefillError as exc:
                if debug:
                    err.print(traceback.format_exc(), markup=False)
                err.print(f"error: {exc}", markup=False)
                if exc.hint:
                    err.print(f"hint: {exc.hint}", markup=False)
                raise typer.Exit(exc.exit_code) from None
            except KeyboardInterrupt:
                err.print("interrupted", markup=False)
                raise typer.Exit(130) from None
            except Exception as exc:  # a bug, not a user error: say so and how to see more
                if debug:
                    raise
                err.print(f"error: internal failure: {type(exc).__name__}: {exc}", markup=False)
                err.print("hint: run again with --debug for the traceback and report it", markup=False)
                raise typer.Exit(1) from None
            finally:
                for item in caught:
                    if not issubclass(item.category, (DeprecationWarning, FutureWarning)):
                        err.print(f"warning: {item.message}", markup=False)

    return wrapper  # type: ignore[return-value]


def _print_version(value: bool) -> None:
    if value:
        typer.echo(f"rarefill {__version__}")
        raise typer.Exit(0)


@app.callback()
def main(
    ctx: typer.Context,
    debug: Annotated[bool, typer.Option("--debug", help="Show the full traceback when something fails.")] = False,
    version: Annotated[
        bool, typer.Option("--version", callback=_print_version, is_eager=True, help="Print the version and exit.")
    ] = False,
) -> None:
    """Expand rare classes of a COCO detection data set with synthetic, filtered, labelled images."""
    ctx.obj = {"debug": debug}


ImagesOption = Annotated[
    Path | None,
    typer.Option(
        "--images",
        help="Folder that the JSON's file_name entries are relative to (default: images/ beside the JSON, "
        "else the JSON's folder).",
    ),
]


@app.command()
@reports_errors
def stats(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file.")],
    images: ImagesOption = None,
    rare_below: Annotated[
        int, typer.Option("--rare-below", min=0, help="Flag categories with fewer instances than this as rare.")
    ] = 50,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.")] = False,
    clip_boxes: Annotated[
        bool, typer.Option("--clip-boxes", help="Clip boxes that leave their image instead of refusing the file.")
    ] = False,
) -> None:
    """Count images and instances per category, box sizes and COCO size buckets; flag rare classes.

    Size buckets follow COCO's evaluation: small < 32^2 px area, medium < 96^2, large above.

    Example: rarefill stats seed_scenes/train.json --rare-below 30
    """
    from .dataset import load_dataset
    from .stats import category_stats, stats_as_dict

    data = load_dataset(dataset, images, clip_boxes=clip_boxes)
    rows = category_stats(data, rare_below=rare_below)
    if as_json:
        typer.echo(json.dumps(stats_as_dict(data, rows), indent=2))
        return
    table = Table(title=f"{dataset}: {len(data.scenes)} images, {sum(r.instances for r in rows)} instances")
    for column in ("category", "images", "instances", "median h (px)", "small", "medium", "large", ""):
        table.add_column(column, justify="left" if column in ("category", "") else "right")
    for r in rows:
        height = "-" if r.median_box_height is None else f"{r.median_box_height:.1f}"
        table.add_row(
            r.name,
            str(r.images),
            str(r.instances),
            height,
            f"{r.small:.0%}",
            f"{r.medium:.0%}",
            f"{r.large:.0%}",
            "[bold red]rare[/]" if r.rare else "",
        )
    _stdout().print(table)


@app.command()
@reports_errors
def ground(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file.")],
    images: ImagesOption = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.")] = False,
    plot: Annotated[
        Path | None, typer.Option("--plot", help="Write a PNG of box height vs. bottom row with the fitted lines.")
    ] = None,
) -> None:
    """Fit the ground-plane model from the labels: horizon row and each class's height / camera height.

    Box height = (H / h_cam) x (bottom row - horizon row) for a level camera (Hoiem et al., 2006).

    Example: rarefill ground seed_scenes/train.json --plot ground.png
    """
    from .dataset import load_dataset
    from .geometry import fit_ground
    from .plots import save_ground_plot

    data = load_dataset(dataset, images, check_images=False)
    model = fit_ground(data)
    if plot is not None:
        save_ground_plot(data, model, plot)
    if as_json:
        typer.echo(json.dumps(model.to_dict(), indent=2))
        return
    camera = "unknown" if model.camera_height_m is None else f"{model.camera_height_m:.2f} m (from prior heights)"
    table = Table(title=f"{dataset}: horizon row {model.horizon_row:.1f}, camera height {camera}")
    for column in ("category", "H / h_cam", "spread (log sd)", "boxes used", "source"):
        table.add_column(column, justify="left" if column in ("category", "source") else "right")
    for name, c in model.classes.items():
        table.add_row(name, f"{c.height_ratio:.3f}", f"{c.spread:.3f}", str(c.n_boxes), c.source)
    _stdout().print(table)


@app.command("render-demo")
@reports_errors
def render_demo(
    ctx: typer.Context,
    out_dir: Annotated[Path, typer.Argument(help="Folder for {train,val,test}.json and images/.")],
    seed: Annotated[
        int | None, typer.Option("--seed", help="Set seed (default: the seed of the committed seed_scenes/).")
    ] = None,
    train: Annotated[int, typer.Option("--train", min=0, help="Number of train images.")] = 150,
    val: Annotated[int, typer.Option("--val", min=0, help="Number of val images.")] = 40,
    test: Annotated[int, typer.Option("--test", min=0, help="Number of test images.")] = 60,
) -> None:
    """Render the demo seed scenes (rural roads, known camera); bit-identical for the same seed.

    Example: rarefill render-demo seed_scenes
    """
    from .demo_world import DEFAULT_SEED, render_seed_set

    written = render_seed_set(
        out_dir, seed=DEFAULT_SEED if seed is None else seed, counts={"train": train, "val": val, "test": test}
    )
    for split, path in written.items():
        _stdout().print(f"{split}: {path}")
    _stdout().print(f"images and drivable masks: {out_dir / 'images'}")


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

    from .dataset import load_dataset
    from .errors import UsageError
    from .generator import fit

    if (minutes is None) == (steps is None):
        raise UsageError("give exactly one of --minutes and --steps")
    data = load_dataset(dataset, images)
    columns = (TextColumn("{task.description}"), BarColumn(), TextColumn("{task.fields[status]}"), TimeElapsedColumn())
    with Progress(*columns, console=_stderr()) as bar:
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
    _stdout().print(
        f"wrote {result.out_dir}: {result.steps_done} steps{resumed}, "
        f"{result.seconds / 60:.1f} min, final loss {result.final_loss:.4f}"
    )


def _parse_shard(text: str) -> tuple[int, int]:
    from .errors import UsageError

    try:
        index, count = (int(v) for v in text.split("/"))
    except ValueError:
        raise UsageError(f"--shard must look like i/N (e.g. 0/4), got {text!r}") from None
    if count < 1 or not 0 <= index < count:
        raise UsageError(f"--shard i/N needs 0 <= i < N, got {text!r}")
    return index, count


def _print_run_summary(summary) -> None:
    out = _stdout()
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

    from .runner import run_recipe

    columns = (TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn())
    with Progress(*columns, console=_stderr(), transient=False) as bar:
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
        str, typer.Option("--shard", help="Run slice i of N of the plan, e.g. 0/4 (see the README for schedulers).")
    ] = "0/1",
) -> None:
    """Make synthetic images from a recipe: place, generate, judge, write labels with provenance.

    Output: labels.json (COCO), images/, manifest.jsonl (every candidate and its verdicts), rejects/.
    A run that is stopped (even killed) continues where it stopped when started again the same way.

    Example: rarefill run recipes/more-tractors.toml --limit 16
    """
    from .recipe import load_recipe

    recipe = load_recipe(recipe_file)
    if out is not None:
        recipe = recipe.with_output(out)
    if limit is not None:
        recipe = recipe.with_limit(limit)
    summary = _run_with_progress(recipe, workers=workers, shard=_parse_shard(shard))
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
    from .collect import collect as collect_shards

    counts = collect_shards(shards, out)
    _stdout().print(f"collected {counts['accepted']} images from {len(shards)} shards into {out / 'labels.json'}")


def _print_merge_summary(summary) -> None:
    out = _stdout()
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
            help="relative: file_name points at the original files; copy / link: into <out stem>_images/.",
        ),
    ] = "relative",
    seed: Annotated[int, typer.Option("--seed", help="Seeds which synthetic images are chosen.")] = 0,
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON instead of a table.")] = False,
) -> None:
    """Mix real and synthetic images at a chosen ratio into one COCO file, never leaking held-out images.

    All real images are kept. Synthetic images made from an image of a --guard split (same file hash,
    or same id and file name) are always left out and counted. Give --synthetic-share or --rare-target.

    Example: rarefill merge seed_scenes/train.json --synthetic outputs/more-tractors
    --guard seed_scenes/val.json --guard seed_scenes/test.json --synthetic-share 0.3 --out merged/train.json
    """
    from .merge import merge, parse_caps

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
    from .dataset import load_dataset
    from .errors import UsageError
    from .report import write_report

    if real_images is not None and real is None:
        raise UsageError("--real-images needs --real (the data set whose images they are)")
    data = load_dataset(real, real_images, check_images=False) if real is not None else None
    result = write_report(run_dir, real=data, page_size=page_size)
    f = result.funnel
    _stdout().print(f"{f.accepted} accepted, {f.rejected} rejected of {f.attempted} candidates; {result.ground_note}")
    _stdout().print(f"wrote {result.path} ({result.pages} page(s), {result.thumbnails_made} new thumbnails)")


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
    from .demo import demo_recipe

    recipe = demo_recipe()
    if out is not None:
        recipe = recipe.with_output(out)
    summary = _run_with_progress(recipe, workers=workers, shard=(0, 1))
    _print_run_summary(summary)
    _stdout().print(f"images:   {summary.output / 'images'}")
    _stdout().print(f"look at it: rarefill report {summary.output}")


@app.command()
@reports_errors
def probe(
    ctx: typer.Context,
    real: Annotated[Path, typer.Option("--real", metavar="TRAIN.json", help="COCO file of the real training split.")],
    test: Annotated[Path, typer.Option("--test", metavar="TEST.json", help="Real held-out split to score on.")],
    synthetic: Annotated[
        list[Path], typer.Option("--synthetic", metavar="RUN_DIR", help="A run folder of `rarefill run` (repeat).")
    ],
    out: Annotated[Path, typer.Option("--out", help="Folder for results.md/json, rare_ap50.png, sets/, runs/.")],
    guard: Annotated[
        list[Path] | None,
        typer.Option("--guard", metavar="HELDOUT.json", help="Another held-out split to keep out (repeat)."),
    ] = None,
    unfiltered: Annotated[
        Path | None,
        typer.Option("--unfiltered", metavar="RUN_DIR", help="Control: a run made with permissive filter limits."),
    ] = None,
    shares: Annotated[str, typer.Option("--shares", help="Synthetic shares to try; 0 is real only.")] = "0,0.25,0.5",
    seeds: Annotated[int, typer.Option("--seeds", min=1, help="Repeats (seeds 0..N-1) per condition.")] = 3,
    epochs: Annotated[
        float | None, typer.Option("--epochs", help="Steps per model = epochs x real images / batch size.")
    ] = None,
    minutes: Annotated[
        float | None, typer.Option("--minutes", help="Training wall time per model (timed once into steps).")
    ] = None,
    input_scale: Annotated[
        float, typer.Option("--input-scale", help="Scale images by this before the detector, (0, 1].")
    ] = 0.5,
    batch_size: Annotated[int, typer.Option("--batch-size", min=1, help="Images per training step.")] = 8,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Models trained side by side (processes).")] = 1,
    threads: Annotated[
        int | None, typer.Option("--threads", min=1, help="Torch threads per model (default: cores / workers).")
    ] = None,
) -> None:
    """Does the synthetic data help a detector on real held-out data? Train a compact CenterNet per
    condition and seed, score it with COCOeval on --test, and compare rare-class AP50.

    Conditions: real only; real + --synthetic at each share; real + --unfiltered at each share.

    Example: rarefill probe --real seed_scenes/train.json --test seed_scenes/test.json
    --guard seed_scenes/val.json --synthetic outputs/more-tractors --synthetic outputs/more-trailers
    --unfiltered outputs/demo-unfiltered --epochs 30 --out outputs/probe
    """
    from .errors import UsageError
    from .probe import TrainSettings, run_probe, write_results
    from .probe.experiment import parse_shares

    if not 0 < input_scale <= 1:
        raise UsageError(f"--input-scale must be in (0, 1], got {input_scale:g}")
    err = _stderr()
    result = run_probe(
        real,
        test_json=test,
        guards=guard or [],
        synthetic=synthetic,
        out=out,
        unfiltered=unfiltered,
        shares=parse_shares(shares),
        seeds=seeds,
        epochs=epochs,
        minutes=minutes,
        settings=TrainSettings(steps=1, batch_size=batch_size, input_scale=input_scale),
        workers=workers,
        threads=threads,
        progress=lambda line: err.print(line, markup=False),
    )
    paths = write_results(result, out)
    _stdout().print(paths["markdown"].read_text(encoding="utf-8"), markup=False)
    _stdout().print(f"wrote {paths['markdown']}, {paths['json']} and {paths['plot']}")
