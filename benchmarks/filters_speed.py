"""How fast the plausibility filters and the box sampler run on one core.

Goal: at least 1,000 candidates per second through the geometric filters (scale, surface, overlap, gap,
objects), so judging never limits a run whose generator makes a few images per second.

Run: /work/venv/bin/python benchmarks/filters_speed.py
"""

from __future__ import annotations

import os
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

import cv2  # noqa: E402
import numpy as np  # noqa: E402

from pipeline.dataset import Scene  # noqa: E402
from pipeline.filters import (  # noqa: E402
    DuplicateIndex,
    FilterLimits,
    check_geometry,
    phash,
    seam,
)
from pipeline.geometry import ClassGround, GroundModel  # noqa: E402
from pipeline.placement import sample_box  # noqa: E402
from pipeline.surface import Surface  # noqa: E402

W, H, HORIZON = 384, 224, 90.0


def per_second(label: str, count: int, run) -> float:
    start = time.perf_counter()
    run()
    rate = count / (time.perf_counter() - start)
    print(f"{label:<58} {rate:>12,.0f} /s")
    return rate


def main() -> None:
    cv2.setNumThreads(1)
    rng = np.random.default_rng(0)
    ground = GroundModel(HORIZON, {"car": ClassGround(1.07, 0.06, 200, "fitted")}, 1.5, W, H)
    rows, cols = np.mgrid[0:H, 0:W]
    mask = (rows > HORIZON) & (np.abs(cols - W / 2) < 3 * (rows - HORIZON))
    limits = FilterLimits()
    others = [(20.0, 120.0, 60.0, 60.0), (200.0, 110.0, 40.0, 25.0), (300.0, 100.0, 20.0, 12.0)]
    bottoms = rng.uniform(100, H - 1, 5000)
    heights = 1.07 * (bottoms - HORIZON) * np.exp(rng.normal(0, 0.1, 5000))
    widths = 1.4 * heights
    lefts = rng.uniform(0, W - widths.clip(max=W - 1))
    boxes = [
        (float(x), float(b - h), float(w), float(h)) for x, b, w, h in zip(lefts, bottoms, widths, heights, strict=True)
    ]

    print(f"one core, {W}x{H} images, {len(others)} other objects per image")
    geometric = per_second(
        "geometric filters (candidates through all five)",
        len(boxes),
        lambda: [check_geometry(b, "car", others, ground, mask, limits, focal_px=300.0) for b in boxes],
    )
    scene = Scene(1, "a.png", W, H, Path("a.png"))
    surface = Surface(mask, estimated=False)
    ratios = {"car": np.array([1.2, 1.4, 1.7])}
    per_second(
        "sample_box (placements found)",
        500,
        lambda: [
            sample_box(scene, "car", ground, surface, i, limits, aspect_ratios=ratios, existing_boxes=others)
            for i in range(500)
        ],
    )
    image = rng.integers(0, 256, (H, W, 3), dtype=np.uint8)
    region = np.zeros((H, W), dtype=bool)
    region[100:160, 150:230] = True
    per_second("blend seam (images)", 500, lambda: [seam(image, region, limits) for _ in range(500)])
    per_second("pHash (images)", 500, lambda: [phash(image) for _ in range(500)])
    index = DuplicateIndex()
    for i in range(10_000):
        index.add(i, int(rng.integers(0, 2**63)))
    lookups = [int(h) for h in rng.integers(0, 2**63, 500)]
    per_second("duplicate look-ups in an index of 10,000 hashes", 500, lambda: [index.nearest(h) for h in lookups])
    print(f"goal >= 1,000 geometric candidates/s: {'met' if geometric >= 1000 else 'NOT met'}")


if __name__ == "__main__":
    main()
