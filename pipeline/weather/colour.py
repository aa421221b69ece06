"""Colour: sRGB and linear light, luminance, HSV scaling and compositing a layer over an image."""

from __future__ import annotations

import cv2
import numpy as np


def check_image(image: np.ndarray) -> None:
    """``ValueError`` unless ``image`` is an (H, W, 3) uint8 array."""
    if not isinstance(image, np.ndarray) or image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"image must be an (H, W, 3) uint8 array, got {getattr(image, 'shape', type(image))}")


def srgb_to_linear(image: np.ndarray) -> np.ndarray:
    """Linear-light RGB in [0, 1] from sRGB: (H, W, 3) uint8 -> float32 (IEC 61966-2-1 transfer curve)."""
    check_image(image)
    v = image.astype(np.float32) / 255.0
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4).astype(np.float32)


def linear_to_srgb(linear: np.ndarray) -> np.ndarray:
    """sRGB uint8 from linear-light RGB in [0, 1] (clipped), the inverse of :func:`srgb_to_linear`."""
    v = np.clip(np.asarray(linear, dtype=np.float32), 0.0, 1.0)
    encoded = np.where(v <= 0.0031308, 12.92 * v, 1.055 * np.power(v, 1 / 2.4) - 0.055)
    return np.clip(np.rint(encoded * 255.0), 0, 255).astype(np.uint8)


def colour_linear(colour: np.ndarray) -> np.ndarray:
    """Linear light of one sRGB colour given in [0, 1]: (3,) -> (3,) float32."""
    c = np.asarray(colour, dtype=np.float64)
    if c.shape != (3,) or np.any((c < 0) | (c > 1)):
        raise ValueError(f"a colour must be 3 sRGB values in [0, 1], got {colour!r}")
    return srgb_to_linear(np.rint(c * 255).astype(np.uint8).reshape(1, 1, 3)).reshape(3)


def luminance(linear: np.ndarray) -> np.ndarray:
    """Relative luminance ``Y = 0.2126 R + 0.7152 G + 0.0722 B`` of linear RGB (ITU-R BT.709): (H, W)."""
    return linear @ np.array([0.2126, 0.7152, 0.0722], dtype=np.float32)


def scale_hsv(image: np.ndarray, *, saturation: float, value: float, where: np.ndarray | None = None) -> np.ndarray:
    """Multiply HSV saturation and value by the given factors (on ``where`` only, if given): (H, W, 3) uint8.

    ``where`` may be a bool mask or a float weight in [0, 1] per pixel (a soft edge).
    """
    check_image(image)
    hsv = cv2.cvtColor(image, cv2.COLOR_RGB2HSV).astype(np.float32)
    weight = np.ones(image.shape[:2], np.float32) if where is None else np.asarray(where, np.float32)
    hsv[..., 1] *= 1.0 + (saturation - 1.0) * weight
    hsv[..., 2] *= 1.0 + (value - 1.0) * weight
    return cv2.cvtColor(np.clip(np.rint(hsv), 0, 255).astype(np.uint8), cv2.COLOR_HSV2RGB)


def over(image: np.ndarray, alpha: np.ndarray, colour: np.ndarray) -> np.ndarray:
    """Composite a layer of one ``colour`` (sRGB 0..1) with coverage ``alpha`` (H, W) over ``image`` in linear light."""
    linear = srgb_to_linear(image)
    paint = colour_linear(np.clip(colour, 0.0, 1.0))
    a = np.asarray(alpha, np.float32)[..., None]
    return linear_to_srgb(linear * (1 - a) + paint * a)
