"""The `rarefill` command line: parse arguments, call the library, print results and errors.

Each module holds a few commands of one kind and registers them on the one Typer ``app`` of
:mod:`pipeline.cli.base`; importing them here is what makes them part of `rarefill`.
"""

# Imported in the order `rarefill --help` lists the commands: look, train, make, after.
from . import data, preview, model, runs, after_run, audit  # noqa: F401, I001  (registers the commands)
from .base import app

__all__ = ["app"]
