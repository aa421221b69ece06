"""Drivable surface: reading mask files loudly, estimating from footprints, footprint share."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from pipeline.dataset import load_dataset
from pipeline.errors import DatasetError, DatasetWarning
from pipeline.surface import MASK_KEY, estimate_surface, footprint_share, mask_for, warn_missing_masks

from .conftest import SEED_SCENES, write_png

W, H = 64, 48


def road(width: int = W, height: int = H) -> np.ndarray:
    """Lower half of the image, columns 16..47: a straight road."""
    mask = np.zeros((height, width), dtype=np.uint8)
    mask[height // 2 :, 16:48] = 255
    return mask


def make_set(tmp_path: Path, *, mask_name: str | None = "surfaces/a.png", boxes=((20, 30, 10, 8),)) -> Path:
    images = tmp_path / "images"
    write_png(images / "a.png", W, H)
    entry = {"id": 1, "file_name": "a.png", "width": W, "height": H}
    if mask_name is not None:
        entry["drivable_mask"] = mask_name
    raw = {
        "images": [entry],
        "annotations": [{"id": i + 1, "image_id": 1, "category_id": 1, "bbox": list(b)} for i, b in enumerate(boxes)],
        "categories": [{"id": 1, "name": "car"}],
    }
    path = tmp_path / "set.json"
    path.write_text(json.dumps(raw))
    return path


def save_mask(path: Path, values: np.ndarray, mode: str = "L") -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(values).convert(mode).save(path)


def test_mask_file_is_read_relative_to_the_image_folder(tmp_path):
    save_mask(tmp_path / "images" / "surfaces" / "a.png", road())
    dataset = load_dataset(make_set(tmp_path))
    surface = mask_for(dataset.scenes[0], dataset=dataset)
    assert not surface.estimated
    assert surface.mask.dtype == bool and surface.mask.shape == (H, W)
    np.testing.assert_array_equal(surface.mask, road() > 0)
    # Without the data set the scene image's folder is the root: the same file here.
    np.testing.assert_array_equal(mask_for(dataset.scenes[0]).mask, road() > 0)


def test_zero_one_masks_are_accepted(tmp_path):
    save_mask(tmp_path / "images" / "surfaces" / "a.png", (road() > 0).astype(np.uint8))
    dataset = load_dataset(make_set(tmp_path))
    np.testing.assert_array_equal(mask_for(dataset.scenes[0], dataset=dataset).mask, road() > 0)


@pytest.mark.parametrize(
    ("name", "values", "mode", "message"),
    [
        ("../outside.png", road(), "L", "outside the image folder"),
        ("surfaces/missing.png", None, "L", "not found"),
        ("surfaces/a.png", road(W + 1, H), "L", "65x48 px but the image is 64x48"),
        ("surfaces/a.png", np.stack([road()] * 3, axis=2), "RGB", "single-channel"),
        ("surfaces/a.png", road() // 2, "L", "only 0 and 255"),
        ("/abs/a.png", None, "L", "relative file name"),
    ],
)
def test_bad_mask_files_are_refused(tmp_path, name, values, mode, message):
    if values is not None:
        target = (tmp_path / "images" / name).resolve()
        save_mask(target, values, mode)
    dataset = load_dataset(make_set(tmp_path, mask_name=name))
    with pytest.raises(DatasetError, match=message) as info:
        mask_for(dataset.scenes[0], dataset=dataset)
    assert "drivable_mask" in str(info.value)


def test_surface_is_estimated_from_footprints_without_a_warning_per_image(tmp_path):
    boxes = ((10, 20, 8, 6), (40, 26, 10, 8))
    dataset = load_dataset(make_set(tmp_path, mask_name=None, boxes=boxes))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        surface = mask_for(dataset.scenes[0], dataset=dataset)
    assert surface.estimated
    # Every footprint stands on the estimate, and the region runs down to the bottom row.
    for box in boxes:
        assert footprint_share(box, surface.mask) == 1.0
    assert surface.mask[H - 1, 12:48].all()
    # Far above the highest footprint (row 26) nothing is drivable.
    assert not surface.mask[:15].any()


def test_missing_masks_are_counted_in_one_warning(tmp_path):
    raw = json.loads(make_set(tmp_path).read_text())
    for i in range(2, 6):
        write_png(tmp_path / "images" / f"{i}.png", W, H, seed=i)
        raw["images"].append({"id": i, "file_name": f"{i}.png", "width": W, "height": H})
    (tmp_path / "set.json").write_text(json.dumps(raw))
    dataset = load_dataset(tmp_path / "set.json")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert warn_missing_masks(dataset) == 4
    assert len(caught) == 1 and caught[0].category is DatasetWarning
    message = str(caught[0].message)
    assert "4 of 5 images name no drivable mask" in message and f'add "{MASK_KEY}"' in message
    raw["images"] = raw["images"][:1]
    (tmp_path / "set.json").write_text(json.dumps(raw))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert warn_missing_masks(load_dataset(tmp_path / "set.json")) == 0


def test_estimate_without_boxes_is_an_error(tmp_path):
    dataset = load_dataset(make_set(tmp_path, mask_name=None, boxes=()))
    with pytest.raises(DatasetError, match="no boxes"):
        mask_for(dataset.scenes[0], dataset=dataset)
    assert not estimate_surface(dataset.scenes, width=W, height=H).any()


def test_footprint_share_counts_the_bottom_strip_only():
    mask = road() > 0  # rows 24..47, columns 16..47
    # Box straddling the road's left edge: columns 8..23 of which 16..23 are on the road.
    assert footprint_share((8, 30, 16, 10), mask) == pytest.approx(0.5)
    # Top of the box above the road, bottom edge on it: only the bottom strip counts.
    assert footprint_share((20, 5, 10, 25), mask) == 1.0
    # Bottom edge above the road.
    assert footprint_share((20, 5, 10, 10), mask) == 0.0
    # Part of the footprint outside the image counts as off the surface.
    assert footprint_share((40, 30, 16, 10), mask) == pytest.approx(0.5)
    with pytest.raises(ValueError):
        footprint_share((0, 0, 0, 5), mask)


@pytest.mark.skipif(not (SEED_SCENES / "train.json").exists(), reason="seed scenes not rendered yet")
def test_seed_scene_masks_hold_the_labelled_vehicles():
    dataset = load_dataset(SEED_SCENES / "train.json", check_images=False)
    shares = []
    for scene in dataset.scenes[:20]:
        surface = mask_for(scene, dataset=dataset)
        assert not surface.estimated and surface.mask.shape == (scene.height, scene.width)
        shares += [footprint_share(a.bbox, surface.mask) for a in scene.annotations]
    # Rendered vehicles stand on the road or its shoulders.
    assert np.median(shares) > 0.9
