"""`rarefill run`, `collect` and `demo` through the CLI, with a tiny model trained here (no download)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from pycocotools.coco import COCO
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import load_dataset
from pipeline.demo import demo_recipe
from pipeline.generator import fit
from pipeline.generator.model import DenoiserConfig
from pipeline.generator.train import TrainSettings

from .conftest import SEED_SCENES
from .test_runner import RECIPE

runner = CliRunner()


@pytest.fixture(scope="module")
def tiny_model(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("model")
    fit(
        load_dataset(SEED_SCENES / "train.json"),
        out_dir=folder,
        steps=2,
        batch_size=4,
        config=DenoiserConfig(window=32, block_out_channels=(16, 32), norm_num_groups=8),
        settings=TrainSettings(verifier_steps=20, checkpoint_every=5),
    )
    return folder


def _recipe(tmp_path: Path, model: Path, *, count: int = 3) -> Path:
    path = tmp_path / "recipe.toml"
    path.write_text(RECIPE.format(dataset=SEED_SCENES / "train.json", model=model, output="out", count=count))
    return path


def test_run_happy_path_with_a_real_model(tmp_path, tiny_model):
    recipe = str(_recipe(tmp_path, tiny_model))
    result = runner.invoke(app, ["run", recipe, "--limit", "2", "--out", str(tmp_path / "o"), "--allow-short"])
    assert result.exit_code == 0, result.output
    assert "of 2 wanted" in result.stdout and "labels:" in result.stdout
    # COCO's reference reader loads the labels; the manifest holds every attempt
    COCO(str(tmp_path / "o" / "labels.json"))
    lines = (tmp_path / "o" / "manifest.jsonl").read_text().splitlines()
    assert len(lines) >= 2 and all("verdicts" in json.loads(line) for line in lines)


def test_missing_recipe_exits_2(tmp_path):
    result = runner.invoke(app, ["run", str(tmp_path / "none.toml")])
    assert result.exit_code == 2
    assert result.stderr.startswith(f"error: {tmp_path / 'none.toml'}: file not found")


def test_bad_recipe_key_exits_2_naming_the_key(tmp_path, tiny_model):
    path = _recipe(tmp_path, tiny_model)
    path.write_text(path.read_text().replace("count = 3", "count = -3"))
    result = runner.invoke(app, ["run", str(path)])
    assert result.exit_code == 2
    assert "stage[0].count: must be in [1," in result.stderr and "Traceback" not in result.output


def test_missing_model_exits_2(tmp_path):
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tmp_path / "no-model")), "--limit", "1"])
    assert result.exit_code == 2
    assert "model folder not found" in result.stderr


def test_bad_shard_exits_2(tmp_path, tiny_model):
    result = runner.invoke(app, ["run", str(_recipe(tmp_path, tiny_model)), "--shard", "3/3"])
    assert result.exit_code == 2 and "0 <= i < N" in result.stderr


def test_other_run_in_the_folder_exits_1(tmp_path, tiny_model):
    recipe = str(_recipe(tmp_path, tiny_model))
    assert runner.invoke(app, ["run", recipe, "--limit", "1", "--allow-short"]).exit_code == 0
    result = runner.invoke(app, ["run", recipe, "--limit", "2"])
    assert result.exit_code == 1 and "holds another run" in result.stderr


def test_collect_refuses_an_incomplete_set_of_shards(tmp_path, tiny_model):
    recipe = str(_recipe(tmp_path, tiny_model, count=9))
    part = tmp_path / "p0"
    assert runner.invoke(app, ["run", recipe, "--shard", "0/2", "--out", str(part), "--allow-short"]).exit_code == 0
    result = runner.invoke(app, ["collect", str(part), "--out", str(tmp_path / "whole")])
    assert result.exit_code == 2 and "shard 1/2 missing" in result.stderr


def test_shard_auto_takes_the_slurm_array_task(tmp_path, tiny_model, monkeypatch):
    monkeypatch.delenv("JOB_COMPLETION_INDEX", raising=False)
    monkeypatch.setenv("SLURM_ARRAY_TASK_ID", "1")
    monkeypatch.setenv("SLURM_ARRAY_TASK_COUNT", "2")
    recipe = str(_recipe(tmp_path, tiny_model, count=9))
    result = runner.invoke(app, ["run", recipe, "--shard", "auto", "--out", str(tmp_path / "p1"), "--allow-short"])
    assert result.exit_code == 0, result.output
    assert "shard 1/2 (from SLURM_ARRAY_TASK_ID=1" in result.stderr
    assert json.loads((tmp_path / "p1" / "run.json").read_text())["shard"] == "1/2"
    # 9 jobs are chunks 0 (8 jobs) and 1 (1 job): shard 1/2 made the second only
    assert sorted(p.name for p in (tmp_path / "p1" / "chunks").iterdir()) == ["000001.json"]


def test_shard_auto_outside_a_scheduler_exits_2(tmp_path, monkeypatch):
    for name in ("SLURM_ARRAY_TASK_ID", "SLURM_ARRAY_TASK_COUNT", "JOB_COMPLETION_INDEX"):
        monkeypatch.delenv(name, raising=False)
    result = runner.invoke(app, ["run", str(tmp_path / "any.toml"), "--shard", "auto"])
    assert result.exit_code == 2 and "--shard auto: no scheduler index" in result.stderr


def test_demo_recipe_is_valid():
    recipe = demo_recipe()
    assert recipe.dataset == SEED_SCENES / "train.json"
    assert {s.kind for s in recipe.stages} >= {"insert"}
