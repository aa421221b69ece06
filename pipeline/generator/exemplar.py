"""Exemplar conditioning of the denoiser: its extra input channels, and the exemplars it is trained on.

Input layout of an exemplar-conditioned denoiser (11 channels, all in [-1, 1] except the masks)::

    0-2   noisy window x_t
    3-5   masked window: the context window with the repaint mask zeroed
    6     repaint mask (1 = repaint)
    7-9   exemplar composite: the placed exemplar inside its silhouette, the masked window elsewhere
    10    exemplar alpha (the placed silhouette, in [0, 1])

Without an exemplar, channels 7-10 are zero and the model is the class-conditional inpainter of a
7-channel model (whose weights a warm start copies, the new input weights starting at zero).

The exemplar composite holds nothing of the scene inside the repaint mask outside the silhouette (the
grown boundary ring and the shadow band): in training those pixels would show the object's real shadow,
which the model must learn to draw, not to copy; at inference the scene there has no shadow yet. Both
sides build the channels with :func:`conditioning`, so they see the same thing.

Training is self-supervised (:func:`augment_exemplar`): a real object is masked with
:func:`pipeline.silhouette.repaint_mask`, an augmented copy of it (colour, brightness, contrast, blur, a few
per cent of shift and scale) is the exemplar, and the target is the original window. The model learns to
undo a change of light in context and to draw the contact shadow, the low frequencies the insert stage
takes from it.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import torch

EXEMPLAR_CHANNELS = 4
"""Input channels an exemplar adds: composite (3) + alpha (1)."""

PLAIN_IN_CHANNELS = 7
"""Inputs of a denoiser without exemplar channels: noisy (3) + masked window (3) + mask (1)."""

EXEMPLAR_IN_CHANNELS = PLAIN_IN_CHANNELS + EXEMPLAR_CHANNELS

WHITE_BALANCE_SIGMA = 0.06
"""Standard deviation of the log gain of each colour channel (a change of illuminant colour)."""

BRIGHTNESS_LOG_RANGE = 0.3
"""Log brightness gain drawn uniformly from +-this (0.74x-1.35x: another exposure or light level)."""

CONTRAST_RANGE = (0.75, 1.3)
SATURATION_RANGE = (0.75, 1.25)

HUE_DEGREES = 8.0
"""Hue rotation drawn from +-this. Kept small on purpose: a real object's paint colour cannot be told from
its scene, so a large hue change would teach the model to repaint every instance in its class's mean
colour and lose the variety the exemplars bring."""

BLUR_SIGMA_MAX = 0.8
"""Gaussian blur (model pixels) drawn from [0, this] for half the exemplars: a softer or resampled source."""

SHIFT_SHARE = 0.03
SCALE_LOG_RANGE = 0.04
"""Shift (share of the object's size) and log scale, each uniform in +-this: a placement a little off."""


def conditioning(
    known: torch.Tensor, mask: torch.Tensor, exemplar: torch.Tensor | None = None, alpha: torch.Tensor | None = None
) -> torch.Tensor:
    """The condition channels (everything but the noisy window) of a batch.

    Parameters
    ----------
    known : (B, 3, S, S) float tensor in [-1, 1]
        The context windows.
    mask : (B, 1, S, S) float tensor of 0/1
        Repaint masks.
    exemplar : (B, 3, S, S) float tensor in [-1, 1], optional
        Windows of the frame with the exemplar placed (only its pixels inside ``alpha`` are used).
    alpha : (B, 1, S, S) float tensor in [0, 1], optional
        Placed silhouettes; a row of zeros means "no exemplar" for that window. Given with ``exemplar``.

    Returns
    -------
    (B, 4, S, S) tensor when ``exemplar`` is None (a 7-channel denoiser), else (B, 8, S, S).
    """
    masked = known * (1 - mask)
    if exemplar is None:
        return torch.cat([masked, mask], dim=1)
    present = (alpha.flatten(1).amax(dim=1) > 0).view(-1, 1, 1, 1).to(known.dtype)
    composite = (exemplar * alpha + masked * (1 - alpha)) * present
    return torch.cat([masked, mask, composite, alpha], dim=1)


def augment_exemplar(window: np.ndarray, alpha: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """An augmented copy of the object in ``window``: what a real instance from another scene looks like.

    Parameters
    ----------
    window : (S, S, 3) uint8 ndarray
        The context window holding the real object.
    alpha : (S, S) float32 ndarray in [0, 1]
        The object's silhouette in the window.
    rng : numpy Generator

    Returns
    -------
    image : (S, S, 3) uint8 ndarray
        The window with the object's colours changed (white balance, brightness, contrast, saturation,
        a small hue rotation), optionally blurred, then shifted and scaled about its bottom centre.
    alpha : (S, S) float32 ndarray
        The silhouette moved with it.
    """
    pixels = window.astype(np.float32) / 255.0
    inside = alpha > 0.5
    mean = pixels[inside].mean(axis=0) if inside.any() else pixels.reshape(-1, 3).mean(axis=0)
    gains = np.exp(rng.normal(0.0, WHITE_BALANCE_SIGMA, 3)) * math.exp(rng.uniform(-1, 1) * BRIGHTNESS_LOG_RANGE)
    pixels = mean + (pixels - mean) * rng.uniform(*CONTRAST_RANGE)
    grey = pixels.mean(axis=2, keepdims=True)
    pixels = grey + (pixels - grey) * rng.uniform(*SATURATION_RANGE)
    pixels = pixels @ _hue_rotation(math.radians(rng.uniform(-1, 1) * HUE_DEGREES)).T
    pixels = np.clip(pixels * gains, 0.0, 1.0)
    if rng.random() < 0.5:
        pixels = cv2.GaussianBlur(pixels, (0, 0), max(1e-3, rng.uniform(0.0, BLUR_SIGMA_MAX)))
    image = np.clip(np.rint(pixels * 255.0), 0, 255).astype(np.uint8)
    return _shift_scale(image, alpha.astype(np.float32), inside, rng)


def _hue_rotation(angle: float) -> np.ndarray:
    """3x3 rotation by ``angle`` about the grey axis (1, 1, 1)/sqrt(3) (Rodrigues' formula), a hue shift."""
    axis = np.full(3, 1.0 / math.sqrt(3.0))
    cross = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    rotation = math.cos(angle) * np.eye(3) + math.sin(angle) * cross + (1 - math.cos(angle)) * np.outer(axis, axis)
    return rotation.astype(np.float32)


def _shift_scale(
    image: np.ndarray, alpha: np.ndarray, inside: np.ndarray, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    if not inside.any():
        return image, alpha
    rows, cols = np.nonzero(inside)
    height, width = rows.max() + 1 - rows.min(), cols.max() + 1 - cols.min()
    scale = math.exp(rng.uniform(-1, 1) * SCALE_LOG_RANGE)
    shift = rng.uniform(-1, 1, 2) * SHIFT_SHARE * np.array([width, height])
    anchor = np.array([(cols.min() + cols.max() + 1) / 2.0, rows.max() + 1.0])  # bottom centre stays near
    matrix = np.array(
        [[scale, 0, (1 - scale) * anchor[0] + shift[0]], [0, scale, (1 - scale) * anchor[1] + shift[1]]], np.float32
    )
    size = (image.shape[1], image.shape[0])
    moved = cv2.warpAffine(image, matrix, size, flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
    moved_alpha = cv2.warpAffine(alpha, matrix, size, flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT)
    return moved, np.clip(moved_alpha, 0.0, 1.0)
