"""Where across the road objects stand: the road's span in a mask row, a box's share of it, and placements
that follow real places."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.across_road import LATERAL_SD, lateral_position, real_laterals, road_span
from pipeline.dataset import load_dataset
from pipeline.placement import Placement, place_at_height
from pipeline.surface import Surface, surface_cache

from .conftest import SEED_SCENES
from .test_filters import FOCAL, GROUND, road_mask
from .test_placement import LIMITS, SCENE


def test_road_span_is_the_widest_run():
    row = np.zeros(30, dtype=bool)
    row[2:6] = row[9:21] = row[24:28] = True
    assert road_span(row) == (9, 21)
    row[24:30] = False
    row[22:30] = True  # 8 wide against 12: still the middle run
    assert road_span(row) == (9, 21)
    assert road_span(np.zeros(5, dtype=bool)) is None
    tie = np.zeros(10, dtype=bool)
    tie[0:3] = tie[5:8] = True
    assert road_span(tie) == (0, 3)  # ties go left


def test_lateral_position_is_the_share_of_the_road_width():
    mask = np.zeros((10, 40), dtype=bool)
    mask[9, 10:30] = True  # the road spans columns 10-29 on the box's bottom row
    assert lateral_position((10.0, 5.0, 10.0, 5.0), mask) == pytest.approx(0.25)  # centre at column 15
    assert lateral_position((26.0, 5.0, 8.0, 5.0), mask) == pytest.approx(1.0)  # on the right edge
    assert lateral_position((0.0, 5.0, 4.0, 5.0), mask) == pytest.approx(-0.4)  # on the left verge
    assert lateral_position((10.0, 2.0, 10.0, 5.0), mask) is None  # row 6 holds no road


def test_placements_follow_the_real_places():
    surface = Surface(road_mask(), estimated=False)
    rng = np.random.default_rng(0)
    shares = []
    for _ in range(300):
        placed = place_at_height(
            SCENE, "car", 40.0, 1.4, GROUND, surface, rng, LIMITS,
            existing_boxes=[], laterals=np.array([0.3, 0.7]), focal_px=FOCAL,
        )  # fmt: skip
        assert isinstance(placed, Placement), placed
        shares.append(lateral_position(placed.box, surface.mask))
    shares = np.array(shares)
    near = np.minimum(np.abs(shares - 0.3), np.abs(shares - 0.7))
    assert near.max() < 4 * LATERAL_SD + 0.01  # every place near a real one
    assert 0.35 < np.mean(shares < 0.5) < 0.65  # both real places drawn
    assert np.std(shares[shares < 0.5]) == pytest.approx(LATERAL_SD, rel=0.25)


@pytest.mark.skipif(not (SEED_SCENES / "train.json").exists(), reason="seed scenes not rendered yet")
def test_real_places_of_the_seed_tractors():
    dataset = load_dataset(SEED_SCENES / "train.json")
    laterals = real_laterals(dataset, "tractor", surface_cache(dataset))
    assert laterals.size == 20  # every training tractor stands on a row of road
    assert not np.any((laterals > 0.2) & (laterals < 0.6))  # none astride the centre line
