"""What a caller asks a generator for, and the protocol every generator follows."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np

BACKGROUND = "background"
"""Label that asks for plain scene content (road, verge, sky) instead of an object."""


@dataclass(frozen=True, eq=False)
class InpaintRequest:
    """One window to inpaint.

    Attributes
    ----------
    image : (H, W, 3) uint8 ndarray
        The full frame.
    mask : (H, W) bool ndarray
        Pixels the generator may change; all other pixels come back bit-identical.
    box : (x, y, w, h)
        COCO box in pixels that the context window is centred on (usually the mask's box).
    label : str
        A class name from ``generator.classes``, or :data:`BACKGROUND`.
    seed : int
        Seeds this request's own noise, so its result does not depend on the rest of the batch.
    condition : str or None
        A scene condition label; no generator supports one yet, so it must be ``None``.
    exemplar : (H, W, 3) uint8 ndarray or None
        Exemplar-guided insertion: the full frame with a real instance of ``label`` already placed in it
        (alpha-composited over the scene inside ``exemplar_alpha``, at the image's own resolution). A
        generator whose ``accepts_exemplar`` is true repaints ``mask`` conditioned on it, so that the object
        takes the scene's light and colour, casts a contact shadow and meets the scene at a clean boundary.
        The caller keeps the exemplar's high frequencies; the generator supplies the low ones.
    exemplar_alpha : (H, W) float32 ndarray in [0, 1] or None
        The placed exemplar's silhouette (1 inside); given exactly when ``exemplar`` is.
    """

    image: np.ndarray
    mask: np.ndarray
    box: tuple[float, float, float, float]
    label: str
    seed: int
    condition: str | None = None
    exemplar: np.ndarray | None = None
    exemplar_alpha: np.ndarray | None = None


@runtime_checkable
class Generator(Protocol):
    """What the stages need from a generator (our trained model, a user's pipeline, or a test fake)."""

    classes: tuple[str, ...]
    accepts_exemplar: bool
    """Whether :meth:`inpaint` uses a request's ``exemplar`` (others refuse requests that carry one)."""

    def inpaint(self, requests: Sequence[InpaintRequest], *, steps: int, guidance: float) -> list[np.ndarray]:
        """Inpaint every request (batched); return one full ``(H, W, 3) uint8`` frame per request."""
        ...

    def info(self) -> dict[str, Any]:
        """Provenance: kind, folder hash, classes, window size."""
        ...


def check_request(
    request: InpaintRequest, index: int, classes: Sequence[str], *, accepts_exemplar: bool = False
) -> None:
    """Raise ``ValueError`` naming ``requests[index]`` and the field when a request is unusable."""
    where = f"requests[{index}]"
    image, mask = request.image, request.mask
    if not isinstance(image, np.ndarray) or image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"{where}.image must be an (H, W, 3) uint8 array, got {_describe(image)}")
    if not isinstance(mask, np.ndarray) or mask.dtype != bool or mask.shape != image.shape[:2]:
        raise ValueError(f"{where}.mask must be an {image.shape[:2]} bool array, got {_describe(mask)}")
    if len(request.box) != 4 or not all(isinstance(v, (int, float, np.number)) for v in request.box):
        raise ValueError(f"{where}.box must be 4 numbers (x, y, w, h), got {request.box!r}")
    x, y, w, h = (float(v) for v in request.box)
    height, width = mask.shape
    if not all(math.isfinite(v) for v in (x, y, w, h)) or w <= 0 or h <= 0:
        raise ValueError(f"{where}.box must be finite with w, h > 0, got {request.box!r}")
    if x < 0 or y < 0 or x + w > width or y + h > height:
        raise ValueError(f"{where}.box {request.box!r} leaves the {width}x{height} image")
    if request.label != BACKGROUND and request.label not in classes:
        raise ValueError(f"{where}.label {request.label!r} is not one of {(*classes, BACKGROUND)}")
    if request.condition is not None:
        raise ValueError(f"{where}.condition {request.condition!r}: scene conditions are not supported yet; pass None")
    if not isinstance(request.seed, (int, np.integer)) or isinstance(request.seed, bool) or request.seed < 0:
        raise ValueError(f"{where}.seed must be an integer >= 0, got {request.seed!r}")
    if not mask.any():
        raise ValueError(f"{where}.mask is empty: nothing to inpaint")
    _check_exemplar(request, where, accepts_exemplar)


def _check_exemplar(request: InpaintRequest, where: str, accepts_exemplar: bool) -> None:
    exemplar, alpha = request.exemplar, request.exemplar_alpha
    if exemplar is None and alpha is None:
        return
    if not accepts_exemplar:
        raise ValueError(f"{where}.exemplar: this generator does not take exemplars; pass None")
    if exemplar is None or alpha is None:
        raise ValueError(f"{where}: exemplar and exemplar_alpha go together; got only one of them")
    shape = request.image.shape
    if not isinstance(exemplar, np.ndarray) or exemplar.dtype != np.uint8 or exemplar.shape != shape:
        raise ValueError(f"{where}.exemplar must be a {shape} uint8 array, got {_describe(exemplar)}")
    if not isinstance(alpha, np.ndarray) or alpha.dtype != np.float32 or alpha.shape != shape[:2]:
        raise ValueError(f"{where}.exemplar_alpha must be a {shape[:2]} float32 array, got {_describe(alpha)}")
    if not (np.isfinite(alpha).all() and alpha.min() >= 0.0 and alpha.max() <= 1.0) or not alpha.any():
        raise ValueError(f"{where}.exemplar_alpha must lie in [0, 1] and be non-zero somewhere")


def _describe(value: object) -> str:
    if isinstance(value, np.ndarray):
        return f"{value.dtype} array of shape {value.shape}"
    return type(value).__name__
