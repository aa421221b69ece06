"""Carry an exemplar from the light of its source image into the light of the scene it is placed in."""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .exemplars import Exemplar

LIGHT_GAIN_LIMITS = (0.5, 2.0)
"""Smallest and largest per-channel gain :func:`light_gain` gives."""


def image_light(image: np.ndarray) -> np.ndarray:
    """The light of an ``(H, W, 3)`` image by the grey-world assumption: its mean RGB, ``(3,) float64``."""
    return image.reshape(-1, 3).mean(axis=0)


def light_gain(exemplar: Exemplar, scene: np.ndarray, strength: float) -> np.ndarray:
    """Per-channel gains that carry ``exemplar`` from its source image's light into ``scene``'s.

    Each channel is scaled by the ratio of the two images' mean values raised to ``strength`` (0: no
    change, 1: the full ratio), within :data:`LIGHT_GAIN_LIMITS`: a von Kries-type adaptation with the
    light of each image estimated by the grey-world assumption.

    References
    ----------
    G. Buchsbaum, "A spatial processor model for object colour perception", J. Franklin Inst. 310, 1980
    (grey world); J. von Kries, 1902, per-channel gain adaptation (common practice, from memory).
    """
    if exemplar.light is None or strength == 0:
        return np.ones(3)
    ratio = (image_light(scene) + 1.0) / (np.asarray(exemplar.light, np.float64) + 1.0)
    return np.clip(ratio**strength, *LIGHT_GAIN_LIMITS)


def relit(exemplar: Exemplar, gain: np.ndarray) -> Exemplar:
    """``exemplar`` with its pixels scaled per channel by ``gain`` (rounded, clipped to 0-255)."""
    if np.allclose(gain, 1.0):
        return exemplar
    pixels = np.clip(np.rint(exemplar.pixels.astype(np.float64) * gain), 0, 255).astype(np.uint8)
    return replace(exemplar, pixels=pixels)
