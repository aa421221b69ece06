"""Train the compact CenterNet on a data set in memory and run it on images.

Images are scaled by ``input_scale`` and padded at the right and bottom to a common canvas whose sides
are multiples of 32; boxes are scaled with them and detections scaled back, so callers only ever see
the data set's own pixel coordinates. Augmentation: a horizontal flip with probability 1/2.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import cv2
import numpy as np
import torch

from ..dataset import Dataset
from ..errors import DatasetError
from .decode import Detections, decode
from .losses import centernet_loss
from .network import INPUT_MULTIPLE, STRIDE, CenterNet
from .targets import encode_targets

_MEAN, _SCALE = 0.5, 0.25


@dataclass(frozen=True)
class TrainSettings:
    """How to train.

    Attributes
    ----------
    steps : int
        Optimiser steps (batches); the probe fixes this across conditions so each gets equal compute.
    batch_size : int
    learning_rate : float
        Peak AdamW learning rate; linear warm-up over the first 5% of steps, then cosine decay to 0.
    weight_decay : float
    input_scale : float
        Factor applied to every image before the network (0.5 halves each side: 4x less compute).
    width : int
        Channels of the network's first stage (:class:`CenterNet`).
    max_objects : int
        Object slots per image in the targets.
    """

    steps: int
    batch_size: int = 8
    learning_rate: float = 2e-3
    weight_decay: float = 1e-4
    input_scale: float = 0.5
    width: int = 16
    max_objects: int = 64

    def __post_init__(self) -> None:
        if self.steps < 1 or self.batch_size < 1 or self.width < 1 or self.max_objects < 1:
            raise ValueError(f"steps, batch_size, width, max_objects must be >= 1: {self}")
        if not 0 < self.input_scale <= 1 or not self.learning_rate > 0 or self.weight_decay < 0:
            raise ValueError(f"need 0 < input_scale <= 1, learning_rate > 0, weight_decay >= 0: {self}")


@dataclass(frozen=True)
class Prepared:
    """Images of a data set on a common canvas, with their boxes, ready for training or inference.

    Attributes
    ----------
    images : (N, H, W, 3) uint8 ndarray
        Scaled images, padded with zeros at the right and bottom.
    sizes : (N, 2) int64 ndarray
        ``(width, height)`` of each scaled image inside the canvas.
    boxes : tuple of (n_i, 4) float32 ndarrays
        COCO boxes in scaled pixels.
    labels : tuple of (n_i,) int64 ndarrays
        Class index of each box (position in ``class_names``).
    image_ids : tuple of int
    class_names : tuple of str
    input_scale : float
    """

    images: np.ndarray
    sizes: np.ndarray
    boxes: tuple[np.ndarray, ...]
    labels: tuple[np.ndarray, ...]
    image_ids: tuple[int, ...]
    class_names: tuple[str, ...]
    input_scale: float


@dataclass(frozen=True)
class TrainedDetector:
    """A trained network with what is needed to use it; ``losses`` holds the total loss of every step."""

    model: CenterNet
    class_names: tuple[str, ...]
    input_scale: float
    losses: tuple[float, ...]
    seconds: float


def prepare(dataset: Dataset, class_names: Sequence[str], *, input_scale: float) -> Prepared:
    """Read and scale every image of ``dataset``; map its categories to positions in ``class_names``.

    ``iscrowd`` regions are left out (COCO evaluation ignores them; they are not objects to learn).

    Raises
    ------
    DatasetError
        A category of ``dataset`` is not in ``class_names``, or an image cannot be read.
    """
    if not 0 < input_scale <= 1:
        raise ValueError(f"input_scale must be in (0, 1], got {input_scale}")
    index = {name: i for i, name in enumerate(class_names)}
    to_class = {}
    for i, category in enumerate(dataset.categories):
        if category.name not in index:
            known = ", ".join(class_names)
            raise DatasetError(
                dataset.source or "<dataset>", f"categories[{i}].name", f"{category.name!r} is not one of {known}"
            )
        to_class[category.id] = index[category.name]
    sizes = np.array([_scaled(s.width, s.height, input_scale) for s in dataset.scenes], np.int64).reshape(-1, 2)
    canvas_w = _round_up(int(sizes[:, 0].max(initial=1)))
    canvas_h = _round_up(int(sizes[:, 1].max(initial=1)))
    images = np.zeros((len(dataset.scenes), canvas_h, canvas_w, 3), np.uint8)
    boxes, labels = [], []
    for i, scene in enumerate(dataset.scenes):
        width, height = sizes[i]
        rgb = scene.load_rgb()
        images[i, :height, :width] = cv2.resize(rgb, (int(width), int(height)), interpolation=cv2.INTER_AREA)
        kept = [a for a in scene.annotations if not a.iscrowd and a.bbox[2] > 0 and a.bbox[3] > 0]
        boxes.append(np.array([a.bbox for a in kept], np.float32).reshape(-1, 4) * np.float32(input_scale))
        labels.append(np.array([to_class[a.category_id] for a in kept], np.int64))
    return Prepared(
        images, sizes, tuple(boxes), tuple(labels), tuple(s.id for s in dataset.scenes), tuple(class_names), input_scale
    )


def train_detector(
    data: Prepared,
    *,
    settings: TrainSettings,
    rng: np.random.Generator | int | None = None,
    progress: Callable[[int, float], None] | None = None,
) -> TrainedDetector:
    """Train a fresh :class:`CenterNet` on ``data``.

    Parameters
    ----------
    data : Prepared
        From :func:`prepare` with ``settings.input_scale``.
    settings : TrainSettings
    rng : numpy Generator, int or None
        Seeds the initial weights, the batches and the flips.
    progress : callable, optional
        Called as ``progress(step, loss)`` after every step (steps count from 1).

    Returns
    -------
    TrainedDetector
    """
    # 1. check inputs
    if data.input_scale != settings.input_scale:
        raise ValueError(f"data prepared at scale {data.input_scale}, settings say {settings.input_scale}")
    if len(data.images) == 0:
        raise ValueError("no training images")
    rng = np.random.default_rng(rng)

    # 2. build the network; torch's own generator is forked so that no global seed is changed
    with torch.random.fork_rng():
        torch.manual_seed(int(rng.integers(2**63 - 1)))
        model = CenterNet(len(data.class_names), width=settings.width)
    optimiser = torch.optim.AdamW(model.parameters(), lr=settings.learning_rate, weight_decay=settings.weight_decay)
    warmup = max(1, round(0.05 * settings.steps))
    schedule = torch.optim.lr_scheduler.LambdaLR(optimiser, lambda s: _learning_rate_factor(s, warmup, settings.steps))

    # 3. train: epochs of shuffled images, each flipped with probability 1/2
    model.train()
    losses: list[float] = []
    order: list[int] = []
    start = time.perf_counter()
    for step in range(1, settings.steps + 1):
        while len(order) < settings.batch_size:
            order.extend(int(i) for i in rng.permutation(len(data.images)))
        picked, order = order[: settings.batch_size], order[settings.batch_size :]
        batch = _batch(data, picked, flips=rng.random(len(picked)) < 0.5, max_objects=settings.max_objects)
        parts = centernet_loss(model(batch["images"]), batch)
        optimiser.zero_grad(set_to_none=True)
        parts["total"].backward()
        optimiser.step()
        schedule.step()
        losses.append(float(parts["total"].detach()))
        if progress is not None:
            progress(step, losses[-1])
    model.eval()
    return TrainedDetector(model, data.class_names, settings.input_scale, tuple(losses), time.perf_counter() - start)


def predict(detector: TrainedDetector, data: Prepared, *, batch_size: int = 16, k: int = 100) -> list[Detections]:
    """Detections of every image of ``data``, in the data set's own pixel coordinates.

    Boxes are clipped to each image; boxes that clipping empties are dropped.
    """
    if data.input_scale != detector.input_scale or data.class_names != detector.class_names:
        raise ValueError("data prepared with another scale or class list than the detector was trained on")
    out: list[Detections] = []
    detector.model.eval()
    with torch.inference_mode():
        for first in range(0, len(data.images), batch_size):
            images = _to_tensor(data.images[first : first + batch_size])
            outputs = detector.model(images)
            found = decode(torch.sigmoid(outputs["heatmap"]), outputs["size"], outputs["offset"], stride=STRIDE, k=k)
            for j, dets in enumerate(found):
                width, height = data.sizes[first + j]
                out.append(_clip(dets, width=float(width), height=float(height), scale=data.input_scale))
    return out


def _batch(data: Prepared, picked: Sequence[int], *, flips: np.ndarray, max_objects: int) -> dict[str, torch.Tensor]:
    images = data.images[picked]  # fancy indexing copies, so flipping below leaves data intact
    canvas_h, canvas_w = images.shape[1:3]
    output_shape = (canvas_h // STRIDE, canvas_w // STRIDE)
    targets = []
    for j, i in enumerate(picked):
        boxes = data.boxes[i].copy()
        if flips[j]:
            width, height = data.sizes[i]
            images[j, :height, :width] = images[j, :height, :width][:, ::-1]
            boxes[:, 0] = width - boxes[:, 0] - boxes[:, 2]
        targets.append(
            encode_targets(
                boxes,
                data.labels[i],
                n_classes=len(data.class_names),
                output_shape=output_shape,
                stride=STRIDE,
                max_objects=max_objects,
            )
        )
    return {
        "images": _to_tensor(images),
        "heatmap": torch.from_numpy(np.stack([t.heatmap for t in targets])),
        "size": torch.from_numpy(np.stack([t.size for t in targets])),
        "offset": torch.from_numpy(np.stack([t.offset for t in targets])),
        "index": torch.from_numpy(np.stack([t.index for t in targets])),
        "mask": torch.from_numpy(np.stack([t.mask for t in targets])),
    }


def _to_tensor(images: np.ndarray) -> torch.Tensor:
    x = torch.from_numpy(np.ascontiguousarray(images)).permute(0, 3, 1, 2).float()
    return (x / 255.0 - _MEAN) / _SCALE


def _clip(dets: Detections, *, width: float, height: float, scale: float) -> Detections:
    x0 = np.clip(dets.boxes[:, 0], 0, width)
    y0 = np.clip(dets.boxes[:, 1], 0, height)
    x1 = np.clip(dets.boxes[:, 0] + dets.boxes[:, 2], 0, width)
    y1 = np.clip(dets.boxes[:, 1] + dets.boxes[:, 3], 0, height)
    keep = (x1 > x0) & (y1 > y0)
    boxes = np.stack([x0, y0, x1 - x0, y1 - y0], axis=1)[keep] / np.float32(scale)
    return Detections(boxes.astype(np.float32), dets.scores[keep], dets.labels[keep])


def _learning_rate_factor(step: int, warmup: int, total: int) -> float:
    if step < warmup:
        return (step + 1) / warmup
    return 0.5 * (1 + math.cos(math.pi * (step - warmup) / max(1, total - warmup)))


def _scaled(width: int, height: int, scale: float) -> tuple[int, int]:
    return max(1, round(width * scale)), max(1, round(height * scale))


def _round_up(value: int) -> int:
    return -(-value // INPUT_MULTIPLE) * INPUT_MULTIPLE
