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
import io
import json
import math
import os
import platform
import shutil
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
from ..files import write_bytes_atomic, write_json_atomic
from .batches import make_batch, object_silhouettes
from .examples import dataset_hash, load_examples
from .exemplar import conditioning
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
from .verifier import VERIFIER_JSON, fit_verifier, save_verifier

CHECKPOINT = "checkpoint.pt"


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
    config = config or DenoiserConfig()
    settings = settings or TrainSettings()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    # 2. data
    examples = load_examples(dataset)
    data_hash = dataset_hash(dataset)
    labels = label_table(examples.classes)

    # 3. model, optimiser, EMA: fresh or from the checkpoint
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        unet = build_unet(config, len(labels))
    start = _warm_start(unet, Path(init), labels, config) if init is not None else None
    ema = copy.deepcopy(unet).requires_grad_(False)
    optimizer = torch.optim.AdamW(unet.parameters(), lr=settings.learning_rate, weight_decay=0.0)
    identity = {"data_hash": data_hash, "labels": list(labels), "config": config.to_dict(), "seed": seed}
    if start is not None:
        identity["init_sha256"] = start["sha256"]
    step, loss_value, seconds_before = _resume(out / CHECKPOINT, identity, unet, ema, optimizer)
    resumed_from = step
    scheduler = training_scheduler()
    alphas = scheduler.alphas_cumprod.float()
    silhouettes = object_silhouettes(examples) if config.exemplar and settings.exemplar_share > 0 else None

    # 4. the verifier first (retrained only when missing or made from other data): a time budget covers
    #    both phases, so the denoiser trains for what the verifier leaves of it
    verifier_started = time.monotonic()
    if not _verifier_matches(out, data_hash):
        verifier = fit_verifier(examples, steps=settings.verifier_steps, rng=seed, progress=progress)
        save_verifier(verifier, out, data_hash=data_hash)
    left = None if minutes is None else max(0.0, minutes - (time.monotonic() - verifier_started) / 60.0)

    # 5. train the denoiser (a fresh one at least one step, so that the folder holds a trained model)
    started = time.monotonic()
    unet.train()
    while not _done(step, steps, left, started) or step == 0:
        lr = settings.learning_rate * min(1.0, (step + 1) / settings.warmup_steps)
        for group in optimizer.param_groups:
            group["lr"] = lr
        loss_value = _train_step(
            unet, optimizer, examples, labels, alphas, seed, step, batch_size, config, settings, silhouettes
        )
        step += 1
        _update_ema(ema, unet, min(settings.ema_decay, (1 + step) / (10 + step)))
        if progress is not None:
            progress(FitProgress("denoiser", step, steps, loss_value, time.monotonic() - started))
        if step % settings.checkpoint_every == 0:
            total_seconds = seconds_before + time.monotonic() - started
            _save_checkpoint(out / CHECKPOINT, identity, unet, ema, optimizer, step, loss_value, total_seconds)
    seconds = time.monotonic() - started
    _save_checkpoint(out / CHECKPOINT, identity, unet, ema, optimizer, step, loss_value, seconds_before + seconds)

    # 6. export the EMA weights as a diffusers folder, metadata last: it marks the folder complete
    history = _history(out / METADATA, data_hash) if resumed_from else []
    entry = {"command": list(command) if command is not None else None, "steps": [resumed_from, step]}
    if start is not None and not resumed_from:
        entry["init"] = start
    history.append(entry)
    if not resumed_from:
        init_record = start
    else:
        init_record = _previous_init(out / METADATA)
    (out / METADATA).unlink(missing_ok=True)
    _replace_dir(out / "unet", lambda tmp: ema.save_pretrained(tmp, safe_serialization=True))
    _replace_dir(out / "scheduler", lambda tmp: scheduler.save_pretrained(tmp))
    metadata = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "classes": list(examples.classes),
        "labels": list(labels),
        "window": config.window,
        "denoiser": config.to_dict(),
        "training": {**settings.__dict__, "batch_size": batch_size, "steps": steps, "minutes": minutes},
        "data_hash": data_hash,
        "data_source": str(dataset.source) if dataset.source else None,
        "command": list(command) if command is not None else None,
        "history": history,
        "init": init_record,
        "seed": seed,
        "steps_done": step,
        "final_loss": loss_value,
        "denoiser_train_seconds": round(seconds_before + seconds, 1),
        "versions": {
            "rarefill": __version__,
            "torch": torch.__version__,
            "diffusers": diffusers.__version__,
            "numpy": np.__version__,
            "opencv": cv2.__version__,
            "python": platform.python_version(),
        },
    }
    write_json_atomic(out / METADATA, metadata, indent=2)
    return FitResult(out, step, seconds, loss_value, resumed_from)


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


def _save_checkpoint(path: Path, identity: dict, unet, ema, optimizer, step: int, loss: float, seconds: float) -> None:
    buffer = io.BytesIO()
    state = {
        **identity,
        "unet": unet.state_dict(),
        "ema": ema.state_dict(),
        "optimizer": optimizer.state_dict(),
        "step": step,
        "loss": loss,
        "seconds": seconds,
    }
    torch.save(state, buffer)
    write_bytes_atomic(path, buffer.getvalue())


def _resume(path: Path, identity: dict, unet, ema, optimizer) -> tuple[int, float, float]:
    if not path.exists():
        return 0, math.nan, 0.0
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # a checkpoint torch cannot read is the user's to remove, not ours
        raise ModelError(f"{path}: checkpoint cannot be read ({exc})", hint="delete it to start afresh") from None
    for key, value in identity.items():
        if state.get(key) != value:
            raise ModelError(
                f"{path}: checkpoint was made with another {key} ({state.get(key)!r:.80} != {value!r:.80})",
                hint="train into a new --out folder, or delete the checkpoint to start afresh",
            )
    unet.load_state_dict(state["unet"])
    ema.load_state_dict(state["ema"])
    optimizer.load_state_dict(state["optimizer"])
    return int(state["step"]), float(state["loss"]), float(state["seconds"])


def _history(metadata: Path, data_hash: str) -> list[dict]:
    # Each call of a resumed training adds one entry, so the metadata names every command that shaped it.
    try:
        previous = json.loads(metadata.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    if previous.get("data_hash") != data_hash:
        return []
    if "history" in previous:
        return list(previous["history"])
    return [{"command": previous.get("command"), "steps": [0, previous.get("steps_done")]}]


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


def _previous_init(metadata: Path):
    try:
        return json.loads(metadata.read_text(encoding="utf-8")).get("init")
    except (OSError, ValueError):
        return None


def _verifier_matches(out: Path, data_hash: str) -> bool:
    path = out / VERIFIER_JSON
    if not path.exists():
        return False
    try:
        return json.loads(path.read_text(encoding="utf-8")).get("data_hash") == data_hash
    except (OSError, ValueError):
        return False


def _replace_dir(target: Path, write: Callable[[Path], None]) -> None:
    # Write the whole folder beside the target, then swap it in, so a crash never leaves half a folder.
    tmp = target.with_name(f".{target.name}.tmp")
    shutil.rmtree(tmp, ignore_errors=True)
    write(tmp)
    old = target.with_name(f".{target.name}.old")
    shutil.rmtree(old, ignore_errors=True)
    if target.exists():
        target.rename(old)
    tmp.rename(target)
    shutil.rmtree(old, ignore_errors=True)
