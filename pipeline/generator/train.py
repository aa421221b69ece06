"""Train the inpainting denoiser (and the object-present verifier) on a user's data set, on CPU.

The finished folder is a diffusers-format model::

    out_dir/
        unet/                 UNet2DModel.save_pretrained (EMA weights, safetensors)
        scheduler/            DDPMScheduler.save_pretrained (the training schedule)
        rarefill_model.json   what made it: classes, window, data hash, command, seed, steps, versions
        verifier.safetensors  the object-present classifier (see verifier.py) + verifier.json
        checkpoint.pt         optimiser state for resuming (not needed to sample; keep out of git)
"""

from __future__ import annotations

import copy
import json
import math
import os
import platform
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import cv2
import diffusers
import numpy as np
import torch

from .. import __version__
from ..dataset import Dataset
from ..errors import ModelError
from .batches import make_batch, object_silhouettes
from .examples import Examples, dataset_hash, load_examples
from .exemplar import conditioning
from .folder import CHECKPOINT, earlier_history, earlier_init, export, resume, save_checkpoint, verifier_matches
from .model import (
    FORMAT,
    FORMAT_VERSION,
    METADATA,
    NULL_LABEL,
    DenoiserConfig,
    build_unet,
    label_table,
    native_bf16,
    same_architecture,
    training_scheduler,
    widen_from,
)
from .progress import FitProgress
from .verifier import fit_verifier, save_verifier


@dataclass(frozen=True)
class TrainSettings:
    """Optimisation settings; the defaults are what trained the committed default model.

    ``mask_weight``/``outside_weight``: loss weight inside and outside the mask (the model only has to
    draw the masked part; the outside keeps some weight so the fill continues its surroundings).
    ``exemplar_share``: share of the object windows given an exemplar (the rest are drawn from the
    label alone, so one model serves both appearances); unused by a model without exemplar channels.
    ``use_bf16``: bfloat16 autocast; None (the default) uses it only on a CPU with native bf16.
    """

    learning_rate: float = 6e-4
    warmup_steps: int = 50
    ema_decay: float = 0.995
    drop_label: float = 0.1
    background_share: float = 0.2
    mask_margin: tuple[float, float] = (0.06, 0.18)
    mask_weight: float = 1.0
    outside_weight: float = 0.1
    checkpoint_every: int = 200
    verifier_steps: int = 1500
    use_bf16: bool | None = None
    exemplar_share: float = 0.6


@dataclass(frozen=True)
class FitResult:
    """What :func:`fit` did. ``steps_done`` counts all steps, including those of earlier (resumed) runs."""

    out_dir: Path
    steps_done: int
    seconds: float
    final_loss: float
    resumed_from: int


# --------------------------------------------------------------------------------------------------
# training


def fit(
    dataset: Dataset,
    *,
    out_dir: str | os.PathLike[str],
    steps: int | None = None,
    minutes: float | None = None,
    seed: int = 0,
    batch_size: int = 16,
    progress: Callable[[FitProgress], None] | None = None,
    config: DenoiserConfig | None = None,
    settings: TrainSettings | None = None,
    command: Sequence[str] | None = None,
    init: str | os.PathLike[str] | None = None,
) -> FitResult:
    """Train (or resume training) the inpainting denoiser and the verifier on ``dataset``.

    Parameters
    ----------
    dataset : Dataset
        Training split (load it with ``pipeline.dataset.load_dataset``).
    out_dir : path
        Model folder. If it holds a checkpoint of the same data, classes, size and seed, training
        resumes from it.
    steps : int, optional
        Train until this many steps in total (counting resumed ones). Exactly one of ``steps`` and
        ``minutes`` must be given.
    minutes : float, optional
        Wall-time budget of this call for both phases: the verifier first (when it must be trained),
        then the denoiser for what is left (a fresh one at least one step).
    seed : int
        Seeds the initial weights and every batch: batch ``k`` depends only on ``(seed, k)``.
    batch_size : int
        Windows per step (throughput on 2 cores falls above 16).
    progress : callable, optional
        Called with a :class:`FitProgress` after every step.
    config, settings : optional
        Model size and optimisation settings (defaults: :class:`DenoiserConfig`, :class:`TrainSettings`).
    command : sequence of str, optional
        The command line that started this, recorded in the metadata.
    init : path, optional
        Warm start: a model folder written by ``fit`` with the same classes and architecture (it may
        lack the exemplar channels; those then start at zero weight, see
        :func:`.model.widen_from`). Its name, hash, steps and command are recorded in the metadata.
        Ignored when resuming from a checkpoint (which already holds the warm-started weights).

    Returns
    -------
    FitResult

    Raises
    ------
    ValueError
        Bad ``steps``, ``minutes``, ``seed`` or ``batch_size``.
    ModelError
        ``out_dir`` holds a checkpoint of other data, classes, size, seed or start; ``init`` is not a
        usable model folder for these classes and this size.
    DatasetError
        The data set has no usable images or objects.

    References
    ----------
    Ho, Jain, Abbeel, "Denoising Diffusion Probabilistic Models", NeurIPS 2020; Ho & Salimans,
    "Classifier-Free Diffusion Guidance", 2021 (label dropped with p = 0.1).
    """
    # 1. check inputs
    _check_fit_inputs(steps=steps, minutes=minutes, seed=seed, batch_size=batch_size)
    config = config or DenoiserConfig()
    settings = settings or TrainSettings()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    # 2. data
    examples = load_examples(dataset)
    call = _FitCall(examples, dataset_hash(dataset), label_table(examples.classes), config, settings, seed, batch_size)

    # 3. model, optimiser, EMA: fresh or from the checkpoint
    model = _start_denoiser(call, out / CHECKPOINT, init)
    scheduler = training_scheduler()
    alphas = scheduler.alphas_cumprod.float()
    silhouettes = object_silhouettes(examples) if config.exemplar and settings.exemplar_share > 0 else None

    # 4. the verifier first (retrained only when missing or made from other data): a time budget covers
    #    both phases, so the denoiser trains for what the verifier leaves of it
    left = _verifier_first(call, out, minutes, progress)

    # 5. train the denoiser (a fresh one at least one step, so that the folder holds a trained model)
    seconds = _train_denoiser(
        model, call, out / CHECKPOINT, alphas, silhouettes, steps=steps, minutes=left, progress=progress
    )

    # 6. export the EMA weights as a diffusers folder, metadata last: it marks the folder complete
    budget = {"steps": steps, "minutes": minutes}
    metadata = _metadata(call, model, out / METADATA, dataset, budget=budget, command=command, seconds=seconds)
    export(out, model.ema, scheduler, metadata)
    return FitResult(out, model.step, seconds, model.loss, model.resumed_from)


@dataclass(frozen=True)
class _FitCall:
    """What one call of :func:`fit` trains on and with, checked."""

    examples: Examples
    data_hash: str
    labels: tuple[str, ...]
    config: DenoiserConfig
    settings: TrainSettings
    seed: int
    batch_size: int


@dataclass
class _Denoiser:
    """The denoiser in training: its weights, their EMA, the optimiser, and where training stands."""

    unet: torch.nn.Module
    ema: torch.nn.Module
    optimizer: torch.optim.Optimizer
    identity: dict
    """What a checkpoint must match to be resumed: data, labels, size, seed and warm start."""
    start: dict | None
    """What is recorded of the ``init`` folder of a warm start."""
    step: int
    loss: float
    seconds_before: float
    """Training seconds of the earlier (resumed) runs."""
    resumed_from: int


def _check_fit_inputs(*, steps: int | None, minutes: float | None, seed: int, batch_size: int) -> None:
    if (steps is None) == (minutes is None):
        raise ValueError(f"give exactly one of steps and minutes, got steps={steps}, minutes={minutes}")
    if steps is not None and (not isinstance(steps, int) or steps < 1):
        raise ValueError(f"steps must be an integer >= 1, got {steps!r}")
    if minutes is not None and not (math.isfinite(minutes) and minutes > 0):
        raise ValueError(f"minutes must be > 0, got {minutes!r}")
    if batch_size < 1:
        raise ValueError(f"batch_size must be >= 1, got {batch_size}")
    if not isinstance(seed, int) or seed < 0:
        raise ValueError(f"seed must be an integer >= 0, got {seed!r}")


def _start_denoiser(call: _FitCall, checkpoint: Path, init: str | os.PathLike[str] | None) -> _Denoiser:
    """A denoiser seeded by the call's seed (warm-started from ``init``), resumed from ``checkpoint`` if any."""
    config, labels, seed = call.config, call.labels, call.seed
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        unet = build_unet(config, len(labels))
    start = _warm_start(unet, Path(init), labels, config) if init is not None else None
    ema = copy.deepcopy(unet).requires_grad_(False)
    optimizer = torch.optim.AdamW(unet.parameters(), lr=call.settings.learning_rate, weight_decay=0.0)
    identity = {"data_hash": call.data_hash, "labels": list(labels), "config": config.to_dict(), "seed": seed}
    if start is not None:
        identity["init_sha256"] = start["sha256"]
    step, loss, seconds_before = resume(checkpoint, identity, unet, ema, optimizer)
    return _Denoiser(unet, ema, optimizer, identity, start, step, loss, seconds_before, resumed_from=step)


def _verifier_first(
    call: _FitCall, out: Path, minutes: float | None, progress: Callable[[FitProgress], None] | None
) -> float | None:
    """Train and save the verifier unless ``out`` holds one of this data; return what is left of ``minutes``."""
    started = time.monotonic()
    if not verifier_matches(out, call.data_hash):
        verifier = fit_verifier(call.examples, steps=call.settings.verifier_steps, rng=call.seed, progress=progress)
        save_verifier(verifier, out, data_hash=call.data_hash)
    return None if minutes is None else max(0.0, minutes - (time.monotonic() - started) / 60.0)


def _train_denoiser(
    model: _Denoiser,
    call: _FitCall,
    checkpoint: Path,
    alphas: torch.Tensor,
    silhouettes: dict | None,
    *,
    steps: int | None,
    minutes: float | None,
    progress: Callable[[FitProgress], None] | None,
) -> float:
    """Train ``model`` to ``steps`` in all or for ``minutes`` (a fresh one at least one step), checkpointing every
    ``checkpoint_every`` steps and at the end; return the seconds this call trained."""
    settings = call.settings
    started = time.monotonic()
    model.unet.train()
    while not _done(model.step, steps, minutes, started) or model.step == 0:
        lr = settings.learning_rate * min(1.0, (model.step + 1) / settings.warmup_steps)
        for group in model.optimizer.param_groups:
            group["lr"] = lr
        model.loss = _train_step(
            model.unet,
            model.optimizer,
            call.examples,
            call.labels,
            alphas,
            call.seed,
            model.step,
            call.batch_size,
            call.config,
            settings,
            silhouettes,
        )
        model.step += 1
        _update_ema(model.ema, model.unet, min(settings.ema_decay, (1 + model.step) / (10 + model.step)))
        if progress is not None:
            progress(FitProgress("denoiser", model.step, steps, model.loss, time.monotonic() - started))
        if model.step % settings.checkpoint_every == 0:
            _checkpoint(checkpoint, model, model.seconds_before + time.monotonic() - started)
    seconds = time.monotonic() - started
    _checkpoint(checkpoint, model, model.seconds_before + seconds)
    return seconds


def _checkpoint(path: Path, model: _Denoiser, seconds: float) -> None:
    save_checkpoint(path, model.identity, model.unet, model.ema, model.optimizer, model.step, model.loss, seconds)


def _metadata(
    call: _FitCall,
    model: _Denoiser,
    previous: Path,
    dataset: Dataset,
    *,
    budget: dict,
    command: Sequence[str] | None,
    seconds: float,
) -> dict:
    """The folder's metadata: what made it; ``previous`` (the metadata so far) gives a resumed run's history.

    ``budget`` holds the call's ``steps`` and ``minutes``; ``seconds`` is what this call trained.
    """
    history = earlier_history(previous, call.data_hash) if model.resumed_from else []
    entry = {"command": list(command) if command is not None else None, "steps": [model.resumed_from, model.step]}
    if model.start is not None and not model.resumed_from:
        entry["init"] = model.start
    history.append(entry)
    return {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "classes": list(call.examples.classes),
        "labels": list(call.labels),
        "window": call.config.window,
        "denoiser": call.config.to_dict(),
        "training": {**call.settings.__dict__, "batch_size": call.batch_size, **budget},
        "data_hash": call.data_hash,
        "data_source": str(dataset.source) if dataset.source else None,
        "command": list(command) if command is not None else None,
        "history": history,
        "init": model.start if not model.resumed_from else earlier_init(previous),
        "seed": call.seed,
        "steps_done": model.step,
        "final_loss": model.loss,
        "denoiser_train_seconds": round(model.seconds_before + seconds, 1),
        "versions": {
            "rarefill": __version__,
            "torch": torch.__version__,
            "diffusers": diffusers.__version__,
            "numpy": np.__version__,
            "opencv": cv2.__version__,
            "python": platform.python_version(),
        },
    }


def _done(step: int, steps: int | None, minutes: float | None, started: float) -> bool:
    if steps is not None:
        return step >= steps
    return time.monotonic() - started >= minutes * 60.0


def _train_step(
    unet, optimizer, examples, labels, alphas, seed, step, batch_size, config, settings, silhouettes=None
) -> float:
    rng = np.random.default_rng([seed, step])
    batch = make_batch(
        examples,
        labels,
        rng,
        batch_size=batch_size,
        window=config.window,
        background_share=settings.background_share,
        mask_margin=settings.mask_margin,
        exemplar_share=settings.exemplar_share if config.exemplar else 0.0,
        silhouettes=silhouettes,
    )
    label_ids = batch.label_ids
    drop = rng.random(batch_size) < settings.drop_label
    label_ids[drop] = NULL_LABEL
    noise_gen = torch.Generator().manual_seed(int(rng.integers(2**62)))
    x0 = torch.from_numpy(batch.images)
    mask = torch.from_numpy(batch.masks)
    noise = torch.randn(x0.shape, generator=noise_gen)
    t = torch.randint(0, len(alphas), (batch_size,), generator=noise_gen)
    a = alphas[t].sqrt().view(-1, 1, 1, 1)
    s = (1 - alphas[t]).sqrt().view(-1, 1, 1, 1)
    noisy = a * x0 + s * noise
    target = a * noise - s * x0  # v-prediction (Salimans & Ho 2022)
    if config.exemplar:
        condition = conditioning(x0, mask, torch.from_numpy(batch.exemplars), torch.from_numpy(batch.alphas))
    else:
        condition = conditioning(x0, mask)
    model_in = torch.cat([noisy, condition], dim=1)
    bf16 = native_bf16() if settings.use_bf16 is None else settings.use_bf16
    with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
        pred = unet(model_in, t, class_labels=torch.from_numpy(label_ids)).sample
    weight = settings.outside_weight + (settings.mask_weight - settings.outside_weight) * mask
    loss = (weight * (pred.float() - target) ** 2).sum() / (weight.sum() * 3)
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    torch.nn.utils.clip_grad_norm_(unet.parameters(), 1.0)
    optimizer.step()
    return float(loss.detach())


@torch.no_grad()
def _update_ema(ema: torch.nn.Module, model: torch.nn.Module, decay: float) -> None:
    for target, source in zip(ema.parameters(), model.parameters(), strict=True):
        target.lerp_(source.detach(), 1.0 - decay)


def _warm_start(unet, folder: Path, labels: Sequence[str], config: DenoiserConfig) -> dict:
    """Copy a trained folder's weights into ``unet``; return what to record about that folder."""
    from .sample import load_trained  # sample.py imports nothing of training; keep it that way round

    source = load_trained(folder, use_bf16=False)
    if tuple(source.labels) != tuple(labels):
        raise ModelError(
            f"{folder}: --init model has labels {list(source.labels)}, this data set {list(labels)}",
            hint="warm-start only from a model trained on the same classes",
        )
    differing = same_architecture(config, source.unet)
    if differing:
        raise ModelError(f"{folder}: --init model differs in {', '.join(differing)} from the model to train")
    try:
        widen_from(unet, source.unet)
    except ValueError as exc:
        raise ModelError(f"{folder}: --init model cannot be copied ({exc})") from None
    meta = json.loads((folder / METADATA).read_text(encoding="utf-8"))
    return {
        "folder": folder.name,
        "sha256": source.folder_hash,
        "in_channels": int(source.unet.config.in_channels),
        "steps_done": meta.get("steps_done"),
        "command": meta.get("command"),
        "history": meta.get("history"),
    }
