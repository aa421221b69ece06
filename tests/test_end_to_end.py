"""The shipped model end to end (slow): a short demo run whose new boxes hold objects of the right class."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from pycocotools.coco import COCO

from pipeline.demo import demo_recipe
from pipeline.generator.verifier import load_verifier
from pipeline.runner import run_recipe

from .conftest import REPO

pytestmark = pytest.mark.slow


def test_demo_run_labels_generated_objects_of_the_right_class(tmp_path: Path):
    recipe = demo_recipe().with_output(tmp_path / "demo").with_limit(8)
    summary = run_recipe(recipe)
    assert summary.accepted >= 0.5 * summary.wanted
    labels_path = tmp_path / "demo" / "labels.json"
    ref = COCO(str(labels_path))  # the COCO project's reference reader loads it unchanged
    assert len(ref.getImgIds()) == summary.accepted
    labels = json.loads(labels_path.read_text())
    names = {c["id"]: c["name"] for c in labels["categories"]}
    verifier = load_verifier(REPO / "models" / "default")
    for image in labels["images"]:
        pixels = np.asarray(Image.open(tmp_path / "demo" / "images" / image["file_name"]).convert("RGB"))
        for ann in labels["annotations"]:
            if ann["image_id"] != image["id"] or not ann["rarefill"]["synthetic"]:
                continue
            x, y, w, h = ann["bbox"]
            assert 0 <= x and 0 <= y and x + w <= image["width"] and y + h <= image["height"]
            wanted = names[ann["category_id"]]
            assert verifier.present_probability(pixels, ann["bbox"], wanted) >= 0.5
