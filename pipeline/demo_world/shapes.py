"""Flat shapes in metres on planar faces, mapped into the image by a homography.

A :class:`Face` is a planar rectangle of the world, ``s`` metres across and ``v`` metres up; its four
corners' image positions define the homography that maps every shape drawn on it, so wheels,
windows and stripes on a receding side are foreshortened exactly as a pinhole camera would.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

Colour = tuple[float, float, float]


@dataclass(frozen=True)
class Polygon:
    """A filled polygon: ``points`` (N, 2) float64 (x, y) continuous image coordinates, RGB ``colour``."""

    points: np.ndarray
    colour: Colour


@dataclass(frozen=True)
class Shade:
    """How light falls on a face: diffuse ``factor`` and per-channel ``tint``; lamps ignore both."""

    factor: float
    tint: Colour = (1.0, 1.0, 1.0)

    def apply(self, colour: Colour, *, emissive: bool = False) -> Colour:
        if emissive:
            return colour
        return tuple(min(255.0, max(0.0, float(c) * self.factor * t)) for c, t in zip(colour, self.tint, strict=True))


def homography(src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    """The 3x3 projective map taking four ``src`` points (4, 2) to four ``dst`` points (4, 2).

    References
    ----------
    Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004, the direct
    linear transform (four point correspondences fix a plane-to-plane homography).
    """
    rows, rhs = [], []
    for (x, y), (u, v) in zip(src, dst, strict=True):
        rows.append([x, y, 1, 0, 0, 0, -u * x, -u * y])
        rows.append([0, 0, 0, x, y, 1, -v * x, -v * y])
        rhs.extend([u, v])
    h = np.linalg.solve(np.asarray(rows, dtype=np.float64), np.asarray(rhs, dtype=np.float64))
    return np.append(h, 1.0).reshape(3, 3)


class Face:
    """A planar rectangle ``[0, size_s] x [0, size_v]`` metres whose corners land on ``corners``.

    ``corners`` (4, 2) are the image positions of (0, 0), (size_s, 0), (size_s, size_v), (0, size_v);
    ``v`` runs up from the ground. Shapes are collected in drawing order in :attr:`polygons`.
    """

    def __init__(self, corners: np.ndarray, size_s: float, size_v: float, shade: Shade) -> None:
        src = np.array([[0, 0], [size_s, 0], [size_s, size_v], [0, size_v]], dtype=np.float64)
        self._h = homography(src, np.asarray(corners, dtype=np.float64))
        self.size_s = size_s
        self.size_v = size_v
        self.shade = shade
        self.polygons: list[Polygon] = []

    def project(self, pts: np.ndarray) -> np.ndarray:
        pts = np.asarray(pts, dtype=np.float64)
        hom = np.c_[pts, np.ones(len(pts))] @ self._h.T
        return hom[:, :2] / hom[:, 2:3]

    def poly(self, pts, colour: Colour, *, emissive: bool = False) -> None:
        pts = np.asarray(pts, dtype=np.float64)
        if len(pts) >= 3:
            self.polygons.append(Polygon(self.project(pts), self.shade.apply(colour, emissive=emissive)))

    def rect(self, s0: float, v0: float, s1: float, v1: float, colour: Colour, *, emissive: bool = False) -> None:
        self.poly([(s0, v0), (s1, v0), (s1, v1), (s0, v1)], colour, emissive=emissive)

    def ellipse(
        self, cs: float, cv: float, rs: float, rv: float, colour: Colour, *, emissive: bool = False, n: int = 28
    ) -> None:
        t = np.linspace(0, 2 * np.pi, n, endpoint=False)
        self.poly(np.c_[cs + rs * np.cos(t), cv + rv * np.sin(t)], colour, emissive=emissive)

    def circle(self, cs: float, cv: float, r: float, colour: Colour, *, emissive: bool = False) -> None:
        self.ellipse(cs, cv, r, r, colour, emissive=emissive)

    def round_rect(self, s0: float, v0: float, s1: float, v1: float, r: float, colour: Colour) -> None:
        r = min(r, (s1 - s0) / 2, (v1 - v0) / 2)
        t = np.linspace(0, np.pi / 2, 6)
        arcs = []
        for (cs, cv), start in (
            ((s1 - r, v1 - r), 0.0),
            ((s0 + r, v1 - r), np.pi / 2),
            ((s0 + r, v0 + r), np.pi),
            ((s1 - r, v0 + r), 1.5 * np.pi),
        ):
            arcs.append(np.c_[cs + r * np.cos(start + t), cv + r * np.sin(start + t)])
        self.poly(np.concatenate(arcs), colour)

    def arc_band(self, cs: float, cv: float, r0: float, r1: float, a0: float, a1: float, colour: Colour) -> None:
        """A ring segment between radii ``r0 < r1`` from angle ``a0`` to ``a1`` (radians, counter-clockwise)."""
        t = np.linspace(a0, a1, 12)
        outer = np.c_[cs + r1 * np.cos(t), cv + r1 * np.sin(t)]
        inner = np.c_[cs + r0 * np.cos(t[::-1]), cv + r0 * np.sin(t[::-1])]
        self.poly(np.concatenate([outer, inner]), colour)

    def stripes(
        self, s0: float, v0: float, s1: float, v1: float, *, width: float, slope: float, colour: Colour, chevron: bool
    ) -> None:
        """Diagonal stripes of ``width`` metres across a rectangle; ``chevron`` mirrors them about the middle."""
        mid = (s0 + s1) / 2
        halves = [(s0, mid, slope), (mid, s1, -slope)] if chevron else [(s0, s1, slope)]
        for a, b, k in halves:
            span = (v1 - v0) + abs(k) * (b - a)
            # stripes run along s with offset k * s in v; step two widths (stripe + gap)
            for off in np.arange(-span, span, 2 * width):
                quad = [(a, v0 + off + k * (a - s0)), (b, v0 + off + k * (b - s0))]
                quad += [(b, v0 + off + width + k * (b - s0)), (a, v0 + off + width + k * (a - s0))]
                clipped = clip_to_rect(np.asarray(quad), a, v0, b, v1)
                if len(clipped) >= 3:
                    self.poly(clipped, colour)


def clip_to_rect(pts: np.ndarray, s0: float, v0: float, s1: float, v1: float) -> np.ndarray:
    """Clip a convex polygon (N, 2) to an axis-aligned rectangle (Sutherland-Hodgman)."""
    out = [tuple(p) for p in pts]
    for axis, bound, keep_greater in ((0, s0, True), (0, s1, False), (1, v0, True), (1, v1, False)):
        if not out:
            break
        src, out = out, []
        for i, cur in enumerate(src):
            prev = src[i - 1]
            cur_in = cur[axis] >= bound if keep_greater else cur[axis] <= bound
            prev_in = prev[axis] >= bound if keep_greater else prev[axis] <= bound
            if cur_in != prev_in:
                t = (bound - prev[axis]) / (cur[axis] - prev[axis])
                out.append(tuple(p + t * (c - p) for p, c in zip(prev, cur, strict=True)))
            if cur_in:
                out.append(cur)
    return np.asarray(out, dtype=np.float64).reshape(-1, 2)
