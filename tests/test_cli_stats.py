"""`rarefill stats` and the CLI's error contract, through typer's CliRunner."""

from __future__ import annotations

import json

from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.stats import MEDIUM_AREA_PX, SMALL_AREA_PX

from .conftest import tiny_coco

runner = CliRunner()


def test_stats_json(tiny_set):
    json_path, images = tiny_set
    result = runner.invoke(app, ["stats", str(json_path), "--images", str(images), "--json", "--rare-below", "2"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    by_name = {c["name"]: c for c in summary["categories"]}
    assert summary["images"] == 2 and summary["annotations"] == 3
    # iscrowd regions are not instances; the tractor has one real box of area 30 (small) and height 6.
    assert by_name["tractor"]["instances"] == 1
    assert by_name["tractor"]["median_box_height"] == 6.0
    assert by_name["tractor"]["rare"] is True
    assert by_name["car"]["small"] == 1.0 and by_name["car"]["rare"] is True


def test_size_buckets_use_coco_thresholds(tiny_set):
    # COCO detection evaluation (cocodataset.org/#detection-eval): small < 32^2, medium < 96^2, large above.
    assert (SMALL_AREA_PX, MEDIUM_AREA_PX) == (1024, 9216)
    json_path, images = tiny_set
    coco = tiny_coco()
    coco["images"][0].update(width=400, height=300)
    coco["annotations"] = [
        {"id": i, "image_id": 1, "category_id": 1, "bbox": [0, 0, 1, 1], "area": area}
        for i, area in enumerate([1023, 1024, 9215, 9216])
    ]
    json_path.write_text(json.dumps(coco))
    result = runner.invoke(app, ["stats", str(json_path), "--images", str(images), "--json"])
    assert result.exit_code == 2  # the image is 40x30 on disk, not 400x300
    assert "images[0]: image a.png is 40x30 px but the entry says 400x300" in result.stderr
    coco["images"][0].update(width=40, height=30)
    json_path.write_text(json.dumps(coco))
    car = json.loads(runner.invoke(app, ["stats", str(json_path), "--images", str(images), "--json"]).stdout)
    car = car["categories"][0]
    assert (car["small"], car["medium"], car["large"]) == (0.25, 0.5, 0.25)


def test_stats_table(tiny_set):
    json_path, images = tiny_set
    result = runner.invoke(app, ["stats", str(json_path), "--images", str(images)])
    assert result.exit_code == 0
    assert "tractor" in result.stdout and "rare" in result.stdout


def test_broken_file_is_one_line_with_file_field_reason(tiny_set):
    json_path, images = tiny_set
    coco = tiny_coco()
    coco["annotations"][1]["bbox"] = [1, 2, 0, 4]
    json_path.write_text(json.dumps(coco))
    result = runner.invoke(app, ["stats", str(json_path), "--images", str(images)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert lines[0] == f"error: {json_path}: annotations[1].bbox: width and height must be > 0, got 0 x 4"
    assert lines[1].startswith("hint: ")
    assert "Traceback" not in result.output


def test_debug_shows_the_traceback(tiny_set):
    json_path, images = tiny_set
    json_path.write_text("{")
    result = runner.invoke(app, ["--debug", "stats", str(json_path)])
    assert result.exit_code == 2
    assert "Traceback" in result.stderr and "malformed JSON" in result.stderr


def test_clip_boxes_prints_a_warning_per_box(tiny_set):
    json_path, images = tiny_set
    coco = tiny_coco()
    coco["annotations"][0]["bbox"] = [35, 2, 8, 4]
    json_path.write_text(json.dumps(coco))
    refused = runner.invoke(app, ["stats", str(json_path), "--images", str(images)])
    assert refused.exit_code == 2 and "--clip-boxes" in refused.stderr
    clipped = runner.invoke(app, ["stats", str(json_path), "--images", str(images), "--clip-boxes", "--json"])
    assert clipped.exit_code == 0
    assert clipped.stderr.count("warning:") == 1 and "annotations[0].bbox" in clipped.stderr


def test_bad_option_value_exits_2(tiny_set):
    json_path, _ = tiny_set
    result = runner.invoke(app, ["stats", str(json_path), "--rare-below", "-1"])
    assert result.exit_code == 2


def test_version():
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0 and result.stdout.startswith("rarefill ")
