"""Run control through the CLI: shortfalls per stage, exit codes, --dry-run, --job, progress, option checks."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_SHORT
from pipeline.recipe import load_recipe
from pipeline.runner import run_recipe
from pipeline.tally import size_band, tally_stages
from pipeline.writer import NEW_BOX_RGB, REQUESTED_BOX_RGB, encode_thumbnail

from .conftest import SEED_SCENES
from .fakes import BlockGenerator, BoxVerifier
from .test_cli_run import tiny_model  # noqa: F401  (the module-scoped fixture)

runner = CliRunner()

# An insert stage the tiny model (two training steps) never satisfies, and a fog restyle it does not take part in.
TWO_STAGES = """
[run]
name = "control"
seed = 5
dataset = "{dataset}"
model = "{model}"
output = "out"
steps = 2
attempts_per_output = 2

[[stage]]
kind = "insert"
class = "tractor"
count = 2

[[stage]]
kind = "restyle"
class = "works_trailer"
count = 2
condition = "fog"
visibility_m = 400.0
"""


def _recipe(tmp_path: Path, model: Path, text: str = TWO_STAGES) -> Path:
    path = tmp_path / "recipe.toml"
    path.write_text(text.format(dataset=SEED_SCENES / "train.json", model=model))
    return path


def _restyle_only(tmp_path: Path, model: Path) -> Path:
    text = TWO_STAGES.split("[[stage]]")
    return _recipe(tmp_path, model, text[0] + "[[stage]]" + text[2])


@pytest.fixture(scope="module")
def short_run(tmp_path_factory, tiny_model):  # noqa: F811
    folder = tmp_path_factory.mktemp("short")
    recipe = _recipe(folder, tiny_model)
    result = runner.invoke(app, ["run", str(recipe)])
    return folder, result


# 1. per stage: wanted, accepted, attempted, rejections by filter, acceptance by size band


def test_short_run_exits_3_and_names_the_short_stage(short_run):
    folder, result = short_run
    assert result.exit_code == EXIT_SHORT == 3, result.output
    assert "stage 0 insert tractor: accepted 0 of 2 wanted (2 short), after 4 attempts" in result.stdout
    assert "stage 1 restyle works_trailer: accepted 2 of 2 wanted, after 2 attempts" in result.stdout
    assert "    rejected by: present" in result.stdout and "    accepted by size:" in result.stdout
    assert "short: 2 of 4 wanted outputs missing in 1 stage(s)" in result.stderr
    assert "--allow-short" in result.stderr


def test_run_json_holds_the_summary_per_stage(short_run):
    folder, _ = short_run
    summary = json.loads((folder / "out" / "run.json").read_text())["summary"]
    assert (summary["wanted"], summary["accepted"], summary["short"]) == (4, 2, 2)
    insert, restyle = summary["stages"]
    assert (insert["kind"], insert["class"], insert["wanted"], insert["accepted"]) == ("insert", "tractor", 2, 0)
    assert insert["attempted"] == 4 and insert["rejected_by"]["present"] >= 1
    assert sum(b["attempted"] for b in insert["by_size"].values()) == 4
    assert restyle["short"] == 0 and restyle["accepted"] == 2


def test_report_shows_the_funnel_per_stage(short_run):
    folder, _ = short_run
    result = runner.invoke(app, ["report", str(folder / "out")])
    assert result.exit_code == 0, result.output
    html = (folder / "out" / "report.html").read_text()
    assert 'id="stages"' in html and "insert tractor" in html and "restyle works_trailer" in html
    assert 'data-stage="0" data-short="2"' in html and 'data-stage="1" data-short="0"' in html


def test_tally_counts_bands_by_the_smallest_object():
    # a 20 px tall requested box falls in the 16-32 px band; a failure before placement has no box
    lines = [
        {"job": "s0-000000", "accepted": False, "rejected_by": ["scale", "present"], "boxes": [
            {"bbox": [0, 0, 5, 90], "requested_bbox": [0, 0, 5, 20], "new": True}]},
        {"job": "s0-000000", "accepted": True, "rejected_by": [], "boxes": [{"bbox": [0, 0, 9, 70], "new": False}]},
        {"job": "s1-000000", "accepted": False, "rejected_by": ["placement"], "boxes": []},
    ]  # fmt: skip
    first, second = tally_stages(lines, [{"kind": "insert", "class": "tractor"}, {"kind": "insert", "class": "bus"}])
    assert (first.wanted, first.accepted, first.attempted, first.short) == (1, 1, 2, 0)
    assert first.rejected_by == {"present": 1, "scale": 1}
    assert first.bands == {"16-32 px": (0, 1), "64-128 px": (1, 1)}
    assert (second.short, second.bands) == (1, {"no box": (0, 1)})
    bands = [size_band(h) for h in (15.9, 16, 63.9, 64, 128)]
    assert bands == ["<16 px", "16-32 px", "32-64 px", "64-128 px", ">=128 px"]


# 2. exit codes: 0 when every stage reached its count, 3 short (0 with --allow-short), 2 bad input, 1 otherwise


def test_allow_short_exits_0_but_still_says_so(tmp_path, tiny_model):  # noqa: F811
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tiny_model)), "--allow-short"])
    assert result.exit_code == 0, result.output
    assert "(2 short)" in result.stdout and "short: 2 of 4 wanted" in result.stderr


def test_a_run_that_reaches_every_count_exits_0(tmp_path, tiny_model):  # noqa: F811
    result = runner.invoke(app, ["run", str(_restyle_only(tmp_path, tiny_model))])
    assert result.exit_code == 0, result.output
    assert "accepted 2 of 2 wanted" in result.stdout and "short" not in result.output


def test_missing_run_folder_and_missing_shard_are_bad_input(tmp_path, tiny_model):  # noqa: F811
    result = runner.invoke(app, ["report", str(tmp_path / "nothing")])
    assert result.exit_code == EXIT_BAD_INPUT and "is not a finished rarefill run folder" in result.stderr
    result = runner.invoke(app, ["collect", str(tmp_path / "nothing"), "--out", str(tmp_path / "whole")])
    assert result.exit_code == EXIT_BAD_INPUT and "is not a rarefill run folder" in result.stderr
    recipe = str(_restyle_only(tmp_path, tiny_model))
    assert runner.invoke(app, ["run", recipe, "--shard", "0/2", "--out", str(tmp_path / "p0")]).exit_code == 0
    result = runner.invoke(app, ["collect", str(tmp_path / "p0"), "--out", str(tmp_path / "whole")])
    assert result.exit_code == EXIT_BAD_INPUT and "shard 1/2 missing" in result.stderr
    assert not (tmp_path / "whole").exists()


def test_a_folder_holding_another_run_is_a_failure_not_bad_input(tmp_path, tiny_model):  # noqa: F811
    recipe = str(_restyle_only(tmp_path, tiny_model))
    assert runner.invoke(app, ["run", recipe, "--limit", "1"]).exit_code == 0
    result = runner.invoke(app, ["run", recipe])
    assert result.exit_code == EXIT_FAILURE and "holds another run" in result.stderr


# 3. --dry-run checks everything, prints the plan per stage, writes nothing


def test_dry_run_prints_the_plan_and_writes_nothing(tmp_path, tiny_model):  # noqa: F811
    recipe = _recipe(tmp_path, tiny_model)
    before = sorted(p.name for p in tmp_path.iterdir())
    result = runner.invoke(app, ["run", str(recipe), "--dry-run"])
    assert result.exit_code == 0, result.output
    assert "plan of control: checked, nothing written" in result.stdout
    assert "stage 0 insert tractor: 2 jobs in 1 chunk(s), up to 2 attempts each, from " in result.stdout
    assert "px tall (expected by the ground model where real objects stand)" in result.stdout
    assert "stage 1 restyle works_trailer: 2 jobs" in result.stdout and "(real instances in the source" in result.stdout
    assert f"output:   {tmp_path / 'out'} (new)" in result.stdout
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_dry_run_with_a_broken_model_exits_2_and_writes_nothing(tmp_path, tiny_model):  # noqa: F811
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "rarefill_model.json").write_text("{not json")
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, broken)), "--dry-run"])
    assert result.exit_code == EXIT_BAD_INPUT and "incomplete model folder, missing unet/config.json" in result.stderr
    assert not (tmp_path / "out").exists()


# 4. --job KEY: that job alone, into a scratch folder, every attempt kept, the same bytes as in the full run


def test_one_job_alone_keeps_every_attempt(tmp_path, short_run, tiny_model):  # noqa: F811
    folder, _ = short_run
    recipe = _recipe(tmp_path, tiny_model)
    scratch = tmp_path / "scratch"
    result = runner.invoke(app, ["run", str(recipe), "--job", "s0-000001", "--out", str(scratch)])
    assert result.exit_code == 0, result.output
    assert "attempt 0: rejected by" in result.stdout and "job s0-000001: not accepted in 2 attempts" in result.stdout
    record = json.loads((scratch / "job.json").read_text())
    manifest = [json.loads(x) for x in (folder / "out" / "manifest.jsonl").read_text().splitlines()]
    full = [m for m in manifest if m["job"] == "s0-000001"]
    assert [a["verdicts"] for a in record["attempts"]] == [m["verdicts"] for m in full]
    drawn = [a for a in record["attempts"] if a["boxes"]]
    assert drawn  # at least one attempt got as far as a composite
    for attempt in record["attempts"]:
        if not attempt["boxes"]:  # refused before drawing (no placement, hidden): the reason, no image
            assert attempt["rejected_by"] and attempt["reason"] and "image" not in attempt
            continue
        assert "requested_bbox" in attempt["boxes"][0]
        image = np.asarray(Image.open(scratch / attempt["image"]))
        mask = np.asarray(Image.open(scratch / attempt["mask"]))
        assert image.shape == mask.shape and set(np.unique(mask)) <= {0, 255} and mask.any()
    assert not (tmp_path / "out").exists()  # the run's own folder is left alone


def test_an_accepted_job_has_the_bytes_of_the_full_run(tmp_path, short_run, tiny_model):  # noqa: F811
    folder, _ = short_run
    recipe = _recipe(tmp_path, tiny_model)
    result = runner.invoke(app, ["run", str(recipe), "--job", "s1-000001"])
    assert result.exit_code == 0, result.output
    scratch = tmp_path / "out-job-s1-000001"
    record = json.loads((scratch / "job.json").read_text())
    accepted = record["attempts"][-1]
    assert accepted["accepted"] and record["output"] is not None
    name = record["output"]["image"]["file_name"]
    assert (scratch / accepted["image"]).read_bytes() == (folder / "out" / "images" / name).read_bytes()


def test_unknown_job_is_bad_input_naming_the_keys(tmp_path, tiny_model):  # noqa: F811
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tiny_model)), "--job", "s7-000000"])
    assert result.exit_code == EXIT_BAD_INPUT
    assert "--job: no job 's7-000000' in the plan (jobs: s0-000000 .. s0-000001, s1-000000" in result.stderr
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tiny_model)), "--job", "s0-000000", "--workers", "2"])
    assert result.exit_code == EXIT_BAD_INPUT and "--workers and --shard do not apply" in result.stderr


# 5. progress counts jobs, with accepted so far and a time estimate, and starts after validation


def test_progress_starts_after_checks_and_counts_jobs(tmp_path):
    recipe_path = tmp_path / "r.toml"
    recipe_path.write_text(TWO_STAGES.format(dataset=SEED_SCENES / "train.json", model=tmp_path / "unused"))
    recipe = load_recipe(recipe_path).with_limit(2)
    seen = []

    def progress(state):
        seen.append((state.wanted, state.done, state.accepted, (tmp_path / "out" / "run.json").is_file()))

    run_recipe(recipe, generator=BlockGenerator(), verifier=BoxVerifier(), progress=progress)
    assert seen[0] == (4, 0, 0, True)  # first call: the folder is claimed, no job made yet
    assert [s[1] for s in seen] == [0, 1, 2, 3, 4]  # one call per job done
    assert seen[-1][2] == json.loads((tmp_path / "out" / "run.json").read_text())["summary"]["accepted"]


def test_progress_bar_shows_jobs_accepted_and_an_estimate(tmp_path, tiny_model):  # noqa: F811
    result = runner.invoke(app, ["run", str(_restyle_only(tmp_path, tiny_model))])
    assert result.exit_code == 0
    assert "jobs" in result.stderr and "2/2" in result.stderr and "accepted 2" in result.stderr
    assert "eta 0:00" in result.stderr


def test_no_progress_before_a_bad_model_is_found(tmp_path):
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tmp_path / "no-model"))])
    assert result.exit_code == EXIT_BAD_INPUT and "model folder not found" in result.stderr
    assert "jobs" not in result.stderr


# 6. a stage option its kind or condition does not use is an error; provenance records only applied options


def test_an_option_the_condition_does_not_read_is_an_error(tmp_path, tiny_model):  # noqa: F811
    path = _recipe(tmp_path, tiny_model)
    path.write_text(path.read_text().replace('condition = "fog"', 'condition = "night"'))
    result = runner.invoke(app, ["run", str(path), "--dry-run"])
    assert result.exit_code == EXIT_BAD_INPUT
    assert "stage[1].visibility_m: does not apply to condition 'night' (it is read only with condition 'fog')" in (
        result.stderr
    )


def test_provenance_records_only_the_options_that_applied(short_run):
    folder, _ = short_run
    labels = json.loads((folder / "out" / "labels.json").read_text())
    options = [image["rarefill"]["stage"]["options"] for image in labels["images"]]
    assert options and all(o == {"condition": "fog", "visibility_m": 400.0, "keep_invisible_as_crowd": False}
                           for o in options)  # fmt: skip


# 7. rejected candidates keep their boxes in the manifest; reject thumbnails draw them


def test_rejected_candidates_keep_their_boxes_in_the_manifest(short_run):
    folder, _ = short_run
    manifest = [json.loads(x) for x in (folder / "out" / "manifest.jsonl").read_text().splitlines()]
    rejected = [m for m in manifest if not m["accepted"] and "reject" in m]
    assert rejected
    for line in rejected:
        (box,) = line["boxes"]
        assert box["new"] and len(box["bbox"]) == 4 and len(box["requested_bbox"]) == 4
        assert box["bbox"] != box["requested_bbox"]  # the re-fitted box is what was drawn, not what was asked


def test_reject_thumbnails_draw_the_requested_and_the_refitted_box():
    import cv2

    image = np.full((100, 200, 3), 90, np.uint8)
    boxes = [{"bbox": [40, 20, 60, 40], "requested_bbox": [120, 30, 40, 50], "new": True}]
    thumb = cv2.imdecode(np.frombuffer(encode_thumbnail(image, boxes), np.uint8), cv2.IMREAD_COLOR)[:, :, ::-1]
    assert thumb.shape == (50, 100, 3)  # half size
    refitted_top = thumb[10, 22:48].astype(int)  # (40, 20) .. (100, 60) at half size
    requested_left = thumb[17:38, 60].astype(int)  # (120, 30) .. (160, 80) at half size
    # JPEG shifts colours a little: the drawn edges stay near their colours, the grey between them stays grey
    assert np.abs(refitted_top - NEW_BOX_RGB).sum(axis=1).mean() < 60
    assert np.abs(requested_left - REQUESTED_BOX_RGB).sum(axis=1).mean() < 60
    assert np.abs(thumb[30, 35].astype(int) - 90).max() < 10


# 8. bad input leaves nothing behind: the model folder is checked before the run folder is made


@pytest.mark.parametrize("damage", ["metadata", "weights"])
def test_a_broken_model_folder_leaves_no_run_folder(tmp_path, tiny_model, damage):  # noqa: F811
    import shutil

    broken = tmp_path / "model"
    shutil.copytree(tiny_model, broken)
    if damage == "metadata":
        (broken / "rarefill_model.json").write_text("{not json")
    else:
        (broken / "unet" / "diffusion_pytorch_model.safetensors").write_bytes(b"not weights")
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, broken))])
    assert result.exit_code == EXIT_BAD_INPUT, result.output
    assert "rarefill_model.json cannot be read" in result.stderr or "weights cannot be loaded" in result.stderr
    assert not (tmp_path / "out").exists()
