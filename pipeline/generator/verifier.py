"""Object-present verifier: a small CNN that tells, from a box crop, which class (or background) it shows.

Trained during ``fit`` on real crops of each class and on background crops of the same images, and
saved beside the model (``verifier.safetensors`` + ``verifier.json``). The insert stage's "generated
object actually present" filter asks it for the probability of the requested class.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import torch
from safetensors.torch import load as load_safetensors
from safetensors.torch import save as save_safetensors
from torch import nn

from ..errors import ModelError
from ..files import write_bytes_atomic, write_json_atomic
from .examples import Examples
from .progress import FitProgress
from .request import BACKGROUND

VERIFIER_WEIGHTS = "verifier.safetensors"
VERIFIER_JSON = "verifier.json"
CROP_PX = 32
MARGIN = 0.1
"""Crop = box grown by this fraction of its width/height on every side (some surroundings for contrast)."""


class CropNet(nn.Module):
    """A small crop classifier: conv-ReLU-maxpool stages, a 2x2 average pool, a 64-wide hidden layer.

    Any input size of at least ``2 ** len(channels)`` pixels works (the pool is adaptive).
    ``embed`` gives the 64-wide hidden layer (the penultimate layer), ``forward`` the logits.
    """

    def __init__(self, n_classes: int, channels: Sequence[int]) -> None:
        super().__init__()
        layers: list[nn.Module] = []
        previous = 3
        for width in channels:
            layers += [nn.Conv2d(previous, width, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2)]
            previous = width
        self.features = nn.Sequential(*layers, nn.AdaptiveAvgPool2d(2), nn.Flatten())
        self.head = nn.Sequential(nn.Linear(previous * 4, 64), nn.ReLU(), nn.Linear(64, n_classes))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.features(x))

    def embed(self, x: torch.Tensor) -> torch.Tensor:
        """The penultimate layer: (N, 3, S, S) float tensor -> (N, 64) float tensor (after its ReLU)."""
        return self.head[:2](self.features(x))


@dataclass
class Verifier:
    """A trained crop classifier. ``classes[0]`` is ``"background"``, the rest are object classes."""

    classes: tuple[str, ...]
    net: CropNet
    channels: tuple[int, ...]
    crop_px: int = CROP_PX
    margin: float = MARGIN

    @torch.no_grad()
    def probabilities(self, image: np.ndarray, boxes: Sequence[Sequence[float]]) -> np.ndarray:
        """Class probabilities of each box's crop.

        Parameters
        ----------
        image : (H, W, 3) uint8 ndarray
        boxes : sequence of (x, y, w, h)
            COCO boxes in pixels, w and h > 0.

        Returns
        -------
        (N, C) float32 ndarray
            Softmax over ``classes``; each row sums to 1.
        """
        if not isinstance(image, np.ndarray) or image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
            raise ValueError(f"image must be an (H, W, 3) uint8 array, got {getattr(image, 'shape', type(image))}")
        if len(boxes) == 0:
            return np.zeros((0, len(self.classes)), np.float32)
        crops = np.stack([crop_box(image, box, size=self.crop_px, margin=self.margin) for box in boxes])
        self.net.eval()
        logits = self.net(crops_to_tensor(crops))
        return torch.softmax(logits, dim=1).numpy().astype(np.float32)

    def present_probability(self, image: np.ndarray, box: Sequence[float], label: str) -> float:
        """Probability that ``box`` in ``image`` shows an object of class ``label``."""
        if label not in self.classes:
            raise ValueError(f"label {label!r} is not one of the verifier's classes {self.classes}")
        return float(self.probabilities(image, [box])[0, self.classes.index(label)])


def crop_box(image: np.ndarray, box: Sequence[float], *, size: int, margin: float) -> np.ndarray:
    """The box grown by ``margin`` of its size on each side, resized to ``size`` x ``size`` (aspect not kept).

    Parts outside the image repeat the border pixels.

    Returns
    -------
    (size, size, 3) uint8 ndarray
    """
    x, y, w, h = (float(v) for v in box)
    if not (w > 0 and h > 0) or not all(math.isfinite(v) for v in (x, y, w, h)):
        raise ValueError(f"box must be finite (x, y, w, h) with w, h > 0, got {tuple(box)}")
    height, width = image.shape[:2]
    c0 = int(math.floor(x - margin * w))
    r0 = int(math.floor(y - margin * h))
    c1 = max(int(math.ceil(x + w + margin * w)), c0 + 1)
    r1 = max(int(math.ceil(y + h + margin * h)), r0 + 1)
    crop = image[max(r0, 0) : min(r1, height), max(c0, 0) : min(c1, width)]
    pads = (max(-r0, 0), max(r1 - height, 0), max(-c0, 0), max(c1 - width, 0))
    if crop.size == 0:
        raise ValueError(f"box {tuple(box)} lies outside the {width}x{height} image")
    if any(pads):
        crop = cv2.copyMakeBorder(crop, *pads, cv2.BORDER_REPLICATE)
    interpolation = cv2.INTER_AREA if crop.shape[0] > size or crop.shape[1] > size else cv2.INTER_LINEAR
    return cv2.resize(crop, (size, size), interpolation=interpolation)


def crops_to_tensor(crops: np.ndarray) -> torch.Tensor:
    """(N, S, S, 3) uint8 crops -> (N, 3, S, S) float32 tensor scaled to [-1, 1], the nets' input."""
    return torch.from_numpy(np.ascontiguousarray(crops.transpose(0, 3, 1, 2))).float() / 127.5 - 1.0


def _augmented_crop(image: np.ndarray, box: Sequence[float], rng: np.random.Generator) -> np.ndarray:
    x, y, w, h = box
    # Jitter matches how far a re-fitted label of a generated object may sit from the object itself.
    dx, dy = rng.uniform(-0.1, 0.1, 2) * (w, h)
    sw, sh = np.exp(rng.uniform(-0.12, 0.12, 2))
    jittered = (x + dx + w * (1 - sw) / 2, y + dy + h * (1 - sh) / 2, w * sw, h * sh)
    crop = crop_box(image, jittered, size=CROP_PX, margin=MARGIN).astype(np.float32)
    crop = crop * rng.uniform(0.8, 1.2) + rng.uniform(-20, 20)
    if rng.random() < 0.5:
        crop = crop[:, ::-1]
    return np.clip(crop, 0, 255).astype(np.uint8)


def fit_verifier(
    examples: Examples,
    *,
    steps: int = 1500,
    batch_size: int = 64,
    channels: Sequence[int] = (16, 32, 64),
    rng: np.random.Generator | int | None = None,
    progress: Callable[[FitProgress], None] | None = None,
) -> Verifier:
    """Train the verifier on real object crops vs background crops (each label drawn equally often).

    Parameters
    ----------
    examples : Examples
        Images and boxes of the training split.
    steps, batch_size : int
    channels : sequence of int
        Widths of the three conv stages.
    rng : Generator, int or None
        Seeds the initial weights and every batch.
    progress : callable, optional
        Called with a ``FitProgress`` (phase ``"verifier"``) every 50 steps.
    """
    rng = np.random.default_rng(rng)
    classes = (BACKGROUND, *examples.classes)
    present = [c for c in examples.classes if examples.objects[c]]
    labels = (BACKGROUND, *present)
    with torch.random.fork_rng():
        torch.manual_seed(int(rng.integers(2**62)))
        net = CropNet(len(classes), channels)
    optimizer = torch.optim.Adam(net.parameters(), lr=2e-3)
    net.train()
    for step in range(steps):
        crops = np.empty((batch_size, CROP_PX, CROP_PX, 3), np.uint8)
        targets = np.empty(batch_size, np.int64)
        for i in range(batch_size):
            label = labels[rng.integers(len(labels))]
            if label == BACKGROUND:
                scene, box = examples.sample_background_box(rng)
            else:
                pool = examples.objects[label]
                ref = pool[rng.integers(len(pool))]
                scene, box = ref.scene, ref.box
            crops[i] = _augmented_crop(examples.images[scene], box, rng)
            targets[i] = classes.index(label)
        for group in optimizer.param_groups:
            group["lr"] = 2e-3 * 0.5 * (1 + math.cos(math.pi * step / steps))
        loss = nn.functional.cross_entropy(net(crops_to_tensor(crops)), torch.from_numpy(targets))
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        if progress is not None and (step + 1) % 50 == 0:
            progress(FitProgress("verifier", step + 1, steps, loss.item(), math.nan))
    net.eval()
    return Verifier(classes, net, tuple(channels))


def save_verifier(verifier: Verifier, folder: str | os.PathLike[str], *, data_hash: str) -> None:
    """Write ``verifier.safetensors`` and ``verifier.json`` into ``folder`` (atomically, json last)."""
    folder = Path(folder)
    state = {k: v.contiguous() for k, v in verifier.net.state_dict().items()}
    write_bytes_atomic(folder / VERIFIER_WEIGHTS, save_safetensors(state))
    meta = {
        "format": "rarefill-verifier",
        "format_version": 1,
        "classes": list(verifier.classes),
        "channels": list(verifier.channels),
        "crop_px": verifier.crop_px,
        "margin": verifier.margin,
        "data_hash": data_hash,
    }
    write_json_atomic(folder / VERIFIER_JSON, meta, indent=2)


def load_verifier(folder: str | os.PathLike[str]) -> Verifier:
    """Read the verifier saved in a model folder.

    Raises
    ------
    ModelError
        The folder, ``verifier.json`` or ``verifier.safetensors`` is missing or unreadable.
    """
    folder = Path(folder)
    meta_path, weights_path = folder / VERIFIER_JSON, folder / VERIFIER_WEIGHTS
    if not folder.is_dir():
        raise ModelError(f"{folder}: model folder not found")
    for path in (meta_path, weights_path):
        if not path.is_file():
            raise ModelError(f"{folder}: {path.name} is missing (the verifier is written by `rarefill fit`)")
    try:
        meta = json.loads(meta_path.read_text(encoding="utf-8"))
        classes = tuple(meta["classes"])
        channels = tuple(int(c) for c in meta["channels"])
        net = CropNet(len(classes), channels)
        net.load_state_dict(load_safetensors(weights_path.read_bytes()))
    except (OSError, ValueError, KeyError, TypeError, RuntimeError) as exc:
        raise ModelError(f"{folder}: verifier cannot be loaded ({exc})") from None
    net.eval()
    return Verifier(classes, net, channels, int(meta.get("crop_px", CROP_PX)), float(meta.get("margin", MARGIN)))
