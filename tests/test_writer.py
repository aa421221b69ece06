"""Run-folder assembly: ids in plan order, and the near-duplicate filter applied there."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline.errors import RunError
from pipeline.writer import RunFolder, assemble, duplicate_of


def _job(key: str, file_name: str, mark: dict) -> dict:
    attempt = {"attempt": 0, "seed": 1, "source_image_id": mark["source"], "verdicts": [], "accepted": True,
               "rejected_by": [], "file_name": f"images/{file_name}"}  # fmt: skip
    image = {"file_name": file_name, "width": 8, "height": 8}
    ann = {"category_id": 1, "bbox": [1, 1, 2, 2], "area": 4, "iscrowd": 0}
    return {"key": key, "stage": 0, "slot": 0, "attempts": [attempt],
            "output": {"image": image, "annotations": [ann], "dedupe": mark}}  # fmt: skip


def test_duplicate_needs_the_same_region_and_a_close_hash():
    base = {"source": 1, "box": [10, 10, 20, 20], "hash": "ffff0000ffff0000", "limit": 6}
    near = {**base, "hash": "ffff0000ffff0007"}  # 3 bits away
    far = {**base, "hash": "0000ffff0000ffff"}
    moved = {**near, "box": [40, 10, 20, 20]}
    assert duplicate_of(near, [(base, "a.png")])["value"] == 3
    assert duplicate_of(far, [(base, "a.png")]) is None
    assert duplicate_of(moved, [(base, "a.png")]) is None


def test_assembly_turns_a_later_duplicate_into_a_rejection(tmp_path):
    folder = RunFolder.claim(tmp_path / "run", {"format": "test"})
    mark = {"source": 7, "box": [0, 0, 8, 8], "hash": "00000000000000ff", "limit": 6}
    for name in ("a.png", "b.png", "c.png"):
        folder.write_image(name, np.zeros((8, 8, 3), dtype=np.uint8))
    jobs = [
        _job("s0-0", "a.png", mark),
        _job("s0-1", "b.png", {**mark, "hash": "00000000000000fe"}),  # 1 bit from a: duplicate
        _job("s0-2", "c.png", {**mark, "source": 8}),  # another source: kept
    ]
    folder.commit(0, jobs)
    counts = assemble(folder.root, [0], categories=[{"id": 1, "name": "car"}], info={})
    assert counts == {"attempted": 3, "accepted": 2, "annotations": 2, "duplicates": 1}
    labels = json.loads((folder.root / "labels.json").read_text())
    assert [i["file_name"] for i in labels["images"]] == ["a.png", "c.png"]
    assert [a["image_id"] for a in labels["annotations"]] == [1, 2]
    lines = [json.loads(x) for x in (folder.root / "manifest.jsonl").read_text().splitlines()]
    assert lines[1]["accepted"] is False and lines[1]["rejected_by"] == ["duplicate"]
    assert "file_name" not in lines[1]
    assert not (folder.root / "images" / "b.png").exists()
    # assembling again (a resumed run) gives the same bytes
    before = (folder.root / "labels.json").read_bytes()
    assemble(folder.root, [0], categories=[{"id": 1, "name": "car"}], info={})
    assert (folder.root / "labels.json").read_bytes() == before


def test_a_folder_with_other_files_is_not_taken(tmp_path):
    (tmp_path / "keep.txt").write_text("mine")
    with pytest.raises(RunError, match="not a rarefill run folder"):
        RunFolder.claim(tmp_path, {"format": "test"})


def test_missing_chunk_is_named(tmp_path):
    folder = RunFolder.claim(tmp_path / "run", {"format": "test"})
    with pytest.raises(RunError, match="chunk 3 is missing"):
        assemble(folder.root, [3], categories=[], info={})
