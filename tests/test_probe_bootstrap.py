"""The probe's paired bootstrap: AP recomputed from stored matches agrees with COCOeval, and intervals behave."""

from __future__ import annotations

import functools

import numpy as np
import pytest

from pipeline.probe.bootstrap import average_precision, class_mean, match_images, paired_bootstrap
from pipeline.probe.evaluation import evaluate

CLASSES = ("car", "tractor", "works_trailer")


def _ground_truth(rng: np.random.Generator, n_images: int = 24) -> dict:
    images, annotations = [], []
    for i in range(1, n_images + 1):
        images.append({"id": i, "file_name": f"{i}.png", "width": 400, "height": 240})
        for _ in range(int(rng.integers(0, 4))):
            w, h = rng.uniform(12, 80, 2)
            x, y = rng.uniform(0, 400 - w), rng.uniform(0, 240 - h)
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": i,
                    "category_id": int(rng.integers(1, len(CLASSES) + 1)),
                    "bbox": [float(x), float(y), float(w), float(h)],
                    "area": float(w * h),
                    "iscrowd": int(rng.random() < 0.05),
                }
            )
    categories = [{"id": k + 1, "name": name} for k, name in enumerate(CLASSES)]
    return {"images": images, "annotations": annotations, "categories": categories}


def _detections(truth: dict, rng: np.random.Generator, *, hit: float = 0.7, drop: str | None = None) -> list[dict]:
    """Jittered copies of the true boxes (found with probability ``hit``) plus random false alarms."""
    out = []
    for ann in truth["annotations"]:
        if rng.random() > hit or (drop is not None and truth["categories"][ann["category_id"] - 1]["name"] == drop):
            continue
        x, y, w, h = ann["bbox"]
        jitter = rng.normal(0, 0.08, 4) * [w, h, w, h]
        out.append(
            {
                "image_id": ann["image_id"],
                "category_id": ann["category_id"],
                "bbox": [float(x + jitter[0]), float(y + jitter[1]), float(w + jitter[2]), float(h + jitter[3])],
                "score": float(rng.uniform(0.3, 1.0)),
            }
        )
    for image in truth["images"]:
        for _ in range(int(rng.integers(0, 3))):
            out.append(
                {
                    "image_id": image["id"],
                    "category_id": int(rng.integers(1, len(CLASSES) + 1)),
                    "bbox": [float(v) for v in (*rng.uniform(0, 300, 2), *rng.uniform(10, 60, 2))],
                    "score": float(rng.uniform(0.0, 0.7)),
                }
            )
    return out


def test_ap_from_stored_matches_equals_cocoeval():
    # Reference: pycocotools COCOeval.accumulate (Lin et al., "Microsoft COCO", ECCV 2014).
    rng = np.random.default_rng(3)
    truth = _ground_truth(rng)
    results = _detections(truth, rng)
    reference = evaluate(truth, results)
    matches = match_images(truth, results)
    for name in CLASSES:
        ours = average_precision(matches.categories[name])
        assert ours is not None
        assert ours[0] == pytest.approx(reference.per_class_ap50[name], abs=1e-12)
        assert ours.mean() == pytest.approx(reference.per_class_ap[name], abs=1e-12)
        assert average_precision(matches.categories[name], threshold=0)[0] == ours[0]


def test_weighted_images_equal_cocoeval_on_a_test_set_with_the_images_repeated():
    # Reference: COCOeval on a ground truth that holds image i weights[i] times (fresh ids, same boxes).
    rng = np.random.default_rng(5)
    truth = _ground_truth(rng, n_images=12)
    results = _detections(truth, rng)
    weights = np.bincount(rng.integers(0, 12, 12), minlength=12)
    repeated = {"images": [], "annotations": [], "categories": truth["categories"]}
    repeated_results = []
    for i, image in enumerate(truth["images"]):
        for copy in range(int(weights[i])):
            new_id = 1000 * (copy + 1) + image["id"]
            repeated["images"].append({**image, "id": new_id})
            for ann in truth["annotations"]:
                if ann["image_id"] == image["id"]:
                    repeated["annotations"].append({**ann, "id": len(repeated["annotations"]) + 1, "image_id": new_id})
            repeated_results += [{**r, "image_id": new_id} for r in results if r["image_id"] == image["id"]]
    reference = evaluate(repeated, repeated_results)
    matches = match_images(truth, results)
    for name in CLASSES:
        ours = average_precision(matches.categories[name], weights)
        if reference.per_class_ap50[name] is None:
            assert ours is None
            continue
        assert ours[0] == pytest.approx(reference.per_class_ap50[name], abs=1e-9)
        assert ours.mean() == pytest.approx(reference.per_class_ap[name], abs=1e-9)


def _arm(truth: dict, seeds: range, offset: int, **kw) -> list:
    return [match_images(truth, _detections(truth, np.random.default_rng(offset + s), **kw)) for s in seeds]


_metric = functools.partial(class_mean, names=("tractor", "works_trailer"), iou="50")


def test_two_arms_from_the_same_process_give_an_interval_that_covers_zero():
    truth = _ground_truth(np.random.default_rng(11), n_images=40)
    a, b = _arm(truth, range(5), 100), _arm(truth, range(5), 200)
    interval = paired_bootstrap(a, b, _metric, resamples=400, rng=0)
    assert interval.low <= 0 <= interval.high
    assert interval.resamples == 400


def test_an_arm_that_misses_a_rare_class_is_worse_with_an_interval_that_excludes_zero():
    truth = _ground_truth(np.random.default_rng(11), n_images=40)
    full = _arm(truth, range(5), 100)
    blind = _arm(truth, range(5), 100, drop="tractor")
    interval = paired_bootstrap(blind, full, _metric, resamples=400, rng=0)
    assert interval.excludes_zero() and interval.high < 0
    assert interval.low <= interval.estimate <= interval.high


def test_an_arm_alone_gives_an_interval_around_its_own_value():
    truth = _ground_truth(np.random.default_rng(11), n_images=40)
    arm = _arm(truth, range(3), 100)
    interval = paired_bootstrap(arm, None, _metric, resamples=300, rng=1)
    assert interval.estimate == pytest.approx(np.mean([_metric(m, None) for m in arm]))
    assert 0 <= interval.low < interval.estimate < interval.high <= 1


def test_the_same_seed_gives_the_same_interval():
    truth = _ground_truth(np.random.default_rng(11), n_images=20)
    a, b = _arm(truth, range(3), 100), _arm(truth, range(3), 200)
    assert paired_bootstrap(a, b, _metric, resamples=50, rng=4) == paired_bootstrap(a, b, _metric, resamples=50, rng=4)


def test_bad_input_is_refused():
    truth = _ground_truth(np.random.default_rng(11), n_images=10)
    other = _ground_truth(np.random.default_rng(12), n_images=11)
    a, b = _arm(truth, range(2), 0), _arm(truth, range(3), 0)
    with pytest.raises(ValueError, match="not paired"):
        paired_bootstrap(a, b, _metric)
    with pytest.raises(ValueError, match="same test images"):
        paired_bootstrap(a, _arm(other, range(2), 0), _metric)
    with pytest.raises(ValueError, match="resamples"):
        paired_bootstrap(a, None, _metric, resamples=0)
    with pytest.raises(ValueError, match="level"):
        paired_bootstrap(a, None, _metric, level=1.5)
    with pytest.raises(ValueError, match="iou"):
        class_mean(a[0], names=("car",), iou="75")
