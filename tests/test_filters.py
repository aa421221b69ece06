"""Plausibility filters: planted implausible composites are rejected by the right filter."""

from __future__ import annotations

import json
import math

import cv2
import numpy as np
import pytest
from pycocotools import mask as mask_utils

from pipeline.filters import (
    DuplicateIndex,
    FilterLimits,
    Verdict,
    box_iou,
    check_geometry,
    focal_from_fov,
    footprint_gaps,
    hamming,
    near_duplicate,
    objects,
    phash,
    seam,
    seam_strength,
)
from pipeline.geometry import ClassGround, GroundModel

from .conftest import SEED_SCENES

W, H = 384, 224
HORIZON = 90.0
CAMERA = 1.5
FOCAL = 300.0
GROUND = GroundModel(
    horizon_row=HORIZON,
    classes={
        "car": ClassGround(height_ratio=1.6 / CAMERA, spread=0.06, n_boxes=200, source="fitted"),
        "bus": ClassGround(height_ratio=3.3 / CAMERA, spread=0.06, n_boxes=50, source="fitted"),
    },
    camera_height_m=CAMERA,
    image_width=W,
    image_height=H,
)
LIMITS = FilterLimits()


def road_mask() -> np.ndarray:
    """A straight road to the horizon: at row r it spans columns 192 +- 3 (r - horizon)."""
    rows, cols = np.mgrid[0:H, 0:W]
    return (rows > HORIZON) & (np.abs(cols - W / 2) < 3 * (rows - HORIZON))


def car_at(left: float, bottom: float, *, scale: float = 1.0) -> tuple[float, float, float, float]:
    h = scale * GROUND.classes["car"].height_ratio * (bottom - HORIZON)
    return (left, bottom - h, 1.4 * h, h)


def names_failed(verdicts: list[Verdict]) -> set[str]:
    return {v.name for v in verdicts if not v}


def test_correctly_placed_car_passes_every_geometric_filter():
    box = car_at(170, 150)
    others = [car_at(20, 180)]  # a nearer car (5 m against 7.5 m) to the left
    verdicts = check_geometry(box, "car", others, GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert [v.name for v in verdicts] == ["scale", "surface", "overlap", "gap", "objects"]
    assert all(verdicts), [v.reason for v in verdicts if not v]


@pytest.mark.parametrize("factor", [0.5, 2.0])
def test_box_at_half_or_double_scale_is_rejected_by_scale_only(factor):
    verdicts = check_geometry(car_at(170, 150, scale=factor), "car", [], GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert names_failed(verdicts) == {"scale"}
    scale_verdict = verdicts[0]
    # |log 2| / 0.06 sd = 11.6 sd.
    assert scale_verdict.value == pytest.approx(math.log(2) / 0.06)
    assert "implausible size" in scale_verdict.reason


def test_scale_band_edge():
    ok = car_at(170, 150, scale=math.exp(2.4 * 0.06))
    bad = car_at(170, 150, scale=math.exp(2.6 * 0.06))
    assert check_geometry(ok, "car", [], GROUND, road_mask(), LIMITS, focal_px=FOCAL)[0]
    assert not check_geometry(bad, "car", [], GROUND, road_mask(), LIMITS, focal_px=FOCAL)[0]


def test_footprint_off_the_road_is_rejected_by_surface_only():
    # At row 120 the road spans columns 102..282; this car (20..65) stands on the verge left of it.
    verdicts = check_geometry(car_at(20, 120), "car", [], GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert names_failed(verdicts) == {"surface"}
    assert verdicts[1].value == 0.0


def test_box_above_the_horizon_fails_scale_and_gap_with_no_value():
    verdicts = check_geometry((170, 40, 20, 20), "car", [], GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert {"scale", "surface", "gap"} <= names_failed(verdicts)
    assert verdicts[0].value is None and verdicts[0].to_dict()["value"] is None


def test_overlapping_pair_is_rejected_by_overlap():
    first = car_at(150, 160)
    second = (first[0] + 0.3 * first[2], *first[1:])
    verdicts = check_geometry(second, "car", [first], GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert "overlap" in names_failed(verdicts)
    assert verdicts[2].value == pytest.approx(0.7 / 1.3)


def test_side_by_side_cars_too_close_on_the_ground_are_rejected_by_gap_only():
    # At row 150 one pixel across is h_cam / (v_b - v_h) = 1.5 / 60 = 0.025 m (X = (u - c_x) h_cam / (v_b - v_h)).
    first = car_at(40, 150)
    right_edge = first[0] + first[2]
    close = (right_edge + 12, *first[1:])  # 12 px = 0.3 m
    apart = (right_edge + 60, *first[1:])  # 60 px = 1.5 m
    verdicts = check_geometry(close, "car", [first], GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert names_failed(verdicts) == {"gap"}
    assert verdicts[3].value == pytest.approx(0.3)
    assert all(check_geometry(apart, "car", [first], GROUND, road_mask(), LIMITS, focal_px=FOCAL))


def test_gap_along_the_road_uses_the_pinhole_distance():
    # Same columns, bottom rows at Z = 10 m and 12 m: bottom row = horizon + f h_cam / Z (Hartley & Zisserman 2004).
    near = car_at(170, HORIZON + FOCAL * CAMERA / 10)
    far = car_at(170, HORIZON + FOCAL * CAMERA / 12)
    gaps = footprint_gaps(far, [near], GROUND, focal_px=FOCAL)
    assert gaps[0] == pytest.approx(2.0)


def test_too_many_objects_is_rejected_by_objects_only():
    others = [(x, 200, 4, 4) for x in range(0, 4 * LIMITS.max_objects, 4)]
    verdicts = check_geometry(car_at(170, 130), "car", others, GROUND, road_mask(), LIMITS, focal_px=FOCAL)
    assert names_failed(verdicts) == {"objects"}
    assert objects(LIMITS.max_objects, LIMITS)
    assert not objects(LIMITS.max_objects + 1, LIMITS)


def test_box_iou_matches_pycocotools():
    rng = np.random.default_rng(0)
    boxes = np.column_stack([rng.uniform(0, 100, (50, 2)), rng.uniform(1, 60, (50, 2))])
    reference = mask_utils.iou(boxes[1:].tolist(), [boxes[0].tolist()], [0])[:, 0]
    np.testing.assert_allclose(box_iou(boxes[0], boxes[1:]), reference, rtol=1e-9, atol=1e-12)


def test_verdict_is_falsy_on_rejection_and_json_able():
    rejected = Verdict("gap", False, math.inf, 1.0, "too close")
    assert not rejected and Verdict("gap", True, 3.0, 1.0, "ok")
    assert json.loads(json.dumps(rejected.to_dict())) == {
        "name": "gap",
        "passed": False,
        "value": None,
        "limit": 1.0,
        "reason": "too close",
    }


@pytest.mark.parametrize(
    "field",
    [
        {"max_iou": 1.5},
        {"min_surface_share": -0.1},
        {"scale_k_sd": -1},
        {"max_objects": 0},
        {"max_objects": 2.5},
        {"min_hash_distance": 65},
        {"min_gap_m": float("nan")},
        {"max_seam_ratio": True},
        {"min_present_probability": 2.0},
    ],
)
def test_filter_limits_are_checked(field):
    with pytest.raises(ValueError, match=next(iter(field))):
        FilterLimits(**field)


def test_focal_from_fov():
    # 90 degrees: f = (W / 2) / tan(45 deg) = W / 2 (pinhole; Hartley & Zisserman 2004).
    assert focal_from_fov(384, hfov_deg=90) == pytest.approx(192)
    with pytest.raises(ValueError):
        focal_from_fov(384, hfov_deg=180)


# --------------------------------------------------------------------------------------------------
# image filters


def textured_scene(seed: int, size: tuple[int, int] = (H, W)) -> np.ndarray:
    """A smooth random scene: coarse noise upsampled, plus fine texture."""
    rng = np.random.default_rng(seed)
    coarse = rng.uniform(0, 255, (6, 8, 3)).astype(np.float32)
    image = cv2.resize(coarse, (size[1], size[0]), interpolation=cv2.INTER_CUBIC)
    image += rng.normal(0, 6, image.shape).astype(np.float32)
    return np.clip(image, 0, 255).astype(np.uint8)


def test_hard_pasted_patch_has_a_stronger_seam_than_a_feathered_one():
    background = textured_scene(1)
    mask = np.zeros((H, W), dtype=bool)
    mask[100:160, 150:230] = True
    patch = np.zeros_like(background)
    patch[...] = (230, 40, 30)
    hard = np.where(mask[..., None], patch, background)
    alpha = cv2.GaussianBlur(mask.astype(np.float32), (0, 0), 4)[..., None]
    feathered = (alpha * patch + (1 - alpha) * background).astype(np.uint8)
    hard_score = seam_strength(hard, mask)
    assert hard_score > seam_strength(feathered, mask)
    assert not seam(hard, mask, LIMITS)
    # The untouched image has no seam: its ring looks like the rest of the image.
    assert seam_strength(background, mask) < 1.5
    assert seam(background, mask, LIMITS)
    with pytest.raises(ValueError, match="mask shape"):
        seam_strength(background, mask[:10])


def test_phash_identical_and_noised_are_near_duplicates_different_scenes_are_not():
    image = textured_scene(2)
    rng = np.random.default_rng(3)
    noised = np.clip(image + rng.normal(0, 5, image.shape), 0, 255).astype(np.uint8)
    assert phash(image) == phash(image.copy())
    assert hamming(phash(image), phash(noised)) < LIMITS.min_hash_distance
    index = DuplicateIndex()
    assert near_duplicate(phash(image), index, LIMITS)  # empty index: nothing to duplicate
    index.add("a.png", phash(image))
    verdict = near_duplicate(phash(noised), index, LIMITS)
    assert not verdict and "a.png" in verdict.reason
    for seed in range(10, 20):
        other = phash(textured_scene(seed))
        assert near_duplicate(other, index, LIMITS), seed
    assert index.nearest(phash(image)) == (0, "a.png")
    assert len(index) == 1
    with pytest.raises(ValueError):
        index.add("b", -1)


@pytest.mark.skipif(not (SEED_SCENES / "train.json").exists(), reason="seed scenes not rendered yet")
def test_phash_separates_seed_scenes():
    from pipeline.dataset import load_dataset

    dataset = load_dataset(SEED_SCENES / "train.json")
    images = [s.load_rgb() for s in dataset.scenes[:12]]
    hashes = [phash(im) for im in images]
    rng = np.random.default_rng(0)
    noised = np.clip(images[0] + rng.normal(0, 4, images[0].shape), 0, 255).astype(np.uint8)
    assert hamming(hashes[0], phash(noised)) < LIMITS.min_hash_distance
    # Different rendered scenes share sky and road layout yet are not near-duplicates.
    distances = [hamming(a, b) for i, a in enumerate(hashes) for b in hashes[i + 1 :]]
    assert min(distances) >= LIMITS.min_hash_distance


@pytest.mark.skipif(not (SEED_SCENES / "train.json").exists(), reason="seed scenes not rendered yet")
def test_seam_passes_untouched_seed_objects_and_flags_hard_pastes():
    from pipeline.dataset import load_dataset

    dataset = load_dataset(SEED_SCENES / "train.json")
    images = [s.load_rgb() for s in dataset.scenes[:40]]
    untouched, pasted = [], []
    for k, (scene, image) in enumerate(zip(dataset.scenes[:40], images, strict=True)):
        other = images[(k + 11) % len(images)]
        for ann in scene.annotations:
            # The insert stage's mask: the box grown by 12% on the sides and top, 2 px below.
            x, y, w, h = ann.bbox
            mask = np.zeros(image.shape[:2], dtype=bool)
            mask[
                max(0, int(y - 0.12 * h)) : int(math.ceil(y + h + 2)), max(0, int(x - 0.12 * w)) : int(x + w + 0.12 * w)
            ] = True
            untouched.append(bool(seam(image, mask, LIMITS)))
            pasted.append(bool(seam(np.where(mask[..., None], other, image), mask, LIMITS)))
    assert np.mean(untouched) >= 0.97
    assert np.mean(pasted) <= 0.4
