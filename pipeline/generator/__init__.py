"""The generator: train an inpainting diffusion model on CPU (``fit``), load one (``load``), inpaint.

``load(folder)`` dispatches on what the folder holds: a model written by ``rarefill fit``
(``rarefill_model.json``) or a user's local diffusers inpainting pipeline (``model_index.json``, with a
text prompt per class, see :mod:`.external`). Both follow the :class:`Generator` protocol. Only this package calls
``from_pretrained``/``save_pretrained``; nothing here touches the network.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

from ..errors import ModelError
from .model import METADATA, MODEL_INDEX
from .progress import FitProgress
from .request import BACKGROUND, Generator, InpaintRequest
from .sample import DiffusionGenerator, load_trained
from .train import FitResult, fit

__all__ = [
    "BACKGROUND",
    "DiffusionGenerator",
    "FitProgress",
    "FitResult",
    "Generator",
    "InpaintRequest",
    "fit",
    "load",
]


def load(folder: str | os.PathLike[str], *, prompts: Mapping[str, str] | None = None) -> Generator:
    """Load a generator from a local folder (never the network).

    Parameters
    ----------
    folder : path
        A folder written by ``rarefill fit``, or a diffusers inpainting pipeline folder.
    prompts : mapping of str -> str, optional
        Text prompt per class name (and optionally ``"background"``); required for a pipeline folder,
        not allowed for our own model (its classes are fixed by training).

    Raises
    ------
    ModelError
        The folder is missing, incomplete or of an unknown kind (the message names the folder and what
        is missing).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise ModelError(f"{folder}: model folder not found")
    if (folder / METADATA).is_file() or (folder / "unet").is_dir() and not (folder / MODEL_INDEX).is_file():
        if prompts:
            raise ModelError(f"{folder}: prompts are for diffusers pipeline folders; this model's classes are fixed")
        return load_trained(folder)
    if (folder / MODEL_INDEX).is_file():
        # Imported here: the Stable Diffusion pipeline pulls in transformers, seconds of start-up that
        # users of our own model should not pay.
        from .external import load_pipeline

        return load_pipeline(folder, prompts)
    raise ModelError(
        f"{folder}: not a model folder: neither {METADATA} (a `rarefill fit` model) nor {MODEL_INDEX} "
        "(a diffusers inpainting pipeline) is there"
    )
