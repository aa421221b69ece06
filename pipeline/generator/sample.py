"""Sampling from our own trained denoiser: load a ``rarefill fit`` folder and inpaint batches of windows.

A request that carries an exemplar starts, by default, from the window of its exemplar frame noised to a
part ``strength`` of the schedule (SDEdit), not from pure noise: the exemplar already holds the object's
shape and most of its colour, so a few solver steps suffice to fit it to the scene.

References
----------
Meng et al., "SDEdit: Guided Image Synthesis and Editing with Stochastic Differential Equations", ICLR 2022.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import cv2
import numpy as np
import torch
from diffusers import DDPMScheduler, UNet2DModel

from ..errors import ModelError
from .exemplar import EXEMPLAR_IN_CHANNELS, PLAIN_IN_CHANNELS, conditioning
from .model import FORMAT, FORMAT_VERSION, METADATA, NULL_LABEL, model_loading_options, native_bf16, sampling_scheduler
from .request import InpaintRequest, check_request
from .windows import Window, context_window, crop_window, paste_window, window_mask

EXEMPLAR_STRENGTH = 0.5
"""Default share of the noise schedule an exemplar request is noised to before denoising (1 = pure noise)."""

_REQUIRED = (
    "rarefill_model.json",
    "unet/config.json",
    "unet/diffusion_pytorch_model.safetensors",
    "scheduler/scheduler_config.json",
)


class DiffusionGenerator:
    """Our class-conditional inpainting denoiser behind the ``Generator`` protocol.

    Parameters
    ----------
    unet : UNet2DModel
        The denoiser (7 input channels, or 11 with exemplar channels; class embeddings indexed by
        ``labels``). ``accepts_exemplar`` is true for an 11-channel one.
    train_scheduler_config : dict
        Config of the training noise schedule; sampling runs DPM-Solver++ on it.
    labels : sequence of str
        Class-embedding index -> label (index 0 is the null label).
    classes : sequence of str
        Object classes it can draw.
    folder : Path or None
        Where it was loaded from; ``folder_hash`` is the sha256 of its weights and configs.
    use_bf16 : bool or None
        Run the UNet under bfloat16 autocast; None (the default) does so only on a CPU with native bf16,
        where it is faster (elsewhere it is many times slower than float32).
    """

    def __init__(
        self,
        unet: UNet2DModel,
        train_scheduler_config: dict,
        *,
        labels: Sequence[str],
        classes: Sequence[str],
        folder: Path | None = None,
        folder_hash: str | None = None,
        use_bf16: bool | None = None,
    ) -> None:
        self.unet = unet.eval().requires_grad_(False)
        self.train_scheduler_config = dict(train_scheduler_config)
        self.labels = tuple(labels)
        self.classes = tuple(classes)
        self.window = int(unet.config.sample_size)
        self.folder = folder
        self.folder_hash = folder_hash
        self.use_bf16 = native_bf16() if use_bf16 is None else bool(use_bf16)
        channels = int(unet.config.in_channels)
        if channels not in (PLAIN_IN_CHANNELS, EXEMPLAR_IN_CHANNELS):
            raise ValueError(
                f"unet has {channels} input channels; expected {PLAIN_IN_CHANNELS} or {EXEMPLAR_IN_CHANNELS}"
            )
        self.accepts_exemplar = channels == EXEMPLAR_IN_CHANNELS

    def info(self) -> dict[str, Any]:
        """Provenance of this generator."""
        return {
            "kind": FORMAT,
            # The folder's name, not its path: provenance must not change with where a clone lives.
            "folder": self.folder.name if self.folder else None,
            "folder_sha256": self.folder_hash,
            "classes": list(self.classes),
            "window": self.window,
            "accepts_exemplar": self.accepts_exemplar,
        }

    def inpaint(
        self,
        requests: Sequence[InpaintRequest],
        *,
        steps: int = 20,
        guidance: float = 1.0,
        batch_size: int = 16,
        feather_px: float = 2.0,
        strength: float = EXEMPLAR_STRENGTH,
    ) -> list[np.ndarray]:
        """Inpaint each request's masked pixels with its label; windows are denoised in batches.

        Parameters
        ----------
        requests : sequence of InpaintRequest
            A request may carry an exemplar when ``accepts_exemplar`` is true; its ``box`` should be
            its mask's bounding box (the window is about twice that, as in training).
        steps : int
            DPM-Solver++ steps actually run per window (10-20 from noise; 4-8 from an exemplar).
        guidance : float
            Classifier-free guidance scale; 1 means the conditional model alone (one pass per step).
        batch_size : int
            Windows per UNet call.
        feather_px : float
            Width of the alpha ramp inside the mask's edge.
        strength : float in (0, 1]
            Exemplar requests only: the denoising starts from the exemplar window noised to this share
            of the schedule (``steps`` solver steps over the last ``strength`` of a schedule of
            ``ceil(steps / strength)``); 1 starts from pure noise. Requests without an exemplar always
            start from pure noise.

        Returns
        -------
        list of (H, W, 3) uint8 ndarray
            One full frame per request; pixels outside ``request.mask`` are bit-identical to the input.
            Each depends only on its own request (seeded noise), not on its batch-mates.
        """
        # 1. check inputs
        if not isinstance(steps, int) or steps < 1:
            raise ValueError(f"steps must be an integer >= 1, got {steps!r}")
        if not guidance >= 1.0:
            raise ValueError(f"guidance must be >= 1, got {guidance!r}")
        if batch_size < 1:
            raise ValueError(f"batch_size must be >= 1, got {batch_size}")
        if not 0.0 < strength <= 1.0:
            raise ValueError(f"strength must lie in (0, 1], got {strength!r}")
        for i, request in enumerate(requests):
            if request.exemplar is not None and not self.accepts_exemplar:
                name = self.folder.name if self.folder else "this model"
                raise ValueError(
                    f"requests[{i}].exemplar: {name} has no exemplar channels (a 7-channel model); "
                    "retrain it with `rarefill fit`, or ask for appearance 'generated'"
                )
            check_request(request, i, self.classes, accepts_exemplar=self.accepts_exemplar)

        # 2. windows; exemplar requests and plain ones follow different schedules, so they batch apart
        windows = [context_window(r.box, r.image.shape[:2]) for r in requests]
        results: list[np.ndarray | None] = [None] * len(requests)
        groups = (
            [i for i, r in enumerate(requests) if r.exemplar is None],
            [i for i, r in enumerate(requests) if r.exemplar is not None],
        )
        for group, group_strength in zip(groups, (1.0, strength), strict=True):
            for start in range(0, len(group), batch_size):
                chunk = group[start : start + batch_size]
                # 3. denoise
                patches = self._denoise(
                    [requests[i] for i in chunk],
                    [windows[i] for i in chunk],
                    steps=steps,
                    guidance=guidance,
                    strength=group_strength,
                )
                # 4. blend back inside the masks
                for j, i in enumerate(chunk):
                    results[i] = paste_window(
                        requests[i].image, requests[i].mask, windows[i], patches[j], feather_px=feather_px
                    )
        return results

    def _inputs(self, requests: Sequence[InpaintRequest], windows: Sequence[Window]):
        """Model-size tensors of a chunk: known window, mask, exemplar window and alpha (zeros if none)."""
        size = self.window

        def tensor(arrays: list[np.ndarray]) -> torch.Tensor:
            return torch.from_numpy(np.ascontiguousarray(np.stack(arrays).transpose(0, 3, 1, 2)))

        known = tensor([crop_window(r.image, w, size) for r, w in zip(requests, windows, strict=True)])
        masks = np.stack([window_mask(r.mask, w, size) for r, w in zip(requests, windows, strict=True)])
        mask = torch.from_numpy(masks[:, None].astype(np.float32))
        known = known.float() / 127.5 - 1.0
        if not self.accepts_exemplar:
            return known, mask, None, None
        shown = tensor(
            [
                crop_window(r.image if r.exemplar is None else r.exemplar, w, size)
                for r, w in zip(requests, windows, strict=True)
            ]
        )
        alphas = [
            np.zeros((size, size), np.float32)
            if r.exemplar_alpha is None
            else crop_window(r.exemplar_alpha, w, size, border=cv2.BORDER_CONSTANT)
            for r, w in zip(requests, windows, strict=True)
        ]
        alpha = torch.from_numpy(np.stack(alphas)[:, None])
        return known, mask, shown.float() / 127.5 - 1.0, alpha

    @torch.no_grad()
    def _denoise(
        self,
        requests: Sequence[InpaintRequest],
        windows: Sequence[Window],
        *,
        steps: int,
        guidance: float,
        strength: float,
    ) -> np.ndarray:
        size = self.window
        known, mask, shown, alpha = self._inputs(requests, windows)
        condition = conditioning(known, mask, shown, alpha) if self.accepts_exemplar else conditioning(known, mask)
        # Each request's noise comes from its own seed, so its result does not depend on its batch-mates.
        noise = torch.stack(
            [torch.randn((3, size, size), generator=torch.Generator().manual_seed(int(r.seed))) for r in requests]
        )
        class_ids = torch.tensor([self.labels.index(r.label) for r in requests], dtype=torch.long)
        if guidance != 1.0:
            condition = torch.cat([condition, condition])
            class_ids = torch.cat([class_ids, torch.full_like(class_ids, NULL_LABEL)])
        scheduler = sampling_scheduler(self.train_scheduler_config)
        if strength < 1.0:
            total = max(steps, math.ceil(steps / strength))
            scheduler.set_timesteps(total)
            scheduler.set_begin_index(total - steps)
            timesteps = scheduler.timesteps[total - steps :]
            # Outside the exemplar's window the start is the known scene (the model's output there is not used).
            x = scheduler.add_noise(shown, noise, timesteps[:1])
        else:
            scheduler.set_timesteps(steps)
            timesteps = scheduler.timesteps
            x = noise * scheduler.init_noise_sigma
        for t in timesteps:
            model_x = scheduler.scale_model_input(x, t)
            if guidance != 1.0:
                model_x = torch.cat([model_x, model_x])
            with torch.autocast("cpu", dtype=torch.bfloat16, enabled=self.use_bf16):
                v = self.unet(torch.cat([model_x, condition], dim=1), t, class_labels=class_ids).sample.float()
            if guidance != 1.0:
                v_cond, v_null = v.chunk(2)
                v = v_null + guidance * (v_cond - v_null)
            x = scheduler.step(v, t, x).prev_sample
        pixels = ((x.clamp(-1, 1) + 1) * 127.5).round().to(torch.uint8)
        return pixels.permute(0, 2, 3, 1).numpy()


def folder_sha256(folder: Path, files: Sequence[str]) -> str:
    """sha256 over the relative path and bytes of each of ``files`` (sorted) in ``folder``."""
    digest = hashlib.sha256()
    for name in sorted(files):
        digest.update(name.encode("utf-8") + b"\0")
        digest.update(hashlib.sha256((folder / name).read_bytes()).digest())
    return digest.hexdigest()


def load_trained(folder: str | os.PathLike[str], *, use_bf16: bool | None = None) -> DiffusionGenerator:
    """Load a folder written by ``fit`` from local files only.

    Raises
    ------
    ModelError
        A required file is missing, or the metadata or weights cannot be read.
    """
    folder = Path(folder)
    missing = [name for name in _REQUIRED if not (folder / name).is_file()]
    if missing:
        raise ModelError(f"{folder}: incomplete model folder, missing {', '.join(missing)}")
    try:
        meta = json.loads((folder / METADATA).read_text(encoding="utf-8"))
        labels, classes = meta["labels"], meta["classes"]
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ModelError(f"{folder}: {METADATA} cannot be read ({exc})") from None
    if meta.get("format") != FORMAT or meta.get("format_version") != FORMAT_VERSION:
        raise ModelError(
            f"{folder}: {METADATA}: unknown format {meta.get('format')!r} version {meta.get('format_version')!r}"
        )
    try:
        unet = UNet2DModel.from_pretrained(folder / "unet", **model_loading_options())
        scheduler = DDPMScheduler.from_pretrained(folder / "scheduler", local_files_only=True)
    except (OSError, ValueError, RuntimeError) as exc:
        raise ModelError(f"{folder}: weights cannot be loaded ({exc})") from None
    if unet.config.num_class_embeds != len(labels):
        raise ModelError(
            f"{folder}: unet has {unet.config.num_class_embeds} class embeddings, metadata {len(labels)} labels"
        )
    return DiffusionGenerator(
        unet,
        dict(scheduler.config),
        labels=labels,
        classes=classes,
        folder=folder,
        folder_hash=folder_sha256(folder, _REQUIRED),
        use_bf16=use_bf16,
    )
