"""Object silhouettes (segmentation, GrabCut, fallback) and the exemplar repaint geometry."""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from pycocotools import mask as mask_utils
from pycocotools.coco import COCO

from pipeline.demo_world.seed_set import DEFAULT_SEED, render_seed_image, seed_set_plan
from pipeline.silhouette import (
    DILATE_PX,
    object_silhouette,
    repaint_mask,
    segmentation_mask,
    shadow_band,
)


def _iou(a: np.ndarray, b: np.ndarray) -> float:
    return float((a & b).sum() / (a | b).sum())


def test_grabcut_recovers_rendered_objects_better_than_their_boxes():
    # The demo renderer's owner buffer is the true visible silhouette of each object.
    plan = seed_set_plan(DEFAULT_SEED)
    cut, boxed = [], []
    for i in range(4):
        _, rendered, _ = render_seed_image(DEFAULT_SEED, "val", i, plan["val"][i])
        for k, (box, visible) in enumerate(zip(rendered.boxes, rendered.visible_fraction, strict=True)):
            if visible < 0.99 or box[3] < 16:
                continue
            truth = rendered.owner == k + 1
            sil = object_silhouette(rendered.image, box)
            whole = object_silhouette(np.zeros_like(rendered.image), box)  # no contrast: the fallback box
            cut.append(_iou(sil.mask, truth))
            boxed.append(_iou(whole.mask, truth))
    assert len(cut) >= 8
    assert np.median(cut) >= 0.85
    assert np.median(cut) > np.median(boxed) + 0.05


def test_grabcut_on_a_plain_background_finds_the_exact_shape():
    image = np.full((80, 100, 3), (40, 120, 40), np.uint8)
    truth = np.zeros((80, 100), np.uint8)
    cv2.fillPoly(truth, [np.array([[30, 60], [45, 20], [70, 25], [75, 60]], np.int32)], 1)
    truth = truth.astype(bool)
    image[truth] = (200, 30, 30)
    rows, cols = np.nonzero(truth)
    box = (cols.min(), rows.min(), cols.max() + 1 - cols.min(), rows.max() + 1 - rows.min())
    sil = object_silhouette(image, box)
    assert sil.source == "grabcut"
    assert _iou(sil.mask, truth) >= 0.97
    again = object_silhouette(image, box)
    assert np.array_equal(again.mask, sil.mask)  # deterministic


def _coco_with(annotation: dict, height: int, width: int) -> COCO:
    coco = COCO()
    coco.dataset = {
        "images": [{"id": 1, "height": height, "width": width, "file_name": "x.png"}],
        "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "iscrowd": 0, "area": 1.0, **annotation}],
        "categories": [{"id": 1, "name": "tractor"}],
    }
    coco.createIndex()
    return coco


@pytest.mark.parametrize("kind", ["polygon", "rle", "compressed"])
def test_segmentations_decode_exactly_as_pycocotools_ann_to_mask(kind):
    # Reference: pycocotools COCO.annToMask (T.-Y. Lin et al., "Microsoft COCO: Common Objects in Context",
    # ECCV 2014; the cocodataset/cocoapi reader).
    height, width = 60, 90
    truth = np.zeros((height, width), np.uint8)
    cv2.ellipse(truth, (40, 30), (25, 14), 10, 0, 360, 1, -1)
    if kind == "polygon":
        segmentation = [[10.5, 10.0, 60.0, 12.5, 55.0, 40.0, 20.0, 45.5], [65.0, 5.0, 80.0, 5.0, 72.0, 20.0]]
    elif kind == "compressed":
        rle = mask_utils.encode(np.asfortranarray(truth))
        segmentation = {"size": rle["size"], "counts": rle["counts"].decode("ascii")}
    else:
        flat = truth.flatten(order="F")
        changes = np.flatnonzero(np.diff(np.r_[0, flat, 1 - flat[-1]]))
        counts = np.diff(np.r_[0, changes]).tolist()
        segmentation = {"size": [height, width], "counts": counts}
    coco = _coco_with({"segmentation": segmentation, "bbox": [0, 0, width, height]}, height, width)
    reference = coco.annToMask(coco.anns[1]).astype(bool)
    assert reference.any()
    assert np.array_equal(segmentation_mask(segmentation, height, width), reference)
    sil = object_silhouette(np.zeros((height, width, 3), np.uint8), (0, 0, width, height), segmentation=segmentation)
    assert sil.source == "segmentation"
    if kind == "polygon":  # two parts: the silhouette keeps the largest
        assert sil.mask.sum() < reference.sum() and (sil.mask <= reference).all()
    else:
        assert np.array_equal(sil.mask, reference)


def test_silhouette_is_clipped_to_the_box_and_holes_are_filled():
    height, width = 50, 50
    ring = np.zeros((height, width), np.uint8)
    cv2.circle(ring, (25, 25), 15, 1, -1)
    cv2.circle(ring, (25, 25), 5, 0, -1)
    rle = mask_utils.encode(np.asfortranarray(ring))
    box = (12, 12, 20, 26)
    sil = object_silhouette(np.zeros((height, width, 3), np.uint8), box, segmentation=rle)
    assert sil.mask[25, 25]  # the hole is filled
    assert not sil.mask[:, :12].any() and not sil.mask[:, 32:].any() and not sil.mask[:12].any()


@pytest.mark.parametrize(
    "image, box, segmentation",
    [
        (np.zeros((40, 40, 3), np.uint8), (10, 10, 4, 3), None),  # too small for GrabCut
        (np.full((40, 40, 3), 90, np.uint8), (5, 5, 20, 20), None),  # nothing to cut
        (np.zeros((40, 40, 3), np.uint8), (5, 5, 10, 10), [[30.0, 30.0, 38.0, 30.0, 38.0, 38.0]]),  # outside box
    ],
)
def test_silhouette_is_never_empty(image, box, segmentation):
    sil = object_silhouette(image, box, segmentation=segmentation)
    assert sil.mask.any()
    assert sil.source in ("grabcut", "box")
    if sil.source == "box":
        x, y, w, h = box
        assert sil.mask.sum() == w * h


def test_repaint_mask_is_the_grown_silhouette_and_a_flat_band_on_the_bottom_row():
    shape = (120, 160)
    silhouette = np.zeros(shape, bool)
    silhouette[40:80, 50:90] = True
    box = (50, 40, 40, 40)
    region = repaint_mask(silhouette, box, shape)
    assert (region.mask == (region.grown | region.band)).all()
    # grown by exactly DILATE_PX along the axes, not farther
    assert region.grown[40, 50 - DILATE_PX] and not region.grown[40, 50 - DILATE_PX - 1]
    assert region.grown[60, 89 + DILATE_PX] and not region.grown[60, 90 + DILATE_PX]
    # band: centred on the bottom edge (row 80), about 0.12 x 40 = 4.8 px tall, 1.2 x 40 = 48 px wide
    rows, cols = np.nonzero(region.band)
    assert rows.min() >= 77 and rows.max() <= 82
    assert abs((rows.min() + rows.max() + 1) / 2 - 80) <= 0.5
    assert 44 <= cols.max() + 1 - cols.min() <= 49
    assert abs((cols.min() + cols.max() + 1) / 2 - 70) <= 0.5
    # an alpha gives the same region as its thresholded silhouette
    alpha = silhouette.astype(np.float32) * 0.9
    assert np.array_equal(repaint_mask(alpha, box).mask, region.mask)


def test_shadow_band_of_a_tiny_object_is_not_empty():
    band = shadow_band((10, 10, 3, 3), (30, 30))
    assert band.any()
    assert band[13, 11]
