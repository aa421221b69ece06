"""The downstream probe: COCOeval scoring, CenterNet targets and decoding, training, the experiment, the CLI.

Scoring is checked against pycocotools (the reference implementation of the COCO detection evaluation)
on cases whose AP is known by definition; targets and peaks against the definitions in CornerNet and
CenterNet; training by overfitting two seed scenes.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import load_dataset, to_coco
from pipeline.errors import UsageError
from pipeline.probe import TrainSettings, evaluate, predict, prepare, run_probe, train_detector, write_results
from pipeline.probe.decode import decode, extract_peaks
from pipeline.probe.evaluation import Evaluation, detections_to_coco
from pipeline.probe.experiment import ProbeResult, ProbeRun, parse_shares, rare_ap50
from pipeline.probe.losses import focal_loss
from pipeline.probe.results import summarise
from pipeline.probe.targets import draw_gaussian, encode_targets, gaussian_radius
from pipeline.provenance import file_sha256

from .conftest import SEED_SCENES

runner = CliRunner()
CATEGORIES = [{"id": 1, "name": "car"}, {"id": 4, "name": "tractor"}]


@pytest.fixture(autouse=True)
def one_torch_thread():
    # These networks are tiny: with two threads, a machine busy with other work spends far more time in
    # thread synchronisation than in arithmetic (measured: 2 s instead of 8 ms per step).
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def box_iou(a, b) -> float:
    ax1, ay1, bx1, by1 = a[0] + a[2], a[1] + a[3], b[0] + b[2], b[1] + b[3]
    w = max(0.0, min(ax1, bx1) - max(a[0], b[0]))
    h = max(0.0, min(ay1, by1) - max(a[1], b[1]))
    inter = w * h
    return inter / (a[2] * a[3] + b[2] * b[3] - inter)


def ground_truth() -> dict:
    """Three 100x80 images: two cars and a tractor; no instance of a third category (bus)."""
    boxes = [(1, 1, [10, 10, 30, 20]), (1, 2, [50, 40, 20, 30]), (2, 4, [5, 20, 40, 40])]
    return {
        "images": [{"id": i, "file_name": f"{i}.png", "width": 100, "height": 80} for i in (1, 2, 3)],
        "annotations": [
            {"id": k + 1, "image_id": im, "category_id": c, "bbox": b, "area": b[2] * b[3], "iscrowd": 0}
            for k, (im, c, b) in enumerate(boxes)
        ],
        "categories": [*CATEGORIES, {"id": 3, "name": "bus"}],
    }


# --------------------------------------------------------------------------------------------------
# COCOeval


def test_perfect_predictions_score_ap_one():
    # COCO detection evaluation (cocodataset.org/#detection-eval; pycocotools COCOeval): detections equal
    # to the ground truth match at every IoU threshold with full precision, so AP = AP50 = 1.
    truth = ground_truth()
    results = [{"image_id": a["image_id"], "category_id": a["category_id"], "bbox": a["bbox"], "score": 1.0}
               for a in truth["annotations"]]  # fmt: skip
    scored = evaluate(truth, results)
    assert scored.ap == pytest.approx(1.0) and scored.ap50 == pytest.approx(1.0)
    assert scored.per_class_ap50 == {"car": pytest.approx(1.0), "tractor": pytest.approx(1.0), "bus": None}
    assert truth == ground_truth()  # not changed


def test_empty_predictions_score_zero():
    # Same source: a class with instances and no detections has zero recall, so precision 0 at every
    # recall point; a class without instances is left out (-1 in COCOeval), here None.
    scored = evaluate(ground_truth(), [])
    assert scored.ap == 0.0 and scored.ap50 == 0.0
    assert scored.per_class_ap50 == {"car": 0.0, "tractor": 0.0, "bus": None}


def test_ap_averages_over_iou_thresholds():
    # COCO AP averages AP over IoU 0.50:0.05:0.95 (cocodataset.org/#detection-eval). One tractor found with
    # IoU 0.62 matches at 0.50, 0.55 and 0.60 only: its AP is 3/10, its AP50 1.
    truth = ground_truth()
    truth["annotations"] = [a for a in truth["annotations"] if a["category_id"] == 4]
    found = [5, 20, 40, 40 * 0.62]
    assert box_iou(found, [5, 20, 40, 40]) == pytest.approx(0.62)
    scored = evaluate(truth, [{"image_id": 2, "category_id": 4, "bbox": found, "score": 0.9}])
    assert scored.per_class_ap["tractor"] == pytest.approx(0.3)
    assert scored.per_class_ap50["tractor"] == pytest.approx(1.0)


# --------------------------------------------------------------------------------------------------
# targets and peaks


@pytest.mark.parametrize("size", [(10.0, 10.0), (4.0, 20.0), (30.0, 7.5), (2.0, 3.0)])
def test_gaussian_radius_keeps_the_overlap(size):
    # Law and Deng, "CornerNet", ECCV 2018, Sec. 3.2: corners moved by the radius keep IoU >= 0.7 in all three
    # cases (both inward, both outward, one each way); at the radius, the tightest case is exactly 0.7.
    h, w = size
    r = gaussian_radius(h, w, min_overlap=0.7)
    box = (0.0, 0.0, w, h)
    cases = [
        (r, r, w - 2 * r, h - 2 * r),  # both corners inward
        (-r, -r, w + 2 * r, h + 2 * r),  # both outward
        (r, r, w, h),  # shifted: one corner in, one out
    ]
    ious = [box_iou(box, case) for case in cases]
    assert min(ious) == pytest.approx(0.7, abs=1e-9)
    assert all(iou >= 0.7 - 1e-9 for iou in ious)
    assert gaussian_radius(h, w, min_overlap=0.5) > r  # a looser overlap allows a larger radius


def test_gaussian_radius_rejects_bad_input():
    with pytest.raises(ValueError, match="height and width"):
        gaussian_radius(0.0, 5.0)
    with pytest.raises(ValueError, match="min_overlap"):
        gaussian_radius(5.0, 5.0, min_overlap=1.0)


def test_draw_gaussian_is_the_size_adaptive_peak():
    # Zhou et al., "Objects as Points", 2019, Sec. 3: Y = exp(-((x - px)^2 + (y - py)^2) / (2 sigma^2)), with
    # sigma = diameter / 6 = (2r + 1) / 6 (the authors' released code, from memory).
    heatmap = np.zeros((20, 30), np.float32)
    draw_gaussian(heatmap, (12, 7), 3)
    sigma = 7 / 6
    assert heatmap[7, 12] == 1.0 and heatmap.max() == 1.0
    assert heatmap[7, 15] == pytest.approx(math.exp(-9 / (2 * sigma**2)), rel=1e-6)
    assert heatmap[5, 11] == pytest.approx(math.exp(-5 / (2 * sigma**2)), rel=1e-6)
    assert heatmap[7, 16] == 0.0 and heatmap[11, 12] == 0.0  # nothing beyond the radius
    # overlapping peaks combine by element-wise maximum; a peak at the border is clipped, not wrapped
    draw_gaussian(heatmap, (0, 0), 2)
    assert heatmap[0, 0] == 1.0 and heatmap[7, 12] == 1.0 and heatmap[19, 29] == 0.0


def test_single_peak_is_decoded_at_its_centre_with_its_size():
    # Encoding a box and decoding the encoded heads gives the box back: the Gaussian's peak (value 1) is the
    # only 3x3 local maximum, at the centre cell; size and offset complete the box (Objects as Points, Sec. 3-4).
    box = [37.0, 21.0, 22.0, 13.0]  # centre (48, 27.5) px = (12, 6.875) cells at stride 4
    targets = encode_targets(np.array([box]), [1], n_classes=2, output_shape=(16, 24), stride=4)
    assert np.argwhere(targets.heatmap == 1.0).tolist() == [[1, 6, 12]]
    size = np.zeros((1, 2, 16, 24), np.float32)
    offset = np.zeros((1, 2, 16, 24), np.float32)
    row, col = divmod(int(targets.index[0]), 24)
    size[0, :, row, col] = targets.size[0]
    offset[0, :, row, col] = targets.offset[0]
    (found,) = decode(
        torch.from_numpy(targets.heatmap[None]), torch.from_numpy(size), torch.from_numpy(offset), stride=4, k=5
    )
    assert found.labels.tolist() == [1]  # the Gaussian's tail cells are not local maxima
    assert found.scores.tolist() == [1.0]
    np.testing.assert_allclose(found.boxes[0], box, atol=1e-4)


def test_peaks_are_local_maxima_without_nms():
    # Objects as Points, Sec. 4: a peak is a value >= its 8 neighbours (3x3 max-pool); two peaks two cells
    # apart both survive (no NMS), a lower neighbour of a peak does not.
    heatmap = torch.zeros(1, 2, 8, 8)
    heatmap[0, 0, 3, 3] = 0.9
    heatmap[0, 0, 3, 4] = 0.8
    heatmap[0, 0, 3, 5] = 0.7
    heatmap[0, 1, 3, 3] = 0.6  # same cell, other class: its own channel's maximum
    scores, classes, rows, cols = extract_peaks(heatmap, k=3)
    assert scores[0].tolist() == pytest.approx([0.9, 0.6, 0.0])
    assert classes[0, :2].tolist() == [0, 1] and rows[0, :2].tolist() == [3, 3] and cols[0, :2].tolist() == [3, 3]
    heatmap[0, 0, 3, 4] = 0.0
    scores, _, _, cols = extract_peaks(heatmap, k=3)
    assert scores[0].tolist() == pytest.approx([0.9, 0.7, 0.6]) and cols[0, :2].tolist() == [3, 5]


def test_focal_loss_matches_equation_one():
    # Objects as Points, Eq. 1 (alpha 2, beta 4): one peak with p = 0.8 and one cell with target 0.5, p = 0.3,
    # normalised by the one peak.
    logit = lambda p: math.log(p / (1 - p))  # noqa: E731
    logits = torch.tensor([[[[logit(0.8), logit(0.3)]]]])
    target = torch.tensor([[[[1.0, 0.5]]]])
    expected = -((0.2**2) * math.log(0.8) + (0.5**4) * (0.3**2) * math.log(0.7))
    assert float(focal_loss(logits, target)) == pytest.approx(expected, rel=1e-5)


# --------------------------------------------------------------------------------------------------
# training


def test_detector_overfits_two_scenes():
    scenes = load_dataset(SEED_SCENES / "train.json")
    tiny = replace(scenes, scenes=scenes.scenes[:2])
    names = tuple(c.name for c in scenes.categories)
    data = prepare(tiny, names, input_scale=0.5)
    settings = TrainSettings(steps=60, batch_size=2, input_scale=0.5, width=8, learning_rate=4e-3)
    ids = [c.id for c in scenes.categories]

    def score(detector) -> float:
        return evaluate(to_coco(tiny), detections_to_coco(predict(detector, data), data.image_ids, ids)).ap50

    untrained = train_detector(data, settings=replace(settings, steps=1, learning_rate=1e-9), rng=0)
    trained = train_detector(data, settings=settings, rng=0)
    assert np.mean(trained.losses[-5:]) < 0.25 * np.mean(trained.losses[:5])
    assert score(untrained) < 0.1
    assert score(trained) > 0.9


# --------------------------------------------------------------------------------------------------
# the experiment, on a tiny world of 64x64 images with one coloured block per object

COLOURS = {1: (220, 30, 30), 4: (30, 200, 40)}


def write_split(root: Path, name: str, n: int, *, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    images, annotations = [], []
    for i in range(n):
        pixels = rng.integers(90, 140, size=(64, 64, 3)).astype(np.uint8)
        image_id = i + 1
        for category_id in (1, 4):
            x, y = (int(v) for v in rng.integers(2, 40, size=2))
            pixels[y : y + 16, x : x + 20] = COLOURS[category_id]
            annotations.append(
                {"id": len(annotations) + 1, "image_id": image_id, "category_id": category_id,
                 "bbox": [x, y, 20, 16], "area": 320, "iscrowd": 0}
            )  # fmt: skip
        file_name = f"{name}_{image_id}.png"
        (root / "images").mkdir(parents=True, exist_ok=True)
        Image.fromarray(pixels).save(root / "images" / file_name)
        images.append({"id": image_id, "file_name": file_name, "width": 64, "height": 64})
    path = root / f"{name}.json"
    path.write_text(json.dumps({"images": images, "annotations": annotations, "categories": CATEGORIES}))
    return path


def write_run(folder: Path, train: Path, *, seed: int) -> Path:
    """A run folder (notes/INTERFACES.md "Run folder") of images made from the train split's images."""
    real = json.loads(train.read_text())
    split = write_split(folder, "labels", len(real["images"]), seed=seed)
    labels = json.loads(split.read_text())
    for entry, source in zip(labels["images"], real["images"], strict=True):
        sha = file_sha256(train.parent / "images" / source["file_name"])
        entry["rarefill"] = {
            "synthetic": True,
            "stage": {"index": 0, "kind": "insert", "class": "tractor", "options": {}},
            "source": {"image_id": source["id"], "file_name": source["file_name"], "sha256": sha},
        }
    split.write_text(json.dumps(labels))
    return folder


@pytest.fixture
def world(tmp_path: Path) -> dict:
    train = write_split(tmp_path / "real", "train", 4, seed=1)
    filtered = write_run(tmp_path / "runs" / "filtered", train, seed=3)
    unfiltered = write_run(tmp_path / "runs" / "unfiltered", train, seed=4)
    return {
        "train": train,
        "test": write_split(tmp_path / "held", "test", 2, seed=2),
        "filtered": filtered,
        "unfiltered": unfiltered,
        "arms": {"filtered": [filtered], "unfiltered": [unfiltered]},
        "out": tmp_path / "probe",
    }


def test_probe_trains_every_condition_and_seed_and_writes_results(world):
    settings = TrainSettings(steps=1, batch_size=2, input_scale=1.0, width=4)
    lines: list[str] = []
    result = run_probe(
        world["train"], test_json=world["test"], guards=[], arms=world["arms"], out=world["out"],
        shares=(0.0, 0.5), seeds=2, epochs=1, settings=settings, threads=1, progress=lines.append,
    )  # fmt: skip
    conditions = [(r.condition, r.seed) for r in result.runs]
    assert conditions == [(c, s) for s in (0, 1) for c in ("real", "filtered@0.5", "unfiltered@0.5")]
    # share 0.5 of merged images: 4 real + round(0.5 / 0.5 * 4) = 4 synthetic; 1 epoch of 4 images is 2 steps
    merged = {r.condition: r for r in result.runs if r.seed == 0}
    assert merged["filtered@0.5"].train_images == 8 and merged["filtered@0.5"].synthetic_images == 4
    assert merged["real"].train_images == 4 and all(r.steps == 2 for r in result.runs)
    assert result.rare_classes == ("car", "tractor")  # both below 50 real instances
    paths = write_results(result, world["out"])
    saved = json.loads(paths["json"].read_text())
    assert [c["condition"] for c in saved["conditions"]] == ["real", "filtered@0.5", "unfiltered@0.5"]
    assert "| filtered@0.5 | 0.500 | 8 (4) |" in paths["markdown"].read_text()
    assert [c["condition"] for c in saved["intervals"]] == ["real", "filtered@0.5", "unfiltered@0.5"]
    assert saved["intervals"][0]["vs_real"] is None and saved["intervals"][1]["vs_real"]["rare_ap50"]["resamples"] > 0
    assert "paired bootstrap" in paths["markdown"].read_text()
    assert paths["plot"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # a second probe with the same inputs reuses every trained model
    again = run_probe(
        world["train"], test_json=world["test"], guards=[], arms=world["arms"], out=world["out"],
        shares=(0.0, 0.5), seeds=2, epochs=1, settings=settings, threads=1,
    )  # fmt: skip
    assert [r.train_seconds for r in again.runs] == [r.train_seconds for r in result.runs]


def test_probe_turns_minutes_into_one_step_count_for_every_model(world):
    settings = TrainSettings(steps=1, batch_size=2, input_scale=1.0, width=4)
    lines: list[str] = []
    result = run_probe(
        world["train"], test_json=world["test"], guards=[], arms={"filtered": [world["filtered"]]},
        out=world["out"], shares=(0.5,), seeds=1, minutes=0.02, settings=settings, threads=1, progress=lines.append,
    )  # fmt: skip
    steps = {r.steps for r in result.runs}
    assert len(steps) == 1 and steps.pop() == result.settings.steps >= 1
    assert [r.condition for r in result.runs] == ["real", "filtered@0.5"]  # the baseline is always trained
    timed = next(line for line in lines if line.startswith("timed"))
    assert f": {result.settings.steps} steps per model for 0.02 min" in timed


def test_summary_pairs_each_run_with_the_real_run_of_its_seed():
    def run(kind: str, seed: int, tractor: float) -> ProbeRun:
        scores = {"car": 0.9, "tractor": tractor}
        evaluation = Evaluation(0.5, 0.8, scores, scores)
        return ProbeRun(kind, 0.0 if kind == "real" else 0.5, seed, 4, 0, 0.0, 2, 1.0, 2.0, 1.0, evaluation)

    runs = (run("real", 0, 0.2), run("real", 1, 0.6), run("filtered", 0, 0.3), run("filtered", 1, 0.8))
    result = ProbeResult(runs, ("car", "tractor"), ("tractor",), TrainSettings(steps=2), (0.0, 0.5), (0, 1), {})
    rows = {row["condition"]: row for row in summarise(result)}
    assert rare_ap50(runs[2].evaluation, ("tractor",)) == 0.3
    gain = rows["filtered@0.5"]["rare_ap50_gain"]
    assert gain.mean == pytest.approx(0.15) and gain.sd == pytest.approx(math.sqrt(2) * 0.05)
    assert rows["real"]["rare_ap50"].mean == pytest.approx(0.4)
    assert rows["real"]["rare_ap50"].sd == pytest.approx(math.sqrt(0.08))


def test_parse_shares():
    assert parse_shares("0.5,0,0.25") == (0.0, 0.25, 0.5)
    for bad, message in (("0,x", "comma-separated"), ("0,1", r"\[0, 1\)"), ("0.2,0.2", "twice"), ("nan", "0, 1")):
        with pytest.raises(UsageError, match=message):
            parse_shares(bad)


# --------------------------------------------------------------------------------------------------
# CLI


def probe_args(world, *extra: str) -> list[str]:
    return [
        "probe", "--real", str(world["train"]), "--test", str(world["test"]), "--arm", f"filtered={world['filtered']}",
        "--out", str(world["out"]), *extra,
    ]  # fmt: skip


def test_cli_probe_happy_path_with_two_worker_processes(world):
    result = runner.invoke(
        app,
        probe_args(world, "--shares", "0,0.5", "--seeds", "1", "--epochs", "1", "--input-scale", "1", "--workers", "2"),
    )
    assert result.exit_code == 0, result.output
    assert "| real |" in result.stdout and "| filtered@0.5 |" in result.stdout
    assert (world["out"] / "rare_ap50.png").is_file()
    # the two models train side by side, so either may finish first
    assert "filtered@0.5, seed 0: AP50" in result.stderr and "real, seed 0: AP50" in result.stderr
    assert "[1/2]" in result.stderr and "[2/2]" in result.stderr


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (("--epochs", "1", "--minutes", "1"), "give at most one of --epochs and --minutes"),
        (("--epochs", "0"), "--epochs must be > 0"),
        (("--epochs", "1", "--shares", "0,1"), "each share must be in [0, 1)"),
        (("--epochs", "1", "--shares", "a"), "--shares must be comma-separated numbers"),
        (("--epochs", "1", "--input-scale", "0"), "--input-scale must be in (0, 1]"),
    ],
)
def test_cli_probe_usage_errors(world, extra, message):
    result = runner.invoke(app, probe_args(world, *extra))
    assert result.exit_code == 2
    assert message in result.stderr and "Traceback" not in result.output


def test_cli_probe_refuses_a_folder_that_is_no_run(world, tmp_path):
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--arm", f"unfiltered={tmp_path}"])
    assert result.exit_code == 2 and "is not a run folder (no labels.json)" in result.stderr
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--arm", f"unfiltered={world['filtered']}"])
    assert (
        result.exit_code == 2
        and "is given in arm 'filtered' and in arm 'unfiltered'; arms must differ" in result.stderr
    )
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--arm", "real=" + str(world["unfiltered"])])
    assert result.exit_code == 2 and "not 'real'" in result.stderr
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--arm", "nofolder"])
    assert result.exit_code == 2 and "--arm must look like NAME=RUN_DIR" in result.stderr
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--baseline", "paste"])
    assert result.exit_code == 2 and "--baseline 'paste' is not one of the arms (filtered)" in result.stderr


def test_cli_probe_names_the_option_that_repeats_the_test_split(world):
    result = runner.invoke(app, [*probe_args(world, "--epochs", "1"), "--guard", str(world["test"])])
    assert result.exit_code == 2
    assert f"error: --test {world['test']} is also given as --guard" in result.stderr
    assert "hint: the test split is always guarded; drop it from --guard" in result.stderr
    args = probe_args(world, "--epochs", "1")
    args[args.index("--test") + 1] = str(world["train"])
    result = runner.invoke(app, args)
    assert (
        result.exit_code == 2 and f"error: --test {world['train']} is also the training split (--real)" in result.stderr
    )
    assert not (world["out"] / "sets").exists()


def test_cli_probe_refuses_a_test_split_with_other_classes(world):
    coco = json.loads(world["test"].read_text())
    coco["categories"][1]["name"] = "bus"
    world["test"].write_text(json.dumps(coco))
    result = runner.invoke(app, probe_args(world, "--epochs", "1"))
    assert result.exit_code == 2
    assert "test.json: categories: names differ from the training split's" in result.stderr


def write_mislabelled_run(folder: Path, train: Path, *, seed: int) -> Path:
    """A run whose images are like the real ones, but with the car and tractor labels swapped."""
    write_run(folder, train, seed=seed)
    labels = json.loads((folder / "labels.json").read_text())
    for ann in labels["annotations"]:
        ann["category_id"] = {1: 4, 4: 1}[ann["category_id"]]
    (folder / "labels.json").write_text(json.dumps(labels))
    return folder


def test_an_arm_of_mislabelled_boxes_scores_below_real_only(tmp_path):
    train = write_split(tmp_path / "real", "train", 8, seed=1)
    test = write_split(tmp_path / "held", "test", 6, seed=2)
    wrong = write_mislabelled_run(tmp_path / "runs" / "wrong", train, seed=3)
    settings = TrainSettings(steps=1, batch_size=2, input_scale=1.0, width=8, learning_rate=4e-3)
    result = run_probe(
        train, test_json=test, guards=[], arms={"mislabelled": [wrong]}, out=tmp_path / "probe",
        shares=(0.0, 0.5), seeds=2, epochs=15, settings=settings, threads=1,
    )  # fmt: skip
    rare = {(r.arm, r.seed): rare_ap50(r.evaluation, result.rare_classes) for r in result.runs}
    assert all(rare[("mislabelled", s)] < rare[("real", s)] - 0.1 for s in (0, 1))
