"""Box sampling for new objects: every sampled box passes the geometric filters it was sampled for."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from pipeline import filters
from pipeline.dataset import Scene, load_dataset
from pipeline.filters import FilterLimits
from pipeline.placement import NoPlacement, Placement, aspect_ratios, sample_box
from pipeline.surface import Surface

from .conftest import SEED_SCENES
from .test_filters import FOCAL, GROUND, HORIZON, H, W, road_mask

SCENE = Scene(id=1, file_name="a.png", width=W, height=H, path=Path("a.png"))
RATIOS = {"car": np.array([1.2, 1.4, 1.7]), "bus": np.array([1.1, 1.3])}
LIMITS = FilterLimits()


def test_aspect_ratios_per_class_skip_crowd(tiny_set):
    dataset = load_dataset(tiny_set[0])
    ratios = aspect_ratios(dataset)
    np.testing.assert_allclose(ratios["car"], [10 / 12])
    np.testing.assert_allclose(ratios["tractor"], [8 / 6])  # the crowd region is left out


def test_thousand_sampled_boxes_pass_scale_surface_and_gap_filters():
    surface = Surface(road_mask(), estimated=False)
    rng = np.random.default_rng(0)
    deviations = []
    for i in range(1000):
        existing = [] if i % 2 else [(170.0, 130.0, 60.0, 45.0), (40.0, 150.0, 70.0, 60.0)]
        category = "bus" if i % 5 == 0 else "car"
        placed = sample_box(
            SCENE, category, GROUND, surface, rng, LIMITS, aspect_ratios=RATIOS, existing_boxes=existing, focal_px=FOCAL
        )
        assert isinstance(placed, Placement), placed
        x, y, w, h = placed.box
        assert 0 <= x and 0 <= y and x + w <= W and y + h <= H
        assert placed.aspect_ratio in RATIOS[category]
        verdicts = [
            filters.scale(placed.box, category, GROUND, LIMITS),
            filters.surface(placed.box, surface.mask, LIMITS),
            filters.gap(placed.box, existing, GROUND, LIMITS, focal_px=FOCAL),
            filters.overlap(placed.box, existing, LIMITS),
        ]
        assert all(verdicts), [v.reason for v in verdicts if not v]
        deviations.append(math.log(h / GROUND.expected_height(category, y + h).expected) / 0.06)
    # Heights follow the class spread: a standard normal truncated to +-2 has sd 0.88.
    assert abs(np.mean(deviations)) < 0.1
    assert np.std(deviations) == pytest.approx(0.88, abs=0.06)


def test_sampling_is_reproducible_from_the_seed():
    surface = Surface(road_mask(), estimated=False)
    first = sample_box(SCENE, "car", GROUND, surface, 7, LIMITS, aspect_ratios=RATIOS, existing_boxes=[])
    again = sample_box(SCENE, "car", GROUND, surface, 7, LIMITS, aspect_ratios=RATIOS, existing_boxes=[])
    assert first == again


def test_full_image_gives_no_placement():
    surface = Surface(road_mask(), estimated=False)
    existing = [(x, 200.0, 4.0, 4.0) for x in range(0, 4 * LIMITS.max_objects, 4)]
    result = sample_box(SCENE, "car", GROUND, surface, 0, LIMITS, aspect_ratios=RATIOS, existing_boxes=existing)
    assert isinstance(result, NoPlacement) and not result
    assert "12 objects" in result.reason


def test_no_surface_low_enough_gives_no_placement():
    mask = np.zeros((H, W), dtype=bool)
    mask[: int(HORIZON) + 5] = True  # only sky and the far road: a car there is under 12 px
    result = sample_box(SCENE, "car", GROUND, Surface(mask, False), 0, LIMITS, aspect_ratios=RATIOS)
    assert isinstance(result, NoPlacement)
    assert "no drivable surface below row" in result.reason


def test_gives_up_and_counts_the_reasons():
    mask = np.zeros((H, W), dtype=bool)
    mask[150:152, 180:200] = True  # a small patch, already taken by a parked car
    existing = [(160.0, 90.0, 60.0, 62.0)]
    surface = Surface(mask, estimated=False)
    result = sample_box(
        SCENE, "car", GROUND, surface, 0, LIMITS, aspect_ratios=RATIOS, existing_boxes=existing, max_tries=50
    )
    assert isinstance(result, NoPlacement)
    assert sum(result.failures.values()) == 50
    assert set(result.failures) <= {"surface", "overlap", "gap", "outside_image"}
    assert "50 tries" in result.reason


def test_bad_inputs_are_refused():
    surface = Surface(road_mask(), estimated=False)
    with pytest.raises(ValueError, match="aspect ratios"):
        sample_box(SCENE, "car", GROUND, surface, 0, LIMITS, aspect_ratios={})
    with pytest.raises(ValueError, match="no class 'tractor'"):
        sample_box(SCENE, "tractor", GROUND, surface, 0, LIMITS, aspect_ratios={"tractor": np.array([1.0])})
    with pytest.raises(ValueError, match="mask shape"):
        sample_box(SCENE, "car", GROUND, Surface(road_mask()[:10], False), 0, LIMITS, aspect_ratios=RATIOS)
    with pytest.raises(ValueError, match="max_sd"):
        sample_box(SCENE, "car", GROUND, surface, 0, LIMITS, aspect_ratios=RATIOS, max_sd=3.0)


@pytest.mark.skipif(not (SEED_SCENES / "train.json").exists(), reason="seed scenes not rendered yet")
def test_rare_classes_placed_in_seed_scenes_pass_the_geometric_filters():
    from pipeline.geometry import fit_ground
    from pipeline.surface import mask_for

    dataset = load_dataset(SEED_SCENES / "train.json", check_images=False)
    ground = fit_ground(dataset)
    ratios = aspect_ratios(dataset)
    rng = np.random.default_rng(1)
    placed = 0
    for scene in dataset.scenes[:30]:
        surface = mask_for(scene, dataset=dataset)
        for category in ("tractor", "works_trailer"):
            result = sample_box(scene, category, ground, surface, rng, LIMITS, aspect_ratios=ratios)
            if not result:
                continue
            placed += 1
            others = [a.bbox for a in scene.annotations]
            verdicts = filters.check_geometry(
                result.box, category, others, ground, surface.mask, LIMITS, image_id=scene.id
            )
            assert all(verdicts), [v.reason for v in verdicts if not v]
    assert placed >= 40
