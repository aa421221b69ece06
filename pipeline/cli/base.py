"""The shared parts of the `rarefill` command line: the Typer app, error reporting, common options.

No logic lives in the CLI. Library errors (pipeline.errors) become one line on stderr plus a hint, with exit
code 2 for bad input and 1 for other failures; `--debug` shows the traceback instead.
"""

from __future__ import annotations

import functools
import traceback
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, TypeVar

import typer
from rich.console import Console

from .. import __version__
from ..errors import EXIT_FAILURE, RarefillError

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


def stdout() -> Console:
    return Console(highlight=False)


def stderr() -> Console:
    return Console(stderr=True, highlight=False, soft_wrap=True)


def reports_errors(command: F) -> F:
    """Turn library errors into one line plus a hint, and warnings into `warning:` lines on stderr.

    The command must take ``ctx: typer.Context`` (keyword) so the global ``--debug`` flag reaches it.
    """

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        debug = bool((kwargs["ctx"].obj or {}).get("debug"))
        err = stderr()
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
            except (typer.Exit, typer.Abort):
                raise  # a command's own exit code (e.g. 3 for a run that finished short)
            except KeyboardInterrupt:
                err.print("interrupted", markup=False)
                raise typer.Exit(130) from None
            except Exception as exc:  # a bug, not a user error: say so and how to see more
                if debug:
                    raise
                err.print(f"error: internal failure: {type(exc).__name__}: {exc}", markup=False)
                err.print("hint: run again with --debug for the traceback and report it", markup=False)
                raise typer.Exit(EXIT_FAILURE) from None
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
