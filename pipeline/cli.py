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
