"""The library's exception and warning types.

Every error a user can cause derives from :class:`RarefillError` and carries a one-line message that
names the file, the field and the reason, plus a hint on what to do. The CLI prints both and exits with
``exit_code``; the library never imports typer.

Exit codes of every `rarefill` command, defined here once: :data:`EXIT_BAD_INPUT`, :data:`EXIT_FAILURE`,
:data:`EXIT_SHORT` (and 0 for success).
"""

from __future__ import annotations

EXIT_FAILURE = 1
"""Anything else went wrong: the run cannot continue, an internal failure."""
EXIT_BAD_INPUT = 2
"""Bad input: a recipe, data set, model folder, option, run folder or shard that is missing or invalid."""
EXIT_SHORT = 3
"""`rarefill run` and `demo` finished, but a stage accepted fewer outputs than wanted (0 with --allow-short)."""


class RarefillError(Exception):
    """Base class. ``exit_code`` is :data:`EXIT_BAD_INPUT` for bad input from the user, else :data:`EXIT_FAILURE`."""

    exit_code = EXIT_FAILURE
    hint = ""

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        super().__init__(message)
        if hint is not None:
            self.hint = hint


class DatasetError(RarefillError):
    """A COCO file or its images are not usable. The message reads ``file: json.path: reason``."""

    exit_code = EXIT_BAD_INPUT
    hint = "fix the named field in the data set (or its image) and run again"

    def __init__(self, file: object, path: str, reason: str, *, hint: str | None = None) -> None:
        self.file = str(file)
        self.path = path
        self.reason = reason
        where = f"{self.file}: {path}" if path else self.file
        super().__init__(f"{where}: {reason}", hint=hint)


class RecipeError(RarefillError):
    """A recipe file is not valid. The message reads ``file: key.path: reason``."""

    exit_code = EXIT_BAD_INPUT
    hint = "fix the named key in the recipe; see recipes/README.md for every key and its range"

    def __init__(self, file: object, key: str, reason: str, *, hint: str | None = None) -> None:
        self.file = str(file)
        self.key = key
        self.reason = reason
        where = f"{self.file}: {key}" if key else self.file
        super().__init__(f"{where}: {reason}", hint=hint)


class UsageError(RarefillError):
    """A command-line value is out of range or contradicts another one."""

    exit_code = EXIT_BAD_INPUT
    hint = "run the command with --help to see what each option takes"


class ModelError(RarefillError):
    """A model folder is missing, incomplete or of an unknown kind."""

    exit_code = EXIT_BAD_INPUT
    hint = "train one with `rarefill fit` or point the recipe at a local diffusers folder"


class RunError(RarefillError):
    """A run cannot continue (output folder belongs to another recipe, shard outputs disagree, ...)."""

    exit_code = EXIT_FAILURE


class RunInputError(RunError):
    """A run folder or shard given as input is missing or is not a run folder: bad input, like a missing file."""

    exit_code = EXIT_BAD_INPUT


class ShardError(RarefillError):
    """The shard folders given to collect are not one whole, finished run; the message names the shard."""

    exit_code = 2
    hint = "give collect the folders of every shard of one run, each run to the end"


class DatasetWarning(UserWarning):
    """Something was accepted but changed or guessed (a clipped box, an estimated surface)."""
