"""The realism audit, checked on controls built from the real crops shipped in seed_scenes/.

Controls (no invented figures): two halves of the same real crops must look alike; blurred or
hue-rotated copies of the same crops must be told apart; a "run" of one repeated crop must cover little
of the real variety; a "run" that copies training crops must be flagged as near-copies. Statistics are
checked against published worked examples.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import replace
from pathlib import Path
from urllib.parse import unquote

import cv2
import numpy as np
import pytest
from pycocotools import mask as mask_utils
from typer.testing import CliRunner

from pipeline.audit import audit_run, read_audit
from pipeline.audit.core import torch_threads
from pipeline.audit.features import coverage, embed, knn_radii, near_copies, precision_recall, train_feature_net
from pipeline.audit.instances import by_class, check_heldout, crop_instances, real_instances, synthetic_instances
from pipeline.audit.repeated import LOG_SCALE_SD, SHIFT_SD, exemplar_copies, jittered
from pipeline.audit.sharpness import compare_sharpness, edge_strength, silhouette_fit
from pipeline.audit.two_sample import binomial_tail, group_folds, two_sample_test, wilson_interval
from pipeline.cli import app
from pipeline.dataset import load_dataset, parse_dataset
from pipeline.errors import DatasetError, RunError, UsageError
from pipeline.provenance import file_sha256
from pipeline.report import write_report

from .conftest import SEED_SCENES

# Small settings keep each control to a few seconds; the controls are strong enough for them.
FAST = {"folds": 4, "epochs": 30, "repeats": 1}


@pytest.fixture(autouse=True, scope="module")
def one_thread():
    # One torch thread: on a shared 2-core machine two threads wait on each other (10x slower, measured).
    with torch_threads(1):
        yield


@pytest.fixture(scope="module")
def test_crops():
    return {name: crop_instances(items) for name, items in by_class(real_instances(_seed("test"))).items()}


@pytest.fixture(scope="module")
def feature_net():
    return train_feature_net(_seed("train"), steps=150, rng=0)


def _seed(split: str):
    return load_dataset(SEED_SCENES / f"{split}.json")


# --------------------------------------------------------------------------------------------------
# statistics against published values


def test_wilson_interval_matches_newcombe_worked_examples():
    # Newcombe, "Two-sided confidence intervals for the single proportion", Statistics in Medicine 17,
    # 1998, Table I, method 3 (score interval without continuity correction), from memory.
    for successes, trials, low, high in ((81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611)):
        got = wilson_interval(successes, trials)
        assert got == pytest.approx((low, high), abs=6e-5)


def test_binomial_tail_is_exact():
    assert binomial_tail(2, 2) == 0.25
    assert binomial_tail(8, 10) == (45 + 10 + 1) / 1024  # C(10,8) + C(10,9) + C(10,10) over 2^10
    assert binomial_tail(0, 7) == 1.0


def test_statistics_refuse_bad_counts():
    with pytest.raises(ValueError, match="successes"):
        wilson_interval(5, 4)
    with pytest.raises(ValueError, match="confidence"):
        wilson_interval(1, 4, confidence=1.0)
    with pytest.raises(ValueError, match="successes"):
        binomial_tail(-1, 4)


def test_knn_radii_and_precision_recall_by_hand():
    line = np.array([[0.0], [1.0], [3.0], [7.0]])
    assert knn_radii(line, k=1).tolist() == [1.0, 1.0, 2.0, 4.0]
    # fake 0.5 lies within radius 1 of real 0; fake 20 lies in no real ball (largest radius 4 around 7).
    fake = np.array([[0.5], [20.0], [2.0], [30.0]])
    precision, recall = precision_recall(line, fake, k=1)
    assert precision == 0.5
    # fake radii (k=1): 0.5 -> 1.5, 2 -> 1.5, 20 -> 10, 30 -> 10; real 0, 1, 3 are inside, 7 is not.
    assert recall == 0.75
    with pytest.raises(ValueError, match="more than k"):
        knn_radii(line[:3], k=3)


# --------------------------------------------------------------------------------------------------
# controls of the two-sample test (issue point 3)


def test_real_against_real_covers_chance(test_crops):
    crops = test_crops["car"].test
    order = np.random.default_rng(1).permutation(len(crops))
    half = len(crops) // 2
    result = two_sample_test(crops[order[:half]], crops[order[half : 2 * half]], rng=0, **FAST)
    assert result.trials == 2 * half
    assert result.low <= 0.5 <= result.high


def _hue_rotated(crops: np.ndarray, degrees: int) -> np.ndarray:
    hsv = np.stack([cv2.cvtColor(c, cv2.COLOR_RGB2HSV) for c in crops])
    hsv[..., 0] = (hsv[..., 0].astype(np.int32) + degrees // 2) % 180  # OpenCV hue runs 0..179 for 0..358 deg
    return np.stack([cv2.cvtColor(c, cv2.COLOR_HSV2RGB) for c in hsv])


@pytest.mark.parametrize("change", ["blur", "hue"])
def test_real_against_changed_copies_is_told_apart(test_crops, change):
    crops = test_crops["tractor"].test
    if change == "blur":
        changed = np.stack([cv2.GaussianBlur(c, (0, 0), 2.0) for c in crops])
    else:
        changed = _hue_rotated(crops, 90)
    result = two_sample_test(crops, changed, rng=0, **FAST)
    assert result.accuracy > 0.9
    assert result.p_value < 1e-6


def test_two_sample_test_is_deterministic_and_checks_input(test_crops):
    crops = test_crops["works_trailer"].test
    a = two_sample_test(crops[:16], crops[16:32], rng=3, folds=2, epochs=2)
    b = two_sample_test(crops[:16], crops[16:32], rng=3, folds=2, epochs=2)
    assert a.to_dict() == b.to_dict()
    assert np.array_equal(a.score_b, b.score_b)
    with pytest.raises(ValueError, match="at least 5 crops"):
        two_sample_test(crops[:4], crops[4:20], rng=0)
    with pytest.raises(ValueError, match="one crop geometry"):
        two_sample_test(crops, crops[:, :16, :16], rng=0)
    with pytest.raises(ValueError, match="uint8"):
        two_sample_test(crops.astype(np.float32), crops, rng=0)


def test_repeats_average_tests_on_new_subsamples(test_crops):
    crops = test_crops["works_trailer"].test
    small, large = crops[:10], crops[10:40]
    one = two_sample_test(small, large, rng=3, folds=2, epochs=2)
    three = two_sample_test(small, large, rng=3, folds=2, epochs=2, repeats=3)
    # The first repeat is the single test (same stream of random numbers).
    assert three.accuracies[0] == one.accuracy and len(three.accuracies) == 3
    assert three.accuracy == pytest.approx(np.mean(three.accuracies))
    assert three.trials == one.trials == 20
    # Each repeat draws 10 of the 30 larger-side crops anew: together they use more than one test does.
    assert len(one.index_b) == 10 and len(three.index_b) > 10
    assert len(three.score_b) == len(three.index_b)
    assert three.to_dict()["repeats"] == list(three.accuracies)
    with pytest.raises(ValueError, match="repeats >= 1"):
        two_sample_test(small, large, rng=0, repeats=0)


def test_held_out_exemplars_separate_repetition_from_appearance(test_crops):
    # Twelve real cars, each repeated five times, against sixty other real cars: every crop is real, so
    # only the repetition differs. The plain test learns the twelve and tells them apart; with each car's
    # copies held out together (grouped cross-validation, common practice) the network meets only cars it
    # has never seen, and its accuracy falls to about chance.
    cars = test_crops["car"].test
    order = np.random.default_rng(5).permutation(len(cars))
    assert len(cars) >= 72
    repeated = np.repeat(cars[order[60:72]], 5, axis=0)
    groups = np.repeat(np.arange(12), 5).tolist()
    plain = two_sample_test(cars[order[:60]], repeated, rng=0, **FAST)
    grouped = two_sample_test(cars[order[:60]], repeated, rng=0, groups_b=groups, **FAST)
    assert plain.low > 0.5 and plain.accuracy > 0.8
    assert grouped.low <= 0.5 <= grouped.high and grouped.accuracy < plain.accuracy - 0.2
    with pytest.raises(ValueError, match="at least 4 groups"):
        two_sample_test(cars[:60], repeated, rng=0, groups_b=[g % 3 for g in groups], **FAST)
    with pytest.raises(ValueError, match="one key per crop"):
        two_sample_test(cars[:60], repeated, rng=0, groups_b=groups[:-1], **FAST)


def test_exemplar_copies_follow_the_composites():
    train = by_class(real_instances(_seed("train")))["tractor"]
    made = [replace(t, exemplar=(t.image_id, t.annotation_id), mirrored=k % 2 == 1) for k, t in enumerate(train)]
    synthetic = [made[k % 5] for k in range(15)]  # five exemplars, three composites each
    copies, mirrored = exemplar_copies(synthetic, train, np.random.default_rng(0))
    assert [(c.image_id, c.annotation_id) for c in copies] == [s.exemplar for s in synthetic]
    assert mirrored.tolist() == [s.mirrored for s in synthetic]
    assert len({c.box for c in copies}) == 15  # no two copies share a crop
    again, _ = exemplar_copies(synthetic, train, np.random.default_rng(0))
    assert [c.box for c in again] == [c.box for c in copies]
    assert exemplar_copies(synthetic, train[1:], np.random.default_rng(0)) is None  # exemplar not in train
    assert exemplar_copies([replace(synthetic[0], exemplar=None)], train, np.random.default_rng(0)) is None


def test_jitter_has_the_stated_spread():
    rng = np.random.default_rng(1)
    boxes = np.array([jittered((100.0, 50.0, 40.0, 20.0), rng) for _ in range(4000)])
    log_scale = np.log(boxes[:, 2] / 40.0)
    assert np.allclose(np.log(boxes[:, 3] / 20.0), log_scale)  # aspect kept
    shift_x = (boxes[:, 0] + boxes[:, 2] / 2 - 120.0) / 40.0
    shift_y = (boxes[:, 1] + boxes[:, 3] / 2 - 60.0) / 20.0
    assert abs(log_scale.std() - LOG_SCALE_SD) < 0.005 and abs(log_scale.mean()) < 0.005
    assert abs(shift_x.std() - SHIFT_SD) < 0.004 and abs(shift_y.std() - SHIFT_SD) < 0.004


def test_group_folds_keep_groups_whole_and_balance_the_folds():
    keys = ["a"] * 6 + ["b"] * 5 + ["c"] * 3 + ["d"] * 3 + ["e"] * 2 + ["f"]
    folds = group_folds(keys, 3, np.random.default_rng(0))
    for key in set(keys):
        assert len({int(f) for f, k in zip(folds, keys, strict=True) if k == key}) == 1
    assert sorted(np.bincount(folds, minlength=3).tolist()) == [6, 7, 7]


# --------------------------------------------------------------------------------------------------
# controls of coverage and near-copies


def test_one_repeated_crop_has_low_recall_and_high_precision(test_crops, feature_net):
    real = embed(feature_net, test_crops["tractor"].feature)
    train_tractors = crop_instances(by_class(real_instances(_seed("train")))["tractor"])
    repeated = embed(feature_net, np.repeat(train_tractors.feature[:1], 40, axis=0))
    figures = coverage(real, repeated, rng=0)
    assert figures["recall"] < 0.2
    assert figures["precision"] >= 0.9
    # The reference (real half against real half) covers far more of the variety.
    assert figures["reference_recall"] > 0.5


def test_copies_of_training_crops_are_near_copies(test_crops, feature_net):
    train_tractors = crop_instances(by_class(real_instances(_seed("train")))["tractor"])
    train = embed(feature_net, train_tractors.feature)
    held = embed(feature_net, test_crops["tractor"].feature)
    copied = near_copies(train[:10], held, train)
    assert copied["share"] == 1.0
    assert copied["nearest"].tolist() == list(range(10))
    # Held-out crops against their own 5% quantile: about 5% (3 of 45 here, the quantile interpolates).
    independent = near_copies(held, held, train)
    assert independent["share"] < 0.1


# --------------------------------------------------------------------------------------------------
# sharpness and box fit


def test_edge_strength_of_a_ramp_is_its_slope():
    ramp = np.tile((np.arange(40) * 3).astype(np.uint8)[None, :, None], (20, 1, 3))
    inner = edge_strength(ramp[:, 2:-2])
    assert inner == pytest.approx(3.0, abs=0.2)  # borders reflect, so only the inner columns are exact
    assert edge_strength(np.full((10, 10, 3), 77, np.uint8)) == 0.0


def test_blur_lowers_sharpness_in_every_band(test_crops):
    crops = test_crops["car"]
    blurred = np.array([edge_strength(cv2.GaussianBlur(c, (0, 0), 1.5)) for c in crops.test])
    plain = np.array([edge_strength(c) for c in crops.test])
    result = compare_sharpness(blurred, crops.heights, plain, crops.heights)
    counted = [band for band in result["bands"] if band["counts"]]
    assert counted and all(band["ratio"] < 1 for band in counted)
    assert 0 < result["ratio"] < 1
    few = compare_sharpness(plain[:3], crops.heights[:3], plain, crops.heights)
    assert few["ratio"] is None and not any(band["counts"] for band in few["bands"])


def test_silhouette_fit_of_a_half_filled_box():
    polygon = [[10.0, 10.0, 20.0, 10.0, 20.0, 20.0, 10.0, 20.0]]  # a 10x10 square
    fill, beyond = silhouette_fit(polygon, (10.0, 10.0, 20.0, 10.0), (64, 48))
    assert fill == pytest.approx(0.5, abs=0.03)
    assert beyond == pytest.approx(0.5, abs=0.03)
    fill, beyond = silhouette_fit(polygon, (10.0, 10.0, 10.0, 10.0), (64, 48))
    assert fill == pytest.approx(1.0, abs=0.05) and beyond == pytest.approx(0.0, abs=0.02)
    with pytest.raises(ValueError, match="empty"):
        silhouette_fit({"size": [48, 64], "counts": [64 * 48]}, (0, 0, 5, 5), (64, 48))


def test_silhouette_fit_reads_compressed_rle_as_pycocotools_writes_it():
    # The generator writes its silhouettes as compressed RLE (counts a string), pycocotools' own encoding;
    # the fit must read them as it reads polygons (pycocotools, the COCO API's reference reader).
    square = np.zeros((48, 64), dtype=np.uint8)
    square[10:20, 10:20] = 1
    rle = mask_utils.encode(np.asfortranarray(square))
    rle["counts"] = rle["counts"].decode("ascii")
    fill, beyond = silhouette_fit(rle, (10.0, 10.0, 20.0, 10.0), (64, 48))
    assert fill == pytest.approx(0.5) and beyond == pytest.approx(0.5)


# --------------------------------------------------------------------------------------------------
# which instances, leakage, the whole audit and the command


def _fake_run(folder: Path, *, split: str = "train", blur: float = 0.0) -> Path:
    """A run folder whose "synthetic" tractors are the real tractors of ``split`` (optionally blurred)."""
    source = json.loads((SEED_SCENES / f"{split}.json").read_text())
    tractor = next(c["id"] for c in source["categories"] if c["name"] == "tractor")
    keep = sorted({a["image_id"] for a in source["annotations"] if a["category_id"] == tractor})
    (folder / "images").mkdir(parents=True)
    images, annotations, manifest = [], [], []
    for image in source["images"]:
        if image["id"] not in keep:
            continue
        path = SEED_SCENES / "images" / image["file_name"]
        name = f"fake_{image['file_name']}"
        if blur:
            rgb = cv2.imread(str(path))
            cv2.imwrite(str(folder / "images" / name), cv2.GaussianBlur(rgb, (0, 0), blur))
        else:
            shutil.copy(path, folder / "images" / name)
        record = {
            "synthetic": True,
            "stage": {"index": 0, "kind": "insert", "class": "tractor"},
            "source": {"image_id": image["id"], "file_name": image["file_name"], "sha256": file_sha256(path)},
            "model": {"name": "test"},
        }
        images.append({**{k: image[k] for k in ("id", "width", "height")}, "file_name": name, "rarefill": record})
        manifest.append(
            {"job": f"s0-{image['id']:06d}", "accepted": True, "verdicts": [], "file_name": f"images/{name}"}
        )
    for a in source["annotations"]:
        if a["image_id"] in keep:
            mark = {"synthetic": a["category_id"] == tractor}
            if mark["synthetic"]:  # each "inserted" tractor names itself as its exemplar
                mark["exemplar"] = {"image_id": a["image_id"], "annotation_id": a["id"]}
            annotations.append(
                {k: a[k] for k in ("id", "image_id", "category_id", "bbox", "area")} | {"rarefill": mark}
            )
    labels = {"images": images, "annotations": annotations, "categories": source["categories"]}
    (folder / "labels.json").write_text(json.dumps(labels))
    (folder / "manifest.jsonl").write_text("".join(json.dumps(line) + "\n" for line in manifest))
    return folder


def test_synthetic_instances_follow_provenance(tmp_path):
    run = _fake_run(tmp_path / "run")
    labels = load_dataset(run / "labels.json")
    found = synthetic_instances(labels)
    assert {i.label for i in found} == {"tractor"} and len(found) == 20
    assert all(i.exemplar == (i.image_id, i.annotation_id) for i in found)
    raw = json.loads((run / "labels.json").read_text())
    raw["images"][0]["rarefill"]["stage"]["kind"] = "restyle"  # a restyled scene: all its objects count
    whole = parse_dataset(raw, run / "images")
    first = raw["images"][0]["id"]
    assert sum(1 for i in synthetic_instances(whole) if i.image_id == first) == sum(
        1 for a in raw["annotations"] if a["image_id"] == first
    )
    del raw["annotations"][0]["rarefill"]
    with pytest.raises(RunError, match="provenance"):
        synthetic_instances(parse_dataset(raw, run / "images"))


def test_heldout_that_made_the_run_is_refused(tmp_path):
    run = _fake_run(tmp_path / "run")
    labels = load_dataset(run / "labels.json")
    check_heldout(labels, _seed("test"))
    with pytest.raises(DatasetError, match="not held out"):
        check_heldout(labels, _seed("train"))


def test_audit_of_copied_training_tractors(tmp_path):
    run = _fake_run(tmp_path / "run")
    result = audit_run(run, SEED_SCENES / "test.json", seed=0, feature_steps=100, **FAST)
    tractor = result["classes"]["tractor"]
    assert list(result["classes"]) == ["tractor"]
    assert result["train"].endswith("train.json")  # found beside test.json by the source images
    assert (tractor["n_synthetic"], tractor["n_real"], tractor["n_train"]) == (20, 45, 20)
    assert tractor["two_sample"]["low"] <= 0.5 <= tractor["two_sample"]["high"]  # real against real
    unseen = tractor["unseen_exemplars"]  # 20 exemplars of one instance each: held out one by one
    assert unseen["trials"] == 40 and unseen["low"] <= 0.5 <= unseen["high"]
    repeated = tractor["repeated_exemplars"]  # each used once: jittered copies of real training tractors
    assert repeated["trials"] == 40 and repeated["low"] <= 0.5 <= repeated["high"]
    assert tractor["near_copies"]["share"] == 1.0  # they are the training crops
    assert tractor["box_fit"]["synthetic"] is None  # no silhouettes recorded
    assert 0.7 < tractor["sharpness"]["ratio"] < 1.4
    shown = tractor["examples"]["most_real"] + tractor["examples"]["least_real"]
    assert shown and all((run / e["crop"]).is_file() and (run / e["neighbour"]).is_file() for e in shown)
    assert read_audit(run) == json.loads(json.dumps(result))
    page = write_report(run).path.read_text()
    section = page[page.index('<section id="audit">') :]
    section = section[: section.index("</section>")]
    assert '<tr data-class="tractor">' in section and "test.json" in section
    sources = [part.split('"')[0] for part in section.split('src="')[1:]]
    assert len(sources) == 2 * len(shown) and all((run / unquote(src)).is_file() for src in sources)


def test_cli_audit_prints_the_table_and_refuses_bad_input(tmp_path):
    run = _fake_run(tmp_path / "run", blur=2.0)
    cli = CliRunner()
    args = ["audit", str(run), "--real", str(SEED_SCENES / "test.json"), "--folds", "4", "--epochs", "30"]
    args += ["--repeats", "2"]
    ok = cli.invoke(app, [*args, "--feature-steps", "100"])
    assert ok.exit_code == 0, ok.output
    assert "tractor" in ok.stdout and "real vs synthetic" in ok.stdout
    audit = read_audit(run)
    figures = audit["classes"]["tractor"]
    assert audit["settings"]["repeats"] == 2 and len(figures["two_sample"]["repeats"]) == 2
    assert figures["two_sample"]["accuracy"] > 0.8  # blurred real tractors are found out
    assert figures["sharpness"]["ratio"] < 0.8
    bad = cli.invoke(app, [*args, "--classes", "tractor,tank"])
    assert bad.exit_code == 2
    assert "tank" in bad.stderr and "not a class of the run" in bad.stderr
    leak = cli.invoke(app, ["audit", str(run), "--real", str(SEED_SCENES / "train.json")])
    assert leak.exit_code == 2 and "not held out" in leak.stderr
    missing = cli.invoke(app, ["audit", str(tmp_path / "nowhere"), "--real", str(SEED_SCENES / "test.json")])
    assert missing.exit_code == 2 and "not a finished rarefill run folder" in missing.stderr  # bad input


def test_audit_refuses_bad_options_and_a_missing_training_split(tmp_path):
    run = _fake_run(tmp_path / "run")
    with pytest.raises(UsageError, match="folds >= 2"):
        audit_run(run, SEED_SCENES / "test.json", folds=1)
    lonely = tmp_path / "alone" / "test.json"  # no training split beside it
    lonely.parent.mkdir()
    shutil.copy(SEED_SCENES / "test.json", lonely)
    with pytest.raises(UsageError, match="holds the run's source images") as caught:
        audit_run(run, lonely, images=SEED_SCENES / "images")
    assert "--train" in caught.value.hint
