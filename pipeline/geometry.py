"""The ground-plane model: expected box height of a class at a bottom row, and ground distance.

For a roughly level pinhole camera at height ``h_cam`` over a flat ground, an object of real height
``H`` standing on the ground with its lower box edge at image row ``v_b`` (rows counted top-down) has
image height

    h = H (v_b - v_h) / h_cam = r_c (v_b - v_h),

where ``v_h`` is the horizon row and ``r_c = H / h_cam`` the class's *height ratio*. :func:`fit_ground`
recovers ``v_h`` and every class's ``r_c`` from the labelled boxes alone, so the model is in pixels and
ratios; metres enter only through the prior height table (classes with too few boxes) and through
:func:`ground_distance`, which also needs the focal length (boxes alone cannot tell it: ``h``, ``w`` and
``v_b - v_h`` all scale with ``f``).

A camera that pitches a little moves the horizon from image to image. The fit gives every image an
offset from the data set's horizon, shrunk toward zero like a random effect (its spread is estimated
from the data, so a fixed camera gets offsets near zero). Filters use an image's own horizon when they
know the image; for any other image the band widens by the horizon's spread (see
:meth:`GroundModel.expected_height`).

References
----------
.. [1] D. Hoiem, A. A. Efros, M. Hebert, "Putting Objects in Perspective", CVPR 2006; IJCV 80, 2008.
.. [2] R. Hartley, A. Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole
   camera: ``h = f H / Z`` and ``v_b = v_h + f h_cam / Z``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from . import __version__
from .dataset import Annotation, Dataset, Scene
from .errors import DatasetError

PRIOR_HEIGHTS_M: Mapping[str, tuple[float, str]] = {
    "car": (1.72, "nuScenes anchor mean height (3D detectors' anchor configs)"),
    "truck": (2.73, "nuScenes anchor mean height"),
    "bus": (3.47, "nuScenes anchor mean height"),
    "trailer": (3.82, "nuScenes anchor mean height"),
    "construction_vehicle": (3.13, "nuScenes anchor mean height"),
    "pedestrian": (1.76, "nuScenes anchor mean height"),
    "bicycle": (1.27, "nuScenes anchor mean height"),
    "motorcycle": (1.44, "nuScenes anchor mean height"),
    "van": (2.2, "from memory: panel vans are about 1.9-2.6 m tall"),
    "tractor": (2.8, "from memory: farm tractors with a cab are about 2.5-3.1 m tall"),
    "works_trailer": (2.6, "from memory: road-works trailers with a raised warning board, about 2.3-3 m"),
}
"""Default real heights (metres) of classes, with where each value comes from. Names are matched after
lower-casing and turning spaces and hyphens into underscores."""

MIN_FIT_BOXES = 8
"""A class needs this many usable boxes to have its ratio fitted; fewer and its prior height is used.
Below about 8 boxes the robust spread (a median absolute deviation) is too unstable to set limits on."""

PRIOR_LOG_SD = 0.15
"""Spread (sd of log height) given to a class scaled from its prior height: Hoiem et al.'s car prior has
sd 0.21 m on 1.59 m (0.13), rounded up because the prior is a class-wide guess, not this data's mean."""

MIN_SPREAD = 0.02
"""Floor of a fitted class's spread: box edges are labelled to about a pixel, 2% of a 50 px box, so a
tighter band would reject boxes for their labelling noise."""

BORDER_PX = 1.0
"""A box within this many pixels of an image edge is truncated by the frame and is not used for fitting."""

_RANSAC_HYPOTHESES = 400
_INLIER_LOG = 0.25
_TUKEY_C = 4.685
_FORMAT = "rarefill.ground/1"


@dataclass(frozen=True)
class ClassGround:
    """One class's fitted relation ``h = height_ratio * (bottom_row - horizon_row)``.

    Attributes
    ----------
    height_ratio : float
        ``H / h_cam``: the class's real height in units of the camera height.
    spread : float
        Robust standard deviation of ``log(h / expected)`` over the class's boxes (1.4826 x the median
        absolute deviation), at least :data:`MIN_SPREAD`; for a prior class, :data:`PRIOR_LOG_SD`
        combined with the disagreement of the fitted classes' camera-height estimates.
    n_boxes : int
        Boxes that carried the fit (inliers after robust reweighting); 0..n for a prior class.
    source : {"fitted", "prior"}
    """

    height_ratio: float
    spread: float
    n_boxes: int
    source: Literal["fitted", "prior"]


@dataclass(frozen=True)
class HeightBand:
    """Expected box height (px) at a bottom row, and the plausible band ``[low, high]`` around it."""

    expected: float
    low: float
    high: float


@dataclass(frozen=True)
class GroundModel:
    """A fitted ground-plane model of one data set (one image size; a horizon per image).

    Attributes
    ----------
    horizon_row : float
        Image row of the horizon (rows top-down, may be negative or beyond the image).
    classes : mapping of str to ClassGround
        Per class name. A class absent here had neither enough boxes nor a way to scale a prior.
    camera_height_m : float or None
        Camera height above the ground estimated from fitted classes' ratios and their prior heights
        (``h_cam = H_prior / r_c``, log-mean weighted by boxes used); None when no fitted class has a prior.
    image_width, image_height : int
        Size of the images the model was fitted on (pixels).
    prior_heights_m : mapping of str to float
        The prior heights used (for provenance).
    image_horizons : mapping of int to float
        Horizon row of each fitted image (by image id) that had boxes to tell it.
    horizon_sd_px : float
        Spread of the per-image horizons around ``horizon_row`` (pixels).
    """

    horizon_row: float
    classes: Mapping[str, ClassGround]
    camera_height_m: float | None
    image_width: int
    image_height: int
    prior_heights_m: Mapping[str, float] = field(default_factory=dict)
    image_horizons: Mapping[int, float] = field(default_factory=dict)
    horizon_sd_px: float = 0.0

    def horizon_for(self, image_id: int | None = None) -> float:
        """Horizon row of image ``image_id`` if the fit saw it, else the data set's ``horizon_row``."""
        if image_id is None:
            return self.horizon_row
        return self.image_horizons.get(image_id, self.horizon_row)

    def class_ground(self, category_name: str) -> ClassGround:
        """The :class:`ClassGround` of a class; ``ValueError`` naming the known classes otherwise."""
        try:
            return self.classes[category_name]
        except KeyError:
            known = ", ".join(self.classes) or "none"
            raise ValueError(
                f"ground model has no class {category_name!r} (known: {known}); it needs {MIN_FIT_BOXES} usable "
                "boxes or a prior height plus a fitted class to scale it"
            ) from None

    def log_sd(self, category_name: str, bottom_row: float, *, image_id: int | None = None) -> float:
        """Standard deviation of ``log(box height)`` expected at ``bottom_row``.

        The class's spread; for an image without its own horizon, combined with the horizon's spread
        seen at that row: ``hypot(spread, horizon_sd_px / (bottom_row - horizon_row))``.
        """
        spread = self.class_ground(category_name).spread
        if image_id is not None and image_id in self.image_horizons:
            return spread
        depth = float(bottom_row) - self.horizon_row
        return math.hypot(spread, self.horizon_sd_px / depth) if depth > 0 else math.inf

    def expected_height(
        self, category_name: str, bottom_row: float, *, k_sd: float = 2.5, image_id: int | None = None
    ) -> HeightBand:
        """Expected image height (px) of a ``category_name`` box whose lower edge is at ``bottom_row``.

        ``expected = height_ratio * (bottom_row - horizon)`` with the image's own horizon when
        ``image_id`` names a fitted image, else the data set's. The band is
        ``expected * exp(+-k_sd * log_sd)`` (:meth:`log_sd`): ``k_sd = 2.5`` keeps about 99% of a normal
        log-height distribution, so a box outside it is implausibly scaled for the data set.

        Raises
        ------
        ValueError
            Unknown class, ``k_sd < 0``, or ``bottom_row`` at or above the horizon (no ground there).

        References
        ----------
        Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006.
        """
        if not k_sd >= 0:
            raise ValueError(f"k_sd must be >= 0, got {k_sd}")
        cls = self.class_ground(category_name)
        horizon = self.horizon_for(image_id)
        depth = float(bottom_row) - horizon
        if not depth > 0:
            raise ValueError(f"bottom row {bottom_row:g} is at or above the horizon row {horizon:.1f}: no ground there")
        expected = cls.height_ratio * depth
        margin = math.exp(k_sd * self.log_sd(category_name, bottom_row, image_id=image_id))
        return HeightBand(expected, expected / margin, expected * margin)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict (what made it: ``format`` and ``rarefill_version``)."""
        return {
            "format": _FORMAT,
            "rarefill_version": __version__,
            "horizon_row": self.horizon_row,
            "camera_height_m": self.camera_height_m,
            "image_width": self.image_width,
            "image_height": self.image_height,
            "classes": {
                name: {"height_ratio": c.height_ratio, "spread": c.spread, "n_boxes": c.n_boxes, "source": c.source}
                for name, c in self.classes.items()
            },
            "prior_heights_m": dict(self.prior_heights_m),
            "horizon_sd_px": self.horizon_sd_px,
            "image_horizons": {str(k): v for k, v in self.image_horizons.items()},
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> GroundModel:
        """Rebuild a model from :meth:`to_dict` output; ``ValueError`` naming the bad key otherwise."""
        if not isinstance(data, Mapping) or data.get("format") != _FORMAT:
            raise ValueError(f"not a ground model: 'format' must be {_FORMAT!r}")
        try:
            classes = {
                str(name): ClassGround(
                    height_ratio=float(c["height_ratio"]),
                    spread=float(c["spread"]),
                    n_boxes=int(c["n_boxes"]),
                    source=_source(c["source"]),
                )
                for name, c in data["classes"].items()
            }
            camera = data["camera_height_m"]
            return cls(
                horizon_row=float(data["horizon_row"]),
                classes=classes,
                camera_height_m=None if camera is None else float(camera),
                image_width=int(data["image_width"]),
                image_height=int(data["image_height"]),
                prior_heights_m={str(k): float(v) for k, v in data.get("prior_heights_m", {}).items()},
                image_horizons={int(k): float(v) for k, v in data.get("image_horizons", {}).items()},
                horizon_sd_px=float(data.get("horizon_sd_px", 0.0)),
            )
        except KeyError as exc:
            raise ValueError(f"ground model: required key {exc.args[0]!r} is missing") from None
        except (TypeError, AttributeError, ValueError) as exc:
            raise ValueError(f"ground model: malformed value ({exc})") from None


def _source(value: Any) -> Literal["fitted", "prior"]:
    if value == "fitted":
        return "fitted"
    if value == "prior":
        return "prior"
    raise ValueError(f"ground model: class source must be 'fitted' or 'prior', got {value!r}")


def normalise_class_name(name: str) -> str:
    """Lower-case, spaces and hyphens to underscores: how class names are matched to prior heights."""
    return name.strip().lower().replace(" ", "_").replace("-", "_")


def prior_heights(priors: Mapping[str, float] | None = None) -> dict[str, float]:
    """The default :data:`PRIOR_HEIGHTS_M` table (metres) updated with ``priors`` (checked: finite, > 0)."""
    table = {name: metres for name, (metres, _) in PRIOR_HEIGHTS_M.items()}
    for name, metres in (priors or {}).items():
        if not isinstance(metres, (int, float)) or isinstance(metres, bool) or not 0 < metres < math.inf:
            raise ValueError(f"prior height of {name!r} must be a finite number of metres > 0, got {metres!r}")
        table[normalise_class_name(name)] = float(metres)
    return table


# --------------------------------------------------------------------------------------------------
# fitting


@dataclass(frozen=True)
class _Boxes:
    """Usable boxes as parallel arrays: bottom row, height (px), class index and image index."""

    bottom: np.ndarray
    height: np.ndarray
    cls: np.ndarray
    image: np.ndarray


@dataclass(frozen=True)
class _Fit:
    """Result of the robust refinement."""

    horizon: float
    log_ratio: np.ndarray
    offsets: np.ndarray
    horizon_sd: float
    weights: np.ndarray
    residual: np.ndarray


def usable_boxes(dataset: Dataset) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Boxes fit for the ground model, per class name: ``(bottom_rows, heights)`` float64 arrays.

    Left out (see :func:`is_usable`): ``iscrowd`` regions and boxes within :data:`BORDER_PX` of an image
    edge (truncated by the frame, so their height or bottom row is not the object's).
    """
    names = dataset.category_names()
    rows: dict[str, tuple[list[float], list[float]]] = {name: ([], []) for name in names.values()}
    for scene in dataset.scenes:
        for ann in scene.annotations:
            if is_usable(ann, scene):
                rows[names[ann.category_id]][0].append(ann.bottom_row)
                rows[names[ann.category_id]][1].append(ann.bbox[3])
    return {name: (np.asarray(b, dtype=np.float64), np.asarray(h, dtype=np.float64)) for name, (b, h) in rows.items()}


def is_usable(ann: Annotation, scene: Scene) -> bool:
    """False for a crowd region or a box within :data:`BORDER_PX` of an edge of its image."""
    x, y, w, h = ann.bbox
    inside = BORDER_PX < x and BORDER_PX < y and x + w < scene.width - BORDER_PX and y + h < scene.height - BORDER_PX
    return inside and not ann.iscrowd


def fit_ground(
    dataset: Dataset,
    *,
    priors: Mapping[str, float] | None = None,
    rng: np.random.Generator | int | None = 0,
    min_boxes: int = MIN_FIT_BOXES,
) -> GroundModel:
    """Fit the horizon row and each class's height ratio ``H / h_cam`` from the labelled boxes.

    Steps: (1) keep usable boxes (see :func:`usable_boxes`); (2) RANSAC over horizon hypotheses, each
    made from two boxes of one class (the line through them meets ``h = 0`` at the horizon), scored by
    a truncated quadratic loss of ``log(h / (r_c (v_b - v_h)))`` with every class's ratio set to the
    median for that horizon; (3) iteratively reweighted Gauss-Newton with Tukey's biweight on the
    horizon, the log ratios and one horizon offset per image, so occluded or mislabelled boxes stop
    counting; the offsets are shrunk toward zero by a normal prior whose spread is re-estimated each
    round (expectation-maximisation for a random effect); (4) classes with fewer than ``min_boxes``
    usable boxes get ``prior height / camera height``, where the camera height is the log-mean of
    ``H_prior / r_c`` over the fitted classes with a prior height, weighted by boxes used.

    Parameters
    ----------
    dataset : Dataset
        All images must share one size.
    priors : mapping of str to float, optional
        Real class heights in metres, overriding or extending :data:`PRIOR_HEIGHTS_M`.
    rng : numpy Generator, int or None
        Randomness of the RANSAC sampling.
    min_boxes : int
        Usable boxes a class needs to be fitted rather than scaled from its prior.

    Returns
    -------
    GroundModel

    Raises
    ------
    DatasetError
        Mixed image sizes, or no class with ``min_boxes`` usable boxes.
    ValueError
        A bad prior height or ``min_boxes < 2``.

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006 / IJCV 2008.
    Fischler, Bolles, "Random Sample Consensus", CACM 24(6), 1981.
    """
    # 1. check inputs and collect usable boxes
    if min_boxes < 2:
        raise ValueError(f"min_boxes must be >= 2, got {min_boxes}")
    table = prior_heights(priors)
    width, height = _one_image_size(dataset)
    per_class = usable_boxes(dataset)
    fitted_names = [name for name, (b, _) in per_class.items() if len(b) >= min_boxes]
    if not fitted_names:
        counts = ", ".join(f"{n} {len(b)}" for n, (b, _) in per_class.items())
        raise DatasetError(
            dataset.source or "<dataset>",
            "annotations",
            f"no class has {min_boxes} usable boxes (not crowd, not touching the image border) to fit the "
            f"ground model from (usable: {counts})",
        )
    boxes, image_ids = _collect(dataset, fitted_names)

    # 2. RANSAC for a starting horizon
    start = _ransac_horizon(boxes, len(fitted_names), height, np.random.default_rng(rng))

    # 3. robust refinement with per-image horizons
    fit = _irls(boxes, len(fitted_names), len(image_ids), start, image_height=height)
    classes: dict[str, ClassGround] = {}
    for i, name in enumerate(fitted_names):
        own = (boxes.cls == i) & np.isfinite(fit.residual)
        mad = float(np.median(np.abs(fit.residual[own] - np.median(fit.residual[own]))))
        classes[name] = ClassGround(
            height_ratio=float(np.exp(fit.log_ratio[i])),
            spread=max(1.4826 * mad, MIN_SPREAD),
            n_boxes=int(np.count_nonzero(fit.weights[boxes.cls == i] > 0)),
            source="fitted",
        )
    supported = np.bincount(boxes.image[fit.weights > 0], minlength=len(image_ids)) > 0
    image_horizons = {image_ids[i]: fit.horizon + float(fit.offsets[i]) for i in range(len(image_ids)) if supported[i]}

    # 4. camera height from fitted classes with a prior, then prior classes
    camera_height, camera_sd = _camera_height(classes, table)
    if camera_height is not None:
        for name, (bottom, _) in per_class.items():
            prior = table.get(normalise_class_name(name))
            if name in classes or prior is None:
                continue
            classes[name] = ClassGround(
                height_ratio=prior / camera_height,
                spread=math.hypot(PRIOR_LOG_SD, camera_sd),
                n_boxes=len(bottom),
                source="prior",
            )
    used_priors = {name: table[normalise_class_name(name)] for name in per_class if normalise_class_name(name) in table}
    return GroundModel(
        horizon_row=fit.horizon,
        classes={name: classes[name] for name in per_class if name in classes},
        camera_height_m=camera_height,
        image_width=width,
        image_height=height,
        prior_heights_m=used_priors,
        image_horizons=image_horizons,
        horizon_sd_px=fit.horizon_sd,
    )


def _collect(dataset: Dataset, names: list[str]) -> tuple[_Boxes, list[int]]:
    """Usable boxes of the classes ``names`` as arrays, and the image id of each image index."""
    class_index = {c.id: names.index(c.name) for c in dataset.categories if c.name in names}
    image_ids: list[int] = []
    bottom, heights, cls, image = [], [], [], []
    for scene in dataset.scenes:
        picked = [a for a in scene.annotations if a.category_id in class_index and is_usable(a, scene)]
        if not picked:
            continue
        for ann in picked:
            bottom.append(ann.bottom_row)
            heights.append(ann.bbox[3])
            cls.append(class_index[ann.category_id])
            image.append(len(image_ids))
        image_ids.append(scene.id)
    boxes = _Boxes(
        bottom=np.asarray(bottom, dtype=np.float64),
        height=np.asarray(heights, dtype=np.float64),
        cls=np.asarray(cls, dtype=np.int64),
        image=np.asarray(image, dtype=np.int64),
    )
    return boxes, image_ids


def _one_image_size(dataset: Dataset) -> tuple[int, int]:
    sizes: dict[tuple[int, int], int] = {}
    for scene in dataset.scenes:
        sizes[(scene.width, scene.height)] = sizes.get((scene.width, scene.height), 0) + 1
    if len(sizes) != 1:
        found = ", ".join(f"{w}x{h} ({n} images)" for (w, h), n in sizes.items()) or "no images"
        raise DatasetError(
            dataset.source or "<dataset>",
            "images",
            f"the ground model needs images of one size (one camera); found {found}",
        )
    return next(iter(sizes))


def _residuals(boxes: _Boxes, horizon: float | np.ndarray, log_ratio: np.ndarray) -> np.ndarray:
    """``log h - log r_c - log(v_b - v_h)``; NaN where the bottom row is not below the horizon.

    ``horizon`` is a scalar, an (N,) array (one horizon per box), or a (K, 1) array of hypotheses with
    ``log_ratio`` (K, C): the result is then (K, N).
    """
    depth = boxes.bottom - np.asarray(horizon, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_depth = np.where(depth > 0.5, np.log(np.maximum(depth, 0.5)), np.nan)
    return np.log(boxes.height) - log_ratio[..., boxes.cls] - log_depth


def _ratio_for_horizon(boxes: _Boxes, n_classes: int, horizons: np.ndarray) -> np.ndarray:
    """(K, C) median log ratio of each class for each horizon hypothesis (the ratio's robust estimate)."""
    depth = boxes.bottom[None, :] - horizons[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        log_r = np.where(depth > 0.5, np.log(boxes.height) - np.log(np.maximum(depth, 0.5)), np.nan)
    out = np.full((len(horizons), n_classes), np.nan)
    for c in range(n_classes):
        own = log_r[:, boxes.cls == c]
        has = np.isfinite(own).any(axis=1)
        out[has, c] = np.nanmedian(own[has], axis=1)
    return out


def _ransac_horizon(boxes: _Boxes, n_classes: int, image_height: int, rng: np.random.Generator) -> float:
    hypotheses = []
    index_by_class = [np.flatnonzero(boxes.cls == c) for c in range(n_classes)]
    weights = np.array([len(ix) for ix in index_by_class], dtype=np.float64)
    # Two boxes at nearly the same row give an ill-conditioned line: ask for a 5% row difference.
    min_row_gap = 0.05 * image_height
    for _ in range(20 * _RANSAC_HYPOTHESES):
        if len(hypotheses) == _RANSAC_HYPOTHESES:
            break
        own = index_by_class[rng.choice(n_classes, p=weights / weights.sum())]
        i, j = rng.choice(own, size=2, replace=False)
        db = boxes.bottom[j] - boxes.bottom[i]
        dh = boxes.height[j] - boxes.height[i]
        if abs(db) < min_row_gap or dh * db <= 0:
            continue
        horizon = boxes.bottom[i] - boxes.height[i] * db / dh
        # Horizons far outside the frame are nonsense for a camera that sees the road.
        if -2 * image_height <= horizon < image_height:
            hypotheses.append(horizon)
    if not hypotheses:
        # All boxes at one row or with heights falling toward the camera: start from the horizon a
        # common ratio of 0.5 would give; the refinement takes it from there.
        return float(np.median(boxes.bottom - 2.0 * boxes.height))
    horizons = np.asarray(hypotheses)
    log_ratio = _ratio_for_horizon(boxes, n_classes, horizons)
    residual = _residuals(boxes, horizons[:, None], np.nan_to_num(log_ratio, nan=0.0))
    cost = np.where(np.isfinite(residual), np.minimum(residual**2, _INLIER_LOG**2), _INLIER_LOG**2).sum(axis=1)
    return float(horizons[np.argmin(cost)])


def _irls(
    boxes: _Boxes, n_classes: int, n_images: int, horizon: float, *, image_height: int, iterations: int = 60
) -> _Fit:
    """Tukey-weighted Gauss-Newton on (log ratios, horizon, per-image offsets) with a shrinkage prior.

    Minimises ``sum_j w_j r_j^2 + s^2 sum_i o_i^2 / tau^2``: ``r_j`` the log residual of box j with its
    image's horizon ``v_h + o_i``, ``s`` the robust residual scale, ``tau`` the spread of the offsets,
    re-estimated each round as the root mean of ``o_i^2`` plus each offset's posterior variance. Each
    offset touches only its image's boxes, so the offsets are eliminated in closed form (Schur
    complement) and the cost grows linearly with the number of images.
    """
    log_ratio = np.nan_to_num(_ratio_for_horizon(boxes, n_classes, np.array([horizon]))[0], nan=0.0)
    offsets = np.zeros(n_images)
    tau = 0.02 * image_height
    for _ in range(iterations):
        residual = _residuals(boxes, horizon + offsets[boxes.image], log_ratio)
        scale = max(1.4826 * float(np.nanmedian(np.abs(residual))), 1e-3)
        weights = _tukey(residual, scale)
        system = _normal_system(boxes, n_classes, n_images, horizon, offsets, residual, weights, (scale / tau) ** 2)
        if system is None:
            break
        step_global, step_offsets, offset_var, _ = system
        # A step that would lift a horizon past the boxes standing below it is damped.
        old_depth = boxes.bottom - horizon - offsets[boxes.image]
        lift = step_global[n_classes] + step_offsets[boxes.image]
        risky = (weights > 0) & (lift > 0.5 * old_depth)
        shrink = float(np.min(0.5 * old_depth[risky] / lift[risky])) if risky.any() else 1.0
        log_ratio = log_ratio + shrink * step_global[:n_classes]
        horizon += shrink * float(step_global[n_classes])
        offsets = offsets + shrink * step_offsets
        tau = float(np.clip(np.sqrt(np.mean(offsets**2 + scale**2 * offset_var)), 0.05, image_height / 4))
        if shrink * max(np.max(np.abs(step_global)), np.max(np.abs(step_offsets), initial=0.0)) < 1e-7:
            break
    residual = _residuals(boxes, horizon + offsets[boxes.image], log_ratio)
    scale = max(1.4826 * float(np.nanmedian(np.abs(residual))), 1e-3)
    weights = _tukey(residual, scale)
    system = _normal_system(boxes, n_classes, n_images, horizon, offsets, residual, weights, (scale / tau) ** 2)
    leverage = system[3] if system is not None else np.zeros(len(residual))
    # Leave-one-out residuals: a box's own image offset partly absorbs its residual, which would make
    # the spread too small for a new object in that image.
    held_out = residual / np.maximum(1.0 - leverage, 1e-3)
    return _Fit(float(horizon), log_ratio, offsets, tau, weights, held_out)


def _tukey(residual: np.ndarray, scale: float) -> np.ndarray:
    u = np.where(np.isfinite(residual), residual, np.inf) / (_TUKEY_C * scale)
    return np.where(np.abs(u) < 1, (1 - u**2) ** 2, 0.0)


def _normal_system(
    boxes: _Boxes,
    n_classes: int,
    n_images: int,
    horizon: float,
    offsets: np.ndarray,
    residual: np.ndarray,
    weights: np.ndarray,
    penalty: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
    """One Gauss-Newton step with the per-image offsets eliminated.

    The residual's Jacobian is -1 on its class's log ratio and ``q = 1 / (v_b - v_h - o_i)`` on the horizon
    and on its image's offset. Normal matrix ``[[A, B], [B^T, D]]`` with ``D`` diagonal; the global step
    solves ``(A - B D^-1 B^T) x = -(g - B D^-1 g_o)``.

    Returns
    -------
    (global step (C+1,), offset step (M,), offset posterior variance / s^2 (M,), leverage (N,)), or None
    when the classes' and horizon's system is singular.
    """
    valid = np.isfinite(residual)
    w = np.where(valid, weights, 0.0)
    r = np.where(valid, residual, 0.0)
    q = np.where(valid, 1.0 / np.maximum(boxes.bottom - horizon - offsets[boxes.image], 0.5), 0.0)
    c, i, n_global = boxes.cls, boxes.image, n_classes + 1
    h = n_classes
    a = np.zeros((n_global, n_global))
    a[np.arange(n_classes), np.arange(n_classes)] = np.bincount(c, w, n_classes)
    a[:n_classes, h] = a[h, :n_classes] = -np.bincount(c, w * q, n_classes)
    a[h, h] = np.sum(w * q * q)
    b = np.zeros((n_global, n_images))
    b[:n_classes] = -np.bincount(c * n_images + i, w * q, n_classes * n_images).reshape(n_classes, n_images)
    b[h] = np.bincount(i, w * q * q, n_images)
    d = np.bincount(i, w * q * q, n_images) + penalty
    g = np.concatenate([-np.bincount(c, w * r, n_classes), [np.sum(w * q * r)]])
    g_o = np.bincount(i, w * q * r, n_images) + offsets * penalty
    y = b / d
    schur = a - y @ b.T
    if np.linalg.matrix_rank(schur) < n_global:
        return None
    cov_global = np.linalg.inv(schur)
    step_global = -cov_global @ (g - y @ g_o)
    step_offsets = -(g_o + b.T @ step_global) / d
    x = -cov_global @ y
    offset_var = 1.0 / d - np.einsum("ki,ki->i", y, x)
    # Leverage w_j J_j N^-1 J_j^T of each box, from the blocks of N^-1.
    quad = (
        cov_global[c, c]
        - 2 * q * cov_global[c, h]
        + q * q * cov_global[h, h]
        - 2 * q * x[c, i]
        + 2 * q * q * x[h, i]
        + q * q * offset_var[i]
    )
    return step_global, step_offsets, offset_var, w * quad


def _camera_height(classes: Mapping[str, ClassGround], table: Mapping[str, float]) -> tuple[float | None, float]:
    """Log-mean of ``H_prior / r_c`` over fitted classes with a prior (weighted by boxes used), and its sd."""
    logs, weights = [], []
    for name, cls in classes.items():
        prior = table.get(normalise_class_name(name))
        if prior is not None and cls.n_boxes > 0:
            logs.append(math.log(prior / cls.height_ratio))
            weights.append(cls.n_boxes)
    if not logs:
        return None, 0.0
    mean = float(np.average(logs, weights=weights))
    sd = float(np.sqrt(np.average((np.asarray(logs) - mean) ** 2, weights=weights)))
    return math.exp(mean), sd


# --------------------------------------------------------------------------------------------------
# distances


def ground_distance(
    bottom_row: float | np.ndarray,
    ground: GroundModel,
    *,
    focal_px: float,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> float | np.ndarray:
    """Distance ``Z`` (metres, along the optical axis) of the ground point imaged at ``bottom_row``.

    ``Z = f h_cam / (v_b - v_h)``.

    Parameters
    ----------
    bottom_row : float or (N,) float ndarray
        Image row(s), top-down; must lie below the horizon.
    ground : GroundModel
    focal_px : float
        Focal length in pixels (boxes alone cannot tell it).
    camera_height_m : float, optional
        Default: the model's estimate ``ground.camera_height_m``.
    image_id : int, optional
        Use this fitted image's own horizon (:meth:`GroundModel.horizon_for`).

    Raises
    ------
    ValueError
        A row at or above the horizon, ``focal_px <= 0``, or no camera height.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
    """
    camera = _camera(ground, camera_height_m)
    if not focal_px > 0:
        raise ValueError(f"focal_px must be > 0, got {focal_px}")
    horizon = ground.horizon_for(image_id)
    depth = np.asarray(bottom_row, dtype=np.float64) - horizon
    if not np.all(depth > 0):
        raise ValueError(f"bottom row(s) at or above the horizon row {horizon:.1f} have no ground distance")
    z = focal_px * camera / depth
    return float(z) if z.ndim == 0 else z


def lateral_offset(
    col: float | np.ndarray,
    bottom_row: float | np.ndarray,
    ground: GroundModel,
    *,
    camera_height_m: float | None = None,
    image_id: int | None = None,
) -> float | np.ndarray:
    """Sideways position ``X`` (metres, right positive) of the ground point at image ``(bottom_row, col)``.

    ``X = (u - c_x) Z / f = (u - c_x) h_cam / (v_b - v_h)`` with the principal point ``c_x`` assumed at
    the image centre; the focal length cancels, so only the camera height is needed. ``image_id`` as in
    :func:`ground_distance`.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004.
    """
    camera = _camera(ground, camera_height_m)
    horizon = ground.horizon_for(image_id)
    depth = np.asarray(bottom_row, dtype=np.float64) - horizon
    if not np.all(depth > 0):
        raise ValueError(f"bottom row(s) at or above the horizon row {horizon:.1f} have no ground position")
    x = (np.asarray(col, dtype=np.float64) - ground.image_width / 2) * camera / depth
    return float(x) if x.ndim == 0 else x


def _camera(ground: GroundModel, camera_height_m: float | None) -> float:
    camera = ground.camera_height_m if camera_height_m is None else camera_height_m
    if camera is None:
        raise ValueError("camera height unknown: the ground model has no estimate; pass camera_height_m")
    if not camera > 0:
        raise ValueError(f"camera_height_m must be > 0, got {camera}")
    return float(camera)
