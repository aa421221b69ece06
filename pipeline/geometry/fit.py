"""Fit the ground models from the labelled boxes: per camera group a horizon, per-image offsets and a
camera height; per class one real height shared by the groups."""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..dataset import Dataset
from ..errors import DatasetError
from .boxes import Boxes, collect_boxes, is_usable, usable_boxes
from .cameras import CameraGroups, ClassHeight, GroupInfo, describe_groups, group_images
from .model import MIN_FIT_BOXES, ClassGround, GroundModel
from .priors import PRIOR_HEIGHTS_M, measured_heights, normalise_class_name, prior_heights
from .solve import Fit, Layout, irls, ransac_horizon, ratio_for_horizon

PRIOR_LOG_SD = 0.15
"""Spread (sd of log height) given to a class scaled from its prior height: Hoiem et al.'s car prior has
sd 0.21 m on 1.59 m (0.13), rounded up because the prior is a class-wide guess, not this data's mean."""

MIN_CAMERA_BOXES = 3
"""Usable boxes a calibrated group with too few boxes to fit its horizon needs to fit its camera height
under the principal row: the median of three survives one occluded or mislabelled box."""

PITCH_SD_DEG = 3.0
"""Spread of a calibrated vehicle camera's pitch against the road, for the horizon's prior: cameras are
mounted level to within a degree or two and the body pitches a degree on its springs and on grades (from
memory). It only matters where the boxes say little, as with a few far objects at one row."""

MIN_SPREAD = 0.02
"""Floor of a fitted class's spread: box edges are labelled to about a pixel, 2% of a 50 px box, so a
tighter band would reject boxes for their labelling noise."""


@dataclass(frozen=True)
class _Known:
    """A class's real height from outside the boxes: metres, log spread, where from, and whether trusted
    (the user's or the data's own 3D labels) over the built-in table."""

    metres: float
    log_sd: float
    source: str
    trusted: bool


def fit_ground(
    dataset: Dataset,
    *,
    priors: Mapping[str, float] | None = None,
    rng: np.random.Generator | int | None = 0,
    min_boxes: int = MIN_FIT_BOXES,
) -> GroundModel:
    """Fit the ground model of a data set from one camera (see :func:`fit_cameras` for several).

    Raises
    ------
    DatasetError
        The images form more than one camera group (sizes, camera names or calibrations differ), or no
        class has ``min_boxes`` usable boxes.
    ValueError
        A bad prior height or ``min_boxes < 2``.
    """
    if min_boxes < 2:
        raise ValueError(f"min_boxes must be >= 2, got {min_boxes}")
    groups = group_images(dataset)
    if len(groups) != 1:
        raise DatasetError(
            dataset.source or "<dataset>",
            "images",
            f"a single ground model needs images of one size and one camera; found {describe_groups(groups)} "
            "(fit_cameras fits one model per camera group)",
        )
    return next(iter(fit_cameras(dataset, priors=priors, rng=rng, min_boxes=min_boxes).groups.values()))


def fit_cameras(
    dataset: Dataset,
    *,
    priors: Mapping[str, float] | None = None,
    rng: np.random.Generator | int | None = 0,
    min_boxes: int = MIN_FIT_BOXES,
) -> CameraGroups:
    """Fit every camera group's horizon and camera height, and each class's real height, from the boxes.

    Steps: (1) group the images by camera (:func:`pipeline.geometry.cameras.group_images`) and keep usable
    boxes (:func:`pipeline.geometry.boxes.usable_boxes`); a class with ``min_boxes`` of them is fitted; a
    group with ``min_boxes`` boxes of fitted classes gets its horizon fitted, a calibrated group with
    fewer keeps its principal row ``cy`` (a level camera) and fits only its camera height, a group with
    neither has no model; (2) per group, RANSAC over horizon hypotheses, each made from two boxes of one
    class (the line through them meets ``h = 0`` at the horizon), scored by a truncated quadratic loss of
    ``log(h / (r_c (v_b - v_h)))``; (3) iteratively reweighted Gauss-Newton with Tukey's biweight on all
    groups at once (a calibrated group's horizon held near its principal row by a weak prior,
    :data:`PITCH_SD_DEG`): per class a log ratio ``l_c``, per group a log camera height ``m_g`` (relative to
    the group with most boxes) and a horizon, per image a horizon offset shrunk toward zero by a normal
    prior whose spread is re-estimated each round (expectation-maximisation for a random effect), so
    box ``h = exp(l_c - m_g) (v_b - v_g - o_i)``; (4) metres: the scale that makes the fitted classes'
    heights ``exp(l_c + k)`` best match their known heights (the user's priors and the data's own 3D
    labels first, else the built-in table; log-mean weighted by boxes used) gives every group's camera
    height ``exp(m_g + k)``; classes with fewer than ``min_boxes`` boxes get ``known height / camera
    height`` in every group.

    Parameters
    ----------
    dataset : Dataset
    priors : mapping of str to float, optional
        Real class heights in metres, overriding the data's 3D labels and :data:`PRIOR_HEIGHTS_M`.
    rng : numpy Generator, int or None
        Randomness of the RANSAC sampling.
    min_boxes : int
        Usable boxes a class needs to be fitted, and a group to have its horizon fitted.

    Returns
    -------
    CameraGroups

    Raises
    ------
    DatasetError
        No class with ``min_boxes`` usable boxes, or a malformed calibration.
    ValueError
        A bad prior height or ``min_boxes < 2``.

    References
    ----------
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006 / IJCV 2008.
    Fischler, Bolles, "Random Sample Consensus", CACM 24(6), 1981.
    """
    # 1. groups, usable boxes and which groups and classes take part
    if min_boxes < 2:
        raise ValueError(f"min_boxes must be >= 2, got {min_boxes}")
    known = _known_heights(dataset, priors)
    groups = group_images(dataset)
    fitted_names, taking_part, unfitted = _participants(dataset, groups, min_boxes)
    names = list(taking_part)
    group_of_image = {i: k for k, name in enumerate(names) for i in groups[name].image_ids}
    boxes, image_ids, image_group = collect_boxes(dataset, fitted_names, group_of_image)
    free = np.array([taking_part[name] for name in names])
    counts = np.bincount(image_group[boxes.image], minlength=len(names))
    layout = Layout(
        len(fitted_names), image_group, free, int(np.argmax(np.where(free, counts, -1))), _horizon_priors(groups, names)
    )

    # 2. RANSAC for each group's starting horizon, then starting ratios
    generator = np.random.default_rng(rng)
    starts = np.empty(len(names))
    for k, name in enumerate(names):
        own = boxes.subset(image_group[boxes.image] == k)
        info = groups[name]
        starts[k] = ransac_horizon(own, len(fitted_names), info.height, generator) if free[k] else info.intrinsics.cy
    log_ratio, log_camera = _start_ratios(boxes, layout, starts)

    # 3. joint robust refinement with per-image horizons
    heights = np.array([groups[name].height for name in names], dtype=np.float64)
    fit = irls(boxes, layout, starts, log_ratio, log_camera, image_heights=heights)

    # 4. metres, then one model per group
    classes = _class_spreads(boxes, fit, fitted_names)
    scale, scale_sd = _metric_scale(fitted_names, classes, fit, known)
    all_names = list(dataset.category_names().values())
    shared = _shared_heights(all_names, fitted_names, fit, scale, known)
    solved = _Solved(boxes, fit, layout, image_ids, fitted_names, classes, known, scale, scale_sd)
    models = {
        name: _group_model(name, groups[name], k, dataset, solved, taking_part[name]) for k, name in enumerate(names)
    }
    image_groups = {i: name for name, info in groups.items() for i in info.image_ids}
    return CameraGroups(models, image_groups, shared, unfitted)


def _horizon_priors(groups: Mapping[str, GroupInfo], names: list[str]) -> np.ndarray:
    """(G, 2) prior mean and sd of each calibrated group's horizon: the principal row, and the rows a
    pitch of :data:`PITCH_SD_DEG` moves it by (``fy tan(pitch)``); NaN for an uncalibrated group."""
    out = np.full((len(names), 2), np.nan)
    for k, name in enumerate(names):
        intrinsics = groups[name].intrinsics
        if intrinsics is not None:
            out[k] = intrinsics.cy, intrinsics.fy * math.tan(math.radians(PITCH_SD_DEG))
    return out


def _participants(
    dataset: Dataset, groups: Mapping[str, GroupInfo], min_boxes: int
) -> tuple[list[str], dict[str, bool], dict[str, str]]:
    """Fitted classes; groups taking part (True: horizon fitted, False: principal row); groups left out."""
    names = dataset.category_names()
    group_of = {i: name for name, info in groups.items() for i in info.image_ids}
    count: dict[tuple[str, str], int] = {}
    for scene in dataset.scenes:
        for ann in scene.annotations:
            if is_usable(ann, scene):
                key = (group_of[scene.id], names[ann.category_id])
                count[key] = count.get(key, 0) + 1
    taking_part = {name: True for name in groups}
    unfitted: dict[str, str] = {}
    fitted: list[str] = []
    for _ in range(2):  # a class may fall short once a group without a model drops out
        fitted = [c for c in names.values() if sum(count.get((g, c), 0) for g in taking_part) >= min_boxes]
        taking_part, unfitted = {}, {}
        for name, info in groups.items():
            n = sum(count.get((name, c), 0) for c in fitted)
            if n >= min_boxes:
                taking_part[name] = True
            elif n >= MIN_CAMERA_BOXES and info.intrinsics is not None:
                taking_part[name] = False
            else:
                unfitted[name] = f"{n} usable boxes of fitted classes; a horizon needs {min_boxes}" + (
                    f", a camera height under a calibrated horizon {MIN_CAMERA_BOXES}"
                    if info.intrinsics is not None
                    else " (or a calibration: intrinsics fx, fy, cx, cy)"
                )
    if not fitted or not taking_part:
        counts = ", ".join(f"{c} {len(b)}" for c, (b, _) in usable_boxes(dataset).items())
        raise DatasetError(
            dataset.source or "<dataset>",
            "annotations",
            f"no class has {min_boxes} usable boxes (not crowd, not touching the image border) to fit the "
            f"ground model from (usable: {counts})",
        )
    return fitted, taking_part, unfitted


def _start_ratios(boxes: Boxes, layout: Layout, horizons: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Starting class log ratios (the reference group's) and group log camera heights, by medians."""
    n_groups, n_classes = layout.n_groups, layout.n_classes
    group = layout.image_group[boxes.image]
    table = np.full((n_groups, n_classes), np.nan)
    for k in range(n_groups):
        own = boxes.subset(group == k)
        if len(own.bottom):
            table[k] = ratio_for_horizon(own, n_classes, horizons[k : k + 1])[0]
    # A class no group sees, or a group without a class, leaves an all-NaN slice: its start is 0.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        log_camera = np.zeros(n_groups)
        log_ratio = np.nan_to_num(np.nanmedian(table, axis=0), nan=0.0)
        for _ in range(3 if n_groups > 1 else 0):
            log_camera = np.nan_to_num(np.nanmedian(log_ratio[None, :] - table, axis=1), nan=0.0)
            log_camera -= log_camera[layout.reference]
            log_ratio = np.nan_to_num(np.nanmedian(table + log_camera[:, None], axis=0), nan=0.0)
    return log_ratio, log_camera


def _class_spreads(boxes: Boxes, fit: Fit, fitted_names: list[str]) -> dict[str, tuple[float, int]]:
    """Per fitted class: robust spread of its held-out residuals (at least MIN_SPREAD) and inliers used."""
    out = {}
    for i, name in enumerate(fitted_names):
        own = (boxes.cls == i) & np.isfinite(fit.residual)
        mad = float(np.median(np.abs(fit.residual[own] - np.median(fit.residual[own])))) if own.any() else 0.0
        out[name] = (max(1.4826 * mad, MIN_SPREAD), int(np.count_nonzero(fit.weights[boxes.cls == i] > 0)))
    return out


def _known_heights(dataset: Dataset, priors: Mapping[str, float] | None) -> dict[str, _Known]:
    """Per class name of the data set, its real height from the user, the 3D labels or the prior table."""
    table = prior_heights(priors)
    given = {normalise_class_name(n) for n in (priors or {})}
    measured = measured_heights(dataset)
    out = {}
    for name in dataset.category_names().values():
        key = normalise_class_name(name)
        if key in given:
            out[name] = _Known(table[key], PRIOR_LOG_SD, "recipe height prior", True)
        elif name in measured:
            m = measured[name]
            boxes = f"{m.n_boxes} box" + ("es" if m.n_boxes != 1 else "")
            out[name] = _Known(m.metres, max(m.log_sd, MIN_SPREAD), f"3D labels ({boxes})", True)
        elif key in table:
            out[name] = _Known(table[key], PRIOR_LOG_SD, f"prior: {PRIOR_HEIGHTS_M[key][1]}", False)
    return out


def _metric_scale(
    fitted_names: list[str], classes: Mapping[str, tuple[float, int]], fit: Fit, known: Mapping[str, _Known]
) -> tuple[float | None, float]:
    """Log metres of one reference camera height: weighted log-mean of ``log H_known - l_c`` over fitted
    classes with a known height (trusted heights only when there are any), and its weighted sd."""
    usable = [(i, n) for i, n in enumerate(fitted_names) if n in known and classes[n][1] > 0]
    if any(known[n].trusted for _, n in usable):
        usable = [(i, n) for i, n in usable if known[n].trusted]
    if not usable:
        return None, 0.0
    logs = np.array([math.log(known[n].metres) - fit.log_ratio[i] for i, n in usable])
    weights = np.array([classes[n][1] for _, n in usable], dtype=np.float64)
    mean = float(np.average(logs, weights=weights))
    return mean, float(np.sqrt(np.average((logs - mean) ** 2, weights=weights)))


def _shared_heights(
    all_names: list[str], fitted_names: list[str], fit: Fit, scale: float | None, known: Mapping[str, _Known]
) -> dict[str, ClassHeight]:
    out = {}
    for name in all_names:
        given = known.get(name)
        metres = given.metres if given is not None else None
        if name in fitted_names and scale is not None:
            metres = math.exp(fit.log_ratio[fitted_names.index(name)] + scale)
        elif name in fitted_names:
            metres = None
        out[name] = ClassHeight(metres, None if given is None else given.metres, "" if given is None else given.source)
    return out


@dataclass(frozen=True)
class _Solved:
    """What the joint fit found, for building the groups' models."""

    boxes: Boxes
    fit: Fit
    layout: Layout
    image_ids: list[int]
    fitted_names: list[str]
    classes: Mapping[str, tuple[float, int]]
    known: Mapping[str, _Known]
    scale: float | None
    scale_sd: float


def _group_model(
    name: str, info: GroupInfo, k: int, dataset: Dataset, solved: _Solved, free_horizon: bool
) -> GroundModel:
    """The ground model of group ``k``: its horizon, images' horizons, camera height and class ratios."""
    boxes, fit, layout, image_ids = solved.boxes, solved.fit, solved.layout, solved.image_ids
    fitted_names, classes, known, scale = solved.fitted_names, solved.classes, solved.known, solved.scale
    in_group = layout.image_group[boxes.image] == k
    supported = np.bincount(boxes.image[(fit.weights > 0) & in_group], minlength=len(image_ids)) > 0
    horizon = float(fit.horizons[k])
    image_horizons = {
        image_ids[i]: horizon + float(fit.offsets[i])
        for i in range(len(image_ids))
        if supported[i] and layout.image_group[i] == k
    }
    camera = None if scale is None else math.exp(float(fit.log_camera[k]) + scale)
    out: dict[str, ClassGround] = {}
    usable = usable_boxes(_only(dataset, info.image_ids))
    for cls_name in dataset.category_names().values():
        if cls_name in fitted_names:
            i = fitted_names.index(cls_name)
            ratio = math.exp(float(fit.log_ratio[i] - fit.log_camera[k]))
            n_used = int(np.count_nonzero((fit.weights > 0) & in_group & (boxes.cls == i)))
            out[cls_name] = ClassGround(ratio, classes[cls_name][0], n_used, "fitted")
        elif camera is not None and cls_name in known:
            given = known[cls_name]
            out[cls_name] = ClassGround(
                height_ratio=given.metres / camera,
                spread=math.hypot(given.log_sd, solved.scale_sd),
                n_boxes=len(usable[cls_name][0]),
                source="labels" if given.source.startswith("3D labels") else "prior",
            )
    return GroundModel(
        horizon_row=horizon,
        classes=out,
        camera_height_m=camera,
        image_width=info.width,
        image_height=info.height,
        prior_heights_m={n: h.metres for n, h in known.items()},
        image_horizons=image_horizons,
        horizon_sd_px=float(fit.horizon_sd[k]),
        camera=name,
        intrinsics=info.intrinsics,
        horizon_source="fitted" if free_horizon else "principal row",
    )


def _only(dataset: Dataset, image_ids: tuple[int, ...]) -> Dataset:
    keep = set(image_ids)
    return Dataset(tuple(s for s in dataset.scenes if s.id in keep), dataset.categories, dataset.images_dir)
