"""The model folder that :func:`~pipeline.generator.train.fit` writes and resumes from.

Everything here reads or writes files of that folder: the optimiser checkpoint (``checkpoint.pt``), what
earlier runs left in the metadata, whether the verifier there was made from this data, and the diffusers
sub-folders, each written beside its place and swapped in whole.
"""

from __future__ import annotations

import io
import json
import math
import shutil
from collections.abc import Callable
from pathlib import Path

import torch

from ..errors import ModelError
from ..files import write_bytes_atomic, write_json_atomic
from .model import METADATA
from .verifier import VERIFIER_JSON

CHECKPOINT = "checkpoint.pt"


def save_checkpoint(path: Path, identity: dict, unet, ema, optimizer, step: int, loss: float, seconds: float) -> None:
    """Write the optimiser checkpoint atomically: ``identity``, the weights, the optimiser state and progress."""
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


def resume(path: Path, identity: dict, unet, ema, optimizer) -> tuple[int, float, float]:
    """Load the checkpoint at ``path`` into ``unet``, ``ema`` and ``optimizer``; ``(step, loss, seconds)``.

    ``(0, nan, 0.0)`` without a checkpoint; a :class:`ModelError` when it cannot be read or was made with
    another ``identity``.
    """
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


def earlier_history(metadata: Path, data_hash: str) -> list[dict]:
    """The ``history`` of the metadata at ``metadata`` when made from the same data, else empty."""
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


def earlier_init(metadata: Path):
    """The ``init`` record of the metadata at ``metadata`` (None when it cannot be read)."""
    try:
        return json.loads(metadata.read_text(encoding="utf-8")).get("init")
    except (OSError, ValueError):
        return None


def verifier_matches(out: Path, data_hash: str) -> bool:
    """Does ``out`` hold a verifier made from the data with ``data_hash``?"""
    path = out / VERIFIER_JSON
    if not path.exists():
        return False
    try:
        return json.loads(path.read_text(encoding="utf-8")).get("data_hash") == data_hash
    except (OSError, ValueError):
        return False


def export(out: Path, ema: torch.nn.Module, scheduler, metadata: dict) -> None:
    """Write the EMA weights and the scheduler as diffusers sub-folders of ``out``, then ``metadata``."""
    # The metadata goes first and comes back last: its presence marks the folder complete.
    (out / METADATA).unlink(missing_ok=True)
    _replace_dir(out / "unet", lambda tmp: ema.save_pretrained(tmp, safe_serialization=True))
    _replace_dir(out / "scheduler", lambda tmp: scheduler.save_pretrained(tmp))
    write_json_atomic(out / METADATA, metadata, indent=2)


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
