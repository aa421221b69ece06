"""The fitted ground model's types: a class's height ratio, a height band, the model of one camera."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from .. import __version__

MIN_FIT_BOXES = 8
"""A class needs this many usable boxes to have its ratio fitted; fewer and its prior height is used.
Below about 8 boxes the robust spread (a median absolute deviation) is too unstable to set limits on."""

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
