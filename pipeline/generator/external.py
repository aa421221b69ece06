"""Bring your own model: a user's local diffusers inpainting pipeline folder, prompted per class."""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
from diffusers import StableDiffusionInpaintPipeline
from PIL import Image

from ..errors import ModelError
from .model import model_loading_options
from .request import BACKGROUND, InpaintRequest, check_request
from .sample import folder_sha256
from .windows import context_window, crop_window, paste_window, window_mask


class PipelineGenerator:
    """A Stable-Diffusion-style inpainting pipeline behind the ``Generator`` protocol.

    Each request's context window is resized to the pipeline's native size, inpainted with the
    prompt of its label, resized back and blended inside the mask, exactly as for our own model.

    Parameters
    ----------
    pipeline : StableDiffusionInpaintPipeline
    prompts : mapping of str -> str
        Text prompt per class name; the key ``"background"`` (optional) is the prompt for plain scene.
    folder : Path or None
        Where the pipeline was loaded from (hashed lazily for :meth:`info`).
    """

    accepts_exemplar = False

    def __init__(
        self, pipeline: StableDiffusionInpaintPipeline, prompts: Mapping[str, str], *, folder: Path | None = None
    ) -> None:
        for name, prompt in prompts.items():
            if not isinstance(name, str) or not isinstance(prompt, str) or not prompt.strip():
                raise ValueError(f"prompts must map class names to non-empty strings, got {name!r}: {prompt!r}")
        self.pipeline = pipeline
        self.prompts = dict(prompts)
        self.classes = tuple(name for name in prompts if name != BACKGROUND)
        self.window = int(pipeline.unet.config.sample_size * pipeline.vae_scale_factor)
        self.folder = folder
        self._hash: str | None = None

    def info(self) -> dict[str, Any]:
        """Provenance: kind, folder, sha256 of every file in it, classes, window size and prompts."""
        if self._hash is None and self.folder is not None:
            files = [p.relative_to(self.folder).as_posix() for p in self.folder.rglob("*") if p.is_file()]
            self._hash = folder_sha256(self.folder, files)
        return {
            "kind": "diffusers-inpaint-pipeline",
            # The folder's name, not its path: provenance must not change with where a clone lives.
            "folder": self.folder.name if self.folder else None,
            "folder_sha256": self._hash,
            "classes": list(self.classes),
            "window": self.window,
            "prompts": dict(self.prompts),
        }

    def inpaint(
        self,
        requests: Sequence[InpaintRequest],
        *,
        steps: int = 20,
        guidance: float = 1.0,
        batch_size: int = 4,
        feather_px: float = 2.0,
    ) -> list[np.ndarray]:
        """Inpaint each request with its class's prompt (see ``DiffusionGenerator.inpaint``).

        ``guidance`` is the pipeline's ``guidance_scale`` (1 = no classifier-free guidance).
        """
        # 1. check inputs
        if not isinstance(steps, int) or steps < 1:
            raise ValueError(f"steps must be an integer >= 1, got {steps!r}")
        if not guidance >= 1.0:
            raise ValueError(f"guidance must be >= 1, got {guidance!r}")
        for i, request in enumerate(requests):
            check_request(request, i, self.classes)
            if request.label not in self.prompts:
                raise ValueError(
                    f"requests[{i}].label {request.label!r} has no prompt (prompts: {sorted(self.prompts)})"
                )

        results: list[np.ndarray] = []
        windows = [context_window(r.box, r.image.shape[:2]) for r in requests]
        for start in range(0, len(requests), batch_size):
            chunk = list(range(start, min(start + batch_size, len(requests))))
            # 2. crop the windows at the pipeline's size
            images = [Image.fromarray(crop_window(requests[i].image, windows[i], self.window)) for i in chunk]
            masks = [
                Image.fromarray(window_mask(requests[i].mask, windows[i], self.window).astype(np.uint8) * 255)
                for i in chunk
            ]
            # 3. inpaint; one torch.Generator per request keeps each result independent of its batch
            output = self.pipeline(
                prompt=[self.prompts[requests[i].label] for i in chunk],
                image=images,
                mask_image=masks,
                height=self.window,
                width=self.window,
                num_inference_steps=steps,
                guidance_scale=guidance,
                generator=[torch.Generator().manual_seed(int(requests[i].seed)) for i in chunk],
                output_type="np",
            )
            patches = np.clip(np.rint(np.asarray(output.images) * 255.0), 0, 255).astype(np.uint8)
            # 4. blend back inside the masks
            for j, i in enumerate(chunk):
                results.append(
                    paste_window(requests[i].image, requests[i].mask, windows[i], patches[j], feather_px=feather_px)
                )
        return results


def load_pipeline(folder: str | os.PathLike[str], prompts: Mapping[str, str] | None) -> PipelineGenerator:
    """Load a local diffusers inpainting pipeline folder (``model_index.json`` + components), offline.

    Raises
    ------
    ModelError
        No prompts were given, or the pipeline cannot be loaded from local files.
    """
    folder = Path(folder)
    if not prompts:
        raise ModelError(
            f"{folder}: a diffusers pipeline folder needs a text prompt per class",
            hint="give prompts, e.g. {'tractor': 'a farm tractor on a rural road'}",
        )
    try:
        pipeline = StableDiffusionInpaintPipeline.from_pretrained(folder, **model_loading_options())
    except (OSError, ValueError, TypeError, RuntimeError, KeyError) as exc:
        raise ModelError(f"{folder}: diffusers inpainting pipeline cannot be loaded ({exc})") from None
    if pipeline.unet.config.in_channels != 9:
        raise ModelError(
            f"{folder}: unet/config.json: in_channels is {pipeline.unet.config.in_channels}, an inpainting "
            "UNet takes 9 (latents 4 + masked-image latents 4 + mask 1)"
        )
    pipeline.set_progress_bar_config(disable=True)
    try:
        return PipelineGenerator(pipeline, prompts, folder=folder)
    except ValueError as exc:
        raise ModelError(f"{folder}: {exc}") from None
