"""Plausibility filters for synthetic composites: each is a small function returning a :class:`Verdict`.

A verdict carries the measured value, the limit and a reason, and is falsy when the candidate is rejected,
so ``all(verdicts)`` accepts. Geometric filters look at one new box against the scene's other boxes (see
:func:`check_geometry`); image filters look at pixels (blend seam) or at outputs already accepted
(near-duplicates via a perceptual hash).

Boxes are COCO ``(x, y, w, h)`` in pixels from the top-left corner.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Sequence
from dataclasses import dataclass, fields
from typing import Any

import cv2
import numpy as np

from .geometry import GroundModel, ground_distance, lateral_offset

# The focal-length helpers live with the distances; the filters have always offered them too.
from .geometry.distances import ASSUMED_HFOV_DEG as ASSUMED_HFOV_DEG
from .geometry.distances import focal_from_fov as focal_from_fov
from .geometry.distances import focal_length
from .surface import footprint_share


@dataclass(frozen=True)
class Verdict:
    """The outcome of one filter. Falsy when the candidate is rejected.

    Attributes
    ----------
    name : str
        Filter name (``"scale"``, ``"surface"``, ``"overlap"``, ``"gap"``, ``"objects"``, ``"seam"``,
        ``"duplicate"``).
    passed : bool
    value : float or None
        What was measured (None when it cannot be measured, e.g. a box above the horizon).
    limit : float
        The limit it was compared with.
    reason : str
        One sentence: the value, the limit and, on rejection, why.
    """

    name: str
    passed: bool
    value: float | None
    limit: float
    reason: str

    def __bool__(self) -> bool:
        return self.passed

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; a non-finite value becomes None (JSON has no infinity)."""
        value = self.value if self.value is None or math.isfinite(self.value) else None
        return {"name": self.name, "passed": self.passed, "value": value, "limit": self.limit, "reason": self.reason}


@dataclass(frozen=True)
class FilterLimits:
    """Limits of the plausibility filters (a recipe may override each).

    Attributes
    ----------
    scale_k_sd : float
        2.5. Largest ``|log(h / expected)|`` in units of the class's fitted spread: 2.5 sd keeps about 99%
        of real boxes (normal log heights), while a box at 0.5x or 2x is |log 2| = 0.69 away, many sd for
        the 0.05-0.15 spreads real classes show.
    min_surface_share : float
        0.8. Least share of the footprint strip on the drivable surface: a wheel may touch the verge,
        most of the object must stand on the road or shoulder.
    max_iou : float
        0.1. Largest IoU with any other object: an inserted object painted over a labelled one would erase
        pixels that the kept label still claims, so only slight overlap is allowed.
    min_gap_m : float
        1.0. Least ground-plane distance in metres between the front edges (footprints) of two objects:
        vehicles keep about a metre apart even when parked (from memory).
    max_objects : int
        12. Most objects in one image after insertion: a rural road scene rarely shows more than about a
        dozen vehicles; busier scenes would train the detector on an unlikely scene.
    max_seam_ratio : float
        2.5. Largest ratio of mean gradient magnitude on the blend-mask border to that of its surroundings
        (:func:`seam_strength`). Measured on the 190 train and val seed scenes with the insert stage's
        masks around their 696 real objects: untouched images score a median 1.14 (99th percentile 2.35,
        0.4% above 2.5); the same masks filled hard with another scene's pixels score a median 3.4 (79%
        above 2.5), feathered with a 2.5 px Gaussian 1.4 (1% above).
    min_hash_distance : int
        6. Least Hamming distance (of 64 bits) between the pHash of a new output and every accepted one:
        re-encoded or slightly noised copies differ by 0-4 bits, unrelated scenes by about 32.
    min_present_probability : float
        0.5. Least probability the verifier (trained on real crops) gives the wanted class in a new
        object's box: at 0.5 the wanted class is more likely than all other classes and background
        together. The verifier filter itself lives in :mod:`pipeline.judge`.
    """

    scale_k_sd: float = 2.5
    min_surface_share: float = 0.8
    max_iou: float = 0.1
    min_gap_m: float = 1.0
    max_objects: int = 12
    max_seam_ratio: float = 2.5
    min_hash_distance: int = 6
    min_present_probability: float = 0.5

    def __post_init__(self) -> None:
        for item in fields(self):
            value = getattr(self, item.name)
            if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
                raise ValueError(f"FilterLimits.{item.name} must be a finite number, got {value!r}")
        unit = {
            "min_surface_share": self.min_surface_share,
            "max_iou": self.max_iou,
            "min_present_probability": self.min_present_probability,
        }
        for name, value in unit.items():
            if not 0 <= value <= 1:
                raise ValueError(f"FilterLimits.{name} must be in [0, 1], got {value}")
        for name in ("scale_k_sd", "min_gap_m", "max_seam_ratio"):
            if getattr(self, name) < 0:
                raise ValueError(f"FilterLimits.{name} must be >= 0, got {getattr(self, name)}")
        if not isinstance(self.max_objects, int) or self.max_objects < 1:
            raise ValueError(f"FilterLimits.max_objects must be an integer >= 1, got {self.max_objects!r}")
        if not isinstance(self.min_hash_distance, int) or not 0 <= self.min_hash_distance <= 64:
            raise ValueError(
                f"FilterLimits.min_hash_distance must be an integer in [0, 64], got {self.min_hash_distance!r}"
            )


# --------------------------------------------------------------------------------------------------
# geometric filters


def scale(
    box: Sequence[float], category: str, ground: GroundModel, limits: FilterLimits, *, image_id: int | None = None
) -> Verdict:
    """Is the box as tall as the ground model expects for ``category`` at its bottom row?

    Value: ``|log(h / expected)| / sd`` in standard deviations, ``sd`` from
    :meth:`~pipeline.geometry.GroundModel.log_sd` (the image's own horizon when ``image_id`` names a
    fitted image); limit: ``limits.scale_k_sd``.

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006.
    """
    _, y, _, h = _box(box)
    bottom = y + h
    ground.class_ground(category)
    horizon = ground.horizon_for(image_id)
    if not bottom > horizon:
        return Verdict(
            "scale", False, None, limits.scale_k_sd,
            f"bottom row {bottom:.1f} is at or above the horizon row {horizon:.1f}: nothing stands there",
        )  # fmt: skip
    expected = ground.expected_height(category, bottom, image_id=image_id).expected
    ratio = h / expected
    sd = abs(math.log(ratio)) / max(ground.log_sd(category, bottom, image_id=image_id), 1e-6)
    passed = sd <= limits.scale_k_sd
    reason = (
        f"height {h:.1f} px is {ratio:.2f}x the expected {expected:.1f} px at row {bottom:.0f} "
        f"({sd:.1f} sd; limit {limits.scale_k_sd:g} sd)"
    )
    return Verdict("scale", passed, sd, limits.scale_k_sd, reason if passed else reason + ": implausible size")


def surface(box: Sequence[float], mask: np.ndarray, limits: FilterLimits) -> Verdict:
    """Does the box's footprint (bottom-edge strip) stand on the drivable surface?"""
    share = footprint_share(_box(box), mask)
    passed = share >= limits.min_surface_share
    reason = f"{share:.0%} of the footprint is on the drivable surface (limit {limits.min_surface_share:.0%})"
    return Verdict("surface", passed, share, limits.min_surface_share, reason if passed else reason + ": off the road")


def box_iou(box: Sequence[float], others: np.ndarray | Sequence[Sequence[float]]) -> np.ndarray:
    """IoU of one ``(x, y, w, h)`` box with each of ``others`` ((N, 4) float): (N,) float64."""
    x, y, w, h = _box(box)
    o = np.asarray(others, dtype=np.float64).reshape(-1, 4)
    ix = np.clip(np.minimum(x + w, o[:, 0] + o[:, 2]) - np.maximum(x, o[:, 0]), 0, None)
    iy = np.clip(np.minimum(y + h, o[:, 1] + o[:, 3]) - np.maximum(y, o[:, 1]), 0, None)
    inter = ix * iy
    return inter / (w * h + o[:, 2] * o[:, 3] - inter)


def overlap(box: Sequence[float], others: Sequence[Sequence[float]], limits: FilterLimits) -> Verdict:
    """Does the box overlap another object by more than ``limits.max_iou`` (largest IoU)?"""
    worst = float(box_iou(box, others).max()) if len(others) else 0.0
    passed = worst <= limits.max_iou
    reason = f"largest IoU with another object is {worst:.2f} (limit {limits.max_iou:g})"
    return Verdict("overlap", passed, worst, limits.max_iou, reason if passed else reason + ": objects overlap")


def footprint_gaps(
    box: Sequence[float],
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> np.ndarray:
    """Ground-plane distance (metres) from the box's footprint to each other box's footprint.

    A footprint is the object's front edge on the ground: the segment from ``X(x)`` to ``X(x + w)`` at
    distance ``Z(bottom row)`` (:func:`~pipeline.geometry.ground_distance`,
    :func:`~pipeline.geometry.lateral_offset`). The gap between two segments is ``hypot(dx, dz)`` with
    ``dx`` their lateral separation (0 when they overlap sideways) and ``dz`` the difference in distance.
    Object length along the road is not modelled; one object hidden right behind another is caught by
    the IoU filter instead. Other boxes whose bottom row is at or above the horizon get ``inf``.
    ``image_id`` picks the image's own horizon (:meth:`~pipeline.geometry.GroundModel.horizon_for`).

    Returns
    -------
    (N,) float64 ndarray
    """
    x, y, w, h = _box(box)
    o = np.asarray(others, dtype=np.float64).reshape(-1, 4)
    gaps = np.full(len(o), np.inf)
    if not len(o):
        return gaps
    bottoms = o[:, 1] + o[:, 3]
    ok = bottoms > ground.horizon_for(image_id) + 1e-9
    camera = {"camera_height_m": camera_height_m, "image_id": image_id}
    z0 = ground_distance(y + h, ground, focal_px=focal_px, **camera)
    left0, right0 = (lateral_offset(c, y + h, ground, **camera) for c in (x, x + w))
    if ok.any():
        z = ground_distance(bottoms[ok], ground, focal_px=focal_px, **camera)
        left = lateral_offset(o[ok, 0], bottoms[ok], ground, **camera)
        right = lateral_offset(o[ok, 0] + o[ok, 2], bottoms[ok], ground, **camera)
        dx = np.clip(np.maximum(left0, left) - np.minimum(right0, right), 0, None)
        gaps[ok] = np.hypot(dx, z - z0)
    return gaps


def gap(
    box: Sequence[float],
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    limits: FilterLimits,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> Verdict:
    """Is the box's footprint at least ``limits.min_gap_m`` metres from every other footprint?

    See :func:`footprint_gaps`. A box at or above the horizon fails (it has no ground position).
    """
    _, y, _, h = _box(box)
    if not y + h > ground.horizon_for(image_id):
        reason = "bottom row is at or above the horizon: no ground position"
        return Verdict("gap", False, None, limits.min_gap_m, reason)
    gaps = footprint_gaps(box, others, ground, focal_px=focal_px, camera_height_m=camera_height_m, image_id=image_id)
    nearest = float(gaps.min()) if len(gaps) else math.inf
    passed = nearest >= limits.min_gap_m
    shown = "no other object on the ground" if not math.isfinite(nearest) else f"nearest object is {nearest:.1f} m away"
    reason = f"{shown} (limit {limits.min_gap_m:g} m)"
    return Verdict("gap", passed, nearest, limits.min_gap_m, reason if passed else reason + ": objects too close")


def objects(count: int, limits: FilterLimits) -> Verdict:
    """Does the image hold at most ``limits.max_objects`` objects (``count`` after insertion)?"""
    if count < 0:
        raise ValueError(f"count must be >= 0, got {count}")
    passed = count <= limits.max_objects
    reason = f"{count} objects in the image (limit {limits.max_objects})"
    reason = reason if passed else reason + ": too busy"
    return Verdict("objects", passed, float(count), float(limits.max_objects), reason)


def check_geometry(
    box: Sequence[float],
    category: str,
    others: Sequence[Sequence[float]],
    ground: GroundModel,
    surface_mask: np.ndarray,
    limits: FilterLimits,
    *,
    focal_px: float | None = None,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> list[Verdict]:
    """Run the geometric filters (scale, surface, overlap, gap, objects) for one new box.

    Parameters
    ----------
    box : (x, y, w, h) floats
        The new object's box.
    category : str
        Its class name.
    others : (N, 4) floats
        Boxes of the objects already in the image.
    ground : GroundModel
    surface_mask : (H, W) bool ndarray
    limits : FilterLimits
    focal_px : float, optional
        Focal length for the gap filter; default the model's (:func:`~pipeline.geometry.distances.focal_length`:
        its calibration, else an assumed field of view).
    camera_height_m : float, optional
        Default: the model's estimate.
    image_id : int, optional
        The image's id: its own fitted horizon is used when the model has one (pitch varies per image).

    Returns
    -------
    list of Verdict
        In the order scale, surface, overlap, gap, objects.
    """
    focal = focal_length(ground) if focal_px is None else focal_px
    return [
        scale(box, category, ground, limits, image_id=image_id),
        surface(box, surface_mask, limits),
        overlap(box, others, limits),
        gap(box, others, ground, limits, focal_px=focal, camera_height_m=camera_height_m, image_id=image_id),
        objects(len(others) + 1, limits),
    ]


def _box(box: Sequence[float]) -> tuple[float, float, float, float]:
    if len(box) != 4:
        raise ValueError(f"a box is (x, y, w, h), got {len(box)} values")
    x, y, w, h = (float(v) for v in box)
    if not (w > 0 and h > 0) or not all(math.isfinite(v) for v in (x, y)):
        raise ValueError(f"box must have finite x, y and w, h > 0, got ({x:g}, {y:g}, {w:g}, {h:g})")
    return x, y, w, h


# --------------------------------------------------------------------------------------------------
# image filters


def _grey(image: np.ndarray) -> np.ndarray:
    if image.dtype != np.uint8 or image.ndim not in (2, 3) or (image.ndim == 3 and image.shape[2] != 3):
        raise ValueError(f"image must be (H, W) or (H, W, 3) uint8, got {image.shape} {image.dtype}")
    return cv2.cvtColor(image, cv2.COLOR_RGB2GRAY) if image.ndim == 3 else image


def seam_strength(image: np.ndarray, mask: np.ndarray, *, ring_px: int = 1, band_px: int = 6) -> float:
    """Gradient energy along the blend-mask border relative to the gradients around it.

    ``mean |grad I|`` over the ring of pixels within ``ring_px`` of the mask border, divided by the mean
    gradient magnitude over the band from ``ring_px`` to ``ring_px + band_px`` pixels outside the mask
    (3x3 Sobel on the greyscale image). A good blend looks like its surroundings there (ratio about 1);
    a hard pasted edge puts a step on the ring that the surroundings do not have. The band's mean is
    floored at half the image's mean gradient, so flat surroundings (sky, clean asphalt) do not turn a
    faint seam into a large ratio.

    The surroundings, not the whole image, are the reference because objects stand among edges: on the
    seed scenes, half of the untouched real objects' insert masks score above 2.3 against the whole
    image's mean gradient (5 px ring), against its surroundings a median 1.14 (3 px ring).

    Parameters
    ----------
    image : (H, W, 3) or (H, W) uint8 ndarray
        The composite.
    mask : (H, W) bool ndarray
        The region that was generated or pasted.
    ring_px : int
        Half-width of the border ring in pixels.
    band_px : int
        Width of the reference band outside the ring in pixels.

    Returns
    -------
    float
        0 for an image without gradients or a mask without a border.
    """
    grey = _grey(image)
    if mask.shape != grey.shape:
        raise ValueError(f"mask shape {mask.shape} differs from the image's {grey.shape}")
    if ring_px < 1 or band_px < 1:
        raise ValueError(f"ring_px and band_px must be >= 1, got {ring_px}, {band_px}")
    # Integer Sobel responses are exact; float64 magnitudes and sums keep the verdict reproducible to the bit.
    gx = cv2.Sobel(grey, cv2.CV_16S, 1, 0, ksize=3).astype(np.float64)
    gy = cv2.Sobel(grey, cv2.CV_16S, 0, 1, ksize=3).astype(np.float64)
    magnitude = np.sqrt(gx * gx + gy * gy)
    m = mask.astype(np.uint8)
    near = cv2.dilate(m, np.ones((2 * ring_px + 1, 2 * ring_px + 1), np.uint8))
    ring = (near - cv2.erode(m, np.ones((2 * ring_px + 1, 2 * ring_px + 1), np.uint8))).astype(bool)
    far = cv2.dilate(m, np.ones((2 * (ring_px + band_px) + 1,) * 2, np.uint8))
    band = (far - near).astype(bool)
    typical = float(magnitude.mean())
    if not ring.any() or typical == 0:
        return 0.0
    reference = max(float(magnitude[band].mean()) if band.any() else 0.0, 0.5 * typical)
    return float(magnitude[ring].mean()) / reference


def seam(image: np.ndarray, mask: np.ndarray, limits: FilterLimits) -> Verdict:
    """Is the blend seam no stronger than ``limits.max_seam_ratio`` (see :func:`seam_strength`)?"""
    ratio = seam_strength(image, mask)
    passed = ratio <= limits.max_seam_ratio
    reason = f"gradient on the blend border is {ratio:.2f}x that around it (limit {limits.max_seam_ratio:g})"
    return Verdict("seam", passed, ratio, limits.max_seam_ratio, reason if passed else reason + ": visible seam")


def phash(image: np.ndarray) -> int:
    """64-bit perceptual hash (pHash) of an image.

    Greyscale, resized to 32x32 (area averaging), 2-D DCT, the 8x8 lowest frequencies compared with their
    median: one bit per coefficient, row-major, first coefficient in the highest bit.

    Parameters
    ----------
    image : (H, W, 3) or (H, W) uint8 ndarray

    Returns
    -------
    int in [0, 2**64)

    References
    ----------
    C. Zauner, "Implementation and Benchmarking of Perceptual Image Hash Functions", 2010 (from memory).
    """
    small = cv2.resize(_grey(image), (32, 32), interpolation=cv2.INTER_AREA).astype(np.float32)
    low = cv2.dct(small)[:8, :8].ravel()
    bits = low > np.median(low)
    return int.from_bytes(np.packbits(bits).tobytes(), "big")


def hamming(a: int, b: int) -> int:
    """Number of differing bits of two 64-bit hashes."""
    return (a ^ b).bit_count()


class DuplicateIndex:
    """Hashes of accepted outputs, searched by Hamming distance (a linear scan: thousands per ms)."""

    def __init__(self) -> None:
        self._hashes = np.zeros(64, dtype=np.uint64)
        self._keys: list[Hashable] = []

    def __len__(self) -> int:
        return len(self._keys)

    def add(self, key: Hashable, image_hash: int) -> None:
        """Record an accepted output's hash under ``key`` (e.g. its file name)."""
        if not 0 <= image_hash < 2**64:
            raise ValueError(f"image_hash must be a 64-bit unsigned integer, got {image_hash}")
        if len(self._keys) == len(self._hashes):
            # Doubling keeps adding n hashes O(n) overall.
            self._hashes = np.concatenate([self._hashes, np.zeros_like(self._hashes)])
        self._hashes[len(self._keys)] = image_hash
        self._keys.append(key)

    def nearest(self, image_hash: int) -> tuple[int, Hashable] | None:
        """``(distance, key)`` of the closest recorded hash, None when the index is empty."""
        if not self._keys:
            return None
        distances = np.bitwise_count(self._hashes[: len(self._keys)] ^ np.uint64(image_hash))
        best = int(np.argmin(distances))
        return int(distances[best]), self._keys[best]


def near_duplicate(image_hash: int, index: DuplicateIndex, limits: FilterLimits) -> Verdict:
    """Is the output at least ``limits.min_hash_distance`` bits from every accepted output's pHash?"""
    found = index.nearest(image_hash)
    limit = float(limits.min_hash_distance)
    if found is None:
        return Verdict("duplicate", True, 64.0, limit, "no accepted output to compare with yet")
    distance, key = found
    passed = distance >= limits.min_hash_distance
    reason = f"nearest accepted output {key!r} is {distance} bits away (limit {limits.min_hash_distance})"
    return Verdict("duplicate", passed, float(distance), limit, reason if passed else reason + ": near-duplicate")
