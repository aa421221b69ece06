"""The exemplar bank: real instances of a class, cut out once, that the insert stage places into new scenes.

Every non-crowd instance of the class in the run's data set (the training split) is considered once, in
data set order. It is usable when it is whole: not truncated by the image edge, not mostly hidden by a
nearer object (real data has no visibility key, so the share of its box covered by the boxes of objects
standing nearer the camera stands in for it) and with a silhouette that fills its box
(:func:`pipeline.silhouette.object_silhouette`: the segmentation where given, else GrabCut). Each usable
instance keeps a crop of its pixels and its silhouette, so an insertion never reads a source image again.

Which exemplar serves a job is decided by :func:`ExemplarBank.pick`: the instances that can reach the job's
target height within the upscale limit, in a fixed shuffled order, dealt round-robin over the job slots,
so every usable instance is used about equally often.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np

from .across_road import real_laterals
from .dataset import Annotation, Dataset, Scene
from .geometry import is_usable
from .height_draws import height_targets, ks_distance
from .provenance import KEY
from .relight import image_light
from .silhouette import box_pixels, object_silhouette
from .surface import Surface

MAX_OCCLUDED_SHARE = 0.2
"""An instance whose box is covered by nearer objects' boxes by more than this share is not used: its
silhouette would carry part of the occluder, or miss the hidden part of the object."""

MIN_FILL = 0.8
"""A silhouette whose bounds are less tall or wide than this share of the labelled box has missed part of
the object (GrabCut lost a roof against the sky, say); such an instance is not used."""

MIN_EXEMPLAR_PX = 8
"""Shortest usable silhouette side: fewer pixels hold no structure to place."""

CROP_MARGIN_PX = 2
"""Pixels of context kept around a silhouette's bounds, so that resampling sees the true edge."""

REASONS = {
    "truncated": "truncated by the image edge",
    "occluded": "mostly hidden by a nearer object",
    "no_silhouette": "no silhouette (GrabCut failed; the box would paste background)",
    "partial_silhouette": "silhouette misses part of the box",
    "too_small": f"silhouette under {MIN_EXEMPLAR_PX} px",
}


@dataclass(frozen=True, eq=False)
class Exemplar:
    """One real instance, cut out of its image.

    Attributes
    ----------
    image_id, annotation_id : int
    file_name : str
        The source image's file name in the data set.
    pixels : (h, w, 3) uint8 ndarray
        The crop around the silhouette's bounds (``CROP_MARGIN_PX`` on every side, clipped to the image).
    alpha : (h, w) float32 ndarray
        The silhouette in the crop: 1 inside, 0 outside.
    bounds : (x0, y0, x1, y1) int
        The silhouette's pixel bounds inside the crop, end exclusive.
    source : str
        Where the silhouette came from (``"segmentation"`` or ``"grabcut"``).
    light : (3,) float64 ndarray or None
        Mean RGB of the whole source image, its light by the grey-world assumption (see
        :func:`pipeline.relight.light_gain`).
    """

    image_id: int
    annotation_id: int
    file_name: str
    pixels: np.ndarray
    alpha: np.ndarray
    bounds: tuple[int, int, int, int]
    source: str
    light: np.ndarray | None = None

    @property
    def height(self) -> int:
        """Silhouette height in pixels."""
        return self.bounds[3] - self.bounds[1]

    def describe(self) -> dict:
        """Provenance: which real instance this is."""
        return {
            "image_id": self.image_id,
            "file_name": self.file_name,
            "annotation_id": self.annotation_id,
            "silhouette": self.source,
            "height_px": self.height,
        }


@dataclass(frozen=True)
class ExemplarBank:
    """The usable instances of one class and why the others were left out.

    Attributes
    ----------
    category : str
    exemplars : tuple of Exemplar
        In a fixed shuffled order (see :func:`build_bank`).
    considered : int
        Non-crowd instances of the class in the data set.
    left_out : mapping of str to int
        Count per reason key of :data:`REASONS`.
    max_upscale : float
        Largest factor an exemplar may be enlarged by.
    heights : (N,) float64 ndarray
        The class's real box heights (frame-truncated boxes left out) that target heights are drawn from.
    bandwidth : float
        Log-space kernel bandwidth of the target heights (see :func:`height_targets`).
    laterals : (M,) float64 ndarray
        The class's real places across the road (:func:`pipeline.across_road.real_laterals`); empty
        when the bank was built without surfaces.
    """

    category: str
    exemplars: tuple[Exemplar, ...]
    considered: int
    left_out: Mapping[str, int] = field(default_factory=dict)
    max_upscale: float = 1.5
    heights: np.ndarray = field(default_factory=lambda: np.zeros(0))
    bandwidth: float = 0.0
    laterals: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def usable_for(self, height_px: float) -> list[int]:
        """Indices of the exemplars that reach ``height_px`` within the upscale limit."""
        return [i for i, e in enumerate(self.exemplars) if e.height * self.max_upscale >= height_px]

    def pick(self, height_px: float, slot: int) -> Exemplar | None:
        """The exemplar of job slot ``slot`` for a target of ``height_px``: round-robin over those usable."""
        usable = self.usable_for(height_px)
        return self.exemplars[usable[slot % len(usable)]] if usable else None

    def summary(self, heights: Sequence[float] = ()) -> dict:
        """How many instances are usable and why the others are not, and how many reach the tallest
        target (of ``heights``, default the tallest real box)."""
        out = {
            "class": self.category,
            "considered": self.considered,
            "usable": len(self.exemplars),
            "left_out": {REASONS[k]: n for k, n in sorted(self.left_out.items())},
            "max_upscale": self.max_upscale,
        }
        if len(heights) or self.heights.size:
            tallest = float(max(heights)) if len(heights) else float(self.heights.max())
            out["usable_for_tallest_target"] = {"height_px": round(tallest, 1), "count": len(self.usable_for(tallest))}
        return out


def nearer_boxes(ann: Annotation, scene: Scene) -> np.ndarray:
    """(H, W) bool mask of the union of the boxes of the objects standing nearer than ``ann`` (lower
    bottom edge)."""
    shape = (scene.height, scene.width)
    cover = np.zeros(shape, dtype=bool)
    for other in scene.annotations:
        if other.id == ann.id or other.iscrowd or other.bottom_row <= ann.bottom_row:
            continue
        q0, p0, q1, p1 = box_pixels(other.bbox, shape)
        cover[p0:p1, q0:q1] = True
    return cover


def occluded_share(ann: Annotation, nearer: np.ndarray) -> float:
    """Share of ``ann``'s box covered by ``nearer`` (:func:`nearer_boxes` of ``ann``)."""
    c0, r0, c1, r1 = box_pixels(ann.bbox, nearer.shape)
    if c1 <= c0 or r1 <= r0:
        return 1.0
    return float(nearer[r0:r1, c0:c1].mean())


def build_bank(
    dataset: Dataset,
    category: str,
    *,
    max_upscale: float = 1.5,
    order_seed: int = 0,
    surface: Callable[[Scene], Surface] | None = None,
) -> ExemplarBank:
    """Cut out every usable instance of ``category`` in ``dataset`` (images read once each).

    Parameters
    ----------
    dataset : Dataset
        The training split: exemplars never come from anywhere else.
    category : str
    max_upscale : float
        Largest enlargement of an exemplar (>= 1): enlarged further, a real instance is visibly softer than
        real objects of the target's size.
    order_seed : int
        Seeds the fixed shuffle of the usable instances (the round-robin order).
    surface : callable, optional
        A scene's drivable surface (:func:`pipeline.surface.surface_cache`), for the class's real places
        across the road (``ExemplarBank.laterals``).

    Returns
    -------
    ExemplarBank
    """
    if not max_upscale >= 1.0:
        raise ValueError(f"max_upscale must be >= 1, got {max_upscale}")
    category_id = dataset.category_by_name(category).id
    found: list[Exemplar] = []
    left_out: Counter[str] = Counter()
    considered = 0
    for scene in dataset.scenes:
        mine = [a for a in scene.annotations if a.category_id == category_id and not a.iscrowd]
        if not mine:
            continue
        image = None
        for ann in mine:
            considered += 1
            if not is_usable(ann, scene):
                left_out["truncated"] += 1
                continue
            nearer = nearer_boxes(ann, scene)
            if occluded_share(ann, nearer) > MAX_OCCLUDED_SHARE:
                left_out["occluded"] += 1
                continue
            image = scene.load_rgb() if image is None else image
            exemplar, reason = _cut_out(image, ann, scene, nearer)
            if exemplar is None:
                left_out[reason] += 1
            else:
                found.append(exemplar)
    order = np.random.default_rng(order_seed).permutation(len(found))
    heights = real_heights(dataset, category)
    heights, bandwidth = height_targets(heights) if heights.size else (heights, 0.0)
    laterals = real_laterals(dataset, category, surface) if surface is not None else np.zeros(0)
    return ExemplarBank(
        category,
        tuple(found[i] for i in order),
        considered,
        dict(left_out),
        float(max_upscale),
        heights,
        bandwidth,
        laterals,
    )


def exemplar_silhouette(image: np.ndarray, ann: Annotation, nearer: np.ndarray) -> tuple[np.ndarray, str]:
    """(H, W) bool silhouette of ``ann`` as an exemplar is cut out, and its source; ``nearer`` is
    :func:`nearer_boxes` of ``ann`` (lower parts never join inside it).

    The annotation's segmentation where given; else GrabCut's, without thin background parts above
    (:func:`without_thin_parts`), with the lower parts it lost against the road (:func:`with_lower_parts`)
    and reaching down to the box's bottom edge (:func:`grounded`). Empty when GrabCut found nothing
    (source ``"box"``: the box would paste background).
    """
    silhouette = object_silhouette(image, ann.bbox, segmentation=ann.segmentation)
    if silhouette.source == "box":
        return np.zeros_like(silhouette.mask), "box"
    mask = silhouette.mask
    if silhouette.source == "grabcut":
        mask = without_thin_parts(mask, ann.bbox[3])
        if mask.any():
            mask = grounded(with_lower_parts(mask, image, ann.bbox, nearer), ann.bbox)
    return mask, silhouette.source


def _cut_out(image: np.ndarray, ann: Annotation, scene: Scene, nearer: np.ndarray) -> tuple[Exemplar | None, str]:
    mask, source = exemplar_silhouette(image, ann, nearer)
    if not mask.any():
        return None, "no_silhouette"
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    r0, r1, c0, c1 = int(rows[0]), int(rows[-1]) + 1, int(cols[0]), int(cols[-1]) + 1
    _, _, w, h = ann.bbox
    if min(r1 - r0, c1 - c0) < MIN_EXEMPLAR_PX:
        return None, "too_small"
    if (r1 - r0) < MIN_FILL * h or (c1 - c0) < MIN_FILL * w:
        return None, "partial_silhouette"
    p0, q0 = max(r0 - CROP_MARGIN_PX, 0), max(c0 - CROP_MARGIN_PX, 0)
    p1, q1 = min(r1 + CROP_MARGIN_PX, image.shape[0]), min(c1 + CROP_MARGIN_PX, image.shape[1])
    pixels = np.ascontiguousarray(image[p0:p1, q0:q1])
    alpha = mask[p0:p1, q0:q1].astype(np.float32)
    bounds = (c0 - q0, r0 - p0, c1 - q0, r1 - p0)
    return Exemplar(scene.id, ann.id, scene.file_name, pixels, alpha, bounds, source, image_light(image)), ""


def without_thin_parts(mask: np.ndarray, box_height: float) -> np.ndarray:
    """A GrabCut silhouette without the thin background structures it tends to keep above an object
    (poles, wires, twigs that touch it): a morphological opening with a disc about 4% of the box height
    (3-7 px) in the upper half of the silhouette, then the largest 8-connected component. The lower half
    is kept as cut: wheels, axles and a trailer's chassis are thin parts of the object itself, and where
    it meets the ground is what places it.
    """
    radius = int(np.clip(round(0.04 * box_height), 1, 3))
    kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * radius + 1, 2 * radius + 1))
    opened = cv2.morphologyEx(mask.astype(np.uint8), cv2.MORPH_OPEN, kernel).astype(bool)
    rows = np.flatnonzero(mask.any(axis=1))
    middle = (int(rows[0]) + int(rows[-1]) + 1) // 2
    opened[middle:] = mask[middle:]
    count, labels, stats, _ = cv2.connectedComponentsWithStats(opened.astype(np.uint8), connectivity=8)
    if count < 2:
        return np.zeros_like(mask)
    return labels == 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))


ROAD_STRIP_PX = 4
"""Rows just below a box whose colour stands for the ground the object stands on (see :func:`with_lower_parts`)."""

ROAD_SPREAD = 3.0
"""A pixel is unlike the ground when its colour (sum of absolute RGB differences from the ground's median)
is more than this many times the ground strip's own median difference ..."""

MIN_ROAD_DIFFERENCE = 20.0
"""... and more than this (0-765 scale), so a uniform road does not make every speck an object."""

LOWER_PARTS_MARGIN = 0.1
"""Lower parts join only within the silhouette's columns widened by this share of the box width on each
side (wheels stand a little wider than a cab; a lane marking that runs off to the side stays out)."""


def with_lower_parts(mask: np.ndarray, image: np.ndarray, box: Sequence[float], blocked: np.ndarray) -> np.ndarray:
    """A GrabCut silhouette with the lower parts it lost against the road put back: wheels, tyres, legs.

    GrabCut, seeded by the box, tends to give dark tyres and a trailer's legs to the background where they
    meet a dark road (on the seed scenes, up to half a rear-view tractor's box height), and such an
    instance would be left out as a partial silhouette. Between the silhouette's lowest row and the box's
    bottom edge, the pixels whose colour is unlike the ground (the median of the :data:`ROAD_STRIP_PX`
    rows below the box, with the thresholds :data:`ROAD_SPREAD` and :data:`MIN_ROAD_DIFFERENCE`) and that
    connect to the silhouette (8-connected), within its columns widened by :data:`LOWER_PARTS_MARGIN`,
    join it; the road between the wheels stays out. Pixels in ``blocked`` ((H, W) bool: the boxes of
    nearer objects) never join: they may show the occluder.
    """
    height, width = mask.shape
    c0, r0, c1, r1 = box_pixels(box, (height, width))
    low = int(np.flatnonzero(mask.any(axis=1))[-1]) + 1
    ground = image[r1 : min(r1 + ROAD_STRIP_PX, height), c0:c1].reshape(-1, 3).astype(np.float32)
    if low >= r1 or len(ground) == 0:
        return mask
    road = np.median(ground, axis=0)
    spread = float(np.median(np.abs(ground - road).sum(axis=1)))
    cols = np.flatnonzero(mask.any(axis=0))
    margin = int(round(LOWER_PARTS_MARGIN * (c1 - c0)))
    q0, q1 = max(c0, int(cols[0]) - margin), min(c1, int(cols[-1]) + 1 + margin)
    band = np.abs(image[low:r1, q0:q1].astype(np.float32) - road).sum(axis=2)
    joined = mask.copy()
    joined[low:r1, q0:q1] |= (band > max(MIN_ROAD_DIFFERENCE, ROAD_SPREAD * spread)) & ~blocked[low:r1, q0:q1]
    _, labels = cv2.connectedComponents(joined.astype(np.uint8), connectivity=8)
    return np.isin(labels, np.unique(labels[mask]))


MAX_GROUND_GAP = 0.15
"""Largest gap (share of the box height) between a GrabCut silhouette's lowest row and its box's bottom
edge that :func:`grounded` closes."""


def grounded(mask: np.ndarray, box: Sequence[float]) -> np.ndarray:
    """A GrabCut silhouette reaching down to its box's bottom edge, where the object meets the ground.

    GrabCut tends to lose dark wheels and axles against a dark road (on the seed scenes' trailers, the
    lowest 7-11% of the box); placed by such a silhouette, an object would float on its chassis. The gap
    (up to :data:`MAX_GROUND_GAP` of the box height) is filled across the columns of the silhouette's
    lowest rows, so the wheels and the little road between them come along, and the placed object stands
    where its real one stood.
    """
    rows = np.flatnonzero(mask.any(axis=1))
    x, y, w, h = (float(v) for v in box)
    bottom = min(int(np.ceil(y + h)), mask.shape[0])
    low = int(rows[-1]) + 1
    if low >= bottom or bottom - low > MAX_GROUND_GAP * h:
        return mask
    cols = np.flatnonzero(mask[max(low - 3, int(rows[0])) : low].any(axis=0))
    out = mask.copy()
    out[low:bottom, int(cols[0]) : int(cols[-1]) + 1] = True
    return out


def real_heights(dataset: Dataset, category: str) -> np.ndarray:
    """Box heights of the class's real instances that the frame does not truncate (the ground model's boxes)."""
    category_id = dataset.category_by_name(category).id
    return np.asarray(
        [a.bbox[3] for s in dataset.scenes for a in s.annotations if a.category_id == category_id and is_usable(a, s)],
        dtype=np.float64,
    )


def banks_summary(banks: Mapping[int, ExemplarBank]) -> dict[str, dict]:
    """Per class (first stage using it), the bank summaries."""
    out: dict[str, dict] = {}
    for bank in banks.values():
        out.setdefault(bank.category, bank.summary())
    return out


def height_report(labels_path, dataset: Dataset, categories: Sequence[str]) -> dict[str, dict]:
    """Per target class: the accepted new objects' box heights against the real ones of ``dataset``.

    Returns ``{class: {"new": n, "real": n, "median_new", "median_real", "ks"}}`` (KS: :func:`ks_distance`);
    classes without new objects are left out.
    """
    path = Path(labels_path)
    if not path.is_file():
        return {}
    labels = json.loads(path.read_text(encoding="utf-8"))
    names = {c["id"]: c["name"] for c in labels["categories"]}
    out: dict[str, dict] = {}
    for name in dict.fromkeys(categories):
        new = [
            a["bbox"][3]
            for a in labels["annotations"]
            if names[a["category_id"]] == name and a.get(KEY, {}).get("synthetic")
        ]
        real = real_heights(dataset, name)
        if not new or not real.size:
            continue
        out[name] = {
            "new": len(new),
            "real": int(real.size),
            "median_new": round(float(np.median(new)), 1),
            "median_real": round(float(np.median(real)), 1),
            "ks": round(ks_distance(new, real), 3),
        }
    return out
