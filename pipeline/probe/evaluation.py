"""Score detections against a COCO ground truth with pycocotools' COCOeval (the reference implementation).

References
----------
Lin et al., "Microsoft COCO: Common Objects in Context", ECCV 2014; cocodataset.org "Detection
evaluation": AP averaged over IoU 0.50:0.05:0.95 with 101 recall points, AP50 at IoU 0.5, area "all",
at most 100 detections per image.
"""

from __future__ import annotations

import contextlib
import copy
import io
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from pycocotools.coco import COCO
from pycocotools.cocoeval import COCOeval

from .decode import Detections


@dataclass(frozen=True)
class Evaluation:
    """COCO box AP of one model on one data set.

    Attributes
    ----------
    ap : float
        AP at IoU 0.50:0.95 over the classes present in the ground truth.
    ap50 : float
        AP at IoU 0.5.
    per_class_ap : mapping of str to float or None
        Per class name; ``None`` for a class without ground-truth instances (COCOeval leaves it out).
    per_class_ap50 : mapping of str to float or None
    """

    ap: float
    ap50: float
    per_class_ap: Mapping[str, float | None]
    per_class_ap50: Mapping[str, float | None]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form; ``Evaluation(**d)`` reads it back."""
        return {
            "ap": self.ap,
            "ap50": self.ap50,
            "per_class_ap": dict(self.per_class_ap),
            "per_class_ap50": dict(self.per_class_ap50),
        }


def detections_to_coco(
    detections: Sequence[Detections], image_ids: Sequence[int], category_ids: Sequence[int]
) -> list[dict[str, Any]]:
    """COCO result entries (``image_id``, ``category_id``, ``bbox``, ``score``) from per-image detections.

    ``category_ids[label]`` is the COCO category id of class index ``label``.
    """
    if len(detections) != len(image_ids):
        raise ValueError(f"{len(detections)} detection sets for {len(image_ids)} images")
    results = []
    for dets, image_id in zip(detections, image_ids, strict=True):
        for box, score, label in zip(dets.boxes, dets.scores, dets.labels, strict=True):
            results.append(
                {
                    "image_id": int(image_id),
                    "category_id": int(category_ids[int(label)]),
                    "bbox": [float(v) for v in box],
                    "score": float(score),
                }
            )
    return results


def evaluate(ground_truth: Mapping[str, Any], results: Sequence[Mapping[str, Any]]) -> Evaluation:
    """COCO box AP of ``results`` on ``ground_truth``.

    Parameters
    ----------
    ground_truth : mapping
        A COCO detection object (``images``, ``annotations``, ``categories``); not changed.
    results : sequence of mapping
        COCO result entries; may be empty (every class with instances then scores 0).

    Returns
    -------
    Evaluation
    """
    # COCOeval prints its progress; keep it out of the probe's output.
    with contextlib.redirect_stdout(io.StringIO()):
        gt, dt = coco_pair(ground_truth, results)
        scorer = COCOeval(gt, dt, iouType="bbox")
        scorer.evaluate()
        scorer.accumulate()
        scorer.summarize()
    # precision: (IoU thresholds, recall points, categories, area ranges, max detections); -1 = no instances
    precision = scorer.eval["precision"]
    names = {c["id"]: c["name"] for c in gt.dataset["categories"]}
    per_ap, per_ap50 = {}, {}
    for k, category_id in enumerate(scorer.params.catIds):
        every = precision[:, :, k, 0, -1]
        at50 = precision[0, :, k, 0, -1]
        per_ap[names[category_id]] = _mean_valid(every)
        per_ap50[names[category_id]] = _mean_valid(at50)
    return Evaluation(float(scorer.stats[0]), float(scorer.stats[1]), per_ap, per_ap50)


def coco_pair(ground_truth: Mapping[str, Any], results: Sequence[Mapping[str, Any]]) -> tuple[COCO, COCO]:
    """pycocotools ``COCO`` objects of a ground truth (deep-copied, so it is not changed) and of results."""
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = copy.deepcopy(dict(ground_truth))
        gt.createIndex()
        if results:
            return gt, gt.loadRes([dict(r) for r in results])
        # loadRes cannot take an empty list; an empty result set has no annotations at all
        dt = COCO()
        dt.dataset = {"images": list(gt.dataset["images"]), "annotations": [], "categories": gt.dataset["categories"]}
        dt.createIndex()
        return gt, dt


def _mean_valid(values: np.ndarray) -> float | None:
    valid = values[values > -1]
    return float(valid.mean()) if valid.size else None
