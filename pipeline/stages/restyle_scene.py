"""What the restyle renderers know about a scene: its camera, depth, sky, objects' silhouettes and road.

Distances come from a measured depth map where the data set gives one, else from the photo itself
(:func:`pipeline.weather.distance.distance_map`: ground plane, upright scenery at its ground contact, sky
at the far limit, labelled objects at their footprint distance over their silhouettes).

A per-image depth map is named by the image entry's extra key ``"depth_map"`` (beside ``"drivable_mask"``),
with a path relative to the data set's image folder, of the image's size, holding the distance along the
optical axis: a ``.npy`` file of float metres (NaN or 0 = not measured), or a single-channel 16-bit PNG of
millimetres (0 = not measured; 65535 = beyond its 65.5 m range). Every measured pixel's distance is used
exactly; unmeasured ones (sky, gaps of a sparse LiDAR scan, beyond range) are estimated.

The camera: the focal length from the image entry's ``intrinsics`` (``fx``) where given, else from an
assumed 60-degree horizontal field of view (:func:`pipeline.filters.focal_from_fov`); the horizon from the
principal row ``intrinsics.cy`` of a level camera where intrinsics are given (steadier than a fit from a
few boxes), else from the ground model's fit of that image; the camera height from the ground model, else
:data:`pipeline.weather.distance.DEFAULT_CAMERA_HEIGHT_M`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np
from PIL import Image, UnidentifiedImageError

from ..dataset import Annotation, Dataset, Scene
from ..errors import DatasetError
from ..geometry import GroundModel, focal_length, ground_for
from ..surface import resolve_inside
from ..weather import distance as dist
from ..weather.fog import box_pixels
from ..weather.sky import sky_mask
from .base import StageContext
from .rebackground import segmentation_mask

DEPTH_KEY = "depth_map"
"""Image-entry extra key naming a 16-bit PNG depth map in millimetres (relative to the image folder)."""

GRABCUT_SIDE_PX = 96
"""Longest side (px) at which an object's box is cut (larger boxes are shrunk first, for speed)."""

INTRINSICS_KEY = "intrinsics"
"""Image-entry extra key holding the pinhole intrinsics ``{"fx", "fy", "cx", "cy"}`` in pixels."""


@dataclass(frozen=True)
class Camera:
    """A level pinhole camera over flat ground, and where each number came from."""

    horizon_row: float
    focal_px: float
    camera_height_m: float
    sources: dict[str, str]


@dataclass(frozen=True)
class Geometry:
    """What the renderers know about the scene: distances, object pixels and mattes, sky, road, camera."""

    distance_map: dist.DistanceMap
    regions: tuple[np.ndarray, ...]
    mattes: tuple[np.ndarray, ...]
    annotations: tuple[Annotation, ...]
    sky: np.ndarray
    drivable: np.ndarray
    camera: Camera

    @property
    def distance(self) -> np.ndarray:
        """(H, W) float64 metres."""
        return self.distance_map.distance

    @property
    def horizon_row(self) -> float:
        return self.camera.horizon_row

    @property
    def focal_px(self) -> float:
        return self.camera.focal_px

    @property
    def camera_height_m(self) -> float:
        return self.camera.camera_height_m


def scene_camera(scene: Scene, ground: GroundModel) -> Camera:
    """The camera of ``scene`` (see the module docstring for where each value comes from)."""
    intrinsics = scene.extra.get(INTRINSICS_KEY)
    fx = _positive(intrinsics.get("fx")) if isinstance(intrinsics, dict) else None
    cy = _finite(intrinsics.get("cy")) if isinstance(intrinsics, dict) else None
    focal = fx if fx is not None else focal_length(ground)
    if cy is None:
        horizon, horizon_source = ground.horizon_for(scene.id), "ground model"
    else:
        horizon, horizon_source = cy, "intrinsics.cy (level camera)"
    height = ground.camera_height_m or dist.DEFAULT_CAMERA_HEIGHT_M
    sources = {
        "focal_px": "intrinsics.fx"
        if fx is not None
        else "camera group (calibration fy, else 60-degree field of view)",
        "horizon_row": horizon_source,
        "camera_height_m": "ground model" if ground.camera_height_m else "default",
    }
    return Camera(float(horizon), float(focal), float(height), sources)


def read_depth_map(scene: Scene, dataset: Dataset | None = None) -> np.ndarray | None:
    """The scene's measured depth (metres, NaN where not measured), or None when it names no depth map.

    A ``.npy`` file holds float metres (NaN, inf or <= 0: not measured); a PNG holds 16-bit millimetres
    (0: not measured; 65535, the top of the range, "65.535 m or farther": also left to the estimate).

    Raises
    ------
    DatasetError
        The path resolves outside the image folder, is missing or unreadable, is not a single-channel
        16-bit PNG (or a 2-D float ``.npy``), or is not of the scene's size.
    """
    name = scene.extra.get(DEPTH_KEY)
    if name is None:
        return None
    where = f"images[id={scene.id}].{DEPTH_KEY}"
    source = (dataset.source if dataset is not None else None) or scene.path
    root = (dataset.images_dir if dataset is not None else scene.path.parent).resolve()
    path = resolve_inside(name, root, source, where)
    try:
        metres = _depth_npy(path, source, where) if path.suffix.lower() == ".npy" else _depth_png(path, source, where)
    except FileNotFoundError:
        raise DatasetError(source, where, f"depth map {path} not found") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise DatasetError(source, where, f"depth map {path} cannot be read ({exc})") from None
    if metres.shape != (scene.height, scene.width):
        shape = f"{metres.shape[1]}x{metres.shape[0]}" if metres.ndim == 2 else str(metres.shape)
        raise DatasetError(
            source, where, f"depth map {name} is {shape} px but the image is {scene.width}x{scene.height}"
        )
    return np.where(np.isfinite(metres) & (metres > 0), metres, np.nan)


def _depth_png(path, source, where) -> np.ndarray:
    with Image.open(path) as img:
        img.load()
        if img.mode not in ("I;16", "I;16B", "I"):
            raise DatasetError(
                source, where, f"depth map {path.name} must be a 16-bit single-channel PNG, got {img.mode}"
            )
        millimetres = np.asarray(img, dtype=np.float64)
    return np.where(millimetres >= 65535, np.nan, millimetres / 1000.0)


def _depth_npy(path, source, where) -> np.ndarray:
    values = np.load(path, allow_pickle=False)
    if values.ndim != 2 or not np.issubdtype(values.dtype, np.floating):
        raise DatasetError(
            source, where, f"depth map {path.name} must be a 2-D float array, got {values.dtype} {values.shape}"
        )
    return values.astype(np.float64)


def object_silhouette(image: np.ndarray, box, segmentation=None) -> np.ndarray | None:
    """An object's pixels: its segmentation, else GrabCut inside its box seeded with a sure core; None if neither.

    GrabCut (Rother, Kolmogorov and Blake, SIGGRAPH 2004; OpenCV's ``cv2.grabCut``) starts from the box as
    "probably foreground", a ring of 15% of its longer side as sure background and, because a labelled box
    is tight, an ellipse over its central 30% x 50% as sure foreground: without that core, on real street
    photos the ring's road and shadow colours often explain a dark pedestrian away entirely. A cut keeping
    under 15% or over 97% of the box is not trusted (None). Boxes under 6 px on a side get None.

    This is the local estimator of the restyle stage; the shared one (``pipeline.silhouette``) replaces it
    when it lands, with the same arguments.
    """
    height, width = image.shape[:2]
    if segmentation is not None:
        mask = segmentation_mask(segmentation, height, width)
        if mask.any():
            return mask
    inside = box_pixels((height, width), box)
    rows, cols = np.nonzero(inside)
    if rows.size == 0 or min(np.ptp(rows), np.ptp(cols)) + 1 < 6:
        return None
    r0, r1, c0, c1 = rows.min(), rows.max() + 1, cols.min(), cols.max() + 1
    grow = max(4, int(math.ceil(0.15 * max(r1 - r0, c1 - c0))))
    p0, p1, q0, q1 = max(0, r0 - grow), min(height, r1 + grow), max(0, c0 - grow), min(width, c1 + grow)
    labels = np.full((p1 - p0, q1 - q0), cv2.GC_BGD, np.uint8)
    labels[r0 - p0 : r1 - p0, c0 - q0 : c1 - q0] = cv2.GC_PR_FGD
    centre = ((c0 + c1) // 2 - q0, (r0 + r1) // 2 - p0)
    axes = (max(1, int(0.15 * (c1 - c0))), max(1, int(0.25 * (r1 - r0))))
    cv2.ellipse(labels, centre, axes, 0, 0, 360, int(cv2.GC_FGD), -1)
    roi = np.ascontiguousarray(image[p0:p1, q0:q1][..., ::-1])
    # a large box is cut at most GRABCUT_SIDE_PX on its longer side: the cut follows colour regions, which
    # survive the shrinking, and its cost grows with the pixel count
    scale = min(1.0, GRABCUT_SIDE_PX / max(r1 - r0, c1 - c0))
    size = (max(1, round((q1 - q0) * scale)), max(1, round((p1 - p0) * scale)))
    small_labels = cv2.resize(labels, size, interpolation=cv2.INTER_NEAREST)
    small_roi = cv2.resize(roi, size, interpolation=cv2.INTER_AREA)
    cv2.setRNGSeed(0)  # GrabCut's k-means draws from OpenCV's own generator: reset it for the same mask each run
    cv2.grabCut(small_roi, small_labels, None, np.zeros((1, 65)), np.zeros((1, 65)), 4, cv2.GC_INIT_WITH_MASK)
    cut = ((small_labels == cv2.GC_FGD) | (small_labels == cv2.GC_PR_FGD)).astype(np.float32)
    mask = np.zeros((height, width), dtype=bool)
    mask[p0:p1, q0:q1] = cv2.resize(cut, (q1 - q0, p1 - p0), interpolation=cv2.INTER_LINEAR) >= 0.5
    mask &= inside
    share = mask.sum() / inside.sum()
    return mask if 0.15 <= share <= 0.97 else None


def object_matte(image: np.ndarray, ann: Annotation) -> tuple[np.ndarray, bool]:
    """An object's matte: 1 on its silhouette (:func:`object_silhouette`), anti-aliased; and whether it was given.

    Where no silhouette holds (a box too small, a failed cut), a soft matte that is 1 in the box's core and
    falls to 0 at its edges over a quarter of its shorter side: an uncertain object must not leave the shape
    of its box in the fog.

    Returns
    -------
    matte : (H, W) float32 ndarray in [0, 1]
    given : bool
        True for a segmentation.
    """
    given = ann.segmentation is not None and segmentation_mask(ann.segmentation, *image.shape[:2]).any()
    pixels = object_silhouette(image, ann.bbox, ann.segmentation)
    if pixels is not None:
        matte = pixels.astype(np.float32)
        return (matte if given else cv2.GaussianBlur(matte, (3, 3), 0)), bool(given)
    box = box_pixels(image.shape[:2], ann.bbox).astype(np.uint8)
    inside = cv2.distanceTransform(np.pad(box, 1), cv2.DIST_L2, 3)[1:-1, 1:-1]
    ramp = max(1.0, 0.25 * min(ann.bbox[2], ann.bbox[3]))
    return np.clip((inside - 0.5) / ramp, 0.0, 1.0).astype(np.float32), False


def scene_geometry(image: np.ndarray, scene: Scene, ctx: StageContext) -> Geometry:
    """Camera, depth map (given or estimated), sky, object mattes and road of one scene."""
    camera = scene_camera(scene, ground_for(ctx.ground, scene))
    labelled = tuple(a for a in scene.annotations if not a.iscrowd)
    found = [object_matte(image, a) for a in labelled]
    mattes = tuple(m for m, _ in found)
    surface = ctx.surface(scene)
    sky = sky_mask(image, camera.horizon_row)
    objects = [dist.PlacedObject(matte, a.bottom_row, given) for (matte, given), a in zip(found, labelled, strict=True)]
    distance = dist.distance_map(
        image,
        horizon_row=camera.horizon_row,
        focal_px=camera.focal_px,
        camera_height_m=camera.camera_height_m,
        sky=sky,
        drivable=surface.mask,
        drivable_given=not surface.estimated,
        objects=objects,
        depth=read_depth_map(scene, ctx.dataset),
    )
    regions = tuple(m >= 0.5 for m in mattes)
    return Geometry(distance, regions, mattes, labelled, sky, surface.mask, camera)


def _positive(value: object) -> float | None:
    number = _finite(value)
    return number if number is not None and number > 0 else None


def _finite(value: object) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        return None
    return float(value)
