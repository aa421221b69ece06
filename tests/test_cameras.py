"""Camera groups: several cameras, image sizes and calibrations in one data set; real class heights shared."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import Dataset, load_dataset, parse_dataset, to_coco
from pipeline.demo_world import Camera, SceneObject
from pipeline.demo_world.sizes import sample_size, sample_style
from pipeline.demo_world.vehicles import object_box
from pipeline.errors import DatasetError
from pipeline.geometry import (
    CameraGroups,
    camera_label,
    fit_cameras,
    fit_ground,
    focal_length,
    ground_distance,
    ground_for,
    measured_heights,
)
from pipeline.report import _scale_panels
from pipeline.report.run_record import _boxes_by_class, _pairs
from pipeline.report_plots import save_scale_plot

from .test_geometry import pinhole_dataset

CATEGORIES = ("car", "van", "bus", "tractor", "works_trailer")


def combine(parts: list[tuple[Dataset, dict]]) -> Dataset:
    """One data set from several, image ids kept apart; ``dict`` adds keys to every image of its part."""
    images, annotations = [], []
    for k, (part, keys) in enumerate(parts):
        raw = to_coco(part)
        for image in raw["images"]:
            images.append({**image, **keys, "id": image["id"] + 10_000 * k, "file_name": f"{k}_{image['file_name']}"})
        for ann in raw["annotations"]:
            annotations.append({**ann, "id": ann["id"] + 1_000_000 * k, "image_id": ann["image_id"] + 10_000 * k})
    raw = {"images": images, "annotations": annotations, "categories": to_coco(parts[0][0])["categories"]}
    return parse_dataset(raw, Path("."), check_images=False)


def demo_world_set(cameras: dict[str, Camera], images: int, seed: int = 0) -> Dataset:
    """Objects of the demo world's sizes on its flat road, projected by each named camera.

    The boxes are the demo renderer's projected object boxes (:func:`pipeline.demo_world.vehicles.object_box`),
    drawn at random depths so that each is 16-80 px tall; occlusion is left out (the single-camera tests
    cover it). Each image entry carries its ``camera`` name and ``intrinsics`` (a level camera: ``cy`` is the
    horizon); each box its object's real height ``height_m``, as a data set with 3D labels would.
    """
    rng = np.random.default_rng(seed)
    entries, anns = [], []
    for name, camera in cameras.items():
        for i in range(images):
            image_id = len(entries) + 1
            intrinsics = {
                "fx": camera.focal_px,
                "fy": camera.focal_px,
                "cx": camera.width / 2,
                "cy": camera.horizon_row,
            }
            entries.append(
                {"id": image_id, "file_name": f"{name}_{i}.png", "width": camera.width, "height": camera.height,
                 "camera": name, "intrinsics": intrinsics}
            )  # fmt: skip
            for category in ["car", "car", "van"] + (["bus"] if i % 2 else []):
                height, width, length = sample_size(category, rng)
                z = camera.focal_px * height / float(np.exp(rng.uniform(np.log(16), np.log(80))))
                view = ("rear", "front", "side")[int(rng.integers(3))]
                obj = SceneObject(category, float(rng.uniform(-6, 6)), z, height, width, length, view,
                                  style=sample_style(category, rng))  # fmt: skip
                x, y, w, h = object_box(obj, camera)
                if x < 2 or y < 2 or x + w > camera.width - 2 or y + h > camera.height - 2:
                    continue
                anns.append(
                    {"id": len(anns) + 1, "image_id": image_id, "category_id": CATEGORIES.index(category) + 1,
                     "bbox": [round(v, 2) for v in (x, y, w, h)], "height_m": height}
                )  # fmt: skip
    raw = {
        "images": entries,
        "annotations": anns,
        "categories": [{"id": i + 1, "name": n} for i, n in enumerate(CATEGORIES)],
    }
    return parse_dataset(raw, Path("."), check_images=False)


def test_two_cameras_of_the_demo_world_are_recovered_within_the_single_camera_tolerances():
    # Two level pinhole cameras of one image size, told apart by their `camera` name: different heights
    # and focal lengths, so the same car is a different share of each image.
    cameras = {
        "roof": Camera(width=384, height=224, focal_px=300.0, camera_height_m=1.35, horizon_row=100.0),
        "bumper": Camera(width=384, height=224, focal_px=420.0, camera_height_m=1.0, horizon_row=112.0),
    }
    dataset = demo_world_set(cameras, images=40)
    fitted = fit_cameras(dataset)
    assert set(fitted.groups) == {"roof 384x224", "bumper 384x224"}
    car_id = dataset.category_by_name("car").id
    car_height = float(
        np.exp(np.mean([math.log(a.extra["height_m"]) for a in dataset.annotations() if a.category_id == car_id]))
    )
    for name, camera in cameras.items():
        group = fitted.groups[f"{name} 384x224"]
        # Tolerances of the single-camera seed-scene test: horizon 3 px, car ratio 5%; camera height 3%
        # as when the real heights are known.
        assert abs(group.horizon_row - camera.horizon_row) <= 3.0, name
        assert group.classes["car"].height_ratio == pytest.approx(car_height / camera.camera_height_m, rel=0.05)
        assert group.camera_height_m == pytest.approx(camera.camera_height_m, rel=0.03), name
        # Distances use the group's own calibration: Z = f h_cam / (v_b - v_h) (Hartley & Zisserman 2004).
        assert focal_length(group) == camera.focal_px
        row = camera.horizon_row + 40.0
        z = ground_distance(row, group, focal_px=focal_length(group), camera_height_m=camera.camera_height_m)
        assert z == pytest.approx(camera.focal_px * camera.camera_height_m / 40.0, rel=0.08)
    # One real height per class, shared: the car's comes out near the labels' own.
    assert fitted.class_heights["car"].metres == pytest.approx(car_height, rel=0.05)
    assert fitted.class_heights["car"].known_from.startswith("3D labels")


COUNTS = {"car": 4, "van": 2, "bus": 1.5, "tractor": 1.2, "works_trailer": 1.2}
"""Boxes per image, so that every class has some 40-200 boxes in every group: enough to hold the fit on
one group alone to a percent."""
SIZES = ((1224, 370, 175.0), (1226, 370, 171.0), (1238, 374, 178.0), (1242, 375, 173.0))


def four_sizes() -> tuple[Dataset, list[Dataset]]:
    """A vehicle camera recorded on four days: four image sizes, each with its own horizon (calibration)."""
    parts = [
        pinhole_dataset(
            seed=20 + k, width=w, height=h, horizon=v, focal=720.0, camera=1.65, images=50, per_image=COUNTS
        )[0]
        for k, (w, h, v) in enumerate(SIZES)
    ]
    return combine([(p, {}) for p in parts]), parts


def test_four_image_sizes_fit_and_each_group_matches_a_fit_on_it_alone():
    dataset, parts = four_sizes()
    with pytest.raises(DatasetError, match="one size"):
        fit_ground(dataset)
    fitted = fit_cameras(dataset)
    assert list(fitted.groups) == [f"{w}x{h}" for w, h, _ in SIZES]
    for (w, h, horizon), part in zip(SIZES, parts, strict=True):
        joint, alone = fitted.groups[f"{w}x{h}"], fit_ground(part)
        assert abs(joint.horizon_row - horizon) < 1.5  # the pinhole test's truth tolerance, at 1.6x the rows
        assert joint.horizon_row == pytest.approx(alone.horizon_row, rel=0.02)
        for name, cls in alone.classes.items():
            if cls.source == "fitted":
                assert joint.classes[name].height_ratio == pytest.approx(cls.height_ratio, rel=0.02), (w, name)
    # Every image of the set knows its group, and the filters' lookup finds it.
    scene = dataset.scenes[-1]
    assert ground_for(fitted, scene) is fitted.groups["1242x375"]


def test_camera_keys_name_the_groups_and_bad_calibrations_are_errors():
    dataset, _, _ = pinhole_dataset(seed=3, images=6)
    raw = to_coco(dataset)
    raw["images"][0]["camera"] = "CAM_FRONT"
    raw["images"][1]["intrinsics"] = {"fx": 700.0, "fy": 701.0, "cx": 190.0, "cy": 92.04}
    # mmdetection3d's mono-3D COCO files give the 3x3 matrix (from memory).
    raw["images"][2]["cam_intrinsic"] = [[700.0, 0.0, 190.0], [0.0, 701.0, 92.04], [0.0, 0.0, 1.0]]
    scenes = parse_dataset(raw, Path("."), check_images=False).scenes
    labels = [camera_label(s) for s in scenes]
    assert labels[:4] == ["CAM_FRONT 384x224", "384x224 fx 700.0 cy 92.0", "384x224 fx 700.0 cy 92.0", "384x224"]
    raw["images"][1]["intrinsics"] = {"fx": 0.0, "fy": 701.0, "cx": 190.0, "cy": 92.0}
    with pytest.raises(DatasetError, match=r"images\[id=2\].*focal"):
        fit_cameras(parse_dataset(raw, Path("."), check_images=False))


def test_small_groups_keep_the_principal_row_or_have_no_model_and_say_why():
    big, _, _ = pinhole_dataset(seed=4, images=60, horizon=90.0)
    few, _, _ = pinhole_dataset(
        seed=5, images=2, horizon=95.0, per_image={"car": 3, "van": 0, "bus": 0, "tractor": 0, "works_trailer": 0}
    )
    calibration = {"intrinsics": {"fx": 300.0, "fy": 300.0, "cx": 192.0, "cy": 95.0}}
    dataset = combine([(big, {"camera": "front"}), (few, {"camera": "side", **calibration}), (few, {"camera": "rear"})])
    fitted = fit_cameras(dataset)
    side = fitted.groups["side 384x224"]
    assert side.horizon_source == "principal row" and side.horizon_row == pytest.approx(95.0)
    # Its camera height comes from the shared car height: the same camera as "front" made its boxes.
    assert side.camera_height_m == pytest.approx(fitted.groups["front 384x224"].camera_height_m, rel=0.1)
    assert "rear 384x224" not in fitted.groups and "a horizon needs 8" in fitted.unfitted["rear 384x224"]
    rear = next(s for s in dataset.scenes if camera_label(s) == "rear 384x224")
    assert not fitted.has_image(rear.id)
    with pytest.raises(ValueError, match="rear 384x224.*no ground model"):
        ground_for(fitted, rear)
    assert CameraGroups.from_dict(json.loads(json.dumps(fitted.to_dict()))) == fitted


def test_3d_label_heights_set_the_camera_height_before_the_priors():
    # Cars 1.80 m tall against the built-in 1.59 m prior: from the prior the camera height comes out 12%
    # low; from the boxes' own `height_m` it comes out right.
    heights = {"car": 1.8, "van": 2.2, "bus": 3.3, "tractor": 2.8, "works_trailer": 2.5}
    dataset, _, _ = pinhole_dataset(
        seed=6,
        outliers=0.0,
        camera=1.5,
        heights=heights,
        per_image={"car": 5, "van": 0, "bus": 0, "tractor": 0, "works_trailer": 0},
    )
    from_prior = fit_ground(dataset).camera_height_m
    assert from_prior == pytest.approx(1.5 * 1.59 / 1.8, rel=0.03)
    raw = to_coco(dataset)
    for ann in raw["annotations"]:
        ann["dim_hwl_m"] = [1.8, 1.7, 4.5]  # KITTI's order: height, width, length
    labelled = parse_dataset(raw, Path("."), check_images=False)
    assert measured_heights(labelled)["car"].metres == pytest.approx(1.8)
    ground = fit_ground(labelled)
    assert ground.camera_height_m == pytest.approx(1.5, rel=0.03)
    assert ground.prior_heights_m["car"] == pytest.approx(1.8)
    # A recipe's own height prior still wins over the labels.
    assert fit_ground(labelled, priors={"car": 1.5}).camera_height_m == pytest.approx(1.25, rel=0.03)


# --------------------------------------------------------------------------------------------------
# real frames in ../shared/realdata (never copied into the repository)


def realdata(name: str) -> Path:
    for root in (Path(__file__).resolve().parents[1].parent / "shared" / "realdata", Path("/work/shared/realdata")):
        if (root / name / "annotations.json").is_file():
            return root / name / "annotations.json"
    pytest.skip(f"real frames {name} not found beside the repository (../shared/realdata)")


def test_nuscenes_six_cameras_load_as_six_groups_near_their_calibration():
    path = realdata("nuscenes_mmdet3d7")
    dataset = load_dataset(path, check_images=False)
    fitted = fit_cameras(dataset)
    assert len(set(fitted.image_groups.values())) == 6
    checked = 0
    for scene in dataset.scenes:
        if not fitted.has_image(scene.id):
            continue
        group = ground_for(fitted, scene)
        assert group.intrinsics.cy == pytest.approx(scene.extra["intrinsics"]["cy"], abs=0.5)
        if group.horizon_source != "fitted":
            continue  # fewer than 8 usable boxes: the horizon is the principal row, nothing to compare
        checked += 1
        # The vehicle's pitch on its springs and the road's grade are not calibrated: about +-1 degree
        # (from memory), so the horizon may lie fy tan(1 deg) (22 px here) from the principal row.
        assert abs(group.horizon_row - group.intrinsics.cy) <= group.intrinsics.fy * math.tan(math.radians(1.0))
        # nuScenes front camera: 1.51 m above the ego ground plane (cam2ego; nuScenes devkit). The metres
        # rest on the 3D-label heights of some 30 loose projected boxes (log sd 0.1-0.2): about 4% standard
        # error, so 10% is 2.5 of them.
        assert group.camera_height_m == pytest.approx(scene.extra["cam2ego_z_m"], rel=0.10)
    assert checked >= 2  # CAM_FRONT and CAM_FRONT_RIGHT carry enough boxes


def test_kitti_two_calibrations_load_as_two_groups_that_use_them():
    path = realdata("kitti_tracking_mini6")
    dataset = load_dataset(path, check_images=False)
    fitted = fit_cameras(dataset)
    assert sorted(fitted.groups) == ["1224x370 fx 707.0 cy 180.5", "1242x375 fx 721.5 cy 172.9"]
    for scene in dataset.scenes:
        group = ground_for(fitted, scene)
        assert (group.image_width, group.image_height) == (scene.width, scene.height)
        assert focal_length(group) == pytest.approx(scene.extra["intrinsics"]["fy"], abs=0.1)


def test_kitti_flat_ground_check_needs_a_level_road():
    # KITTI's colour camera is about 1.65 m above the road (Geiger, Lenz, Urtasun, CVPR 2012). A flat-ground
    # fit can only find that, and the principal row, where the road under the objects is level: the labels'
    # `loc_cam_xyz_m` y is the height of each object's base below the camera.
    dataset = load_dataset(realdata("kitti_tracking_mini6"), check_images=False)
    fitted = fit_cameras(dataset)
    for name, group in fitted.groups.items():
        bases = [a.extra["loc_cam_xyz_m"][1] for s in dataset.scenes if camera_label(s) == name for a in s.annotations]
        if np.std(bases) > 0.15:
            continue
        assert abs(group.horizon_row - group.intrinsics.cy) <= group.intrinsics.fy * math.tan(math.radians(1.0))
        assert group.camera_height_m == pytest.approx(1.65, rel=0.10)
        return
    pytest.skip(
        "no KITTI group stands on a level road: the 3D labels put object bases 1.5-3.2 m below the camera in "
        "the 1242x375 frames (a street falling away) and 1.1-1.8 m in the 1224x370 ones (rising)"
    )


def test_report_scale_plot_has_a_panel_per_camera_group(tmp_path):
    dataset, _ = four_sizes()
    fitted = fit_cameras(dataset)
    panels = _scale_panels(fitted, dataset, dataset, [])
    assert [p.name for p in panels] == list(fitted.groups)
    assert sum(len(b) for p in panels for b in p.real.values()) == sum(
        len(b) for b in _boxes_by_class(_pairs(dataset), dataset.categories, usable_only=True).values()
    )
    save_scale_plot({}, {}, tmp_path / "scale.png", ground=None, image_height=375, groups=panels)
    save_scale_plot(panels[0].real, {}, tmp_path / "one.png", ground=panels[0].ground, image_height=375)
    with Image.open(tmp_path / "scale.png") as many, Image.open(tmp_path / "one.png") as one:
        assert many.size[1] > one.size[1]  # two rows of panels


def test_ground_command_on_real_frames_prints_tables_and_no_per_image_messages(tmp_path):
    path = realdata("nuscenes_mmdet3d7")
    result = CliRunner().invoke(app, ["ground", str(path), "--plot", str(tmp_path / "plot.png")])
    assert result.exit_code == 0, result.output
    assert result.output.count("camera CAM_") == 6  # five tables and the one group without a model
    assert "no ground model" in result.output and "real class heights" in result.output
    assert "warning" not in result.output
    assert (tmp_path / "plot.png").stat().st_size > 10_000
