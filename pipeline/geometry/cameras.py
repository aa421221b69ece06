"""Camera groups: which images share one camera, and the fitted ground models of all groups of a data set.

An image belongs to a group by, in this order:

1. its ``camera`` string (a camera name, e.g. ``"CAM_FRONT"``), with the image size;
2. else its calibration: ``intrinsics: {fx, fy, cx, cy}`` in pixels, or a 3x3 camera matrix under
   ``cam_intrinsic`` (``[[fx, 0, cx], [0, fy, cy], [0, 0, 1]]``), with the image size;
3. else its size alone (one size, one camera).

Images of one camera name share one calibration: the group's intrinsics are the median of its images'.
Every group has its own horizon (and per-image offsets) and camera height; real class heights in metres
are shared by all groups, so a class seen by one camera informs the others (:func:`pipeline.geometry.fit_cameras`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import __version__
from ..dataset import Dataset, Scene
from ..errors import DatasetError
from .model import GroundModel, Intrinsics

CAMERA_KEY = "camera"
INTRINSICS_KEY = "intrinsics"
MATRIX_KEY = "cam_intrinsic"
_FORMAT = "rarefill.ground-groups/1"


@dataclass(frozen=True)
class ClassHeight:
    """A class's real height in metres, shared by every camera group.

    Attributes
    ----------
    metres : float or None
        The model's height: for a fitted class its fitted ratio times the metric scale, else the known
        height; None when nothing in the data or the priors gives metres.
    known_m : float or None
        The height given from outside the boxes: the data's 3D labels, else the prior table.
    known_from : str
        Where ``known_m`` comes from ("" when unknown).
    """

    metres: float | None
    known_m: float | None
    known_from: str


@dataclass(frozen=True)
class CameraGroups:
    """The fitted ground models of a data set, one per camera group, sharing real class heights.

    Attributes
    ----------
    groups : mapping of str to GroundModel
        Per group name, the group's model (its horizon, camera height and class ratios).
    image_groups : mapping of int to str
        Group name of every image of the fitted data set.
    class_heights : mapping of str to ClassHeight
        Real heights shared by the groups.
    unfitted : mapping of str to str
        Groups without a model, with the reason (too few boxes and no calibration to stand in).
    """

    groups: Mapping[str, GroundModel]
    image_groups: Mapping[int, str]
    class_heights: Mapping[str, ClassHeight] = field(default_factory=dict)
    unfitted: Mapping[str, str] = field(default_factory=dict)

    def has_image(self, image_id: int) -> bool:
        """True when image ``image_id`` belongs to a group with a model."""
        return self.image_groups.get(image_id) in self.groups

    def for_image(self, image_id: int) -> GroundModel:
        """The model of image ``image_id``'s group; ``ValueError`` saying why when there is none."""
        name = self.image_groups.get(image_id)
        if name is None:
            raise ValueError(f"image {image_id} was not in the data set the ground model was fitted on")
        return self._group(name)

    def _group(self, name: str) -> GroundModel:
        if name in self.groups:
            return self.groups[name]
        reason = self.unfitted.get(name, "not in the fitted data set")
        raise ValueError(f"camera group {name!r} has no ground model: {reason}")

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dict: the groups' models, each image's group and the shared class heights."""
        return {
            "format": _FORMAT,
            "rarefill_version": __version__,
            "class_heights_m": {
                name: {"metres": h.metres, "known_m": h.known_m, "known_from": h.known_from}
                for name, h in self.class_heights.items()
            },
            "groups": {name: model.to_dict() for name, model in self.groups.items()},
            "unfitted": dict(self.unfitted),
            "image_groups": {str(k): v for k, v in self.image_groups.items()},
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> CameraGroups:
        """Rebuild from :meth:`to_dict` output; ``ValueError`` naming the bad key otherwise."""
        if not isinstance(data, Mapping) or data.get("format") != _FORMAT:
            raise ValueError(f"not a set of camera ground models: 'format' must be {_FORMAT!r}")
        try:
            heights = {
                str(n): ClassHeight(_float_or_none(h["metres"]), _float_or_none(h["known_m"]), str(h["known_from"]))
                for n, h in data["class_heights_m"].items()
            }
            return cls(
                groups={str(n): GroundModel.from_dict(m) for n, m in data["groups"].items()},
                image_groups={int(k): str(v) for k, v in data["image_groups"].items()},
                class_heights=heights,
                unfitted={str(k): str(v) for k, v in data.get("unfitted", {}).items()},
            )
        except KeyError as exc:
            raise ValueError(f"camera ground models: required key {exc.args[0]!r} is missing") from None
        except (TypeError, AttributeError) as exc:
            raise ValueError(f"camera ground models: malformed value ({exc})") from None


def _float_or_none(value: Any) -> float | None:
    return None if value is None else float(value)


def ground_for(ground: GroundModel | CameraGroups, scene: Scene) -> GroundModel:
    """The ground model of ``scene``'s camera: what placement, the filters and the stages use for an image.

    A single :class:`GroundModel` is every image's; from :class:`CameraGroups`, the group the fit put the
    image in, or for an image the fit did not see, the group its camera key names.

    Raises
    ------
    ValueError
        The image's group has no model (too few boxes), or no group matches an unseen image.
    """
    if isinstance(ground, GroundModel):
        return ground
    if scene.id in ground.image_groups:
        return ground.for_image(scene.id)
    return ground._group(camera_label(scene))


def scene_intrinsics(scene: Scene) -> Intrinsics | None:
    """The calibration an image entry gives (see the module docstring), else None.

    Raises
    ------
    ValueError
        A calibration key is present but malformed (names the key).
    """
    given = scene.extra.get(INTRINSICS_KEY)
    if given is not None:
        if not isinstance(given, Mapping):
            raise ValueError(f"{INTRINSICS_KEY} must be an object with fx, fy, cx, cy")
        values = [given.get(k) for k in ("fx", "fy", "cx", "cy")]
        key = INTRINSICS_KEY
    elif scene.extra.get(MATRIX_KEY) is not None:
        matrix = scene.extra[MATRIX_KEY]
        try:
            values = [matrix[0][0], matrix[1][1], matrix[0][2], matrix[1][2]]
        except (TypeError, IndexError, KeyError):
            raise ValueError(
                f"{MATRIX_KEY} must be a 3x3 camera matrix [[fx, 0, cx], [0, fy, cy], [0, 0, 1]]"
            ) from None
        key = MATRIX_KEY
    else:
        return None
    if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values):
        raise ValueError(f"{key}: fx, fy, cx and cy must be numbers, got {values}")
    try:
        return Intrinsics(*(float(v) for v in values))
    except ValueError as exc:
        raise ValueError(f"{key}: {exc}") from None


def camera_label(scene: Scene) -> str:
    """The name of ``scene``'s camera group: ``"CAM_FRONT 1600x900"``, ``"1242x375 fx 721.5 cy 172.9"`` or
    ``"1242x375"`` (camera name, else calibration rounded to 0.1 px, else size; each with the size)."""
    size = f"{scene.width}x{scene.height}"
    camera = scene.extra.get(CAMERA_KEY)
    if isinstance(camera, str) and camera.strip():
        return f"{camera.strip()} {size}"
    intrinsics = scene_intrinsics(scene)
    if intrinsics is not None:
        return f"{size} fx {intrinsics.fx:.1f} cy {intrinsics.cy:.1f}"
    return size


@dataclass(frozen=True)
class GroupInfo:
    """What the images say about one camera group: size, calibration (median of its images') and images."""

    width: int
    height: int
    intrinsics: Intrinsics | None
    image_ids: tuple[int, ...]


def group_images(dataset: Dataset) -> dict[str, GroupInfo]:
    """The camera groups of ``dataset``, by name, in order of first appearance.

    Raises
    ------
    DatasetError
        A malformed calibration (names the image and the key).
    """
    members: dict[str, list[Scene]] = {}
    calibrations: dict[str, list[Intrinsics]] = {}
    for scene in dataset.scenes:
        try:
            label = camera_label(scene)
            intrinsics = scene_intrinsics(scene)
        except ValueError as exc:
            raise DatasetError(dataset.source or "<dataset>", f"images[id={scene.id}]", str(exc)) from None
        members.setdefault(label, []).append(scene)
        if intrinsics is not None:
            calibrations.setdefault(label, []).append(intrinsics)
    out = {}
    for label, scenes in members.items():
        found = calibrations.get(label)
        intrinsics = None
        if found:
            median = np.median([[c.fx, c.fy, c.cx, c.cy] for c in found], axis=0)
            intrinsics = Intrinsics(*(float(v) for v in median))
        out[label] = GroupInfo(scenes[0].width, scenes[0].height, intrinsics, tuple(s.id for s in scenes))
    return out


def describe_groups(groups: Mapping[str, GroupInfo]) -> str:
    """``"1242x375 (3 images), 1224x370 (3 images)"``: the groups found, for messages."""
    return ", ".join(f"{name} ({len(g.image_ids)} images)" for name, g in groups.items()) or "no images"
