"""The validated COCO layer: every rule has a test, checked against pycocotools as the reference reader."""

from __future__ import annotations

import copy
import json
import os
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image
from pycocotools.coco import COCO

from pipeline.dataset import Dataset, load_dataset, parse_dataset, save_dataset, to_coco
from pipeline.errors import DatasetError, DatasetWarning

from .conftest import tiny_coco, write_png


def _write(tmp_path: Path, coco: dict) -> Path:
    path = tmp_path / "set.json"
    path.write_text(json.dumps(coco))
    return path


def _files(folder: Path) -> set[Path]:
    return {p for p in folder.rglob("*")}


def test_tiny_set_loads(tiny_set):
    json_path, images = tiny_set
    data = load_dataset(json_path, images)
    assert [s.id for s in data.scenes] == [1, 2]
    assert [len(s.annotations) for s in data.scenes] == [2, 1]
    assert data.category_by_name("tractor").id == 2
    assert data.scenes[0].annotations[1].bbox == (20.5, 4.0, 8.0, 6.0)


def test_default_image_folder_is_images_beside_the_json(tiny_set):
    json_path, images = tiny_set
    assert load_dataset(json_path).images_dir == images


# --- one test per rule: (mutation, JSON path the error must name, words of the reason) ---------------


def _set(path: list, value):
    def mutate(coco: dict) -> None:
        target = coco
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value

    return mutate


def _delete(path: list):
    def mutate(coco: dict) -> None:
        target = coco
        for key in path[:-1]:
            target = target[key]
        del target[path[-1]]

    return mutate


RULES = [
    ("missing images", _delete(["images"]), "images", "required key is missing"),
    ("images not a list", _set(["images"], {}), "images", "must be a list"),
    ("image not an object", _set(["images", 0], 5), "images[0]", "must be a JSON object"),
    ("image id missing", _delete(["images", 1, "id"]), "images[1].id", "required key is missing"),
    ("image id a string", _set(["images", 1, "id"], "2"), "images[1].id", "must be an integer"),
    ("image id a boolean", _set(["images", 1, "id"], True), "images[1].id", "must be an integer"),
    ("width zero", _set(["images", 0, "width"], 0), "images[0].width", "must be > 0"),
    ("duplicate image id", _set(["images", 1, "id"], 1), "images[1].id", "duplicate image id 1"),
    ("duplicate annotation id", _set(["annotations", 1, "id"], 10), "annotations[1].id", "duplicate annotation id"),
    ("duplicate category id", _set(["categories", 1, "id"], 1), "categories[1].id", "duplicate category id"),
    ("duplicate category name", _set(["categories", 1, "name"], "car"), "categories[1].name", "duplicate category"),
    ("category name missing", _delete(["categories", 0, "name"]), "categories[0].name", "required key"),
    ("unknown image_id", _set(["annotations", 0, "image_id"], 99), "annotations[0].image_id", "no image has id 99"),
    ("unknown category_id", _set(["annotations", 2, "category_id"], 7), "annotations[2].category_id", "no category"),
    ("bbox missing", _delete(["annotations", 0, "bbox"]), "annotations[0].bbox", "required key is missing"),
    ("bbox three numbers", _set(["annotations", 0, "bbox"], [1, 2, 3]), "annotations[0].bbox", "4 finite numbers"),
    ("bbox with a string", _set(["annotations", 0, "bbox"], [1, 2, "3", 4]), "annotations[0].bbox", "4 finite"),
    ("bbox not finite", _set(["annotations", 0, "bbox"], [1, 2, 1e400, 4]), "annotations[0].bbox", "4 finite"),
    ("bbox zero width", _set(["annotations", 0, "bbox"], [1, 2, 0, 4]), "annotations[0].bbox", "must be > 0"),
    ("bbox negative height", _set(["annotations", 0, "bbox"], [1, 2, 3, -4]), "annotations[0].bbox", "must be > 0"),
    ("bbox outside", _set(["annotations", 0, "bbox"], [35, 2, 8, 4]), "annotations[0].bbox", "leaves its 40x30"),
    ("bbox above", _set(["annotations", 0, "bbox"], [3, -1.5, 8, 4]), "annotations[0].bbox", "by more than 1 px"),
    ("area negative", _set(["annotations", 0, "area"], -1), "annotations[0].area", "finite number >= 0"),
    ("iscrowd 2", _set(["annotations", 0, "iscrowd"], 2), "annotations[0].iscrowd", "must be 0 or 1"),
    ("segmentation a string", _set(["annotations", 0, "segmentation"], "x"), "annotations[0].segmentation", "RLE"),
    ("absolute file_name", _set(["images", 0, "file_name"], "/etc/passwd"), "images[0].file_name", "is absolute"),
    ("escaping file_name", _set(["images", 0, "file_name"], "../a.png"), "images[0].file_name", "outside the image"),
    ("missing image file", _set(["images", 0, "file_name"], "gone.png"), "images[0].file_name", "not found"),
    ("size mismatch", _set(["images", 0, "width"], 41), "images[0]", "is 40x30 px but the entry says 41x30"),
]


@pytest.mark.parametrize("label, mutate, field, words", RULES, ids=[r[0] for r in RULES])
def test_each_rule_names_file_field_and_reason(tiny_set, label, mutate, field, words):
    json_path, images = tiny_set
    coco = tiny_coco()
    mutate(coco)
    json_path.write_text(json.dumps(coco))
    before = _files(json_path.parent)
    with pytest.raises(DatasetError) as info:
        load_dataset(json_path, images)
    message = str(info.value)
    assert message.startswith(f"{json_path}: {field}:"), message
    assert words in message
    assert info.value.path == field
    assert _files(json_path.parent) == before


def test_malformed_json_names_line_and_column(tmp_path):
    path = tmp_path / "bad.json"
    path.write_text('{"images": [\n  {"id": 1,}\n]}')
    with pytest.raises(DatasetError, match=r"bad.json: malformed JSON at line 2, column 12"):
        load_dataset(path, tmp_path)


def test_top_level_must_be_an_object(tmp_path):
    with pytest.raises(DatasetError, match="top level must be a JSON object, got a list"):
        load_dataset(_write(tmp_path, []), tmp_path)


def test_missing_json_file(tmp_path):
    with pytest.raises(DatasetError, match="file not found"):
        load_dataset(tmp_path / "nope.json")


def test_symlink_out_of_the_image_folder_is_refused(tiny_set, tmp_path_factory):
    json_path, images = tiny_set
    outside = tmp_path_factory.mktemp("outside")
    write_png(outside / "secret.png", 40, 30)
    os.symlink(outside / "secret.png", images / "link.png")
    coco = tiny_coco()
    coco["images"][0]["file_name"] = "link.png"
    json_path.write_text(json.dumps(coco))
    with pytest.raises(DatasetError, match=r"images\[0\].file_name: 'link.png' resolves outside"):
        load_dataset(json_path, images)


def test_empty_and_unreadable_images(tiny_set):
    json_path, images = tiny_set
    (images / "a.png").write_bytes(b"")
    with pytest.raises(DatasetError, match=r"images\[0\].file_name: image file .*a.png is empty"):
        load_dataset(json_path, images)
    (images / "a.png").write_bytes(b"not a png at all")
    with pytest.raises(DatasetError, match=r"images\[0\].file_name: image file .*a.png cannot be read"):
        load_dataset(json_path, images)


def test_clipping_is_explicit_and_warns_per_box(tiny_set):
    json_path, images = tiny_set
    coco = tiny_coco()
    coco["annotations"][0]["bbox"] = [35, 2, 8, 4]
    coco["annotations"][1]["bbox"] = [-3, 4, 8, 6]
    json_path.write_text(json.dumps(coco))
    with pytest.warns(DatasetWarning) as record:
        data = load_dataset(json_path, images, clip_boxes=True)
    assert len(record) == 2
    assert "annotations[0].bbox" in str(record[0].message)
    assert data.scenes[0].annotations[0].bbox == (35.0, 2.0, 5.0, 4.0)
    assert data.scenes[0].annotations[1].bbox == (0.0, 4.0, 5.0, 6.0)


def test_one_pixel_tolerance_keeps_the_box_as_given(tiny_set):
    json_path, images = tiny_set
    coco = tiny_coco()
    coco["annotations"][0]["bbox"] = [-0.5, 0, 40.9, 30.5]
    json_path.write_text(json.dumps(coco))
    assert load_dataset(json_path, images).scenes[0].annotations[0].bbox == (-0.5, 0.0, 40.9, 30.5)


# --- round trip and the reference reader ------------------------------------------------------------


def test_round_trip_keeps_every_key(tiny_set, tmp_path):
    json_path, images = tiny_set
    data = load_dataset(json_path, images)
    out = tmp_path / "out" / "copy.json"
    save_dataset(data, out)
    assert json.loads(out.read_text()) == tiny_coco()
    again = load_dataset(out, images)
    assert to_coco(again) == to_coco(data)
    assert [p.name for p in out.parent.iterdir()] == ["copy.json"]  # no temporary file left behind


def test_failed_save_leaves_the_old_file(tiny_set, tmp_path):
    json_path, images = tiny_set
    data = load_dataset(json_path, images)
    out = tmp_path / "copy.json"
    out.write_text("old")
    broken = Dataset(data.scenes, data.categories, images, extra={"bad": float("nan")})
    with pytest.raises(ValueError):
        save_dataset(broken, out)
    assert out.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".copy")) == []


def test_agrees_with_pycocotools(tiny_set):
    # Reference reader: pycocotools.coco.COCO (cocodataset/cocoapi), the COCO project's own API.
    json_path, images = tiny_set
    data = load_dataset(json_path, images)
    ref = COCO(str(json_path))
    assert sorted(ref.getImgIds()) == sorted(s.id for s in data.scenes)
    assert sorted(ref.getCatIds()) == sorted(c.id for c in data.categories)
    for scene in data.scenes:
        ref_anns = ref.loadAnns(ref.getAnnIds(imgIds=[scene.id]))
        assert len(ref_anns) == len(scene.annotations)
        ours_sorted = sorted(scene.annotations, key=lambda a: a.id)
        for ours, theirs in zip(ours_sorted, sorted(ref_anns, key=lambda a: a["id"]), strict=True):
            assert list(ours.bbox) == pytest.approx(theirs["bbox"])
            assert ours.category_id == theirs["category_id"]
            assert ours.iscrowd == theirs["iscrowd"]
            assert ours.area == pytest.approx(theirs["area"])


def test_segmentations_survive_for_pycocotools_masks(tiny_set, tmp_path):
    # pycocotools.annToMask decodes both polygon and RLE segmentations of the saved file.
    json_path, images = tiny_set
    out = tmp_path / "copy.json"
    save_dataset(load_dataset(json_path, images), out)
    ref = COCO(str(out))
    polygon = ref.annToMask(ref.loadAnns([11])[0])
    rle = ref.annToMask(ref.loadAnns([12])[0])
    assert polygon.shape == (30, 40) and 30 <= polygon.sum() <= 60
    assert rle.sum() == 1200


# --- pixels -----------------------------------------------------------------------------------------


@pytest.mark.parametrize("mode", ["L", "LA", "RGBA", "P", "CMYK", "RGB"])
def test_image_modes_load_as_rgb(tmp_path, mode):
    rgb = np.zeros((6, 8, 3), dtype=np.uint8)
    rgb[:, :4] = (200, 30, 10)
    img = Image.fromarray(rgb).convert(mode)
    suffix = ".jpg" if mode == "CMYK" else ".png"
    path = tmp_path / f"img{suffix}"
    img.save(path, quality=100) if suffix == ".jpg" else img.save(path)
    coco = {"images": [{"id": 1, "file_name": path.name, "width": 8, "height": 6}], "annotations": [], "categories": []}
    scene = load_dataset(_write(tmp_path, coco), tmp_path).scenes[0]
    pixels = scene.load_rgb()
    assert pixels.shape == (6, 8, 3) and pixels.dtype == np.uint8
    expected = np.asarray(img.convert("RGB"))
    assert np.abs(pixels.astype(int) - expected.astype(int)).max() <= 2


def test_sixteen_bit_grey_keeps_the_high_byte(tmp_path):
    grey = np.array([[0, 256, 65535, 4096]], dtype=np.uint16)
    Image.fromarray(grey).save(tmp_path / "g.png")
    assert Image.open(tmp_path / "g.png").mode.startswith("I")
    coco = {"images": [{"id": 1, "file_name": "g.png", "width": 4, "height": 1}], "annotations": [], "categories": []}
    pixels = load_dataset(_write(tmp_path, coco), tmp_path).scenes[0].load_rgb()
    assert pixels[0, :, 0].tolist() == [0, 1, 255, 16]
    assert (pixels[..., 0] == pixels[..., 2]).all()


def test_exif_rotated_jpeg_loads_upright(tmp_path):
    stored = np.zeros((10, 20, 3), dtype=np.uint8)
    stored[:, :10] = 255  # left half white as stored
    exif = Image.Exif()
    exif[0x0112] = 6  # EXIF orientation 6: rotate 90 degrees clockwise to display (EXIF 2.32, CIPA DC-008)
    Image.fromarray(stored).save(tmp_path / "r.jpg", exif=exif, quality=100)
    coco = {"images": [{"id": 1, "file_name": "r.jpg", "width": 10, "height": 20}], "annotations": [], "categories": []}
    pixels = load_dataset(_write(tmp_path, coco), tmp_path).scenes[0].load_rgb()
    assert pixels.shape == (20, 10, 3)
    assert pixels[:10].mean() > 200 and pixels[10:].mean() < 50  # stored left half is now on top
    wrong = copy.deepcopy(coco)
    wrong["images"][0].update(width=20, height=10)
    with pytest.raises(DatasetError, match="is 10x20 px but the entry says 20x10"):
        load_dataset(_write(tmp_path, wrong), tmp_path)


def test_pixels_are_read_lazily(tiny_set, monkeypatch):
    json_path, images = tiny_set
    calls = []
    monkeypatch.setattr(Image.Image, "load", lambda self: calls.append(1))
    data = load_dataset(json_path, images)
    assert calls == []
    assert data.scenes[0].path == images / "a.png"


# --- fuzz: arbitrary JSON is a Dataset or a DatasetError, nothing else --------------------------------

_json = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 50) | st.floats(allow_nan=True) | st.text(max_size=6),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=10), inner, max_size=4),
    max_leaves=25,
)
_near_coco = st.fixed_dictionaries(
    {
        "images": st.lists(
            st.fixed_dictionaries(
                {"id": st.integers(0, 3) | _json, "file_name": st.sampled_from(["a.png", "../x", "/a", ""]) | _json},
                optional={"width": st.integers(-1, 50) | _json, "height": st.integers(-1, 50) | _json},
            ),
            max_size=3,
        )
        | _json,
        "annotations": st.lists(
            st.fixed_dictionaries(
                {"id": st.integers(0, 3), "image_id": st.integers(0, 3), "category_id": st.integers(0, 3)},
                optional={
                    "bbox": st.lists(st.floats(-5, 60) | _json, min_size=3, max_size=5) | _json,
                    "area": _json,
                    "iscrowd": _json,
                    "segmentation": _json,
                },
            ),
            max_size=3,
        )
        | _json,
        "categories": st.lists(
            st.fixed_dictionaries({"id": st.integers(0, 3) | _json, "name": st.sampled_from(["car", "van"]) | _json}),
            max_size=3,
        )
        | _json,
    }
)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=_json | _near_coco)
def test_fuzz_any_json_is_a_dataset_or_a_dataset_error(tiny_set, raw):
    _, images = tiny_set
    try:
        result = parse_dataset(raw, images)
    except DatasetError as exc:
        assert str(exc)
    else:
        assert isinstance(result, Dataset)
        json.dumps(to_coco(result))


def test_saved_files_get_the_usual_mode_not_owner_only(tiny_set, tmp_path):
    json_path, images = tiny_set
    out = tmp_path / "copy.json"
    save_dataset(load_dataset(json_path, images), out)
    umask = os.umask(0)
    os.umask(umask)
    assert out.stat().st_mode & 0o777 == 0o666 & ~umask
