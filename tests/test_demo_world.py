"""The demo world renderer and the committed seed scenes (issue 3).

Geometry checks use the pinhole model: an object H metres tall standing at depth Z is f H / Z pixels
tall and its ground line lies f h_cam / Z rows below the horizon for a level camera (Hartley,
Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004). Label checks compare with
pycocotools' reading of the JSON (the COCO reference reader).
"""

from __future__ import annotations

import dataclasses
import json
from collections import Counter
from pathlib import Path

import cv2
import numpy as np
import pytest
from pycocotools.coco import COCO
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import load_dataset
from pipeline.demo_world import (
    CATEGORIES,
    DEFAULT_SEED,
    Camera,
    Lighting,
    SceneObject,
    render_scene,
    render_seed_set,
    sample_scene,
)
from pipeline.demo_world.seed_set import DEFAULT_COUNTS, encode_png, render_seed_image, seed_set_plan
from pipeline.demo_world.sizes import sample_style

SEED_SCENES = Path(__file__).resolve().parents[1] / "seed_scenes"
SPLITS = ("train", "val", "test")
RARE_IDS = (4, 5)  # tractor, works_trailer


def _extent(mask: np.ndarray) -> tuple[int, int, int, int]:
    """``(x0, y0, x1, y1)`` of a mask's pixels as continuous box edges."""
    rows, cols = np.nonzero(mask)
    return int(cols.min()), int(rows.min()), int(cols.max()) + 1, int(rows.max()) + 1


def _edges(box) -> np.ndarray:
    x, y, w, h = box
    return np.array([x, y, x + w, y + h])


@pytest.fixture(scope="module")
def scenes():
    """Four small sampled scenes with every class, rendered once for the module."""
    wanted = [
        ["tractor", "works_trailer", "car", "van"],
        ["works_trailer", "bus", "car"],
        ["tractor", "car", "car", "van", "bus"],
        ["tractor", "works_trailer"],
    ]
    out = []
    for seed, categories in enumerate(wanted):
        spec = sample_scene(100 + seed, categories=categories)
        out.append((spec, render_scene(spec)))
    return out


@pytest.fixture(scope="module")
def committed():
    return {split: json.loads((SEED_SCENES / f"{split}.json").read_text()) for split in SPLITS}


# --------------------------------------------------------------------------------------------------
# rendered pixels agree with the labels


def test_each_object_mask_reaches_its_box_edges(scenes):
    checked = 0
    for spec, rendered in scenes:
        assert len(rendered.boxes) == len(spec.objects) > 0
        for box, mask in zip(rendered.boxes, rendered.amodal, strict=True):
            assert np.abs(np.array(_extent(mask)) - _edges(box)).max() <= 1.0
            checked += 1
    assert checked >= 10


def _alone(spec, obj):
    """The spec with only ``obj``, no scenery and flat light (no cast shadow outside the footprint)."""
    return dataclasses.replace(spec, objects=(obj,), scenery=(), lighting=Lighting("overcast", 1))


def test_drawn_pixels_of_an_object_fill_its_box(scenes):
    """Pixels that change when the object is added span its box within 1.5 px on all four sides.

    1 px for the label, plus the half-pixel anti-aliased fringe a polygon edge leaves in the image.
    """
    for spec, _ in scenes[:2]:
        for obj in spec.objects:
            with_obj = render_scene(_alone(spec, obj))
            without = render_scene(dataclasses.replace(_alone(spec, obj), objects=()))
            changed = np.abs(with_obj.image.astype(int) - without.image.astype(int)).max(axis=2) > 8
            assert np.abs(np.array(_extent(changed)) - _edges(with_obj.boxes[0])).max() <= 1.5, obj.category


def test_box_height_and_ground_row_follow_the_pinhole_model(scenes):
    # Hartley & Zisserman, Multiple View Geometry, 2nd ed., 2004: h_px = f H / Z; bottom = horizon + f h_cam / Z
    for spec, rendered in scenes:
        cam = spec.camera
        for obj, (_, y, _, h) in zip(spec.objects, rendered.boxes, strict=True):
            assert h == pytest.approx(cam.focal_px * obj.height_m / obj.z_m, abs=1.0)
            assert y + h == pytest.approx(cam.horizon_row + cam.focal_px * cam.camera_height_m / obj.z_m, abs=1.0)
            assert 15.0 <= h <= 80.0


def test_nearer_object_covers_the_farther_one():
    spec = sample_scene(5, categories=["car"])
    rng = np.random.default_rng(0)
    near = SceneObject("car", 0.4, 9.0, 1.5, 1.8, 4.3, "rear", style=sample_style("car", rng))
    far = SceneObject("bus", 0.0, 16.0, 3.4, 2.5, 11.0, "rear", style=sample_style("bus", rng))
    base = dataclasses.replace(spec, scenery=(), lighting=Lighting("overcast", 1))
    near_alone = render_scene(dataclasses.replace(base, objects=(near,)))
    for order in ((near, far), (far, near)):  # depth decides, not the listing order
        both = render_scene(dataclasses.replace(base, objects=order))
        near_id = order.index(near) + 1
        overlap = both.amodal[0] & both.amodal[1]
        assert overlap.sum() > 200
        assert (both.owner[overlap] == near_id).all()
        inner = cv2.erode(overlap.astype(np.uint8), np.ones((3, 3), np.uint8)).astype(bool)
        assert np.array_equal(both.image[inner], near_alone.image[inner])
        assert both.visible_fraction[order.index(near)] == 1.0
        assert both.visible_fraction[order.index(far)] < 1.0


def test_drivable_mask_is_the_road_under_the_horizon(scenes):
    for spec, rendered in scenes:
        mask = rendered.drivable
        assert mask.shape == (spec.camera.height, spec.camera.width)
        assert not mask[: int(spec.camera.horizon_row)].any()
        assert mask[-1].sum() > spec.camera.width // 3  # the road fills the bottom row's middle
        assert mask[-1, spec.camera.width // 2]


def test_rendering_is_deterministic_and_seed_dependent(tmp_path):
    counts = {"train": 1, "val": 1, "test": 0}
    first = render_seed_set(tmp_path / "a", seed=11, counts=counts)
    render_seed_set(tmp_path / "b", seed=11, counts=counts)
    render_seed_set(tmp_path / "c", seed=12, counts={"train": 1})
    assert set(first) == {"train", "val"}
    files = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*") if p.is_file())
    assert len(files) == 2 + 2 * 2  # two JSON files, two images and two masks
    for rel in files:
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes(), rel
    assert (tmp_path / "a" / "images/train_0001.png").read_bytes() != (
        tmp_path / "c" / "images/train_0001.png"
    ).read_bytes()


def test_bad_input_is_refused():
    with pytest.raises(ValueError, match="unknown splits"):
        seed_set_plan(1, {"training": 3})
    with pytest.raises(ValueError, match="integers >= 0"):
        seed_set_plan(1, {"train": -1})
    with pytest.raises(ValueError, match="horizon_row"):
        Camera(width=384, height=224, focal_px=300.0, camera_height_m=1.3, horizon_row=300.0)
    with pytest.raises(ValueError, match="category"):
        SceneObject("tank", 0.0, 10.0, 2.0, 2.0, 4.0, "rear")
    with pytest.raises(ValueError, match="view"):
        SceneObject("car", 0.0, 10.0, 1.5, 1.8, 4.0, "top")


def test_render_demo_command_writes_a_set(tmp_path):
    result = CliRunner().invoke(app, ["render-demo", str(tmp_path / "set"), "--seed", "4", "--train", "1",
                                      "--val", "0", "--test", "0"])  # fmt: skip
    assert result.exit_code == 0, result.output
    assert str(tmp_path / "set" / "train.json") in result.output
    data = load_dataset(tmp_path / "set" / "train.json")
    assert len(data.scenes) == 1 and not (tmp_path / "set" / "val.json").exists()


# --------------------------------------------------------------------------------------------------
# the committed seed set


def test_committed_images_re_render_bit_identically(committed):
    plan = seed_set_plan(DEFAULT_SEED, DEFAULT_COUNTS)
    for split, index in (("train", 0), ("val", 7), ("test", 59)):
        spec, rendered, seed = render_seed_image(DEFAULT_SEED, split, index, plan[split][index])
        stem = f"{split}_{index + 1:04d}"
        assert encode_png(rendered.image) == (SEED_SCENES / "images" / f"{stem}.png").read_bytes()
        mask = encode_png(rendered.drivable.astype(np.uint8) * 255)
        assert mask == (SEED_SCENES / "images" / "surfaces" / f"{stem}.png").read_bytes()
        entry = committed[split]["images"][index]
        assert entry["render_truth"]["seed"] == seed
        boxes = [a["bbox"] for a in committed[split]["annotations"] if a["image_id"] == entry["id"]]
        assert boxes == [[round(v, 2) for v in b] for b in rendered.boxes]


def test_committed_set_loads_and_agrees_with_pycocotools(committed):
    for split in SPLITS:
        path = SEED_SCENES / f"{split}.json"
        data = load_dataset(path)  # checks every image file and size
        coco = COCO(str(path))
        assert {c["id"]: c["name"] for c in coco.loadCats(coco.getCatIds())} == dict(enumerate(CATEGORIES, start=1))
        assert sorted(coco.getImgIds()) == sorted(s.id for s in data.scenes)
        assert len(coco.getAnnIds()) == sum(1 for _ in data.annotations())
        for ann in data.annotations():
            ref = coco.loadAnns(ann.id)[0]
            assert ref["image_id"] == ann.image_id and ref["category_id"] == ann.category_id
            assert tuple(ref["bbox"]) == pytest.approx(ann.bbox)
        for cid in range(1, 6):
            assert len(coco.getAnnIds(catIds=[cid])) == sum(1 for a in data.annotations() if a.category_id == cid)
        assert "rendered" in committed[split]["info"]["description"].lower()


def test_committed_counts_rare_and_common(committed):
    counts = {s: Counter(a["category_id"] for a in committed[s]["annotations"]) for s in SPLITS}
    assert {s: len(committed[s]["images"]) for s in SPLITS} == DEFAULT_COUNTS
    for rare in RARE_IDS:
        assert 15 <= counts["train"][rare] <= 25
        assert counts["val"][rare] >= 40 and counts["test"][rare] >= 40
    for common in (1, 2, 3):
        assert counts["train"][common] > 2 * counts["train"][4]
    for split in SPLITS:
        per_image = Counter(a["image_id"] for a in committed[split]["annotations"])
        assert set(per_image) == {i["id"] for i in committed[split]["images"]}
        assert 1 <= min(per_image.values()) and max(per_image.values()) <= 6


def test_committed_labels_follow_the_pinhole_model(committed):
    # Hartley & Zisserman, Multiple View Geometry, 2nd ed., 2004: h_px = f H / Z; bottom = horizon + f h_cam / Z
    for split in SPLITS:
        cams = {i["id"]: i["render_truth"] for i in committed[split]["images"]}
        for ann in committed[split]["annotations"]:
            cam, truth = cams[ann["image_id"]], ann["render_truth"]
            x, y, w, h = ann["bbox"]
            assert h == pytest.approx(cam["focal_px"] * truth["height_m"] / truth["Z_m"], abs=1.0)
            expected_bottom = cam["horizon_row"] + cam["focal_px"] * cam["camera_height_m"] / truth["Z_m"]
            assert y + h == pytest.approx(expected_bottom, abs=1.0)
            assert 15.0 <= h <= 80.0 and x >= 0 and y >= 0 and x + w <= 384 and y + h <= 224
            assert truth["visible_fraction"] >= 0.5
            assert 0 < ann["area"] <= w * h + 2 * (w + h)


def test_committed_masks_are_binary_and_hold_most_objects(committed):
    on_surface = total = 0
    for split in SPLITS:
        by_image = {i["id"]: i for i in committed[split]["images"]}
        for image_id, entry in list(by_image.items())[:20]:
            mask = cv2.imread(str(SEED_SCENES / "images" / entry["drivable_mask"]), cv2.IMREAD_UNCHANGED)
            assert mask.shape == (entry["height"], entry["width"]) and set(np.unique(mask)) <= {0, 255}
            for ann in (a for a in committed[split]["annotations"] if a["image_id"] == image_id):
                x, y, w, h = ann["bbox"]
                row, col = min(int(y + h) - 1, entry["height"] - 1), int(x + w / 2)
                on_surface += bool(mask[max(0, row - 2) : row + 1, col].any())
                total += 1
    assert total > 100 and on_surface / total >= 0.75
