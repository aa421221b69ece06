"""The restyle stage: conditions rendered on real scenes, labels kept true, invisible objects handled."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from pipeline.dataset import load_dataset
from pipeline.errors import RecipeError
from pipeline.filters import FilterLimits, focal_from_fov
from pipeline.geometry import GroundModel, fit_ground
from pipeline.judge import judge
from pipeline.plan import Job
from pipeline.recipe import STAGE_OPTIONS, StageSpec, load_recipe
from pipeline.runner import run_recipe
from pipeline.stages import Candidate, Failure, StageContext, restyle, run

from .conftest import SEED_SCENES
from .fakes import AlwaysVerifier, BlockGenerator, fake_context


def spec(target: str = "tractor", **options) -> StageSpec:
    values = {k: default for k, (_, default) in STAGE_OPTIONS["restyle"].items()}
    values.update(options)
    return StageSpec(0, "restyle", target, 1, values)


def context(dataset, ground) -> StageContext:
    return fake_context(dataset, ground)


# --------------------------------------------------------------------------------------------------
# a small scene whose distances are known exactly


SKY, GROUND = (180, 200, 230), (90, 100, 80)
HORIZON = 40.0


@pytest.fixture
def known_scene(tmp_path: Path):
    """160x96 frame, horizon at row 40: a near tractor, a far car, a near van barely darker than the grass."""
    image = np.zeros((96, 160, 3), np.uint8)
    image[:40] = SKY
    image[40:] = GROUND
    image[60:90, 60:90] = (30, 30, 30)  # tractor, bottom row 90
    image[41:45, 100:106] = (20, 20, 20)  # car, bottom row 45
    image[70:85, 20:40] = (86, 96, 76)  # van, bottom row 85, Weber contrast about 0.08 on the grass
    (tmp_path / "images" / "surfaces").mkdir(parents=True)
    Image.fromarray(image).save(tmp_path / "images" / "a.png")
    road = np.zeros((96, 160), np.uint8)
    road[41:, 50:110] = 255
    Image.fromarray(road).save(tmp_path / "images" / "surfaces" / "a.png")
    boxes = {4: [60, 60, 30, 30], 1: [100, 41, 6, 4], 2: [20, 70, 20, 15]}
    coco = {
        "images": [{"id": 1, "file_name": "a.png", "width": 160, "height": 96, "drivable_mask": "surfaces/a.png"}],
        "annotations": [
            {"id": 10 + c, "image_id": 1, "category_id": c, "bbox": b, "area": b[2] * b[3], "iscrowd": 0}
            for c, b in boxes.items()
        ],
        "categories": [
            {"id": i + 1, "name": n} for i, n in enumerate(("car", "van", "bus", "tractor", "works_trailer"))
        ],
    }
    (tmp_path / "set.json").write_text(json.dumps(coco))
    dataset = load_dataset(tmp_path / "set.json")
    ground = GroundModel(horizon_row=HORIZON, classes={}, camera_height_m=1.5, image_width=160, image_height=96)
    return dataset, context(dataset, ground)


def restyled(ctx, stage: StageSpec, scene_index: int = 0, seed: int = 5) -> Candidate | Failure:
    return run(Job(0, 0, seed, 0, ((scene_index, -1),)), 0, stage, ctx)


def test_an_object_beyond_the_visibility_leaves_the_labels(known_scene):
    dataset, ctx = known_scene
    car_distance = focal_from_fov(160) * 1.5 / (45 - HORIZON)  # Hartley & Zisserman: Z = f h / (v - v_h)
    visibility = 30.0
    assert car_distance > visibility  # t < 0.05: beyond the MOR, invisible by the WMO/CIE definition
    out = restyled(ctx, spec(condition="fog", visibility_m=visibility))
    assert isinstance(out, Candidate)
    assert [a.id for a in out.kept] == [14, 12]
    dropped = {a.id: why for a, why in out.dropped}
    assert set(dropped) == {11}
    car = next(v for v in out.details["visibility"] if v["annotation_id"] == 11)
    assert car["transmission"] == pytest.approx(math.exp(-math.log(20) * car_distance / visibility), abs=1e-4)
    assert car["transmission"] < 0.05 and "transmission" in dropped[11]
    # the faint van stays: the grass behind it is farther, so fog lifts it more than the van
    van = next(v for v in out.details["visibility"] if v["annotation_id"] == 12)
    assert van["contrast"] > van["contrast_clear"]
    assert out.details["beta_per_m"] == pytest.approx(math.log(20) / visibility, rel=1e-4)
    # nothing was generated: no seam, no geometric check; the judge has nothing to object to
    assert not out.changed.any() and out.checked == ()
    assert judge(out, ctx) == []


def test_an_object_whose_measured_contrast_falls_under_five_percent_leaves(known_scene):
    dataset, ctx = known_scene
    car_distance = focal_from_fov(160) * 1.5 / (45 - HORIZON)
    # t = 0.06 at the car: inside the MOR, but its contrast against the sky and far ground is C0 t < 0.05
    visibility = -math.log(20) * car_distance / math.log(0.06)
    out = restyled(ctx, spec(condition="fog", visibility_m=visibility))
    car = next(v for v in out.details["visibility"] if v["annotation_id"] == 11)
    assert car["transmission"] == pytest.approx(0.06, abs=1e-3)
    assert car["contrast"] < 0.05 <= car["contrast_clear"]
    assert [a.id for a, _ in out.dropped] == [11]


def test_invisible_objects_can_stay_as_crowd_regions(known_scene):
    dataset, ctx = known_scene
    out = restyled(ctx, spec(condition="fog", visibility_m=30.0, keep_invisible_as_crowd=True))
    assert isinstance(out, Candidate) and out.dropped == ()
    crowd = {a.id: a.iscrowd for a in out.kept}
    assert crowd == {11: 1, 12: 0, 14: 0}
    original = {a.id: a for a in dataset.scenes[0].annotations}
    assert all(a.bbox == original[a.id].bbox for a in out.kept)
    positives = [a.bbox for a in out.kept if not a.iscrowd] + [n.bbox for n in out.new]
    assert positives == [original[14].bbox, original[12].bbox]  # crowd: no positive


def test_clear_air_keeps_every_label(known_scene):
    dataset, ctx = known_scene
    out = restyled(ctx, spec(condition="fog", visibility_m=5000.0))
    assert out.kept == dataset.scenes[0].annotations and out.dropped == ()


def test_a_scene_whose_target_vanishes_fails(known_scene):
    dataset, ctx = known_scene
    out = restyled(ctx, spec("car", condition="fog", visibility_m=30.0))
    assert isinstance(out, Failure) and out.filter == "visibility"


def test_night_lights_the_vehicles(known_scene):
    dataset, ctx = known_scene
    out = restyled(ctx, spec(condition="night"))
    clear = dataset.scenes[0].load_rgb()
    assert out.image.mean() < 0.5 * clear.mean()
    # the tractor's centre is left of the image centre: oncoming, so white head lamps near its lower corners
    row, col = int(60 + 0.72 * 30), int(60 + 0.15 * 30)
    lamp = out.image[row - 1 : row + 2, col - 1 : col + 2].reshape(-1, 3).mean(axis=0)
    assert lamp.min() > 150
    assert out.image[65, 75].max() < 60  # the body between the lamps stays dark
    assert out.kept == dataset.scenes[0].annotations


# --------------------------------------------------------------------------------------------------
# the seed scenes


@pytest.fixture(scope="module")
def seeds():
    dataset = load_dataset(SEED_SCENES / "train.json")
    return dataset, context(dataset, fit_ground(dataset))


def test_eligible_scenes_hold_the_target(seeds):
    dataset, _ = seeds
    tractor = dataset.category_by_name("tractor").id
    found = restyle.eligible(dataset, spec(condition="fog"), FilterLimits())
    expected = {i for i, s in enumerate(dataset.scenes) if any(a.category_id == tractor for a in s.annotations)}
    assert {i for i, _ in found} == expected and all(j == -1 for _, j in found)


@pytest.mark.parametrize(
    "options",
    [
        {"condition": "fog", "visibility_m": 150.0},
        {"condition": "rain", "rain_mm_per_h": 50.0},
        {"condition": "snow", "snow_intensity": 0.7},
        {"condition": "dusk"},
        {"condition": "night"},
    ],
)
def test_conditions_keep_labels_except_the_dropped(seeds, options):
    dataset, ctx = seeds
    index = restyle.eligible(dataset, spec(condition="fog"), FilterLimits())[0][0]
    scene = dataset.scenes[index]
    out = restyled(ctx, spec(**options), index)
    assert isinstance(out, Candidate)
    assert out.image.shape == scene.load_rgb().shape and out.image.dtype == np.uint8
    assert np.abs(out.image.astype(int) - scene.load_rgb()).mean() > 5  # the condition shows
    dropped = [a for a, _ in out.dropped]
    assert sorted(a.id for a in (*out.kept, *dropped)) == sorted(a.id for a in scene.annotations)
    assert all(a in scene.annotations for a in out.kept)  # unchanged boxes, classes, ids
    if options["condition"] in ("rain", "dusk", "night"):
        assert out.dropped == ()
    assert out.details["condition"] == options["condition"]
    again = restyled(ctx, spec(**options), index)
    assert np.array_equal(again.image, out.image)  # one seed, one image


def test_recipe_requires_a_known_condition(tmp_path):
    base = f'[run]\nname = "r"\ndataset = "{SEED_SCENES / "train.json"}"\nmodel = "m"\noutput = "out"\n'
    path = tmp_path / "r.toml"
    path.write_text(base + '[[stage]]\nkind = "restyle"\nclass = "tractor"\ncount = 1\n')
    with pytest.raises(RecipeError, match="condition"):
        load_recipe(path)
    # a learned restyle needs condition labels no generator supports yet: not offered
    path.write_text(base + '[[stage]]\nkind = "restyle"\nclass = "tractor"\ncount = 1\ncondition = "learned"\n')
    with pytest.raises(RecipeError, match="must be one of"):
        load_recipe(path)


def test_run_writes_restyled_images_with_condition_provenance(tmp_path):
    recipe_path = tmp_path / "fog.toml"
    recipe_path.write_text(
        f'[run]\nname = "fog"\nseed = 1\ndataset = "{SEED_SCENES / "train.json"}"\nmodel = "{tmp_path / "none"}"\n'
        'output = "out"\nsteps = 2\n\n[[stage]]\nkind = "restyle"\nclass = "works_trailer"\ncount = 3\n'
        'condition = "fog"\nvisibility_m = 80.0\n'
    )
    generator = BlockGenerator()
    summary = run_recipe(load_recipe(recipe_path), generator=generator, verifier=AlwaysVerifier())
    assert summary.accepted == 3 and generator.calls == []  # physically based: nothing inpainted
    labels = json.loads((tmp_path / "out" / "labels.json").read_text())
    source = {s.id: s for s in load_dataset(SEED_SCENES / "train.json").scenes}
    for image in labels["images"]:
        prov = image["rarefill"]
        assert prov["stage"]["kind"] == "restyle" and prov["details"]["visibility_m"] == 80.0
        assert prov["details"]["beta_per_m"] == pytest.approx(math.log(20) / 80.0, rel=1e-4)
        real = {a.id: a for a in source[prov["source"]["image_id"]].annotations}
        dropped = {d["annotation_id"] for d in prov["details"].get("dropped", [])}
        written = [a for a in labels["annotations"] if a["image_id"] == image["id"]]
        kept_ids = {a["rarefill"]["source_annotation_id"] for a in written}
        assert kept_ids | dropped == set(real) and not kept_ids & dropped
        for a in written:
            assert a["bbox"] == list(real[a["rarefill"]["source_annotation_id"]].bbox)


# --------------------------------------------------------------------------------------------------
# distances: the ground plane, a given depth map, silhouettes


def test_fog_on_the_given_road_follows_koschmieder(known_scene):
    # Koschmieder 1924 (via Sakaridis et al., IJCV 2018): I = J t + A (1 - t), t = exp(-beta d), with
    # beta = ln(20) / V (WMO-No. 8: the MOR is where contrast falls to 5%) and d = f h / (v - v_h) on the
    # ground plane (Hartley & Zisserman 2004). Invert it per pixel on the road column and compare.
    dataset, ctx = known_scene
    visibility = 60.0
    out = restyled(ctx, spec(condition="fog", visibility_m=visibility))
    clear = dataset.scenes[0].load_rgb()
    a = np.array(out.details["airlight_rgb"]) / 255.0

    def decode(v):
        return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)  # IEC 61966-2-1

    focal = focal_from_fov(160)
    for row in (50, 60, 75, 95):
        z = focal * 1.5 / (row + 0.5 - HORIZON)
        expected = math.exp(-math.log(20) * z / visibility)
        j, i = decode(clear[row, 52] / 255.0), decode(out.image[row, 52] / 255.0)
        t = (i - decode(a)) / (j - decode(a))
        assert float(np.median(t)) == pytest.approx(expected, abs=0.02)


def _with_depth(tmp_path, depth: np.ndarray, mode: str = "I;16"):
    source = json.loads((tmp_path / "set.json").read_text())
    if mode == "npy":
        np.save(tmp_path / "images" / "d.npy", depth)
    else:
        Image.fromarray(depth.astype(np.uint16 if mode == "I;16" else np.uint8)).save(tmp_path / "images" / "d.png")
    source["images"][0]["depth_map"] = "d.npy" if mode == "npy" else "d.png"
    (tmp_path / "set.json").write_text(json.dumps(source))
    return load_dataset(tmp_path / "set.json")


def test_a_given_depth_map_is_used_exactly(known_scene, tmp_path):
    from pipeline.stages.restyle_scene import scene_geometry
    from pipeline.weather.distance import Source

    dataset, ctx = known_scene
    depth = np.zeros((96, 160), np.int64)
    depth[40:] = np.linspace(65_000, 2_500, 56).astype(np.int64)[:, None]  # 65 m to 2.5 m, in millimetres
    depth[60:90, 60:90] = 7_300  # the tractor at 7.3 m whatever its footprint says
    depth[45, :10] = 65_535  # beyond the PNG's range: left to the estimate
    data = _with_depth(tmp_path, depth)
    ctx2 = context(data, ctx.ground)
    geometry = scene_geometry(data.scenes[0].load_rgb(), data.scenes[0], ctx2)
    measured = (depth > 0) & (depth < 65_535)
    assert np.array_equal(geometry.distance[measured], depth[measured] / 1000.0)
    assert np.all(geometry.distance_map.source[measured] == Source.MEASURED)
    assert np.all(geometry.distance_map.source[~measured] != Source.MEASURED)  # the sky: estimated
    metres = np.where(depth > 0, depth * 0.004, np.nan)  # up to 260 m: a float .npy has no range limit
    data_npy = _with_depth(tmp_path, metres, mode="npy")
    found = scene_geometry(data_npy.scenes[0].load_rgb(), data_npy.scenes[0], context(data_npy, ctx.ground))
    assert np.array_equal(found.distance[depth > 0], metres[depth > 0])
    out = restyled(ctx2, spec(condition="fog", visibility_m=50.0))
    tractor = next(v for v in out.details["visibility"] if v["annotation_id"] == 14)
    assert tractor["contrast"] > 0.05


def test_a_bad_depth_map_is_refused_naming_the_key(known_scene, tmp_path):
    from pipeline.errors import DatasetError
    from pipeline.stages.restyle_scene import read_depth_map

    data = _with_depth(tmp_path, np.full((96, 160), 9, np.uint8), mode="L")
    with pytest.raises(DatasetError, match="depth_map.*16-bit"):
        read_depth_map(data.scenes[0], data)
    data = _with_depth(tmp_path, np.full((50, 160), 9000))
    with pytest.raises(DatasetError, match="160x50 px but the image is 160x96"):
        read_depth_map(data.scenes[0], data)


def test_the_night_sky_is_no_brighter_than_the_ground(known_scene):
    # a day sky under the low-light curve would stay the brightest thing in the frame; a night sky is not
    dataset, ctx = known_scene
    out = restyled(ctx, spec(condition="night"))
    sky, grass = out.image[5:35, 120:155].mean(), out.image[50:60, 120:155].mean()
    clear = dataset.scenes[0].load_rgb()
    assert clear[5:35, 120:155].mean() > 1.5 * clear[50:60, 120:155].mean()
    assert sky <= grass + 3


def test_restyle_preview_writes_input_distance_and_output(known_scene, tmp_path):
    from typer.testing import CliRunner

    from pipeline.cli import app

    out = tmp_path / "preview.png"
    args = ["restyle-preview", str(tmp_path / "set.json"), "--image", "a.png", "--condition", "fog"]
    result = CliRunner().invoke(app, [*args, "--visibility", "80", "--out", str(out), "--panel-width", "200"])
    assert result.exit_code == 0, result.output
    sheet = np.asarray(Image.open(out))
    assert sheet.shape[1] == 3 * (200 + 4)  # input | distance | fog, each with a 4 px gutter
    assert sheet.shape[0] == 22 + round(96 * 200 / 160) + 4  # label bar, panel, gutter
    bad = CliRunner().invoke(app, ["restyle-preview", str(tmp_path / "set.json"), "--image", "nope.png"])
    assert bad.exit_code == 2 and "nope.png" in bad.output
    bad = CliRunner().invoke(app, ["restyle-sheet", str(tmp_path / "set.json"), "--conditions", "fog:3"])
    assert bad.exit_code == 2 and "fog:3" in bad.output
