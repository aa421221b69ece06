"""Sampling from our own trained denoiser: load a ``rarefill fit`` folder and inpaint batches of windows."""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch
from diffusers import DDPMScheduler, UNet2DModel

from ..errors import ModelError
from .model import FORMAT, FORMAT_VERSION, METADATA, NULL_LABEL, model_loading_options, sampling_scheduler
from .request import InpaintRequest, check_request
from .windows import context_window, crop_window, paste_window, window_mask

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
        The denoiser (7 input channels, class embeddings indexed by ``labels``).
    train_scheduler_config : dict
        Config of the training noise schedule; sampling runs DPM-Solver++ on it.
    labels : sequence of str
        Class-embedding index -> label (index 0 is the null label).
    classes : sequence of str
        Object classes it can draw.
    folder : Path or None
        Where it was loaded from; ``folder_hash`` is the sha256 of its weights and configs.
    use_bf16 : bool
        Run the UNet under bfloat16 autocast (faster on CPUs with native bf16).
    """

    accepts_exemplar = False

    def __init__(
        self,
        unet: UNet2DModel,
        train_scheduler_config: dict,
        *,
        labels: Sequence[str],
        classes: Sequence[str],
        folder: Path | None = None,
        folder_hash: str | None = None,
        use_bf16: bool = True,
    ) -> None:
        self.unet = unet.eval().requires_grad_(False)
        self.train_scheduler_config = dict(train_scheduler_config)
        self.labels = tuple(labels)
        self.classes = tuple(classes)
        self.window = int(unet.config.sample_size)
        self.folder = folder
        self.folder_hash = folder_hash
        self.use_bf16 = use_bf16

    def info(self) -> dict[str, Any]:
        """Provenance of this generator."""
        return {
            "kind": FORMAT,
            # The folder's name, not its path: provenance must not change with where a clone lives.
            "folder": self.folder.name if self.folder else None,
            "folder_sha256": self.folder_hash,
            "classes": list(self.classes),
            "window": self.window,
        }

    def inpaint(
        self,
        requests: Sequence[InpaintRequest],
        *,
        steps: int = 20,
        guidance: float = 1.0,
        batch_size: int = 16,
        feather_px: float = 2.0,
    ) -> list[np.ndarray]:
        """Inpaint each request's masked pixels with its label; windows are denoised in batches.

        Parameters
        ----------
        requests : sequence of InpaintRequest
        steps : int
            DPM-Solver++ steps (10-20 is enough).
        guidance : float
            Classifier-free guidance scale; 1 means the conditional model alone (one pass per step).
        batch_size : int
            Windows per UNet call.
        feather_px : float
            Width of the alpha ramp inside the mask's edge.

        Returns
        -------
        list of (H, W, 3) uint8 ndarray
            One full frame per request; pixels outside ``request.mask`` are bit-identical to the input.
        """
        # 1. check inputs
        if not isinstance(steps, int) or steps < 1:
            raise ValueError(f"steps must be an integer >= 1, got {steps!r}")
        if not guidance >= 1.0:
            raise ValueError(f"guidance must be >= 1, got {guidance!r}")
        if batch_size < 1:
            raise ValueError(f"batch_size must be >= 1, got {batch_size}")
        for i, request in enumerate(requests):
            check_request(request, i, self.classes)

        # 2. crop the context windows
        windows = [context_window(r.box, r.image.shape[:2]) for r in requests]
        results: list[np.ndarray] = []
        for start in range(0, len(requests), batch_size):
            chunk = list(range(start, min(start + batch_size, len(requests))))
            known = np.stack([crop_window(requests[i].image, windows[i], self.window) for i in chunk])
            masks = np.stack([window_mask(requests[i].mask, windows[i], self.window) for i in chunk])
            labels = [self.labels.index(requests[i].label) for i in chunk]
            seeds = [int(requests[i].seed) for i in chunk]
            # 3. denoise
            patches = self._denoise(known, masks, labels, seeds, steps=steps, guidance=guidance)
            # 4. blend back inside the masks
            for j, i in enumerate(chunk):
                results.append(
                    paste_window(requests[i].image, requests[i].mask, windows[i], patches[j], feather_px=feather_px)
                )
        return results

    @torch.no_grad()
    def _denoise(
        self, known: np.ndarray, masks: np.ndarray, labels: list[int], seeds: list[int], *, steps: int, guidance: float
    ) -> np.ndarray:
        size = self.window
        image = torch.from_numpy(np.ascontiguousarray(known.transpose(0, 3, 1, 2))).float() / 127.5 - 1.0
        mask = torch.from_numpy(masks[:, None].astype(np.float32))
        condition = torch.cat([image * (1 - mask), mask], dim=1)
        # Each request's noise comes from its own seed, so its result does not depend on its batch-mates.
        x = torch.stack([torch.randn((3, size, size), generator=torch.Generator().manual_seed(s)) for s in seeds])
        class_ids = torch.tensor(labels, dtype=torch.long)
        if guidance != 1.0:
            condition = torch.cat([condition, condition])
            class_ids = torch.cat([class_ids, torch.full_like(class_ids, NULL_LABEL)])
        scheduler = sampling_scheduler(self.train_scheduler_config)
        scheduler.set_timesteps(steps)
        x = x * scheduler.init_noise_sigma
        for t in scheduler.timesteps:
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


def load_trained(folder: str | os.PathLike[str], *, use_bf16: bool = True) -> DiffusionGenerator:
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
