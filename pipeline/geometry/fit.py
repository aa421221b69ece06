"""Fit the ground model from the labelled boxes: horizon, per-image offsets, class ratios, camera height."""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from ..dataset import Dataset
from ..errors import DatasetError
from .boxes import collect_boxes, usable_boxes
from .model import MIN_FIT_BOXES, ClassGround, GroundModel
from .priors import normalise_class_name, prior_heights
from .solve import irls, ransac_horizon

PRIOR_LOG_SD = 0.15
"""Spread (sd of log height) given to a class scaled from its prior height: Hoiem et al.'s car prior has
sd 0.21 m on 1.59 m (0.13), rounded up because the prior is a class-wide guess, not this data's mean."""

MIN_SPREAD = 0.02
"""Floor of a fitted class's spread: box edges are labelled to about a pixel, 2% of a 50 px box, so a
tighter band would reject boxes for their labelling noise."""


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
    boxes, image_ids = collect_boxes(dataset, fitted_names)

    # 2. RANSAC for a starting horizon
    start = ransac_horizon(boxes, len(fitted_names), height, np.random.default_rng(rng))

    # 3. robust refinement with per-image horizons
    fit = irls(boxes, len(fitted_names), len(image_ids), start, image_height=height)
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
