"""Physically based scene conditions: fog, rain, snow, dusk and night, in numpy/OpenCV only.

Every function here is pure: arrays and keyword options in, arrays out, randomness through one ``rng``.
Distances come from the flat-ground pinhole model (:func:`scene_distance`), so fog thickens, streaks
shorten and flakes shrink with distance the way the camera would see them. Images are (H, W, 3) uint8 sRGB;
light is mixed in linear sRGB (IEC 61966-2-1) because Koschmieder's law and the Weber contrast are about
radiance, not about gamma-encoded pixel values.

References
----------
.. [1] H. Koschmieder, "Theorie der horizontalen Sichtweite", Beitr. Phys. freien Atm. 12, 1924 (via [2]).
.. [2] C. Sakaridis, D. Dai, L. Van Gool, "Semantic Foggy Scene Understanding with Synthetic Data",
   IJCV 126, 2018: ``I = J t + A (1 - t)``, ``t = exp(-beta d)``, beta 0.005-0.02 per metre.
.. [3] WMO Guide to Meteorological Instruments and Methods of Observation (WMO-No. 8), and CIE: the
   meteorological optical range is the distance at which a beam's contrast falls to 5%.
.. [4] K. He, J. Sun, X. Tang, "Single Image Haze Removal Using Dark Channel Prior", CVPR 2009 (airlight
   from the brightest 0.1% of the dark channel; from memory).
.. [5] J. S. Marshall, W. McK. Palmer, "The distribution of raindrops with size", J. Meteorology 5, 1948
   (``N(D) = N0 exp(-Lambda D)``, ``N0 = 8000 m^-3 mm^-1``, ``Lambda = 4.1 R^-0.21 mm^-1``; from memory).
.. [6] D. Atlas, R. C. Srivastava, R. S. Sekhon, "Doppler radar characteristics of precipitation at
   vertical incidence", Rev. Geophys. 11, 1973 (terminal velocity ``9.65 - 10.3 exp(-0.6 D)`` m/s;
   from memory).
.. [7] F. Lv, Y. Li, F. Lu, "Attention Guided Low-light Image Enhancement with a Large Scale Low-light
   Simulation Dataset", IJCV 129, 2021: ``I_out = b (a I)^g``, a in [0.9, 1], b in [0.5, 1], g in [1.5, 5],
   plus Poisson-Gaussian noise.
.. [8] A. Foi, M. Trimeche, V. Katkovnik, K. Egiazarian, "Practical Poissonian-Gaussian noise modeling
   and fitting for single-image raw-data", IEEE TIP 17, 2008 (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import cv2
import numpy as np

MOR_CONTRAST = 0.05
"""Contrast threshold of the meteorological optical range (WMO/CIE): at distance V a beam keeps 5%."""

DEFAULT_CAMERA_HEIGHT_M = 1.65
"""Camera height used when the ground model has no estimate: the KITTI car's camera (Geiger et al., CVPR
2012; from memory)."""

EXPOSURE_S = 1 / 60
"""Exposure time that sets streak lengths: a common automotive/video setting (common practice)."""

LAMP_COLOURS = {
    "head": (1.0, 0.95, 0.82),
    "tail": (1.0, 0.12, 0.06),
    "amber": (1.0, 0.62, 0.08),
}
"""Linear RGB colour of vehicle lamps (white-yellow head lamps, red tail lamps, amber beacons)."""


# --------------------------------------------------------------------------------------------------
# colour


def srgb_to_linear(image: np.ndarray) -> np.ndarray:
    """Linear-light RGB in [0, 1] from sRGB: (H, W, 3) uint8 -> float32 (IEC 61966-2-1 transfer curve)."""
    _check_image(image)
    v = image.astype(np.float32) / 255.0
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4).astype(np.float32)


def linear_to_srgb(linear: np.ndarray) -> np.ndarray:
    """sRGB uint8 from linear-light RGB in [0, 1] (clipped), the inverse of :func:`srgb_to_linear`."""
    v = np.clip(np.asarray(linear, dtype=np.float32), 0.0, 1.0)
    encoded = np.where(v <= 0.0031308, 12.92 * v, 1.055 * np.power(v, 1 / 2.4) - 0.055)
    return np.clip(np.rint(encoded * 255.0), 0, 255).astype(np.uint8)


def luminance(linear: np.ndarray) -> np.ndarray:
    """Relative luminance ``Y = 0.2126 R + 0.7152 G + 0.0722 B`` of linear RGB (ITU-R BT.709): (H, W)."""
    return linear @ np.array([0.2126, 0.7152, 0.0722], dtype=np.float32)


# --------------------------------------------------------------------------------------------------
# distance and fog


def extinction_coefficient(visibility_m: float, *, contrast: float = MOR_CONTRAST) -> float:
    """Extinction coefficient ``beta = -ln(contrast) / V`` (per metre); ``ln(20) / V`` for the MOR.

    Parameters
    ----------
    visibility_m : float
        Meteorological optical range V in metres (> 0).
    contrast : float
        Contrast threshold that defines V: 0.05 for the MOR (WMO/CIE), 0.02 for the older
        meteorological range.

    References
    ----------
    WMO-No. 8 (MOR definition); Koschmieder 1924.
    """
    if not (visibility_m > 0 and math.isfinite(visibility_m)):
        raise ValueError(f"visibility_m must be a finite number > 0, got {visibility_m!r}")
    if not 0 < contrast < 1:
        raise ValueError(f"contrast must be in (0, 1), got {contrast!r}")
    return -math.log(contrast) / visibility_m


def transmission(distance_m: np.ndarray | float, beta: float) -> np.ndarray:
    """Koschmieder transmission ``t = exp(-beta d)``; 0 at infinite distance (sky), 1 at d = 0.

    Parameters
    ----------
    distance_m : float or ndarray
        Distances in metres (>= 0, may be ``inf``).
    beta : float
        Extinction coefficient per metre (>= 0).

    Returns
    -------
    float64 ndarray of the same shape
    """
    if not beta >= 0:
        raise ValueError(f"beta must be >= 0, got {beta!r}")
    d = np.asarray(distance_m, dtype=np.float64)
    if np.any(d < 0):
        raise ValueError("distances must be >= 0")
    with np.errstate(invalid="ignore"):
        return np.where(np.isinf(d), 0.0 if beta > 0 else 1.0, np.exp(-beta * np.where(np.isinf(d), 0.0, d)))


SCENERY_HEIGHT_M = 10.0
"""Height given to roadside scenery (trees, houses, poles) that rises above the horizon: field trees are about
8-15 m tall, houses 6-9 m (from memory). Only its top row is seen, so a tall thing reads as near."""


def scene_distance(
    shape: tuple[int, int],
    *,
    horizon_row: float,
    focal_px: float,
    camera_height_m: float,
    objects: Sequence[tuple[np.ndarray, float]] = (),
    scenery: np.ndarray | None = None,
    scenery_height_m: float = SCENERY_HEIGHT_M,
) -> np.ndarray:
    """Distance (metres) to what each pixel shows, from a level camera over flat ground.

    Ground pixels (centre row ``r + 0.5`` below the horizon) are at ``Z = f h_cam / (r + 0.5 - v_h)``; pixels
    at or above the horizon are sky, at infinity, unless ``scenery`` marks them: then each column's scenery is
    a thing ``scenery_height_m`` tall whose top is at the column's highest scenery row ``v_t``, so at
    ``Z = f (H - h_cam) / (v_h - v_t)`` (the nearest top within 1% of the image width counts, so a crown's
    ragged edge keeps the crown's distance); below the horizon such a column shows nothing farther than its
    scenery (the thing hides the ground behind it down to its base). Every pixel of an object is at the
    distance of its footprint (its bottom row). Objects are painted far to near, so a nearer object hides a
    farther one.

    Parameters
    ----------
    shape : (H, W)
    horizon_row : float
        Horizon row (top-down, continuous pixel coordinates).
    focal_px : float
        Focal length in pixels (> 0).
    camera_height_m : float
        Camera height above the ground (> 0).
    objects : sequence of ((H, W) bool ndarray, float)
        Each object's pixels and its bottom row; an object standing at or above the horizon is at infinity.
    scenery : (H, W) bool ndarray, optional
        Pixels above the horizon that are not sky (see :func:`sky_mask`).
    scenery_height_m : float
        Assumed real height of scenery (> camera height).

    Returns
    -------
    (H, W) float64 ndarray
        Metres, ``inf`` for sky.

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole over a plane);
    Hoiem, Efros, Hebert, "Putting Objects in Perspective", CVPR 2006 (height above the horizon).
    """
    if not (focal_px > 0 and camera_height_m > 0):
        raise ValueError(f"focal_px and camera_height_m must be > 0, got {focal_px!r}, {camera_height_m!r}")
    if not scenery_height_m > camera_height_m:
        raise ValueError(f"scenery_height_m must exceed the camera height, got {scenery_height_m!r}")
    height, width = shape
    rows = np.arange(height, dtype=np.float64) + 0.5 - horizon_row
    with np.errstate(divide="ignore"):
        per_row = np.where(rows > 0, focal_px * camera_height_m / np.where(rows > 0, rows, 1.0), np.inf)
    distance = np.repeat(per_row[:, None], width, axis=1)
    if scenery is not None:
        if scenery.shape != (height, width) or scenery.dtype != bool:
            raise ValueError(f"scenery must be a {(height, width)} bool array, got {scenery.shape}")
        above = scenery & (rows <= 0)[:, None]
        has = above.any(axis=0)
        rise = np.where(has, horizon_row - np.argmax(above, axis=0), 0.0).astype(np.float32)
        reach = max(1, int(round(0.01 * width))) * 2 + 1
        rise = cv2.dilate(rise.reshape(1, -1), np.ones((1, reach), np.uint8)).ravel().astype(np.float64)
        with np.errstate(divide="ignore"):
            column = focal_px * (scenery_height_m - camera_height_m) / np.maximum(rise, 0.5)
        # below the horizon a column's scenery hides the farther ground behind it, down to its base row
        below = has[None, :] & (rows > 0)[:, None]
        distance = np.where(above, column[None, :], np.where(below, np.minimum(distance, column[None, :]), distance))
    depths = [footprint_distance(bottom, horizon_row, focal_px, camera_height_m) for _, bottom in objects]
    for index in np.argsort(depths)[::-1]:
        region = objects[index][0]
        if region.shape != (height, width) or region.dtype != bool:
            raise ValueError(f"objects[{index}] mask must be a {(height, width)} bool array, got {region.shape}")
        distance[region] = depths[index]
    return distance


def sky_mask(image: np.ndarray, horizon_row: float, *, step: int = 3) -> np.ndarray:
    """Sky pixels: above the horizon and reached from the top edge through smooth colour changes.

    A flood fill from the top row's brightest half (by dark channel: sky is light in every channel, foliage
    is not) spreads while neighbouring pixels differ by at most ``step`` levels per channel; sky gradients
    and soft clouds pass, the outline of a tree, roof or pole stops it.

    Returns
    -------
    (H, W) bool ndarray
    """
    _check_image(image)
    height, width = image.shape[:2]
    rows = int(np.clip(math.ceil(horizon_row), 0, height))
    sky = np.zeros((height, width), dtype=bool)
    if rows == 0:
        return sky
    region = np.ascontiguousarray(cv2.GaussianBlur(image[:rows], (3, 3), 0))
    fill = np.zeros((rows + 2, width + 2), np.uint8)
    dark = region[0].min(axis=1)
    flags = 4 | cv2.FLOODFILL_MASK_ONLY | (1 << 8)
    for col in np.flatnonzero(dark >= np.median(dark)):
        if not fill[1, col + 1]:
            cv2.floodFill(region, fill, (int(col), 0), (0, 0, 0), (step,) * 3, (step,) * 3, flags)
    sky[:rows] = fill[1:-1, 1:-1].astype(bool)
    return sky


def footprint_distance(bottom_row: float, horizon_row: float, focal_px: float, camera_height_m: float) -> float:
    """Distance (m) of an object standing at ``bottom_row``: ``f h_cam / (v_b - v_h)``; inf at or above the horizon."""
    depth = float(bottom_row) - horizon_row
    return focal_px * camera_height_m / depth if depth > 0 else math.inf


def estimate_airlight(image: np.ndarray, horizon_row: float, *, share: float = 0.001, patch_px: int = 7) -> np.ndarray:
    """Atmospheric light: mean colour of the sky pixels whose dark channel is brightest.

    The dark channel is the minimum over RGB and a ``patch_px`` square; its top ``share`` (0.1%) of pixels
    above the horizon are the haziest, most light-filled sky (He et al. 2009), which ignores small bright
    objects and saturated blue sky. Without sky rows (horizon at or above the top edge) the whole image is
    used.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    horizon_row : float

    Returns
    -------
    (3,) float64 ndarray
        sRGB in [0, 1].

    References
    ----------
    He, Sun, Tang, "Single Image Haze Removal Using Dark Channel Prior", CVPR 2009 (from memory).
    """
    _check_image(image)
    if not 0 < share <= 1:
        raise ValueError(f"share must be in (0, 1], got {share!r}")
    sky_rows = int(np.clip(math.floor(horizon_row), 0, image.shape[0]))
    region = image[:sky_rows] if sky_rows > 0 else image
    dark = cv2.erode(region.min(axis=2), np.ones((patch_px, patch_px), np.uint8))
    count = max(1, int(round(share * dark.size)))
    top = np.argpartition(dark.ravel(), dark.size - count)[dark.size - count :]
    return region.reshape(-1, 3)[top].astype(np.float64).mean(axis=0) / 255.0


def apply_fog(image: np.ndarray, transmission_map: np.ndarray, airlight: np.ndarray) -> np.ndarray:
    """Koschmieder's law ``I = J t + A (1 - t)`` per pixel, in linear light.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
        The clear scene J (sRGB).
    transmission_map : (H, W) float ndarray in [0, 1]
    airlight : (3,) float
        A, sRGB in [0, 1] (see :func:`estimate_airlight`).

    Returns
    -------
    (H, W, 3) uint8 ndarray

    References
    ----------
    Sakaridis, Dai, Van Gool, IJCV 2018; Koschmieder 1924.
    """
    _check_image(image)
    t = np.asarray(transmission_map, dtype=np.float32)
    if t.shape != image.shape[:2] or np.any((t < 0) | (t > 1)):
        raise ValueError(f"transmission_map must be an {image.shape[:2]} array in [0, 1], got {t.shape}")
    a = _airlight_linear(airlight)
    linear = srgb_to_linear(image) * t[..., None] + a * (1.0 - t[..., None])
    return linear_to_srgb(linear)


def _airlight_linear(airlight: np.ndarray) -> np.ndarray:
    a = np.asarray(airlight, dtype=np.float64)
    if a.shape != (3,) or np.any((a < 0) | (a > 1)):
        raise ValueError(f"airlight must be 3 sRGB values in [0, 1], got {airlight!r}")
    return srgb_to_linear(np.rint(a * 255).astype(np.uint8).reshape(1, 1, 3)).reshape(3)


# --------------------------------------------------------------------------------------------------
# visibility of labelled objects


def ring_mask(
    box: Sequence[float], shape: tuple[int, int], *, width_share: float = 0.25, min_px: int = 3
) -> np.ndarray:
    """The ring around a box: the box grown by ``width_share`` of its shorter side (>= ``min_px``), minus it.

    Returns
    -------
    (H, W) bool ndarray (clipped to the image)
    """
    x, y, w, h = (float(v) for v in box)
    grow = max(min_px, int(math.ceil(width_share * min(w, h))))
    inner = _box_pixels(shape, x, y, w, h)
    outer = _box_pixels(shape, x - grow, y - grow, w + 2 * grow, h + 2 * grow)
    return outer & ~inner


def _box_pixels(shape: tuple[int, int], x: float, y: float, w: float, h: float) -> np.ndarray:
    height, width = shape
    mask = np.zeros(shape, dtype=bool)
    c0, r0 = max(0, int(math.floor(x))), max(0, int(math.floor(y)))
    c1, r1 = min(width, int(math.ceil(x + w))), min(height, int(math.ceil(y + h)))
    mask[r0:r1, c0:c1] = True
    return mask


def object_contrast(luminance_map: np.ndarray, region: np.ndarray, ring: np.ndarray) -> float:
    """Apparent contrast of an object against its surroundings: mean ``|L - L_b| / L_b`` over its pixels.

    ``L_b`` is the mean luminance of the ring around it. For a uniform object this is the Weber contrast
    ``|L_o - L_b| / L_b`` of mean luminances; averaging the absolute value per pixel keeps a two-tone object
    (light body, dark windows) from cancelling to zero. Under fog it falls as ``C0 t(d)`` when the ring lies
    at the object's distance (Koschmieder).

    Parameters
    ----------
    luminance_map : (H, W) float ndarray
        Linear relative luminance (see :func:`luminance`).
    region, ring : (H, W) bool ndarray
        The object's pixels and its surroundings (both non-empty).

    Returns
    -------
    float
        ``inf`` when the surroundings are black.
    """
    if not region.any() or not ring.any():
        raise ValueError("region and ring must both hold pixels")
    background = float(luminance_map[ring].mean())
    if background <= 0:
        return math.inf
    return float(np.abs(luminance_map[region] - background).mean() / background)


# --------------------------------------------------------------------------------------------------
# rain


def raindrop_slope(rate_mm_per_h: float) -> float:
    """Marshall-Palmer slope ``Lambda = 4.1 R^-0.21`` per mm of drop diameter (Marshall & Palmer 1948)."""
    if not (rate_mm_per_h > 0 and math.isfinite(rate_mm_per_h)):
        raise ValueError(f"rain rate must be a finite number of mm/h > 0, got {rate_mm_per_h!r}")
    return 4.1 * rate_mm_per_h**-0.21


def visible_drop_density(rate_mm_per_h: float, *, min_diameter_mm: float = 1.0) -> float:
    """Raindrops per cubic metre with diameter >= ``min_diameter_mm`` (those that draw streaks).

    ``int_Dmin^inf N0 exp(-Lambda D) dD = (N0 / Lambda) exp(-Lambda Dmin)`` with ``N0 = 8000 m^-3 mm^-1``
    (Marshall & Palmer 1948, from memory). Increases with the rain rate: about 150 m^-3 at 5 mm/h, 470 at
    25 mm/h and 1080 at 100 mm/h. Smaller drops are below a pixel at any distance the camera resolves and
    show only as the haze of far layers.
    """
    slope = raindrop_slope(rate_mm_per_h)
    return 8000.0 / slope * math.exp(-slope * min_diameter_mm)


def mean_visible_diameter_mm(rate_mm_per_h: float, *, min_diameter_mm: float = 1.0) -> float:
    """Mean diameter (mm) of drops >= ``min_diameter_mm`` in a Marshall-Palmer spectrum: ``Dmin + 1 / Lambda``."""
    return min_diameter_mm + 1.0 / raindrop_slope(rate_mm_per_h)


def terminal_velocity(diameter_mm: float) -> float:
    """Fall speed (m/s) of a raindrop: ``9.65 - 10.3 exp(-0.6 D)`` (Atlas et al. 1973, from memory)."""
    return max(0.0, 9.65 - 10.3 * math.exp(-0.6 * diameter_mm))


def wetness(rate_mm_per_h: float) -> float:
    """How wet the road looks, 0..1: ``1 - exp(-R / 5 mm/h)``; even light rain soaks asphalt in minutes.

    A look, not a measurement (common practice): 2 mm/h gives 0.33, 10 mm/h 0.86, 25 mm/h 0.99.
    """
    if not rate_mm_per_h >= 0:
        raise ValueError(f"rain rate must be >= 0, got {rate_mm_per_h!r}")
    return 1.0 - math.exp(-rate_mm_per_h / 5.0)


@dataclass(frozen=True)
class Layer:
    """One depth slab of falling particles: its near and far distance (m) and how many particles it holds."""

    near_m: float
    far_m: float
    count: int

    @property
    def distance_m(self) -> float:
        """Representative distance: the slab's geometric mean."""
        return math.sqrt(self.near_m * self.far_m)


def particle_layers(
    shape: tuple[int, int],
    *,
    focal_px: float,
    density_per_m3: float,
    near_m: float,
    far_m: float,
    n_layers: int,
    rng: np.random.Generator | int | None,
) -> list[Layer]:
    """Split the view frustum between ``near_m`` and ``far_m`` into slabs (geometric spacing) and fill them.

    A slab from ``z0`` to ``z1`` of a frustum ``W / f`` wide and ``H / f`` high per metre of distance has
    volume ``(W / f) (H / f) (z1^3 - z0^3) / 3``; its particle count is Poisson with mean ``density x volume``.
    """
    height, width = shape
    if not (0 < near_m < far_m and n_layers >= 1 and density_per_m3 >= 0):
        raise ValueError(f"need 0 < near_m < far_m, n_layers >= 1, density >= 0; got {near_m}, {far_m}, {n_layers}")
    rng = np.random.default_rng(rng)
    edges = np.geomspace(near_m, far_m, n_layers + 1)
    area = (width / focal_px) * (height / focal_px)
    layers = []
    for z0, z1 in zip(edges[:-1], edges[1:], strict=True):
        volume = area * (z1**3 - z0**3) / 3.0
        layers.append(Layer(float(z0), float(z1), int(rng.poisson(density_per_m3 * volume))))
    return layers


def streak_kernel(length_px: float, angle_deg: float) -> np.ndarray:
    """A line kernel ``length_px`` long at ``angle_deg`` from vertical, peak 1 (a streak of uniform brightness)."""
    length = max(1.0, float(length_px))
    size = int(math.ceil(length)) | 1
    kernel = np.zeros((size, size), np.float32)
    c = size // 2
    dx = 0.5 * (length - 1) * math.sin(math.radians(angle_deg))
    dy = 0.5 * (length - 1) * math.cos(math.radians(angle_deg))
    cv2.line(kernel, (round(c - dx), round(c - dy)), (round(c + dx), round(c + dy)), 1.0, 1, cv2.LINE_AA)
    return kernel / max(float(kernel.max()), 1e-6)


def particle_alpha(
    distance: np.ndarray,
    layers: Sequence[Layer],
    *,
    focal_px: float,
    diameter_m: float,
    fall_speed_m_s: float,
    angle_deg: float,
    opacity: float,
    defocus_px_m: float,
    rng: np.random.Generator | int | None,
) -> np.ndarray:
    """Coverage (0..1) of falling particles (rain streaks or snow flakes) over the scene, depth by depth.

    Each layer's particles land at random pixels; a particle at distance Z is ``f D / Z`` px wide and is
    smeared over ``f v T / Z`` px (its fall during the exposure :data:`EXPOSURE_S`), so near particles are
    long and wide and far ones are short, thin and faint (sub-pixel ones weighted by their width). Out-of-
    focus blur of ``defocus_px_m / Z`` px (focus at infinity) softens the nearest. A layer is hidden where
    the scene is nearer than it (in proportion to the share of the slab in front of the scene).

    Parameters
    ----------
    distance : (H, W) float ndarray
        Scene distance in metres (see :func:`scene_distance`).
    layers : sequence of Layer
    focal_px, diameter_m, fall_speed_m_s : float
    angle_deg : float
        Fall direction from vertical (wind).
    opacity : float
        Coverage of one particle pixel that is fully covered (brightness of the particle).
    defocus_px_m : float
        Blur radius in pixels at 1 m.
    rng : numpy Generator, int or None

    Returns
    -------
    (H, W) float32 ndarray in [0, 1]
    """
    rng = np.random.default_rng(rng)
    height, width = distance.shape
    total = np.zeros((height, width), np.float32)
    for layer in layers:
        z = layer.distance_m
        size_px = focal_px * diameter_m / z
        hits = np.bincount(rng.integers(0, height * width, size=layer.count), minlength=height * width)
        seeds = hits.reshape(height, width).astype(np.float32) * (opacity * min(1.0, size_px))
        streak = cv2.filter2D(seeds, -1, streak_kernel(focal_px * fall_speed_m_s * EXPOSURE_S / z, angle_deg))
        if size_px > 1.5:
            disc = int(math.ceil(size_px))
            streak = cv2.dilate(streak, cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (disc, disc)))
        blur = defocus_px_m / z
        if blur > 0.3:
            streak = cv2.GaussianBlur(streak, (0, 0), blur)
        # only the part of the slab in front of the scene shows; layers composite as 1 - prod(1 - a)
        in_front = np.clip((distance - layer.near_m) / (layer.far_m - layer.near_m), 0.0, 1.0).astype(np.float32)
        total = 1.0 - (1.0 - total) * (1.0 - np.clip(streak, 0.0, 1.0) * in_front)
    return total


def wet_road(image: np.ndarray, drivable: np.ndarray, *, wetness_level: float) -> np.ndarray:
    """Darken and desaturate the drivable surface as water does (a wet surface absorbs more light).

    Value scaled by ``1 - 0.35 w`` and saturation by ``1 - 0.4 w`` on the mask (tuned by eye; common
    practice). Lekner & Dorf, "Why some things are darker when wet", Applied Optics 27, 1988, explain the
    darkening (from memory).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    drivable : (H, W) bool ndarray
    wetness_level : float in [0, 1]
    """
    _check_image(image)
    if not 0 <= wetness_level <= 1:
        raise ValueError(f"wetness_level must be in [0, 1], got {wetness_level!r}")
    return scale_hsv(image, saturation=1.0 - 0.4 * wetness_level, value=1.0 - 0.35 * wetness_level, where=drivable)


def scale_hsv(image: np.ndarray, *, saturation: float, value: float, where: np.ndarray | None = None) -> np.ndarray:
    """Multiply HSV saturation and value by the given factors (on ``where`` only, if given): (H, W, 3) uint8."""
    _check_image(image)
    hsv = cv2.cvtColor(image, cv2.COLOR_RGB2HSV).astype(np.float32)
    inside = np.ones(image.shape[:2], dtype=bool) if where is None else where
    hsv[..., 1] *= np.where(inside, saturation, 1.0)
    hsv[..., 2] *= np.where(inside, value, 1.0)
    return cv2.cvtColor(np.clip(np.rint(hsv), 0, 255).astype(np.uint8), cv2.COLOR_HSV2RGB)


def road_reflections(
    image: np.ndarray, drivable: np.ndarray, boxes: Sequence[Sequence[float]], *, strength: float
) -> np.ndarray:
    """Faint mirror images of objects on a wet road: each box flipped below its bottom edge, fading out.

    Blended with weight ``strength`` at the bottom edge falling linearly to 0 over the box height, only on the
    drivable surface and blurred vertically (a rough water film is no mirror).
    """
    _check_image(image)
    out = image.astype(np.float32)
    height, width = drivable.shape
    for box in boxes:
        x, y, w, h = (float(v) for v in box)
        c0, c1 = max(0, int(round(x))), min(width, int(round(x + w)))
        r0, bottom = max(0, int(round(y))), min(height, int(round(y + h)))
        span = min(bottom - r0, height - bottom)
        if c1 <= c0 or span < 2:
            continue
        mirrored = image[bottom - span : bottom, c0:c1][::-1].astype(np.float32)
        mirrored = cv2.GaussianBlur(mirrored, (1, 5), 0)
        weight = strength * np.linspace(1.0, 0.0, span, dtype=np.float32)[:, None]
        weight = weight * drivable[bottom : bottom + span, c0:c1]
        target = out[bottom : bottom + span, c0:c1]
        out[bottom : bottom + span, c0:c1] = target * (1 - weight[..., None]) + mirrored * weight[..., None]
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


# --------------------------------------------------------------------------------------------------
# snow


def snow_visibility_m(intensity: float) -> float:
    """Visibility in falling snow from an intensity knob in [0, 1]: ``1000 m x 0.2^intensity``.

    Log-linear from 1000 m (0: the light/moderate snow boundary) to 200 m (1: heavy snow); the US National
    Weather Service grades snowfall by visibility: light >= 5/8 mile (1 km), heavy <= 1/4 mile (400 m)
    (from memory).
    """
    if not 0 <= intensity <= 1:
        raise ValueError(f"snow intensity must be in [0, 1], got {intensity!r}")
    return 1000.0 * 0.2**intensity


def snow_cover(
    image: np.ndarray,
    *,
    ground: np.ndarray,
    vegetation: np.ndarray,
    cover: float,
    rng: np.random.Generator | int | None,
) -> np.ndarray:
    """Whiten snow-covered ground and the tops of trees, keeping their texture as shading.

    Covered pixels become ``white x shade`` with ``shade = 0.8 + 0.2 L / mean(L)`` (their own relative
    luminance), blended by ``cover`` on ``ground`` and by ``0.6 cover`` times a smooth random pattern on
    ``vegetation`` (snow sits on parts of a crown). Tuned by eye (common practice).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    ground, vegetation : (H, W) bool ndarray
        Off-road ground and tree/hedge pixels to whiten.
    cover : float in [0, 1]
    rng : numpy Generator, int or None
    """
    _check_image(image)
    if not 0 <= cover <= 1:
        raise ValueError(f"cover must be in [0, 1], got {cover!r}")
    rng = np.random.default_rng(rng)
    height, width = ground.shape
    linear = srgb_to_linear(image)
    lum = luminance(linear)
    typical = float(lum[ground | vegetation].mean()) if (ground | vegetation).any() else 1.0
    shade = np.clip(0.8 + 0.2 * lum / max(typical, 1e-4), 0.6, 1.1)
    white = np.array([0.82, 0.85, 0.9], np.float32)
    snow = white * shade[..., None]
    pattern = cv2.resize(rng.random((max(2, height // 6), max(2, width // 6))).astype(np.float32), (width, height))
    weight = cover * ground + 0.6 * cover * vegetation * np.clip(1.6 * pattern - 0.3, 0.0, 1.0)
    mixed = linear * (1.0 - weight[..., None]) + snow * weight[..., None]
    return linear_to_srgb(mixed)


def vegetation_mask(image: np.ndarray, *, min_excess_green: float = 12.0) -> np.ndarray:
    """Pixels that look like plants: excess green ``2G - R - B`` above ``min_excess_green`` (0-255 scale).

    Woebbecke et al., "Color indices for weed identification under various soil, residue, and lighting
    conditions", Trans. ASAE 38, 1995 (from memory).
    """
    _check_image(image)
    rgb = image.astype(np.int16)
    return (2 * rgb[..., 1] - rgb[..., 0] - rgb[..., 2]) > min_excess_green


# --------------------------------------------------------------------------------------------------
# dusk and night


@dataclass(frozen=True)
class LowLight:
    """Parameters of the low-light curve ``b (a I)^g`` and the sensor noise."""

    a: float
    b: float
    g: float
    photons: float
    read_sigma: float


LOW_LIGHT_RANGES = {
    "dusk": {
        "a": (0.95, 1.0),
        "b": (0.75, 1.0),
        "g": (1.5, 2.2),
        "photons": (300.0, 600.0),
        "read_sigma": (0.002, 0.006),
    },
    "night": {
        "a": (0.9, 1.0),
        "b": (0.5, 0.7),
        "g": (3.0, 5.0),
        "photons": (80.0, 200.0),
        "read_sigma": (0.006, 0.015),
    },
}
"""Uniform ranges per condition. a, b, g lie inside Lv et al.'s (IJCV 2021) a in [0.9, 1], b in [0.5, 1],
g in [1.5, 5]: dusk takes the mild end, night the dark end. Photons per unit intensity (shot noise) and the
read-noise sd are common practice for small automotive sensors, tuned by eye."""


def sample_low_light(condition: str, rng: np.random.Generator | int | None) -> LowLight:
    """Draw the curve and noise parameters of ``"dusk"`` or ``"night"`` from :data:`LOW_LIGHT_RANGES`."""
    if condition not in LOW_LIGHT_RANGES:
        raise ValueError(f"condition must be one of {', '.join(LOW_LIGHT_RANGES)}, got {condition!r}")
    rng = np.random.default_rng(rng)
    return LowLight(**{k: float(rng.uniform(*v)) for k, v in LOW_LIGHT_RANGES[condition].items()})


def low_light_curve(image: np.ndarray, *, a: float, b: float, g: float) -> np.ndarray:
    """``I_out = b (a I)^g`` per channel with ``I = pixel / 255`` (Lv, Li, Lu, IJCV 2021).

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
    a, b : float in (0, 1]
    g : float >= 1

    Returns
    -------
    (H, W, 3) float32 ndarray in [0, 1]
    """
    _check_image(image)
    if not (0 < a <= 1 and 0 < b <= 1 and g >= 1):
        raise ValueError(f"need 0 < a <= 1, 0 < b <= 1, g >= 1; got a={a!r}, b={b!r}, g={g!r}")
    return (b * np.power(a * image.astype(np.float32) / 255.0, g)).astype(np.float32)


def poisson_gaussian_noise(
    image: np.ndarray, *, photons: float, read_sigma: float, rng: np.random.Generator | int | None
) -> np.ndarray:
    """Sensor noise: ``Poisson(photons I) / photons + N(0, read_sigma^2)`` (Foi et al. 2008).

    Parameters
    ----------
    image : (H, W, 3) float ndarray in [0, 1]
    photons : float
        Photon count of a fully bright pixel (> 0): fewer photons, more shot noise.
    read_sigma : float
        Sd of the signal-independent read noise (>= 0).

    Returns
    -------
    (H, W, 3) float32 ndarray in [0, 1]
    """
    if not (photons > 0 and read_sigma >= 0):
        raise ValueError(f"need photons > 0 and read_sigma >= 0, got {photons!r}, {read_sigma!r}")
    rng = np.random.default_rng(rng)
    shot = rng.poisson(np.clip(image, 0.0, 1.0) * photons) / photons
    return np.clip(shot + rng.normal(0.0, read_sigma, image.shape), 0.0, 1.0).astype(np.float32)


def lamp_positions(box: Sequence[float], kind: str) -> list[tuple[float, float, float]]:
    """Lamp centres and radius ``(col, row, radius_px)`` on a vehicle box.

    Head and tail lamps sit near the lower corners (15% in from each side, 72% down) with a radius of 5% of
    the box's shorter side (so a long side view gets no giant lamps); amber beacons of a works trailer sit at
    the top corners of its warning board.
    """
    x, y, w, h = (float(v) for v in box)
    radius = max(0.8, 0.05 * min(w, h))
    if kind == "amber":
        return [(x + 0.12 * w, y + 0.06 * h, radius), (x + 0.88 * w, y + 0.06 * h, radius)]
    if kind not in ("head", "tail"):
        raise ValueError(f"lamp kind must be head, tail or amber, got {kind!r}")
    return [(x + 0.15 * w, y + 0.72 * h, radius), (x + 0.85 * w, y + 0.72 * h, radius)]


def lamp_light(
    shape: tuple[int, int], lamps: Sequence[tuple[float, float, float, str]], *, brightness: float
) -> np.ndarray:
    """Additive light of lamps: a bright core of each lamp's radius plus a glow 4 radii wide.

    Parameters
    ----------
    shape : (H, W)
    lamps : sequence of (col, row, radius_px, kind)
        ``kind`` a key of :data:`LAMP_COLOURS`.
    brightness : float
        Peak added intensity of a core (linear, >= 0).

    Returns
    -------
    (H, W, 3) float32 ndarray (linear light to add)
    """
    height, width = shape
    out = np.zeros((height, width, 3), np.float32)
    for col, row, radius, kind in lamps:
        core = np.zeros((height, width), np.float32)
        scale = 4
        centre = (int(round(col * scale)), int(round(row * scale)))
        cv2.circle(core, centre, max(1, int(round(radius * scale))), 1.0, -1, cv2.LINE_AA, shift=2)
        core = cv2.GaussianBlur(core, (0, 0), max(0.5, 0.4 * radius))
        glow = cv2.GaussianBlur(core, (0, 0), max(1.5, 4.0 * radius)) * 6.0
        light = brightness * (np.clip(core / max(float(core.max()), 1e-6), 0, 1) + np.clip(glow, 0, 0.6))
        out += light[..., None] * np.asarray(LAMP_COLOURS[kind], np.float32)
    return out


def _check_image(image: np.ndarray) -> None:
    if not isinstance(image, np.ndarray) or image.dtype != np.uint8 or image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"image must be an (H, W, 3) uint8 array, got {getattr(image, 'shape', type(image))}")
