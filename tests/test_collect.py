"""`collect` checks the shard folders before it merges: one plan, each shard once, each finished."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.collect import collect, verify_shards
from pipeline.errors import ShardError

from .test_runner import fake_run, folder_bytes, write_recipe

runner = CliRunner()


@pytest.fixture(scope="module")
def shards(tmp_path_factory) -> tuple[Path, list[Path]]:
    """Four finished shards of a 32-job recipe (4 chunks, one per shard) and the single-machine run."""
    root = tmp_path_factory.mktemp("shards")
    recipe = write_recipe(root, count=32)
    fake_run(recipe, root / "single")
    parts = []
    for i in range(4):
        fake_run(recipe, root / f"part{i}", shard=(i, 4))
        parts.append(root / f"part{i}")
    return root, parts


def _copy_tree(source: Path, target: Path) -> Path:
    for path in source.rglob("*"):
        if path.is_file():
            (target / path.relative_to(source)).parent.mkdir(parents=True, exist_ok=True)
            (target / path.relative_to(source)).write_bytes(path.read_bytes())
    return target


def _collect_cli(parts, out: Path):
    return runner.invoke(app, ["collect", *map(str, parts), "--out", str(out)])


def test_collected_shards_in_any_order_equal_the_single_run(shards, tmp_path):
    root, parts = shards
    result = _collect_cli(parts[::-1], tmp_path / "whole")
    assert result.exit_code == 0, result.output
    assert folder_bytes(tmp_path / "whole") == folder_bytes(root / "single")


def test_missing_shard_exits_2_naming_it(shards, tmp_path):
    _, parts = shards
    result = _collect_cli([parts[0], parts[1], parts[3]], tmp_path / "whole")
    assert result.exit_code == 2
    assert "shard 2/4 missing" in result.stderr
    assert not (tmp_path / "whole").exists()  # nothing is written before the shards check out


def test_duplicated_shard_exits_2_naming_both_folders(shards, tmp_path):
    _, parts = shards
    twin = _copy_tree(parts[1], tmp_path / "part1-again")
    result = _collect_cli([*parts, twin], tmp_path / "whole")
    assert result.exit_code == 2
    assert "shard 1/4 is given twice" in result.stderr
    assert str(parts[1]) in result.stderr and str(twin) in result.stderr


def test_shard_of_another_plan_exits_2_naming_it(shards, tmp_path):
    root, parts = shards
    # the same recipe with another seed has another plan: its shard 3/4 must not be mixed in
    other = tmp_path / "recipe.toml"
    other.write_text((root / "recipe.toml").read_text().replace("seed = 3", "seed = 4"))
    fake_run(other, tmp_path / "other3", shard=(3, 4))
    result = _collect_cli([*parts[:3], tmp_path / "other3"], tmp_path / "whole")
    assert result.exit_code == 2
    assert f"shard 3/4 ({tmp_path / 'other3'}) comes from another plan" in result.stderr
    assert "plan_sha256" in result.stderr


def test_shard_of_another_split_exits_2(shards, tmp_path):
    _, parts = shards
    fake_run(parts[0].parent / "recipe.toml", tmp_path / "third", shard=(1, 3))
    with pytest.raises(ShardError, match=r"shard 1/3 .* is one of 3 shards, but shard 0/4 .* is one of 4"):
        verify_shards([parts[0], tmp_path / "third"])


def test_unfinished_shard_exits_2_saying_how_far_short(shards, tmp_path):
    root, parts = shards
    # as if shard 2/4 were killed before it committed its chunk: no chunk record and no labels yet
    cut = _copy_tree(parts[2], tmp_path / "cut")
    for name in ("chunks/000002.json", "labels.json"):
        (cut / name).unlink()
    given = [parts[0], parts[1], cut, parts[3]]
    result = _collect_cli(given, tmp_path / "whole")
    assert result.exit_code == 2
    assert f"shard 2/4 ({cut}) committed 0 of 1 chunks, 1 short (chunks 2)" in result.stderr
    assert "resumes" in result.stderr  # the hint says how to finish it
    # once the shard is run again it resumes, and collect then gives the single-run bytes
    fake_run(root / "recipe.toml", cut, shard=(2, 4))
    assert _collect_cli(given, tmp_path / "whole").exit_code == 0
    assert folder_bytes(tmp_path / "whole") == folder_bytes(root / "single")


def test_shard_stopped_before_its_labels_is_unfinished(shards, tmp_path):
    _, parts = shards
    cut = _copy_tree(parts[2], tmp_path / "cut")
    (cut / "labels.json").unlink()
    with pytest.raises(ShardError, match=r"shard 2/4 .* stopped before writing labels.json"):
        collect([parts[0], parts[1], cut, parts[3]], tmp_path / "whole")


def test_shard_lacking_an_image_its_chunk_names_is_unfinished(shards, tmp_path):
    _, parts = shards
    cut = _copy_tree(parts[3], tmp_path / "cut")
    record = json.loads((cut / "chunks" / "000003.json").read_text())
    image = next(a["file_name"] for j in record["jobs"] for a in j["attempts"] if "file_name" in a)
    (cut / image).unlink()
    with pytest.raises(ShardError, match=rf"shard 3/4 .* lacks {image}, named by chunk 3"):
        verify_shards([*parts[:3], cut])


def test_folder_that_is_no_run_exits_2(shards, tmp_path):
    _, parts = shards
    (tmp_path / "empty").mkdir()
    result = _collect_cli([*parts, tmp_path / "empty"], tmp_path / "whole")
    assert result.exit_code == 2 and "is not a rarefill run folder" in result.stderr
