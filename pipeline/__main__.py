"""`python -m pipeline ARGS` runs the `rarefill` command line (handy in a checkout without the console script)."""

from .cli import app

app(prog_name="rarefill")
