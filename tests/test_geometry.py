"""Ground-plane model: fit from labels, expected heights, distances; checked against the pinhole camera."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import load_dataset, parse_dataset, save_dataset, to_coco
from pipeline.errors import DatasetError
from pipeline.geometry import (
    PRIOR_HEIGHTS_M,
    ClassGround,
    GroundModel,
    fit_ground,
    ground_distance,
    lateral_offset,
    prior_heights,
)

from .conftest import SEED_SCENES

NAMES = ("car", "van", "bus", "tractor", "works_trailer")


def pinhole_dataset(
    *,
    seed: int = 0,
    outliers: float = 0.2,
    width: int = 384,
    height: int = 224,
    focal: float = 300.0,
    camera: float = 1.5,
    horizon: float = 90.0,
    heights: dict[str, float] | None = None,
    per_image: dict[str, float] | None = None,
    images: int = 60,
    horizon_sd: float = 0.0,
) -> tuple:
    """Boxes of objects on a flat ground seen by a level pinhole camera; a share made short (occluded).

    Pinhole camera: h = f H / Z and bottom row = horizon + f h_cam / Z (Hartley & Zisserman, Multiple
    View Geometry, 2nd ed., 2004). ``horizon_sd`` moves each image's horizon (a pitching camera);
    the third returned value maps image id to its horizon row.
    """
    rng = np.random.default_rng(seed)
    heights = heights or {"car": 1.6, "van": 2.2, "bus": 3.3, "tractor": 2.8, "works_trailer": 2.5}
    per_image = per_image or {"car": 4, "van": 2, "bus": 1, "tractor": 0.4, "works_trailer": 0.4}
    ids = {name: i + 1 for i, name in enumerate(NAMES)}
    image_entries, anns = [], []
    horizons = {}
    for image_id in range(1, images + 1):
        image_entries.append({"id": image_id, "file_name": f"{image_id}.png", "width": width, "height": height})
        horizons[image_id] = image_horizon = horizon + rng.normal(0, horizon_sd) if horizon_sd else horizon
        for name, mean_count in per_image.items():
            for _ in range(rng.poisson(mean_count)):
                z = rng.uniform(6, 60)
                real = heights[name] * math.exp(rng.normal(0, 0.05))
                bottom = image_horizon + focal * camera / z
                h = focal * real / z
                w = 1.4 * h
                if rng.random() < outliers:
                    if rng.random() < 0.5:
                        h *= rng.uniform(0.3, 0.7)  # lower part hidden: bottom edge moves up
                        bottom = bottom - (focal * real / z - h)
                    else:
                        h *= rng.uniform(0.3, 0.7)  # top hidden
                x = rng.uniform(5, width - w - 5) if width - w - 10 > 0 else 5
                y = bottom - h
                if y < 3 or bottom > height - 3 or x + w > width - 3:
                    continue
                anns.append({"id": len(anns) + 1, "image_id": image_id, "category_id": ids[name], "bbox": [x, y, w, h]})
    raw = {
        "images": image_entries,
        "annotations": anns,
        "categories": [{"id": i, "name": n} for n, i in ids.items()],
    }
    return parse_dataset(raw, Path("."), check_images=False), heights, horizons


def test_fit_recovers_horizon_and_ratios_with_20_percent_outliers():
    truth = {"camera": 1.5, "horizon": 90.0}
    dataset, heights, _ = pinhole_dataset(outliers=0.2, camera=truth["camera"], horizon=truth["horizon"])
    ground = fit_ground(dataset)
    assert abs(ground.horizon_row - truth["horizon"]) < 1.0
    for name, real in heights.items():
        cls = ground.classes[name]
        assert cls.source == "fitted"
        assert cls.height_ratio == pytest.approx(real / truth["camera"], rel=0.04), name
        # Occluded boxes are down-weighted, so fewer boxes carry the fit than were given.
        assert 0 < cls.n_boxes
    # Heights vary 5% in log space; the robust spread sees that, not the outliers' 30-70% shrink.
    assert 0.03 < ground.classes["car"].spread < 0.09
    assert ground.image_width == 384 and ground.image_height == 224


def test_fit_horizon_outside_the_frame_and_other_camera():
    # With the horizon above the frame only objects shorter than the camera height fit in the image,
    # so the camera sits high (4 m, a bus or truck mount).
    dataset, heights, _ = pinhole_dataset(seed=3, horizon=-10.0, camera=4.0, focal=250.0, outliers=0.2)
    ground = fit_ground(dataset, rng=7)
    assert abs(ground.horizon_row - (-10.0)) < 1.5
    for name in ("car", "bus"):
        assert ground.classes[name].height_ratio == pytest.approx(heights[name] / 4.0, rel=0.05)


def test_per_image_horizons_follow_a_pitching_camera():
    dataset, heights, horizons = pinhole_dataset(seed=9, outliers=0.1, horizon_sd=3.0, images=120)
    ground = fit_ground(dataset)
    errors = np.array([ground.image_horizons[i] - horizons[i] for i in ground.image_horizons])
    assert len(errors) > 100
    assert np.sqrt(np.mean(errors**2)) < 1.5  # against a 3 px spread of the truth
    assert ground.horizon_sd_px == pytest.approx(3.0, rel=0.3)
    assert abs(ground.horizon_row - np.mean(list(horizons.values()))) < 1.0
    assert ground.classes["car"].height_ratio == pytest.approx(heights["car"] / 1.5, rel=0.04)
    # A fixed camera gets (nearly) no per-image horizon spread.
    fixed, _, _ = pinhole_dataset(seed=9, outliers=0.1, images=120)
    assert fit_ground(fixed).horizon_sd_px < 0.5


def test_image_horizon_and_band_for_unknown_images():
    ground = GroundModel(
        horizon_row=90.0,
        classes={"car": ClassGround(1.0, 0.05, 100, "fitted")},
        camera_height_m=1.5,
        image_width=384,
        image_height=224,
        image_horizons={7: 94.0},
        horizon_sd_px=2.0,
    )
    assert ground.horizon_for(7) == 94.0 and ground.horizon_for(8) == 90.0 and ground.horizon_for() == 90.0
    assert ground.expected_height("car", 134.0, image_id=7).expected == pytest.approx(40.0)
    assert ground.log_sd("car", 134.0, image_id=7) == pytest.approx(0.05)
    # Elsewhere the horizon's own spread widens the band: hypot(0.05, 2 / (134 - 90)).
    band = ground.expected_height("car", 134.0)
    assert band.expected == pytest.approx(44.0)
    assert band.high / band.expected == pytest.approx(math.exp(2.5 * math.hypot(0.05, 2 / 44)))
    assert ground_distance(134.0, ground, focal_px=300, image_id=7) == pytest.approx(300 * 1.5 / 40)


def test_fit_is_deterministic_for_a_seed():
    dataset, _, _ = pinhole_dataset(seed=1)
    assert fit_ground(dataset, rng=5) == fit_ground(dataset, rng=5)


def test_rare_class_falls_back_to_prior_scaled_by_estimated_camera_height():
    camera = 1.5
    counts = {"car": 4, "van": 2, "bus": 1, "tractor": 0.05, "works_trailer": 0.0}
    # Real heights equal to the priors, so the camera height estimate is exact up to noise.
    heights = {n: PRIOR_HEIGHTS_M[n][0] for n in NAMES}
    dataset, _, _ = pinhole_dataset(seed=2, outliers=0.0, camera=camera, heights=heights, per_image=counts)
    ground = fit_ground(dataset)
    assert ground.camera_height_m == pytest.approx(camera, rel=0.03)
    tractor = ground.classes["tractor"]
    assert tractor.source == "prior"
    assert tractor.n_boxes < 8
    assert tractor.height_ratio == pytest.approx(PRIOR_HEIGHTS_M["tractor"][0] / ground.camera_height_m)
    assert ground.classes["works_trailer"].source == "prior"


def test_priors_override_the_table_and_are_checked():
    counts = {"car": 4, "van": 2, "bus": 1, "tractor": 0.05, "works_trailer": 0.0}
    dataset, _, _ = pinhole_dataset(seed=2, outliers=0.0, per_image=counts)
    ground = fit_ground(dataset, priors={"Works Trailer": 3.0})
    assert ground.prior_heights_m["works_trailer"] == 3.0
    assert ground.classes["works_trailer"].height_ratio == pytest.approx(3.0 / ground.camera_height_m)
    assert prior_heights({"car": 1.5})["car"] == 1.5
    for bad in (0, -1.0, float("nan"), "2", True):
        with pytest.raises(ValueError, match="prior height"):
            fit_ground(dataset, priors={"car": bad})


def test_class_without_boxes_or_prior_is_absent_and_named_in_the_error():
    counts = {"car": 4, "van": 0.0, "bus": 0.0, "tractor": 0.0, "works_trailer": 0.0}
    dataset, _, _ = pinhole_dataset(seed=4, outliers=0.0, per_image=counts)
    raw = to_coco(dataset)
    for category in raw["categories"]:
        if category["name"] == "bus":
            category["name"] = "gizmo"
    renamed = parse_dataset(raw, Path("."), check_images=False)
    ground = fit_ground(renamed)
    assert "gizmo" not in ground.classes
    with pytest.raises(ValueError, match="no class 'gizmo'"):
        ground.expected_height("gizmo", 150)


def test_fit_refuses_too_few_boxes_and_mixed_sizes():
    raw = {
        "images": [{"id": 1, "file_name": "a.png", "width": 100, "height": 80}],
        "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [10, 30, 10, 10]}],
        "categories": [{"id": 1, "name": "car"}],
    }
    with pytest.raises(DatasetError, match="usable boxes"):
        fit_ground(parse_dataset(raw, Path("."), check_images=False))
    raw["images"].append({"id": 2, "file_name": "b.png", "width": 120, "height": 80})
    with pytest.raises(DatasetError, match="one size"):
        fit_ground(parse_dataset(raw, Path("."), check_images=False))
    with pytest.raises(ValueError, match="min_boxes"):
        fit_ground(parse_dataset(raw, Path("."), check_images=False), min_boxes=1)


def test_border_and_crowd_boxes_are_not_used():
    dataset, _, _ = pinhole_dataset(seed=5, outliers=0.0)
    baseline = fit_ground(dataset)
    raw = to_coco(dataset)
    # Absurd boxes that would wreck the fit if used: touching the border, or crowd regions.
    for i in range(200):
        raw["annotations"].append({"id": 10_000 + i, "image_id": 1, "category_id": 1, "bbox": [0, 100, 30, 5 + i % 50]})
        raw["annotations"].append(
            {"id": 20_000 + i, "image_id": 1, "category_id": 1, "bbox": [50, 100, 30, 100], "iscrowd": 1}
        )
    ground = fit_ground(parse_dataset(raw, Path("."), check_images=False))
    assert ground.horizon_row == pytest.approx(baseline.horizon_row)
    assert ground.classes["car"].n_boxes == baseline.classes["car"].n_boxes


def test_kitti_worked_example_expected_height_and_distance():
    # KITTI set-up: camera about 1.65 m above the road, f about 721.5 px (Geiger, Lenz, Urtasun, "Are we
    # ready for autonomous driving? The KITTI vision benchmark suite", CVPR 2012; from memory).
    # Pinhole: h = f H / Z, bottom row = horizon + f h_cam / Z (Hartley & Zisserman 2004).
    focal, camera, car, horizon = 721.5, 1.65, 1.5, 180.0
    ground = GroundModel(
        horizon_row=horizon,
        classes={"car": ClassGround(height_ratio=car / camera, spread=0.1, n_boxes=100, source="fitted")},
        camera_height_m=camera,
        image_width=1242,
        image_height=375,
    )
    for distance, pixels in ((10, 108.2), (20, 54.1), (40, 27.1)):
        bottom = horizon + focal * camera / distance
        band = ground.expected_height("car", bottom)
        assert band.expected == pytest.approx(pixels, abs=0.05)
        assert ground_distance(bottom, ground, focal_px=focal) == pytest.approx(distance)
        # The band is +-2.5 spreads in log space.
        assert band.high / band.expected == pytest.approx(math.exp(0.25))
        assert band.low / band.expected == pytest.approx(math.exp(-0.25))
    rows = horizon + focal * camera / np.array([10.0, 20.0, 40.0])
    np.testing.assert_allclose(ground_distance(rows, ground, focal_px=focal), [10, 20, 40])
    # Lateral position: X = (u - c_x) Z / f; a point 100 px right of centre at 20 m is 100 * 20 / 721.5 m.
    assert lateral_offset(621 + 100, rows[1], ground) == pytest.approx(100 * 20 / focal)


def test_rows_at_or_above_the_horizon_are_errors():
    ground = GroundModel(90.0, {"car": ClassGround(1.0, 0.1, 10, "fitted")}, None, 384, 224)
    for row in (90.0, 50.0):
        with pytest.raises(ValueError, match="horizon"):
            ground.expected_height("car", row)
        with pytest.raises(ValueError, match="horizon"):
            ground_distance(row, ground, focal_px=300, camera_height_m=1.5)
    with pytest.raises(ValueError, match="camera height unknown"):
        ground_distance(120.0, ground, focal_px=300)
    with pytest.raises(ValueError, match="focal_px"):
        ground_distance(120.0, ground, focal_px=0, camera_height_m=1.5)
    with pytest.raises(ValueError, match="k_sd"):
        ground.expected_height("car", 120.0, k_sd=-1)


def test_to_dict_from_dict_round_trip_through_json():
    dataset, _, _ = pinhole_dataset(seed=6)
    ground = fit_ground(dataset)
    data = json.loads(json.dumps(ground.to_dict()))
    assert data["format"] == "rarefill.ground/1"
    assert GroundModel.from_dict(data) == ground
    for broken in ({}, {**data, "horizon_row": None}, {k: v for k, v in data.items() if k != "classes"}):
        with pytest.raises(ValueError):
            GroundModel.from_dict(broken)
    bad_source = json.loads(json.dumps(data))
    bad_source["classes"]["car"]["source"] = "guessed"
    with pytest.raises(ValueError, match="source"):
        GroundModel.from_dict(bad_source)


# --------------------------------------------------------------------------------------------------
# seed scenes (rendered with a known camera; render_truth is read here only)

SEED_TRAIN = SEED_SCENES / "train.json"
needs_seed = pytest.mark.skipif(not SEED_TRAIN.exists(), reason="seed scenes not rendered yet")


@needs_seed
def test_seed_scenes_fit_matches_render_truth():
    dataset = load_dataset(SEED_TRAIN, check_images=False)
    ground = fit_ground(dataset)
    truths = [s.extra["render_truth"] for s in dataset.scenes]
    horizon = float(np.median([t["horizon_row"] for t in truths]))
    camera = float(np.median([t["camera_height_m"] for t in truths]))
    assert abs(ground.horizon_row - horizon) <= 3.0
    car_id = dataset.category_by_name("car").id
    car_heights = [a.extra["render_truth"]["height_m"] for a in dataset.annotations() if a.category_id == car_id]
    truth_ratio = float(np.mean(car_heights)) / camera
    assert ground.classes["car"].height_ratio == pytest.approx(truth_ratio, rel=0.05)
    # The camera pitches: each image's horizon is recovered far better than the 2.5 px they vary by.
    by_id = {s.id: s.extra["render_truth"]["horizon_row"] for s in dataset.scenes}
    errors = np.array([row - by_id[i] for i, row in ground.image_horizons.items()])
    assert len(errors) == len(dataset.scenes)
    assert np.sqrt(np.mean(errors**2)) < 1.5


# --------------------------------------------------------------------------------------------------
# command line


def seed_or_synthetic(tmp_path: Path) -> Path:
    if SEED_TRAIN.exists():
        return SEED_TRAIN
    dataset, _, _ = pinhole_dataset(seed=8)
    path = tmp_path / "synthetic.json"
    save_dataset(dataset, path)
    return path


def test_cli_ground_prints_the_horizon_and_writes_json_and_plot(tmp_path):
    path = seed_or_synthetic(tmp_path)
    runner = CliRunner()
    result = runner.invoke(app, ["ground", str(path)])
    assert result.exit_code == 0, result.output
    assert "horizon row" in result.output and "car" in result.output
    result = runner.invoke(app, ["ground", str(path), "--json", "--plot", str(tmp_path / "plot.png")])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert data["format"] == "rarefill.ground-groups/1"
    (group,) = data["groups"].values()
    assert isinstance(group["horizon_row"], float)
    assert {"height_ratio", "spread", "n_boxes", "source"} <= set(group["classes"]["car"])
    assert data["class_heights_m"]["car"]["metres"] > 0
    with Image.open(tmp_path / "plot.png") as plot:
        assert plot.format == "PNG" and plot.size[0] > 400


def test_cli_ground_bad_file_exits_2(tmp_path):
    runner = CliRunner()
    result = runner.invoke(app, ["ground", str(tmp_path / "missing.json")])
    assert result.exit_code == 2
    assert "not found" in result.output
    broken = tmp_path / "broken.json"
    broken.write_text("{not json")
    result = runner.invoke(app, ["ground", str(broken)])
    assert result.exit_code == 2 and "malformed JSON" in result.output
