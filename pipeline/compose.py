"""Put an exemplar into a scene at the image's own resolution, and keep its detail after the generator.

Three pure steps of the insert stage's exemplar mode:

1. :func:`place_exemplar`: scale a real instance and its silhouette to the target height (area averaging
   when shrinking, bicubic when enlarging), optionally mirror it and rotate its hue, and composite it over
   the scene with its lower silhouette edge on the chosen row.
2. :func:`feathered_paste`: the composite with a light feather on the boundary, for generators that do not
   take exemplars (and for ``harmonise = false``, the naive paste).
3. :func:`keep_detail`: after a generator has repainted the region in context, the output in the region
   is the low-pass of the generator's frame plus the high-pass of the placed composite (a
   Laplacian-pyramid split): the exemplar's detail inside the silhouette, the scene's in the boundary ring
   and shadow band, the generator's light, colour and shadow everywhere; every pixel outside the
   repainted region keeps its input value.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from .exemplars import Exemplar

FEATHER_SIGMA_PX = 0.8
"""Gaussian feather of a pasted silhouette's edge (pixels): enough to hide the staircase of a hard cut,
too little to halo (common practice)."""


@dataclass(frozen=True, eq=False)
class Placed:
    """An exemplar placed in a frame.

    Attributes
    ----------
    composite : (H, W, 3) uint8 ndarray
        The scene with the exemplar alpha-composited over it.
    alpha : (H, W) float32 ndarray
        The placed silhouette's (resampled, soft-edged) alpha.
    silhouette : (H, W) bool ndarray
        ``alpha >= 0.5``: the label's pixels. Never empty.
    box : (x, y, w, h) float
        The silhouette's pixel bounds: the label box.
    scale : float
        Target height over the exemplar's silhouette height.
    """

    composite: np.ndarray
    alpha: np.ndarray
    silhouette: np.ndarray
    box: tuple[float, float, float, float]
    scale: float


def rotate_hue(pixels: np.ndarray, degrees: float) -> np.ndarray:
    """``pixels`` (uint8 RGB) with every hue turned by ``degrees`` (HSV hue; saturation and value kept).

    References
    ----------
    A. R. Smith, "Color gamut transform pairs", SIGGRAPH 1978 (the HSV model; OpenCV's conversion).
    """
    if degrees == 0:
        return pixels.copy()
    hsv = cv2.cvtColor(pixels.astype(np.float32) / 255.0, cv2.COLOR_RGB2HSV)
    hsv[..., 0] = np.mod(hsv[..., 0] + degrees, 360.0)
    return np.clip(np.rint(cv2.cvtColor(hsv, cv2.COLOR_HSV2RGB) * 255.0), 0, 255).astype(np.uint8)


def _resized(exemplar: Exemplar, scale: float, mirror: bool, hue_deg: float) -> tuple[np.ndarray, np.ndarray]:
    pixels, alpha = exemplar.pixels, exemplar.alpha
    if hue_deg:
        turned = rotate_hue(pixels, hue_deg)
        pixels = np.where(alpha[..., None] > 0, turned, pixels)
    if mirror:
        pixels, alpha = pixels[:, ::-1], alpha[:, ::-1]
    h, w = alpha.shape
    size = (max(1, round(w * scale)), max(1, round(h * scale)))
    if size != (w, h):
        # Area averaging when shrinking (no aliasing), bicubic when enlarging (Keys, "Cubic convolution
        # interpolation for digital image processing", IEEE ASSP 1981).
        interpolation = cv2.INTER_AREA if scale < 1 else cv2.INTER_CUBIC
        pixels = cv2.resize(np.ascontiguousarray(pixels), size, interpolation=interpolation)
        alpha = cv2.resize(
            np.ascontiguousarray(alpha), size, interpolation=cv2.INTER_AREA if scale < 1 else cv2.INTER_LINEAR
        )
    return np.ascontiguousarray(pixels), np.clip(alpha, 0.0, 1.0).astype(np.float32)


def place_exemplar(
    scene: np.ndarray,
    exemplar: Exemplar,
    *,
    bottom_row: int,
    centre_col: float,
    height_px: float,
    mirror: bool = False,
    hue_deg: float = 0.0,
) -> Placed | None:
    """Scale ``exemplar`` to ``height_px`` and composite it so its silhouette ends on row ``bottom_row - 1``.

    Parameters
    ----------
    scene : (H, W, 3) uint8 ndarray
    exemplar : Exemplar
    bottom_row : int
        The lower edge of the placed silhouette (the label box's ``y + h``).
    centre_col : float
        Column of the silhouette's horizontal centre.
    height_px : float
        Wanted silhouette height.
    mirror : bool
        Flip left-right.
    hue_deg : float
        Hue rotation inside the silhouette (0 keeps the colours).

    Returns
    -------
    Placed or None
        None when the placed silhouette would leave the image.
    """
    if not height_px > 0:
        raise ValueError(f"height_px must be > 0, got {height_px}")
    scale = float(height_px) / exemplar.height
    pixels, alpha = _resized(exemplar, scale, mirror, hue_deg)
    inside = alpha >= 0.5
    if not inside.any():
        return None
    rows = np.flatnonzero(inside.any(axis=1))
    cols = np.flatnonzero(inside.any(axis=0))
    oy = int(bottom_row) - int(rows[-1] + 1)
    ox = int(math.floor(centre_col - (cols[0] + cols[-1] + 1) / 2 + 0.5))
    height, width = scene.shape[:2]
    if oy + rows[0] < 0 or ox + cols[0] < 0 or oy + rows[-1] >= height or ox + cols[-1] >= width:
        return None
    full_alpha = np.zeros((height, width), dtype=np.float32)
    r0, c0 = max(oy, 0), max(ox, 0)
    r1, c1 = min(oy + alpha.shape[0], height), min(ox + alpha.shape[1], width)
    full_alpha[r0:r1, c0:c1] = alpha[r0 - oy : r1 - oy, c0 - ox : c1 - ox]
    layer = scene.copy()
    layer[r0:r1, c0:c1] = pixels[r0 - oy : r1 - oy, c0 - ox : c1 - ox]
    composite = blend(scene, layer, full_alpha)
    silhouette = full_alpha >= 0.5
    box = (float(ox + cols[0]), float(oy + rows[0]), float(cols[-1] + 1 - cols[0]), float(rows[-1] + 1 - rows[0]))
    return Placed(composite, full_alpha, silhouette, box, scale)


def blend(base: np.ndarray, top: np.ndarray, alpha: np.ndarray) -> np.ndarray:
    """``alpha * top + (1 - alpha) * base``, rounded; pixels where ``alpha == 0`` are ``base`` exactly."""
    out = base.copy()
    where = alpha > 0
    a = alpha[where][:, None]
    mixed = a * top[where].astype(np.float32) + (1.0 - a) * base[where].astype(np.float32)
    out[where] = np.clip(np.rint(mixed), 0, 255).astype(np.uint8)
    return out


def feathered_paste(scene: np.ndarray, placed: Placed, region: np.ndarray) -> np.ndarray:
    """The placed exemplar pasted with a :data:`FEATHER_SIGMA_PX` feather, changing nothing outside ``region``.

    Parameters
    ----------
    scene : (H, W, 3) uint8 ndarray
    placed : Placed
    region : (H, W) bool ndarray
        Pixels that may change (the grown silhouette).
    """
    alpha = cv2.GaussianBlur(placed.alpha, (0, 0), FEATHER_SIGMA_PX) * region
    # The feather softens the edge only: inside the silhouette the exemplar stays whole.
    alpha = np.where(placed.alpha >= 1.0, 1.0, alpha).astype(np.float32)
    return blend(scene, placed.composite, alpha)


def detail_levels(object_px: float, window_px: int) -> int:
    """Pyramid levels whose detail comes from the exemplar, for an object whose context window
    (twice its longer side, see :mod:`pipeline.generator.windows`) is drawn at ``window_px`` model pixels.

    The generator draws one model pixel per ``ratio = 2 object_px / window_px`` image pixels, so it can
    carry detail of periods down to about ``2 ratio``; a level ``L`` split leaves it periods longer than
    about ``2^(L+1)`` px. ``L = 1 + max(0, ceil(log2 ratio))``: the generator keeps shading, colour and
    shadow; the exemplar keeps every edge the model's window is too coarse to draw crisply.
    """
    ratio = max(2.0 * float(object_px) / max(int(window_px), 1), 1e-6)
    return 1 + max(0, math.ceil(math.log2(ratio)))


def low_pass(image: np.ndarray, levels: int) -> np.ndarray:
    """The Gaussian-pyramid low-pass of ``image`` (float32): ``levels`` reductions, then as many expansions.

    ``image - low_pass(image, L)`` is the sum of the first ``L`` Laplacian levels (the high-pass).

    References
    ----------
    P. J. Burt, E. H. Adelson, "The Laplacian Pyramid as a Compact Image Code", IEEE Trans.
    Communications 31 (1983): REDUCE and EXPAND with the 5-tap generating kernel (OpenCV's pyrDown/pyrUp).
    """
    sizes = []
    current = image.astype(np.float32)
    for _ in range(levels):
        if min(current.shape[:2]) < 2:
            break
        sizes.append((current.shape[1], current.shape[0]))
        current = cv2.pyrDown(current)
    for size in reversed(sizes):
        current = cv2.pyrUp(current, dstsize=size)
    return current


def keep_detail(
    scene: np.ndarray, generated: np.ndarray, placed: Placed, region: np.ndarray, *, levels: int
) -> np.ndarray:
    """Low frequencies from the generator, high frequencies from the placed composite, inside ``region``.

    ``out = low(generated) + high(composite)`` inside ``region``; ``scene`` outside it. Inside the silhouette
    the highs are the exemplar's, so the object is as crisp as the real one; in the boundary ring and the
    shadow band the composite is the scene, so its own texture (road markings, the edge of a farther car)
    stays crisp under the generator's shading and shadow. The generator's highs are dropped everywhere: a
    64 px window drawn over an object's context is softer than the frame (one model pixel covers about
    ``2 object_px / 64`` image pixels), and its highs alone left a soft halo around every object.

    Parameters
    ----------
    scene : (H, W, 3) uint8 ndarray
        The input frame.
    generated : (H, W, 3) uint8 ndarray
        The generator's frame (changed only inside ``region``).
    placed : Placed
    region : (H, W) bool ndarray
        The repainted region (grown silhouette and shadow band).
    levels : int
        See :func:`detail_levels`.
    """
    rows = np.flatnonzero(region.any(axis=1))
    cols = np.flatnonzero(region.any(axis=0))
    pad = 2 ** (levels + 1)
    height, width = region.shape
    r0, r1 = max(int(rows[0]) - pad, 0), min(int(rows[-1]) + 1 + pad, height)
    c0, c1 = max(int(cols[0]) - pad, 0), min(int(cols[-1]) + 1 + pad, width)
    gen = generated[r0:r1, c0:c1].astype(np.float32)
    comp = placed.composite[r0:r1, c0:c1].astype(np.float32)
    merged = np.clip(np.rint(low_pass(gen, levels) + comp - low_pass(comp, levels)), 0, 255).astype(np.uint8)
    out = scene.copy()
    sub = region[r0:r1, c0:c1]
    out[r0:r1, c0:c1][sub] = merged[sub]
    return out
