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
Source = Literal["fitted", "prior", "labels"]


@dataclass(frozen=True)
class Intrinsics:
    """A calibrated pinhole camera's focal lengths and principal point, in pixels (rows top-down).

    For a camera pitched down by ``theta`` the horizon lies at ``cy - fy tan(theta)``: at the principal row
    ``cy`` for a level camera (Hartley & Zisserman, "Multiple View Geometry", 2nd ed., 2004).
    """

    fx: float
    fy: float
    cx: float
    cy: float

    def __post_init__(self) -> None:
        if not all(isinstance(v, float) and math.isfinite(v) for v in (self.fx, self.fy, self.cx, self.cy)):
            raise ValueError(f"intrinsics must be finite numbers, got {self}")
        if not (self.fx > 0 and self.fy > 0):
            raise ValueError(f"focal lengths fx, fy must be > 0, got {self.fx:g}, {self.fy:g}")

    def pitch_deg(self, horizon_row: float) -> float:
        """Downward pitch (degrees) that puts the horizon at ``horizon_row``: ``atan((cy - v_h) / fy)``."""
        return math.degrees(math.atan((self.cy - horizon_row) / self.fy))

    def to_dict(self) -> dict[str, float]:
        return {"fx": self.fx, "fy": self.fy, "cx": self.cx, "cy": self.cy}


@dataclass(frozen=True)
class ClassGround:
    """One class's fitted relation ``h = height_ratio * (bottom_row - horizon_row)``.

    Attributes
    ----------
    height_ratio : float
        ``H / h_cam``: the class's real height in units of the camera height.
    spread : float
        Robust standard deviation of ``log(h / expected)`` over the class's boxes (1.4826 x the median
        absolute deviation), at least :data:`MIN_SPREAD`; for a class scaled from a known height, the
        height's spread (:data:`PRIOR_LOG_SD` for a prior, the 3D labels' own for measured heights)
        combined with the disagreement of the fitted classes' camera-height estimates.
    n_boxes : int
        Boxes that carried the fit (inliers after robust reweighting); 0..n for a scaled class.
    source : {"fitted", "prior", "labels"}
        Fitted from the boxes, or its real height (a prior, or the data's own 3D labels) over the camera
        height.
    """

    height_ratio: float
    spread: float
    n_boxes: int
    source: Source


@dataclass(frozen=True)
class HeightBand:
    """Expected box height (px) at a bottom row, and the plausible band ``[low, high]`` around it."""

    expected: float
    low: float
    high: float


@dataclass(frozen=True)
class GroundModel:
    """A fitted ground-plane model of one camera group (one image size; a horizon per image).

    Attributes
    ----------
    horizon_row : float
        Image row of the horizon (rows top-down, may be negative or beyond the image).
    classes : mapping of str to ClassGround
        Per class name. A class absent here had neither enough boxes nor a way to scale a prior.
    camera_height_m : float or None
        Camera height above the ground estimated from fitted classes' ratios and their known heights
        (``h_cam = H / r_c``, log-mean weighted by boxes used; 3D-label heights before priors); None when no
        fitted class has a known height.
    image_width, image_height : int
        Size of the images the model was fitted on (pixels).
    prior_heights_m : mapping of str to float
        The known heights used (3D labels, else priors; for provenance).
    image_horizons : mapping of int to float
        Horizon row of each fitted image (by image id) that had boxes to tell it.
    horizon_sd_px : float
        Spread of the per-image horizons around ``horizon_row`` (pixels).
    camera : str
        The camera group's name (see :func:`pipeline.geometry.cameras.camera_label`); "" for a hand-made model.
    intrinsics : Intrinsics or None
        The group's calibration when the data gives one: distances then use its focal length and
        principal point.
    horizon_source : {"fitted", "principal row"}
        Fitted from the boxes, or (a group with too few boxes to tell it) the calibrated principal row.
    """

    horizon_row: float
    classes: Mapping[str, ClassGround]
    camera_height_m: float | None
    image_width: int
    image_height: int
    prior_heights_m: Mapping[str, float] = field(default_factory=dict)
    image_horizons: Mapping[int, float] = field(default_factory=dict)
    horizon_sd_px: float = 0.0
    camera: str = ""
    intrinsics: Intrinsics | None = None
    horizon_source: Literal["fitted", "principal row"] = "fitted"

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
            "camera": self.camera,
            "intrinsics": None if self.intrinsics is None else self.intrinsics.to_dict(),
            "horizon_source": self.horizon_source,
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
            intrinsics = data.get("intrinsics")
            horizon_source = data.get("horizon_source", "fitted")
            if horizon_source not in ("fitted", "principal row"):
                raise ValueError(f"horizon_source must be 'fitted' or 'principal row', got {horizon_source!r}")
            return cls(
                horizon_row=float(data["horizon_row"]),
                classes=classes,
                camera_height_m=None if camera is None else float(camera),
                image_width=int(data["image_width"]),
                image_height=int(data["image_height"]),
                prior_heights_m={str(k): float(v) for k, v in data.get("prior_heights_m", {}).items()},
                image_horizons={int(k): float(v) for k, v in data.get("image_horizons", {}).items()},
                horizon_sd_px=float(data.get("horizon_sd_px", 0.0)),
                camera=str(data.get("camera", "")),
                intrinsics=None
                if intrinsics is None
                else Intrinsics(**{k: float(intrinsics[k]) for k in "fx fy cx cy".split()}),
                horizon_source=horizon_source,
            )
        except KeyError as exc:
            raise ValueError(f"ground model: required key {exc.args[0]!r} is missing") from None
        except (TypeError, AttributeError, ValueError) as exc:
            raise ValueError(f"ground model: malformed value ({exc})") from None


def _source(value: Any) -> Source:
    for known in ("fitted", "prior", "labels"):
        if value == known:
            return known
    raise ValueError(f"ground model: class source must be 'fitted', 'prior' or 'labels', got {value!r}")
