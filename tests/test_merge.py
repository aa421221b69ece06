"""`rarefill merge`: ratio control, stratified selection, leakage guard, vocabularies, ids, determinism, CLI.

Every test builds a tiny real split, held-out splits and synthetic run folders (in the run-folder format of
notes/INTERFACES.md, written by hand here) in ``tmp_path``.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings
from collections import Counter
from pathlib import Path

import pytest
from pycocotools.coco import COCO
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.dataset import load_dataset
from pipeline.errors import DatasetError, DatasetWarning, UsageError
from pipeline.merge import Candidate, load_mapping, merge, parse_caps, select_synthetic

from .conftest import write_png

runner = CliRunner()
W, H = 24, 16
CATEGORIES = [{"id": 1, "name": "car"}, {"id": 4, "name": "tractor"}, {"id": 5, "name": "works_trailer"}]


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def write_split(root: Path, name: str, n: int, *, seed: int, rare: dict[int, int] | None = None) -> Path:
    """A split of ``n`` images, one car each; ``rare`` adds {image index: category id} objects."""
    images, annotations = [], []
    for i in range(n):
        file_name = f"{name}_{i + 1:04d}.png"
        write_png(root / "images" / file_name, W, H, seed=seed + i)
        images.append({"id": i + 1, "file_name": file_name, "width": W, "height": H})
        annotations.append({"id": len(annotations) + 1, "image_id": i + 1, "category_id": 1, "bbox": [1, 2, 6, 4]})
    for i, category_id in (rare or {}).items():
        annotations.append(
            {"id": len(annotations) + 1, "image_id": i + 1, "category_id": category_id, "bbox": [12, 3, 8, 6]}
        )
    for ann in annotations:
        ann.update(area=ann["bbox"][2] * ann["bbox"][3], iscrowd=0)
    path = root / f"{name}.json"
    path.write_text(
        json.dumps(
            {"info": {"description": name}, "images": images, "annotations": annotations, "categories": CATEGORIES}
        )
    )
    return path


def write_run(folder: Path, items: list[dict], *, categories=CATEGORIES, seed: int = 1000) -> Path:
    """A run folder: labels.json with provenance, images/*.png, run.json (notes/INTERFACES.md "Run folder").

    Each item: {"source": (image_id, file_name, sha256), "class": stage target class, "new": [category id],
    "kept": [category id]}.
    """
    by_name = {c["name"]: c["id"] for c in categories}
    images, annotations = [], []
    for k, item in enumerate(items):
        image_id = k + 1
        file_name = f"run_{image_id:04d}.png"
        write_png(folder / "images" / file_name, W, H, seed=seed + k)
        source_id, source_file, source_sha = item["source"]
        images.append(
            {
                "id": image_id,
                "file_name": file_name,
                "width": W,
                "height": H,
                "rarefill": {
                    "synthetic": True,
                    "recipe": {"name": "more-rare", "sha256": "0" * 64},
                    "stage": {"index": 0, "kind": "insert", "class": item.get("class"), "options": {}},
                    "source": {"image_id": source_id, "file_name": source_file, "sha256": source_sha},
                    "job": {"key": f"s0-{k}", "attempt": 0, "seed": k},
                    "model": {"kind": "fake"},
                    "filters": {},
                    "details": {},
                    "versions": {},
                },
            }
        )
        for category_id in item.get("kept", [by_name["car"]]):
            annotations.append(
                {
                    "category_id": category_id,
                    "bbox": [1, 2, 6, 4],
                    "area": 24,
                    "iscrowd": 0,
                    "rarefill": {"synthetic": False, "source_annotation_id": 1},
                }
            )
            annotations[-1]["image_id"] = image_id
        for category_id in item.get("new", []):
            annotations.append(
                {
                    "category_id": category_id,
                    "bbox": [12, 3, 8, 6],
                    "area": 48,
                    "iscrowd": 0,
                    "image_id": image_id,
                    "rarefill": {"synthetic": True, "stage": "insert", "requested_bbox": [12, 3, 8, 6]},
                }
            )
    for i, ann in enumerate(annotations):
        ann["id"] = i + 1
    labels = {
        "info": {"description": "synthetic", "recipe_sha256": "0" * 64, "shard": "0/1"},
        "images": images,
        "annotations": annotations,
        "categories": categories,
    }
    (folder / "labels.json").write_text(json.dumps(labels))
    (folder / "run.json").write_text(json.dumps({"format": "rarefill.run/1", "categories": categories}))
    return folder


class World:
    """Real train (8 images; 1 tractor, 1 works_trailer), val and test (3 images each; ids 1..3 collide with
    train's), and a run folder of 10 tractor + 10 works_trailer images made from train images."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.train = write_split(root / "real", "train", 8, seed=0, rare={0: 4, 1: 5})
        self.val = write_split(root / "held", "val", 3, seed=100)
        self.test = write_split(root / "held", "test", 3, seed=200)
        self.train_images = root / "real" / "images"
        self.out = root / "merged.json"
        items = [self.item(k % 8, "tractor", 4) for k in range(10)]
        items += [self.item(k % 8, "works_trailer", 5) for k in range(10)]
        self.run = write_run(root / "runs" / "a", items)

    def source(self, split: str, index: int) -> tuple[int, str, str]:
        file_name = f"{split}_{index + 1:04d}.png"
        folder = self.train_images if split == "train" else self.root / "held" / "images"
        return (index + 1, file_name, sha256(folder / file_name))

    def item(self, index: int, cls: str, category_id: int, split: str = "train") -> dict:
        return {"source": self.source(split, index), "class": cls, "new": [category_id]}

    def merge(self, *, strict: bool = True, **options):
        """Merge with the world's defaults; an unexpected DatasetWarning fails the test unless not strict."""
        options.setdefault("synthetic", [self.run])
        options.setdefault("guards", [self.val, self.test])
        options.setdefault("out", self.out)
        with warnings.catch_warnings():
            if strict:
                warnings.simplefilter("error", DatasetWarning)
            return merge(self.train, **options)

    def output(self) -> dict:
        return json.loads(self.out.read_text())


@pytest.fixture
def world(tmp_path: Path) -> World:
    return World(tmp_path)


def synthetic_entries(coco: dict) -> list[dict]:
    return [im for im in coco["images"] if im.get("rarefill", {}).get("synthetic")]


def instances(coco: dict) -> Counter:
    names = {c["id"]: c["name"] for c in coco["categories"]}
    return Counter(names[a["category_id"]] for a in coco["annotations"] if not a["iscrowd"])


# --------------------------------------------------------------------------------------------------
# ratio control


@pytest.mark.parametrize("share", [0.0, 0.1, 0.25, 0.3, 0.5, 0.6, 2 / 3])
def test_share_is_exact_to_one_image(world, share):
    summary = world.merge(synthetic_share=share, seed=3)
    coco = world.output()
    n_real, n_syn = 8, len(synthetic_entries(coco))
    assert len(coco["images"]) == n_real + n_syn == summary.real_images + summary.synthetic_selected
    # The share s / (n + s) moves in steps of about 1 / (n + s); the nearest integer s is within one image.
    assert abs(n_syn / (n_real + n_syn) - share) <= 1 / (n_real + n_syn)
    best = min(range(0, 21), key=lambda s: abs(s / (n_real + s) - share))
    assert n_syn == best and summary.shortfalls == ()


def test_every_real_image_is_kept_first_with_its_annotations(world):
    world.merge(synthetic_share=0.5)
    coco = world.output()
    train = json.loads(world.train.read_text())
    real = coco["images"][:8]
    assert [Path(im["file_name"]).name for im in real] == [im["file_name"] for im in train["images"]]
    assert sum(a["image_id"] <= 8 for a in coco["annotations"]) == len(train["annotations"])


def test_share_is_stratified_by_target_class(world):
    world.merge(synthetic_share=0.5, seed=11)  # 8 synthetic of 10 tractor + 10 works_trailer images
    groups = Counter(im["rarefill"]["stage"]["class"] for im in synthetic_entries(world.output()))
    assert groups == {"tractor": 4, "works_trailer": 4}


def test_stratification_gives_a_small_group_its_share():
    # 18 images for one class, 2 for another: a plain random draw of 4 would usually miss the small group.
    candidates = [Candidate("tractor", {"tractor": 1})] * 18 + [Candidate("works_trailer", {"works_trailer": 1})] * 2
    for seed in range(20):
        chosen = select_synthetic(candidates, real_counts={}, rare=["tractor", "works_trailer"], n_wanted=4, rng=seed)
        assert Counter(candidates[i].group for i in chosen) == {"tractor": 2, "works_trailer": 2}
    # A group that runs out leaves its turns to the others.
    chosen = select_synthetic(candidates, real_counts={}, rare=[], n_wanted=10, rng=0)
    assert Counter(candidates[i].group for i in chosen) == {"tractor": 8, "works_trailer": 2}


def test_share_beyond_what_is_available_reports_what_was_reached(world):
    with pytest.warns(DatasetWarning, match=r"reached share 0\.7143 \(20 of 28 images\)"):
        summary = world.merge(strict=False, synthetic_share=0.9)
    assert summary.synthetic_wanted == 72 and summary.synthetic_selected == 20
    assert len(summary.shortfalls) == 1 and "only 20 of 20 available" in summary.shortfalls[0]


def test_rare_target_is_reached_with_the_fewest_images(world):
    summary = world.merge(rare_target=4, rare_below=5)
    coco = world.output()
    # Real: 1 tractor, 1 works_trailer; each synthetic image adds one new object of its class.
    assert instances(coco)["tractor"] == 4 and instances(coco)["works_trailer"] == 4
    assert len(synthetic_entries(coco)) == 6 and summary.shortfalls == ()
    assert {c.name: c.rare for c in summary.classes} == {"car": False, "tractor": True, "works_trailer": True}


def test_rare_target_shortfall_is_reported(world):
    with pytest.warns(DatasetWarning, match=r"rare target 20 not reached for (tractor|works_trailer): 11 instances"):
        summary = world.merge(strict=False, rare_target=20)
    assert instances(world.output())["tractor"] == 11
    assert len(summary.shortfalls) == 2 and "real 1 + synthetic 10" in summary.shortfalls[0]


def test_caps_are_respected(world):
    with pytest.warns(DatasetWarning, match="limited by its cap of 2 synthetic instances"):
        summary = world.merge(strict=False, rare_target=6, caps={"tractor": 2})
    counts = instances(world.output())
    assert counts["tractor"] == 1 + 2 and counts["works_trailer"] == 6
    # Every synthetic image also carries a car from its source: a car cap limits every image.
    with pytest.warns(DatasetWarning, match="reached share"):
        summary = world.merge(strict=False, synthetic_share=0.5, caps={"car": 3})
    assert summary.synthetic_selected == 3 and instances(world.output())["car"] == 8 + 3


def test_parse_caps():
    assert parse_caps(["tractor=3", "works_trailer = 0"]) == {"tractor": 3, "works_trailer": 0}
    for bad in (["tractor"], ["tractor=-1"], ["=3"], ["tractor=x"], ["tractor=1", "tractor=2"]):
        with pytest.raises(UsageError, match="--cap"):
            parse_caps(bad)


# --------------------------------------------------------------------------------------------------
# leakage guard


def test_image_made_from_a_test_image_is_left_out_even_with_a_colliding_id(world):
    # test_0001.png has image id 1, as train_0001.png does; only the file hash tells them apart.
    leak = world.item(0, "tractor", 4, split="test")
    fine = world.item(0, "tractor", 4, split="train")
    assert leak["source"][0] == fine["source"][0] == 1
    run = write_run(world.root / "runs" / "b", [leak, fine])
    with pytest.warns(DatasetWarning, match=r"left out 1 synthetic image\(s\) made from held-out images"):
        summary = world.merge(strict=False, synthetic=[run], synthetic_share=0.1)
    assert summary.excluded == {"hash": 1, "id+file_name": 0}
    kept = synthetic_entries(world.output())
    assert [im["rarefill"]["source"]["sha256"] for im in kept] == [fine["source"][2]]


def test_id_and_file_name_is_a_second_guard_key(world):
    # The held-out image's file is gone (cannot be hashed) and the recorded hash matches nothing on disk.
    (world.root / "held" / "images" / "val_0002.png").unlink()
    leak = {"source": (2, "val_0002.png", "a" * 64), "class": "tractor", "new": [4]}
    run = write_run(world.root / "runs" / "b", [leak, world.item(3, "tractor", 4)])
    with pytest.warns(DatasetWarning) as caught:
        summary = world.merge(strict=False, synthetic=[run], synthetic_share=0.1)
    messages = [str(w.message) for w in caught]
    assert any("1 guarded image file(s) not found" in m for m in messages)
    assert summary.excluded == {"hash": 0, "id+file_name": 1} and summary.synthetic_selected == 1


def test_training_image_identical_to_a_held_out_image_is_refused(world):
    shutil.copyfile(world.root / "held" / "images" / "test_0003.png", world.train_images / "train_0005.png")
    with pytest.raises(DatasetError, match=r"images\[4\]: training image train_0005.png is byte-identical to "):
        world.merge(synthetic_share=0.2)
    assert not world.out.exists()


def test_the_guard_cannot_be_left_out(world):
    with pytest.raises(UsageError, match="held-out splits to guard"):
        world.merge(synthetic_share=0.2, guards=[])


def test_synthetic_image_without_provenance_is_refused(world):
    labels = json.loads((world.run / "labels.json").read_text())
    del labels["images"][2]["rarefill"]["source"]["sha256"]
    (world.run / "labels.json").write_text(json.dumps(labels))
    with pytest.raises(DatasetError, match=r"labels.json: images\[2\].rarefill.source.sha256: must be a SHA-256"):
        world.merge(synthetic_share=0.2)


# --------------------------------------------------------------------------------------------------
# output format


def test_output_loads_in_pycocotools_with_unique_ids(world):
    world.merge(synthetic_share=0.5)
    # pycocotools (Lin et al., "Microsoft COCO: Common Objects in Context", 2014; cocodataset/cocoapi) is
    # the reference reader of the format: it indexes images, annotations and categories by id.
    coco = COCO(str(world.out))
    raw = world.output()
    assert sorted(coco.getImgIds()) == list(range(1, len(raw["images"]) + 1)) == [im["id"] for im in raw["images"]]
    assert sorted(coco.getAnnIds()) == list(range(1, len(raw["annotations"]) + 1))
    assert coco.getCatIds() == [1, 4, 5]
    # 8 real images (10 real annotations) + 8 synthetic images (a car and a new rare object each).
    assert len(coco.getAnnIds()) == 10 + 16 and len(coco.getAnnIds(catIds=[1])) == 16
    for image_id in coco.getImgIds():
        entry = coco.loadImgs(image_id)[0]
        assert (world.out.parent / entry["file_name"]).is_file()  # relative to the output JSON's folder
    assert load_dataset(world.out).scenes[-1].path.is_file()  # our own loader reads it too


def test_provenance_survives_the_merge(world):
    world.merge(synthetic_share=0.2)
    coco = world.output()
    run = json.loads((world.run / "labels.json").read_text())
    image = synthetic_entries(coco)[0]
    original = next(im for im in run["images"] if im["id"] == image["rarefill"]["merged_from"]["image_id"])
    assert {k: v for k, v in image["rarefill"].items() if k != "merged_from"} == original["rarefill"]
    anns = [a for a in coco["annotations"] if a["image_id"] == image["id"]]
    assert [a["rarefill"]["synthetic"] for a in anns] == [False, True]
    assert coco["info"]["merge"]["synthetic_share"] == 0.2 and "time" not in json.dumps(coco["info"])


def test_merging_twice_gives_identical_bytes_and_the_seed_matters(world):
    world.merge(synthetic_share=0.3, seed=5)
    first = world.out.read_bytes()
    world.merge(synthetic_share=0.3, seed=5)
    assert world.out.read_bytes() == first
    picks = set()
    for seed in range(6):
        world.merge(synthetic_share=0.3, seed=seed)
        picks.add(tuple(im["rarefill"]["job"]["key"] for im in synthetic_entries(world.output())))
    assert len(picks) > 1


def test_info_records_the_inputs_hashes(world):
    world.merge(rare_target=3, caps={"tractor": 5}, seed=9)
    merge_info = world.output()["info"]["merge"]
    assert merge_info["rare_target"] == 3 and merge_info["seed"] == 9 and merge_info["caps"] == {"tractor": 5}
    hashes = {entry["file"]: entry["sha256"] for entry in merge_info["inputs"]}
    assert hashes["real/train.json"] == sha256(world.train)
    assert hashes["runs/a/labels.json"] == sha256(world.run / "labels.json")
    assert hashes["held/test.json"] == sha256(world.test)


def test_relative_file_names_leaving_the_image_folder_are_flagged(world):
    out = world.root / "merged" / "train.json"
    with pytest.warns(DatasetWarning, match=r"16 file_name\(s\) climb out of the image folder"):
        world.merge(strict=False, synthetic_share=0.5, out=out, images_mode="relative")
    names = [im["file_name"] for im in json.loads(out.read_text())["images"]]
    assert names[0] == "../real/images/train_0001.png"
    assert all((out.parent / name).is_file() for name in names)


@pytest.mark.parametrize("where", ["merged/train.json", "real/merged.json", "merged.json"])
def test_the_default_output_loads_back_in_stats(world, where):
    # merged/: relative names would need ../; real/: an images/ folder beside the output is where the
    # loader looks, not the output's own folder
    out = world.root / where
    result = runner.invoke(app, cli_args(world, "--synthetic-share", "0.5", "--out", str(out)))
    assert result.exit_code == 0, result.output
    assert "warning" not in result.stderr
    result = runner.invoke(app, ["stats", str(out), "--json"])
    assert result.exit_code == 0, result.output
    merged = load_dataset(out)
    assert len(merged.scenes) == 16 and all(scene.path.is_file() for scene in merged.scenes)
    assert all(scene.path.samefile(world.train_images / scene.file_name.split("/")[-1]) for scene in merged.scenes[:8])


def test_relative_names_are_relative_to_the_folder_the_loader_reads(world):
    out = world.root / "real" / "merged.json"  # beside real/images/, where the loader looks
    with pytest.warns(DatasetWarning, match=r"2 file_name\(s\) climb out of the image folder"):
        world.merge(strict=False, synthetic_share=0.2, out=out, images_mode="relative")
    names = [im["file_name"] for im in json.loads(out.read_text())["images"]]
    assert names[:2] == ["train_0001.png", "train_0002.png"] and len(names) == 10
    assert all(name.startswith("../../runs/a/images/run_") for name in names[8:])


@pytest.mark.parametrize("mode", ["copy", "link"])
def test_images_can_be_copied_or_linked_beside_the_output(world, mode):
    world.merge(synthetic_share=0.2, images_mode=mode)
    coco = world.output()
    names = [im["file_name"] for im in coco["images"]]
    assert names[0] == "merged_images/real/train_0001.png" and names[-1].startswith("merged_images/synthetic-1/")
    copied = world.out.parent / names[-1]
    original = world.run / "images" / Path(names[-1]).name
    assert copied.read_bytes() == original.read_bytes()
    assert copied.samefile(original) == (mode == "link")


# --------------------------------------------------------------------------------------------------
# vocabularies and mapping files


def foreign_run(world: World, name: str = "trailer") -> Path:
    categories = [{"id": 1, "name": "car"}, {"id": 2, "name": name}]
    items = [{"source": world.source("train", k), "class": name, "new": [2]} for k in range(4)]
    return write_run(world.root / "runs" / "foreign", items, categories=categories)


def test_other_vocabulary_is_refused_without_a_mapping(world):
    run = foreign_run(world)
    with pytest.raises(DatasetError, match=r"categories\[1\].name: category 'trailer' is not in the real split"):
        world.merge(synthetic=[run], synthetic_share=0.2)


def test_other_vocabulary_is_accepted_with_a_mapping(world):
    run = foreign_run(world)
    mapping = world.root / "mapping.json"
    mapping.write_text(json.dumps({"trailer": "works_trailer"}))
    summary = world.merge(synthetic=[run, world.run], synthetic_share=0.5, mapping=mapping)
    coco = world.output()
    assert coco["categories"] == CATEGORIES  # the real split's ids, nothing appended
    assert instances(coco)["works_trailer"] == 1 + summary.classes[2].synthetic
    foreign = [im for im in synthetic_entries(coco) if im["rarefill"]["merged_from"]["synthetic_set"] == 1]
    assert foreign, "the mapped set contributes images"
    ids = {a["category_id"] for a in coco["annotations"] if a["image_id"] in {im["id"] for im in foreign}}
    assert ids == {1, 5}


def test_mapping_a_name_to_itself_appends_a_new_category(world):
    run = foreign_run(world, "digger")
    mapping = world.root / "mapping.json"
    mapping.write_text(json.dumps({"digger": "digger"}))
    world.merge(synthetic=[run], synthetic_share=0.2, mapping=mapping)
    coco = world.output()
    assert coco["categories"][-1] == {"id": 6, "name": "digger"}
    assert instances(coco)["digger"] == 2


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("{trailer: works_trailer}", r"mapping.json: malformed JSON at line 1"),
        ('["trailer", "works_trailer"]', r"mapping.json: must be a JSON object of names, got list"),
        ('{"trailer": 5}', r"mapping.json: trailer: must map to a non-empty category name, got 5"),
        ('{"trailer": "works_trailer", "lorry": "bus"}', r"mapping.json: lorry: names no category of the synthetic"),
        ('{"trailer": "trailr"}', r"mapping.json: trailer: maps to 'trailr', which is no category of the real"),
    ],
)
def test_bad_mapping_file_is_a_clear_error(world, text, message):
    mapping = world.root / "mapping.json"
    mapping.write_text(text)
    with pytest.raises(DatasetError, match=message):
        world.merge(synthetic=[foreign_run(world)], synthetic_share=0.2, mapping=mapping)


def test_missing_mapping_file(tmp_path):
    with pytest.raises(DatasetError, match="mapping file not found"):
        load_mapping(tmp_path / "nope.json")


# --------------------------------------------------------------------------------------------------
# option checks


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({}, "exactly one of --synthetic-share and --rare-target"),
        ({"synthetic_share": 0.2, "rare_target": 5}, "exactly one of"),
        ({"synthetic_share": 1.0}, r"--synthetic-share must be in \[0, 1\), got 1.0"),
        ({"synthetic_share": -0.1}, "--synthetic-share must be in"),
        ({"rare_target": -1}, "--rare-target must be an integer >= 0"),
        ({"synthetic_share": 0.2, "images_mode": "symlink"}, "--images-mode must be one of relative, copy, link"),
        ({"synthetic_share": 0.2, "caps": {"lorry": 2}}, "--cap lorry=...: no category named 'lorry'"),
        ({"synthetic_share": 0.2, "synthetic": []}, "at least one synthetic run folder"),
    ],
)
def test_bad_options_are_usage_errors(world, options, message):
    with pytest.raises(UsageError, match=message):
        world.merge(**options)


def test_output_may_not_overwrite_an_input(world):
    with pytest.raises(UsageError, match="is one of the input files"):
        world.merge(synthetic_share=0.2, out=world.train)
    with pytest.raises(UsageError, match="--guard .*train.json is the real training split itself"):
        world.merge(synthetic_share=0.2, guards=[world.val, world.train])
    with pytest.raises(UsageError, match="--guard .*val.json is given twice"):
        world.merge(synthetic_share=0.2, guards=[world.val, world.root / "held" / ".." / "held" / "val.json"])
    with pytest.raises(UsageError, match="--synthetic .*a is given twice"):
        world.merge(synthetic_share=0.2, synthetic=[world.run, world.run])


# --------------------------------------------------------------------------------------------------
# command line


def cli_args(world: World, *extra: str) -> list[str]:
    return [
        "merge", str(world.train), "--real-images", str(world.train_images), "--synthetic", str(world.run),
        "--guard", str(world.val), "--guard", str(world.test), "--out", str(world.out), *extra,
    ]  # fmt: skip


def test_cli_help_has_an_example():
    result = runner.invoke(app, ["merge", "--help"])
    assert result.exit_code == 0 and "Example: rarefill merge" in result.stdout


def test_cli_happy_path_table_and_json(world):
    result = runner.invoke(app, cli_args(world, "--synthetic-share", "0.5", "--seed", "2"))
    assert result.exit_code == 0, result.output
    assert "synthetic share 0.5000: used 8 of 20 available synthetic images (wanted 8)" in result.stdout
    assert "tractor 4/10, works_trailer 4/10" in result.stdout
    result = runner.invoke(app, cli_args(world, "--rare-target", "3", "--cap", "tractor=1", "--json"))
    assert result.exit_code == 0
    summary = json.loads(result.stdout)
    by_name = {c["name"]: c for c in summary["classes"]}
    assert by_name["tractor"]["synthetic"] == 1 and by_name["works_trailer"]["total"] == 3
    assert summary["shortfalls"] and "warning: rare target 3 not reached for tractor" in result.stderr


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        ([], "error: give exactly one of --synthetic-share and --rare-target"),
        (["--synthetic-share", "1.5"], "error: --synthetic-share must be in [0, 1), got 1.5"),
        (["--rare-target", "3", "--cap", "tractor"], "error: --cap must look like CLASS=N"),
        (["--rare-target", "3", "--images-mode", "move"], "error: --images-mode must be one of"),
        (["--synthetic-share", "0.2", "--mapping", "missing.json"], "error: missing.json: mapping file not found"),
    ],
)
def test_cli_user_errors_are_one_line_and_exit_2(world, extra, message):
    result = runner.invoke(app, cli_args(world, *extra))
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert lines[0].startswith(message) and lines[1].startswith("hint: ")
    assert "Traceback" not in result.output and not world.out.exists()


def test_cli_without_guard_or_run_folder(world):
    args = [
        "merge",
        str(world.train),
        "--synthetic",
        str(world.run),
        "--out",
        str(world.out),
        "--synthetic-share",
        ".2",
    ]
    result = runner.invoke(app, args)
    assert result.exit_code == 2 and "error: give the held-out splits to guard" in result.stderr
    args[3] = str(world.root / "no-run")
    result = runner.invoke(app, [*args, "--guard", str(world.val)])
    assert result.exit_code == 2 and "labels.json: not found; is this a rarefill run folder?" in result.stderr
