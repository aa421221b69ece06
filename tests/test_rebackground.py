"""The rebackground stage: a real object's pixels kept bit for bit, surroundings regenerated and checked."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image
from pycocotools import mask as mask_utils

from pipeline.dataset import Annotation, load_dataset
from pipeline.filters import FilterLimits
from pipeline.geometry import fit_ground
from pipeline.judge import judge
from pipeline.plan import Job
from pipeline.recipe import STAGE_OPTIONS, StageSpec
from pipeline.stages import Candidate, Failure, StageContext, rebackground, run
from pipeline.surface import mask_for

from .conftest import SEED_SCENES
from .fakes import BlockGenerator, fake_context

CLASSES = ("background", "car", "van", "bus", "tractor", "works_trailer")


class FixedVerifier:
    """Sees ``label`` with ``probability`` in every box (the rest goes to background)."""

    classes = CLASSES

    def __init__(self, label: str = "background", probability: float = 1.0) -> None:
        self.label, self.probability = label, probability
        self.seen: list[int] = []

    def probabilities(self, image, boxes):
        self.seen.append(len(boxes))
        out = np.zeros((len(boxes), len(CLASSES)), np.float32)
        out[:, 0] = 1.0 - self.probability
        out[:, CLASSES.index(self.label)] += self.probability
        return out

    def present_probability(self, image, box, label):
        return float(self.probabilities(image, [box])[0, CLASSES.index(label)])


def spec(target: str = "tractor", **options) -> StageSpec:
    values = {k: default for k, (_, default) in STAGE_OPTIONS["rebackground"].items()}
    values.update(options)
    return StageSpec(0, "rebackground", target, 1, values)


@pytest.fixture(scope="module")
def seeds():
    dataset = load_dataset(SEED_SCENES / "train.json")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        surfaces = {s.id: mask_for(s, dataset=dataset) for s in dataset.scenes}
    ground = fit_ground(dataset)
    return dataset, ground, surfaces


def context(seeds, verifier=None) -> StageContext:
    dataset, ground, surfaces = seeds
    return fake_context(dataset, ground, verifier=verifier, surfaces=surfaces)


def remade(ctx, stage, source, seed=11):
    job = Job(0, 0, seed, 0, (source,))
    drafted = rebackground.draft(job, 0, stage, ctx)
    assert not isinstance(drafted, Failure), drafted
    frames = ctx.generator.inpaint(list(drafted.requests), steps=2, guidance=1.0)
    return drafted, rebackground.complete(drafted, frames, ctx)


def test_eligible_lists_every_target_instance(seeds):
    dataset = seeds[0]
    trailer = dataset.category_by_name("works_trailer").id
    found = rebackground.eligible(dataset, spec("works_trailer"), FilterLimits())
    expected = [
        (i, j)
        for i, s in enumerate(dataset.scenes)
        for j, a in enumerate(s.annotations)
        if a.category_id == trailer and not a.iscrowd
    ]
    assert found == expected and found


def test_kept_object_pixels_are_bit_identical_and_the_road_untouched(seeds):
    dataset = seeds[0]
    ctx = context(seeds, FixedVerifier())
    for source in rebackground.eligible(dataset, spec(), FilterLimits())[:4]:
        scene = dataset.scenes[source[0]]
        target = scene.annotations[source[1]]
        drafted, out = remade(ctx, spec(windows=8), source)
        assert isinstance(out, Candidate)
        clear = scene.load_rgb()
        pixels, _ = rebackground.object_pixels(clear, target)
        keep = drafted.state["keep"]
        assert (keep & pixels).sum() == pixels.sum()  # the protected region holds the whole estimate
        assert all(not (r.mask & keep).any() for r in drafted.requests)  # no request may touch it
        assert np.array_equal(out.image[keep], clear[keep])  # bit-identical
        road = ctx.surface(scene).mask
        assert np.array_equal(out.image[road], clear[road])  # the object's ground is the real road
        for other in (a for a in scene.annotations if a is not target):  # kept whole, box and all
            x, y, w, h = (int(round(v)) for v in other.bbox)
            assert np.array_equal(out.image[y : y + h, x : x + w], clear[y : y + h, x : x + w])
        # the surroundings did change, and that is what the seam filter will look at
        assert out.changed.any() and not np.array_equal(out.image[out.changed], clear[out.changed])
        assert out.kept[0] is target and out.checked == (0,)
        assert [a.id for a in out.kept] == [target.id] + [a.id for a in scene.annotations if a is not target]
        assert out.dropped == ()
        assert out.details["unlabelled_check"]["max_object_probability"] == 0.0


def test_the_judge_checks_the_kept_object_and_the_seam(seeds):
    dataset = seeds[0]
    ctx = context(seeds)
    source = rebackground.eligible(dataset, spec(), FilterLimits())[0]
    _, out = remade(ctx, spec(), source)
    names = [v.name for v in judge(out, ctx)]
    # the kept real object: its scale and footing only (its place among the real objects is real)
    assert names[:2] == ["scale", "surface"] and "overlap" not in names and names[-1] == "seam"
    assert out.details["unlabelled_check"] == "skipped: no verifier"


def test_other_objects_can_be_removed_and_dropped(seeds):
    dataset = seeds[0]
    ctx = context(seeds)
    sources = rebackground.eligible(dataset, spec(), FilterLimits())
    done = 0
    for source in sources:
        scene = dataset.scenes[source[0]]
        drafted, out = remade(ctx, spec(other_objects="remove", windows=2), source)
        removed = [a for a, why in out.dropped if why == "removed by background inpainting"]
        if not removed:
            continue
        kept = {a.id for a in out.kept}
        assert not kept & {a.id for a in removed}
        assert kept | {a.id for a in removed} == {a.id for a in scene.annotations}
        assert out.details["removed_annotation_ids"] == [a.id for a in removed]
        for ann in removed:
            x, y, w, h = (int(round(v)) for v in ann.bbox)
            assert out.changed[y : y + h, x : x + w].mean() > 0.5  # painted over
        keep = drafted.state["keep"]
        assert np.array_equal(out.image[keep], scene.load_rgb()[keep])
        done += 1
        if done == 2:
            break
    assert done == 2


def test_an_object_seen_in_the_new_surroundings_fails_as_unlabelled(seeds):
    dataset = seeds[0]
    verifier = FixedVerifier("car", 0.9)
    ctx = context(seeds, verifier)
    source = rebackground.eligible(dataset, spec(), FilterLimits())[0]
    drafted, out = remade(ctx, spec(windows=3), source)
    assert isinstance(out, Failure) and out.filter == "unlabelled" and "car" in out.reason
    # each window is shown whole and as four quadrants
    assert verifier.seen == [5 * len(drafted.requests)]
    _, fine = remade(context(seeds, FixedVerifier("car", 0.4)), spec(windows=3), source)
    assert isinstance(fine, Candidate)


def test_the_stage_runs_through_the_registry(seeds):
    dataset = seeds[0]
    ctx = context(seeds)
    source = rebackground.eligible(dataset, spec(), FilterLimits())[1]
    out = run(Job(0, 0, 5, 0, (source,)), 0, spec(), ctx)
    again = run(Job(0, 0, 5, 0, (source,)), 0, spec(), ctx)
    assert isinstance(out, Candidate) and np.array_equal(out.image, again.image)  # one seed, one image


def test_poisson_paste_takes_gradients_and_meets_the_surroundings():
    # Perez, Gangnet, Blake 2003: inside the mask the result solves Laplace(f) = div(grad frame) with f = base
    # on the border; a frame that is the base plus a constant therefore pastes back as the base itself.
    rng = np.random.default_rng(0)
    base = cv2.GaussianBlur(rng.integers(0, 255, (60, 80, 3)).astype(np.uint8), (0, 0), 3)
    for x, y, w, h in [(10, 10, 20, 15), (0, 0, 21, 16), (50, 30, 30, 30)]:
        mask = np.zeros((60, 80), bool)
        mask[y : y + h, x : x + w] = True
        frame = base.copy()
        frame[mask] = np.clip(frame[mask].astype(int) + 40, 0, 255)
        out = rebackground.poisson_paste(base, frame, mask)
        assert np.array_equal(out[~mask], base[~mask])
        assert np.abs(out.astype(int) - base).max() <= 1  # the offset is gone, the texture in place


# --------------------------------------------------------------------------------------------------
# the object's own pixels


def test_a_segmentation_is_used_as_is():
    # COCO polygon [x0, y0, x1, y0, x1, y1, x0, y1] of a pixel-aligned rectangle covers w x h pixels
    # (pycocotools rasterisation, the COCO reference).
    ann = Annotation(1, 1, 1, (10.0, 5.0, 20.0, 8.0), 160.0, segmentation=[[10, 5, 30, 5, 30, 13, 10, 13]])
    mask, source = rebackground.object_pixels(np.zeros((40, 50, 3), np.uint8), ann)
    assert source == "segmentation" and mask.sum() == 160 and mask[5:13, 10:30].all()


def test_a_compressed_rle_segmentation_decodes_to_its_mask():
    truth = np.zeros((30, 40), np.uint8, order="F")
    truth[5:10, 3:20] = 1
    rle = mask_utils.encode(truth)  # pycocotools, the COCO reference encoder
    segmentation = {"size": rle["size"], "counts": rle["counts"].decode("ascii")}  # as JSON stores it
    ann = Annotation(1, 1, 1, (3.0, 5.0, 17.0, 5.0), 85.0, segmentation=segmentation)
    mask, source = rebackground.object_pixels(np.zeros((30, 40, 3), np.uint8), ann)
    assert source == "segmentation" and np.array_equal(mask, truth.astype(bool))


def test_grabcut_finds_an_object_inside_a_loose_box():
    rng = np.random.default_rng(0)
    image = np.clip(rng.normal((80, 130, 60), 12, (80, 100, 3)), 0, 255).astype(np.uint8)
    image[30:50, 35:65] = (200, 40, 40)
    image[30:36, 40:60] = (40, 40, 60)  # windows: a two-tone object
    truth = np.zeros((80, 100), bool)
    truth[30:50, 35:65] = True
    ann = Annotation(1, 1, 1, (30.0, 26.0, 40.0, 28.0), 1120.0)
    mask, source = rebackground.object_pixels(image, ann)
    assert source == "grabcut"
    assert (mask & truth).sum() / (mask | truth).sum() > 0.85


def test_a_tiny_box_is_kept_whole():
    ann = Annotation(1, 1, 1, (10.0, 10.0, 4.0, 3.0), 12.0)
    mask, source = rebackground.object_pixels(np.zeros((30, 30, 3), np.uint8), ann)
    assert source == "box" and mask.sum() == 12


def test_a_scene_without_room_fails_to_draft(tmp_path: Path):
    # the whole frame is road: nothing off-road to regenerate, nothing to remove
    Image.fromarray(np.full((60, 80, 3), 90, np.uint8)).save(tmp_path / "a.png")
    (tmp_path / "s").mkdir()
    Image.fromarray(np.full((60, 80), 255, np.uint8)).save(tmp_path / "s" / "a.png")
    coco = {
        "images": [{"id": 1, "file_name": "a.png", "width": 80, "height": 60, "drivable_mask": "s/a.png"}],
        "annotations": [
            {"id": 1, "image_id": 1, "category_id": 1, "bbox": [30, 30, 12, 10], "area": 120, "iscrowd": 0}
        ],
        "categories": [{"id": 1, "name": "tractor"}],
    }
    (tmp_path / "set.json").write_text(json.dumps(coco))
    dataset = load_dataset(tmp_path / "set.json")
    surface = mask_for(dataset.scenes[0], dataset=dataset)
    ctx = StageContext(dataset, BlockGenerator(), None, FilterLimits(), lambda s: surface, {}, (0.0, 1e9))
    out = rebackground.draft(Job(0, 0, 1, 0, ((0, 0),)), 0, spec(), ctx)
    assert isinstance(out, Failure) and out.filter == "placement"
