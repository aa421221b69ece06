"""Sky, distant tree line, fields and the road, evaluated per pixel on the ground plane.

Every ground pixel is traced to its ground point (X, Z) through the level pinhole camera, so the
road, its markings and field furrows are in exact perspective. Thin features (lines, furrows) are
box-filtered over the pixel's ground footprint, which also fades them towards the horizon.
"""

from __future__ import annotations

import cv2
import numpy as np

from .camera import Camera
from .scene import Lighting, Road, SceneSpec

FIELD_COLOURS: dict[str, tuple[float, float, float]] = {
    "grass": (88, 128, 56),
    "pasture": (68, 108, 44),
    "wheat": (196, 172, 96),
    "stubble": (182, 160, 112),
    "ploughed": (112, 84, 60),
    "rapeseed": (214, 200, 64),
}
FIELD_KINDS = tuple(FIELD_COLOURS)

_SKY = {
    "sunny": ((72, 122, 200), (178, 206, 232), (250, 250, 252)),
    "overcast": ((140, 146, 158), (196, 199, 206), (175, 178, 186)),
    "dusk": ((42, 52, 102), (238, 150, 92), (150, 95, 110)),
}  # top, horizon, cloud colours per lighting kind


def sky_colours(lighting: Lighting) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return tuple(np.asarray(c, dtype=np.float32) for c in _SKY[lighting.kind])


def _noise(grid: np.ndarray, u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Smooth value noise: ``grid`` (n, n) sampled bilinearly at (u, v) grid cells, wrapping around."""
    n = grid.shape[0]
    u0, v0 = np.floor(u), np.floor(v)
    fu, fv = (u - u0).astype(np.float32), (v - v0).astype(np.float32)
    i0, j0 = u0.astype(np.int64) % n, v0.astype(np.int64) % n
    i1, j1 = (i0 + 1) % n, (j0 + 1) % n
    top = grid[j0, i0] * (1 - fu) + grid[j0, i1] * fu
    bottom = grid[j1, i0] * (1 - fu) + grid[j1, i1] * fu
    return top * (1 - fv) + bottom * fv


def _band(a: np.ndarray, half_width: float, footprint: np.ndarray) -> np.ndarray:
    """Fraction of a pixel of ground ``footprint`` covered by the band ``|a| <= half_width``."""
    lo = np.maximum(a - footprint / 2, -half_width)
    hi = np.minimum(a + footprint / 2, half_width)
    return np.clip((hi - lo) / footprint, 0.0, 1.0)


def _inside(a: np.ndarray, footprint: np.ndarray) -> np.ndarray:
    """Coverage of the half-plane ``a >= 0`` (signed distance ``a`` in metres)."""
    return np.clip(a / footprint + 0.5, 0.0, 1.0)


def render_background(spec: SceneSpec, *, scale: int) -> np.ndarray:
    """The scene without scenery or objects, ``(H*scale, W*scale, 3) float32`` RGB in [0, 255].

    ``scale`` supersamples for anti-aliasing; pixel centres map to continuous coordinates
    ``(index + 0.5) / scale``.
    """
    cam, light = spec.camera, spec.lighting
    rng = np.random.default_rng(spec.texture_seed)
    h_s, w_s = cam.height * scale, cam.width * scale
    ys = (np.arange(h_s, dtype=np.float64) + 0.5) / scale
    xs = (np.arange(w_s, dtype=np.float64) + 0.5) / scale
    out = np.zeros((h_s, w_s, 3), dtype=np.float32)

    # 1. sky with clouds
    top, horizon_c, cloud_c = sky_colours(light)
    sky_rows = ys < cam.horizon_row
    t = np.clip(ys[sky_rows] / cam.horizon_row, 0, 1) ** 0.8
    out[sky_rows] = (top[None, :] * (1 - t[:, None]) + horizon_c[None, :] * t[:, None])[:, None, :]
    clouds = _cloud_alpha(rng, h_s, w_s, cam.horizon_row * scale, light.kind)
    out[:] = out * (1 - clouds[..., None]) + cloud_c * clouds[..., None]

    # 2. ground: fields, verges, road
    ground_rows = ys > cam.horizon_row
    yy, xx = np.meshgrid(ys[ground_rows], xs, indexing="ij")
    z = np.minimum(cam.depth_of_row(yy), 5000.0)
    x = (xx - cam.centre_col) * z / cam.focal_px
    fp_x = z / (cam.focal_px * scale)  # metres across one pixel
    fp_z = z * z / (cam.focal_px * cam.camera_height_m * scale)  # metres along one pixel
    ground = _fields(spec, rng, x, z, fp_x, fp_z)
    ground = _road(spec.road, rng, ground, x, z, fp_x, fp_z)
    ground *= np.float32(light.ambient) * np.asarray(light.tint, dtype=np.float32)
    haze = (1 - np.exp(-z / 260.0))[..., None].astype(np.float32)
    out[ground_rows] = ground * (1 - haze) + horizon_c * haze

    # 3. distant tree line standing on the horizon
    _tree_line(out, rng, cam, light, scale)
    return out


def _cloud_alpha(rng: np.random.Generator, h_s: int, w_s: int, horizon_px: float, kind: str) -> np.ndarray:
    low = np.zeros((h_s // 4, w_s // 4), dtype=np.float32)
    n = {"sunny": rng.integers(3, 9), "overcast": rng.integers(18, 30), "dusk": rng.integers(4, 10)}[kind]
    for _ in range(int(n)):
        cx, cy = rng.uniform(-10, low.shape[1] + 10), rng.uniform(0, horizon_px / 4 * 0.85)
        for _ in range(int(rng.integers(3, 8))):
            ax, ay = rng.uniform(4, 16), rng.uniform(2, 6)
            centre = (int(cx + rng.uniform(-14, 14)), int(cy + rng.uniform(-3, 3)))
            cv2.ellipse(low, centre, (int(ax), int(ay)), 0, 0, 360, float(rng.uniform(0.5, 1.0)), -1)
    low = cv2.GaussianBlur(low, (0, 0), 3.0)
    alpha = cv2.resize(low, (w_s, h_s), interpolation=cv2.INTER_LINEAR)
    rows = (np.arange(h_s) + 0.5)[:, None]
    alpha *= np.clip((horizon_px - rows) / (0.15 * horizon_px), 0, 1)  # clouds thin out towards the horizon
    return np.clip(alpha * (0.9 if kind == "overcast" else 0.8), 0, 0.9)


def _fields(spec: SceneSpec, rng, x, z, fp_x, fp_z) -> np.ndarray:
    road = spec.road
    d = x - road.centre_x(z)
    grid = rng.random((64, 64)).astype(np.float32)
    fine = rng.random((64, 64)).astype(np.float32)
    ground = np.empty(x.shape + (3,), dtype=np.float32)
    for side in (-1, 1):
        cfg = spec.fields["left" if side < 0 else "right"]
        lateral = side * d - (road.lane_width_m + (road.shoulder_right_m if side > 0 else road.shoulder_left_m))
        mask = side * d >= 0
        kind = np.full(x.shape, -1, dtype=np.int32)
        for i, (z0, _kind, _period, _along) in enumerate(cfg["segments"]):
            kind[(z >= z0) & mask] = i
        col = np.zeros(x.shape + (3,), dtype=np.float32)
        for i, (_z0, name, period, along) in enumerate(cfg["segments"]):
            sel = kind == i
            if not sel.any():
                continue
            base = np.asarray(FIELD_COLOURS[name], dtype=np.float32)
            coord = lateral[sel] if along else z[sel]
            footprint = fp_x[sel] if along else fp_z[sel]
            fade = np.clip(1 - 2 * footprint / period, 0, 1)
            stripes = 1 + 0.16 * fade * np.sin(2 * np.pi * coord / period)
            patch = _noise(grid, (lateral[sel] / 9.0) % 64, (z[sel] / 14.0) % 64)
            grain = _noise(fine, (lateral[sel] / 0.9) % 64, (z[sel] / 1.2) % 64)
            grain_fade = np.clip(1 - footprint / 0.9, 0, 1)
            shade = stripes * (0.86 + 0.28 * patch) * (1 + 0.1 * grain_fade * (grain - 0.5))
            col[sel] = base[None, :] * shade[:, None]
        verge = np.asarray(FIELD_COLOURS["grass"], dtype=np.float32) * 0.95
        verge_cov = _inside(cfg["verge_m"] - lateral, fp_x)[..., None]
        col = (
            col * (1 - verge_cov)
            + verge * verge_cov * (0.9 + 0.2 * _noise(grid, (lateral / 2) % 64, (z / 3) % 64))[..., None]
        )
        ground[mask] = col[mask]
    return ground


def _road(road: Road, rng, ground, x, z, fp_x, fp_z) -> np.ndarray:
    d = x - road.centre_x(z)
    half = road.lane_width_m
    sh_right, sh_left = road.shoulder_right_m, road.shoulder_left_m
    grid = rng.random((64, 64)).astype(np.float32)
    outer = np.where(d > 0, half + sh_right, half + sh_left)
    shoulder_cov = _inside(outer - np.abs(d), fp_x)[..., None]
    grit = _noise(grid, (d / 0.5) % 64, (z / 0.7) % 64)
    shoulder = np.asarray(road.shoulder, dtype=np.float32) * (0.92 + 0.16 * grit)[..., None]
    ground = ground * (1 - shoulder_cov) + shoulder * shoulder_cov
    asphalt_cov = _inside(half - np.abs(d), fp_x)[..., None]
    patch = _noise(grid, (d / 3.0) % 64, (z / 6.0) % 64)
    tracks = sum(_band(d - c, 0.35, np.maximum(fp_x, 0.05)) for c in (-2.0, -0.6, 0.6, 2.0)) * 0.06
    asphalt = np.asarray(road.asphalt, dtype=np.float32) * (0.93 + 0.12 * patch - tracks)[..., None]
    ground = ground * (1 - asphalt_cov) + asphalt * asphalt_cov
    paint = np.asarray((228, 228, 222), dtype=np.float32)
    lines = np.maximum(_band(d - (half - 0.2), 0.06, fp_x), _band(d + (half - 0.2), 0.06, fp_x))
    if road.centre_line:
        # dashes 3 m long every 12 m: from memory, a common rural centre-line pattern
        pos = np.mod(z + 4.0, 12.0)
        along = sum(_band(pos - c, 1.5, np.maximum(fp_z, 1e-3)) for c in (1.5, 13.5, -10.5))
        lines = np.maximum(lines, _band(d, 0.06, fp_x) * along)
    lines = lines[..., None] * 0.9
    return ground * (1 - lines) + paint * lines


def _tree_line(out: np.ndarray, rng: np.random.Generator, cam: Camera, light: Lighting, scale: int) -> None:
    w_s = out.shape[1]
    knots = rng.random(w_s // 24 + 3).astype(np.float32)
    height = cv2.resize(knots[None, :], (w_s, 1), interpolation=cv2.INTER_CUBIC)[0]
    bumps = cv2.resize(rng.random(w_s // 3 + 3).astype(np.float32)[None, :], (w_s, 1))[0]
    height = np.clip((height - 0.35) * 12 + bumps * 2.0, 0, 9) * scale  # pixels above the horizon
    _, horizon_c, _ = sky_colours(light)
    colour = np.asarray((70, 95, 72), dtype=np.float32) * 0.65 + horizon_c * 0.35
    colour = colour * np.float32(light.ambient)
    rows = np.arange(out.shape[0], dtype=np.float32)[:, None] + 0.5
    horizon_px = cam.horizon_row * scale
    cov = np.clip(rows - (horizon_px - height[None, :]), 0, 1) * (rows < horizon_px + 0.5)
    out[:] = out * (1 - cov[..., None]) + colour * cov[..., None]


def drivable_mask(camera: Camera, road: Road) -> np.ndarray:
    """``(H, W) bool``: pixels whose centre sees the road or its shoulders."""
    ys = np.arange(camera.height, dtype=np.float64) + 0.5
    xs = np.arange(camera.width, dtype=np.float64) + 0.5
    yy, xx = np.meshgrid(ys, xs, indexing="ij")
    below = yy > camera.horizon_row
    z = np.where(below, camera.depth_of_row(np.where(below, yy, camera.horizon_row + 1)), np.inf)
    x = (xx - camera.centre_col) * z / camera.focal_px
    d = x - road.centre_x(np.where(below, z, 0.0))
    inside = (d <= road.lane_width_m + road.shoulder_right_m) & (d >= -(road.lane_width_m + road.shoulder_left_m))
    return below & inside
