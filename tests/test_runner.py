"""The recipe runner end to end with a fake generator: labels, determinism, resume after kill -9, shards."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
from pycocotools.coco import COCO

from pipeline.collect import collect
from pipeline.dataset import load_dataset
from pipeline.errors import DatasetWarning, RecipeError, RunError
from pipeline.preview import preview_recipe
from pipeline.recipe import load_recipe
from pipeline.runner import prepare, run_recipe

from .conftest import SEED_SCENES
from .fakes import AlwaysVerifier, BlockGenerator, ShadeGenerator

RECIPE = """
[run]
name = "test-tractors"
seed = 3
dataset = "{dataset}"
model = "{model}"
output = "{output}"
steps = 2
attempts_per_output = 3

[[stage]]
kind = "insert"
class = "tractor"
count = {count}
objects_per_image = [1, 2]
{options}"""


def write_recipe(
    folder: Path, *, count: int = 12, output: str = "out", name: str = "recipe.toml", options: str = ""
) -> Path:
    path = folder / name
    text = RECIPE.format(
        dataset=SEED_SCENES / "train.json", model=folder / "no-model", output=output, count=count, options=options
    )
    path.write_text(text)
    return path


def fake_run(recipe_path: Path, out: Path | None = None, **kwargs):
    recipe = load_recipe(recipe_path)
    if out is not None:
        recipe = recipe.with_output(out)
    return run_recipe(recipe, generator=BlockGenerator(), verifier=AlwaysVerifier(), **kwargs)


def folder_bytes(root: Path) -> dict[str, bytes]:
    """Every file a run leaves, except the time-stamped log."""
    return {
        str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file() and p.name != "run.log"
    }


def test_run_writes_coco_labels_with_provenance(tmp_path):
    summary = fake_run(write_recipe(tmp_path))
    out = tmp_path / "out"
    assert summary.wanted == 12 and summary.accepted >= 6
    # pycocotools, the COCO project's reference reader, loads the labels unchanged
    ref = COCO(str(out / "labels.json"))
    assert len(ref.getImgIds()) == summary.accepted
    labels = json.loads((out / "labels.json").read_text())
    tractor = next(c["id"] for c in labels["categories"] if c["name"] == "tractor")
    source_set = load_dataset(SEED_SCENES / "train.json")
    by_id = {s.id: s for s in source_set.scenes}
    for image in labels["images"]:
        prov = image["rarefill"]
        assert prov["synthetic"] and prov["stage"]["kind"] == "insert"
        assert (out / "images" / image["file_name"]).is_file()
        anns = [a for a in labels["annotations"] if a["image_id"] == image["id"]]
        new = [a for a in anns if a["rarefill"]["synthetic"]]
        kept = [a for a in anns if not a["rarefill"]["synthetic"]]
        assert 1 <= len(new) <= 2 and all(a["category_id"] == tractor for a in new)
        # the source image's real annotations come along unchanged, except those the new object hides
        source = by_id[prov["source"]["image_id"]]
        hidden = [d["annotation_id"] for d in prov["details"].get("dropped", [])]
        carried = [a["rarefill"]["source_annotation_id"] for a in kept]
        assert sorted(carried + hidden) == sorted(a.id for a in source.annotations)
        originals = {a.id: a for a in source.annotations}
        clipped = {c["annotation_id"]: c["bbox"] for c in prov["details"].get("clipped", [])}
        for a in kept:
            original = originals[a["rarefill"]["source_annotation_id"]]
            assert a["bbox"] == clipped.get(original.id, list(original.bbox))
        for a in new:
            x, y, w, h = a["bbox"]
            assert x >= 0 and y >= 0 and x + w <= image["width"] and y + h <= image["height"]
        # every filter it was accepted by passed
        assert all(v["passed"] for v in prov["filters"])
    manifest = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert len(manifest) == summary.attempted and sum(m["accepted"] for m in manifest) == summary.accepted
    # a job without an accepted output used its whole attempt budget, each rejection naming its filter
    jobs = {m["job"] for m in manifest}
    for job in jobs:
        lines = [m for m in manifest if m["job"] == job]
        assert any(m["accepted"] for m in lines) or len(lines) == 3
        assert all(m["rejected_by"] for m in lines if not m["accepted"])


def test_new_box_is_refitted_to_the_drawn_pixels(tmp_path):
    fake_run(write_recipe(tmp_path, count=4, options='appearance = "generated"'))
    out = tmp_path / "out"
    labels = json.loads((out / "labels.json").read_text())
    for image in labels["images"]:
        pixels = np.asarray(__import__("PIL.Image").Image.open(out / "images" / image["file_name"]).convert("RGB"))
        source = load_dataset(SEED_SCENES / "train.json").scenes
        original = next(s for s in source if s.id == image["rarefill"]["source"]["image_id"]).load_rgb()
        changed = (pixels != original).any(axis=2)
        for a in labels["annotations"]:
            if a["image_id"] == image["id"] and a["rarefill"]["synthetic"]:
                x, y, w, h = (int(round(v)) for v in a["bbox"])
                inside = changed[y : y + h, x : x + w]
                # the label hugs the block the fake drew: every edge row/column of the box has changed pixels
                assert inside[0].any() and inside[-1].any() and inside[:, 0].any() and inside[:, -1].any()


def test_same_recipe_same_bytes(tmp_path):
    recipe = write_recipe(tmp_path)
    fake_run(recipe, tmp_path / "a")
    fake_run(recipe, tmp_path / "b")
    assert folder_bytes(tmp_path / "a") == folder_bytes(tmp_path / "b")


def test_resume_after_lost_chunks_gives_the_same_result(tmp_path):
    recipe = write_recipe(tmp_path, count=20)
    fake_run(recipe)
    whole = folder_bytes(tmp_path / "out")
    for name in ("chunks/000001.json", "labels.json", "manifest.jsonl"):
        (tmp_path / "out" / name).unlink()
    summary = fake_run(recipe)
    assert summary.chunks_skipped == 2
    assert folder_bytes(tmp_path / "out") == whole


def test_another_recipe_cannot_reuse_the_folder(tmp_path):
    fake_run(write_recipe(tmp_path, count=4))
    with pytest.raises(RunError, match="holds another run"):
        fake_run(write_recipe(tmp_path, count=5))


def test_shards_and_collect_equal_a_single_run(tmp_path):
    recipe = write_recipe(tmp_path, count=20)
    fake_run(recipe)
    single = folder_bytes(tmp_path / "out")
    parts = []
    for i in range(3):
        part = tmp_path / f"part{i}"
        fake_run(recipe, part, shard=(i, 3))
        parts.append(part)
    collect(parts, tmp_path / "whole")
    assert folder_bytes(tmp_path / "whole") == single


def test_denoising_is_batched_per_chunk(tmp_path):
    generator = ShadeGenerator()
    run_recipe(load_recipe(write_recipe(tmp_path, count=8)), generator=generator, verifier=AlwaysVerifier())
    assert generator.calls[0] >= 8  # the first round of a chunk of 8 jobs is one call


def test_a_data_set_without_masks_warns_once_with_the_count(tmp_path):
    coco = json.loads((SEED_SCENES / "train.json").read_text())
    for image in coco["images"]:
        del image["drivable_mask"]
    (tmp_path / "nomasks.json").write_text(json.dumps(coco))
    recipe = write_recipe(tmp_path, count=4)
    text = recipe.read_text().replace(str(SEED_SCENES / "train.json"), str(tmp_path / "nomasks.json"))
    recipe.write_text(text.replace("[run]\n", f'[run]\nimages = "{SEED_SCENES / "images"}"\n'))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        summary = fake_run(recipe)
    assert summary.attempted >= 4  # the surfaces of many images were estimated on the way
    messages = [str(w.message) for w in caught if issubclass(w.category, DatasetWarning)]
    assert len(messages) == 1, messages
    assert f"{len(coco['images'])} of {len(coco['images'])} images name no drivable mask" in messages[0]


def test_unknown_class_is_a_usage_error(tmp_path):
    path = write_recipe(tmp_path)
    path.write_text(path.read_text().replace('class = "tractor"', 'class = "combine"'))
    with pytest.raises(Exception, match="'combine' is not a category"):
        prepare(load_recipe(path))


def test_a_class_the_model_does_not_know_is_refused_before_anything_is_written(tmp_path):
    # The model is asked for the class when it repaints the placed exemplar (or draws the object); a model
    # trained on other data does not know it. The run must say so up front, not fail inside a worker.
    recipe = load_recipe(write_recipe(tmp_path, count=4))
    other = ShadeGenerator(classes=("car", "van"))
    refusal = r"stage\[0\]\.class: the model .* does not know 'tractor' \(its classes: car, van\)"
    with pytest.raises(RecipeError, match=refusal):
        run_recipe(recipe, generator=other, verifier=AlwaysVerifier())
    with pytest.raises(RecipeError, match=refusal):  # --dry-run checks what the run would
        preview_recipe(recipe, generator=other)
    assert not (tmp_path / "out").exists()
    pasted = load_recipe(write_recipe(tmp_path, count=4, output="pasted", options="harmonise = false"))
    assert run_recipe(pasted, generator=other, verifier=AlwaysVerifier()).accepted == 4  # the model is not asked


KILL_SCRIPT = """
import sys
from pathlib import Path
from pipeline.recipe import load_recipe
from pipeline.runner import run_recipe
from tests.fakes import AlwaysVerifier, BlockGenerator

class SlowGenerator(BlockGenerator):
    def inpaint(self, requests, **kw):
        import time
        time.sleep(0.15)
        return super().inpaint(requests, **kw)

recipe = load_recipe(sys.argv[1]).with_output(Path(sys.argv[2]))
run_recipe(recipe, generator=SlowGenerator(), verifier=AlwaysVerifier())
"""


def test_kill_9_and_rerun_gives_the_uninterrupted_result(tmp_path):
    recipe = write_recipe(tmp_path, count=40)
    fake_run(recipe, tmp_path / "reference")
    repo = Path(__file__).resolve().parents[1]
    env = {**os.environ, "PYTHONPATH": str(repo)}
    killed = tmp_path / "killed"
    process = subprocess.Popen([sys.executable, "-c", KILL_SCRIPT, str(recipe), str(killed)], env=env, cwd=repo)
    chunks = tmp_path / "killed" / "chunks"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and len(list(chunks.glob("*.json"))) < 2:
        time.sleep(0.05)
    process.send_signal(signal.SIGKILL)
    process.wait()
    done = len(list(chunks.glob("*.json")))
    assert 2 <= done < 5, "the run should have been killed part-way"
    summary = fake_run(recipe, killed)
    assert summary.chunks_skipped >= 2
    assert folder_bytes(killed) == folder_bytes(tmp_path / "reference")


def test_objects_hidden_by_an_insert_leave_the_labels_and_nearer_ones_are_never_painted_over(tmp_path):
    fake_run(write_recipe(tmp_path, count=16, options='appearance = "generated"'))
    out = tmp_path / "out"
    labels = json.loads((out / "labels.json").read_text())
    source = {s.id: s for s in load_dataset(SEED_SCENES / "train.json").scenes}
    for image in labels["images"]:
        new = [a for a in labels["annotations"] if a["image_id"] == image["id"] and a["rarefill"]["synthetic"]]
        lowest_new = max(a["rarefill"]["requested_bbox"][1] + a["rarefill"]["requested_bbox"][3] for a in new)
        for dropped in image["rarefill"]["details"].get("dropped", []):
            ann = next(a for a in source[image["rarefill"]["source"]["image_id"]].annotations
                       if a.id == dropped["annotation_id"])  # fmt: skip
            assert ann.bottom_row <= lowest_new  # only farther objects end up hidden
    manifest = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    occlusions = [m for m in manifest if m["rejected_by"] == ["occlusion"]]
    assert all("nearer annotation" in m["reason"] for m in occlusions)
