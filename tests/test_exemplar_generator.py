"""Exemplar-conditioned denoiser: training batches, warm start, sampling with an exemplar, old folders."""

from __future__ import annotations

import dataclasses
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch

from pipeline.dataset import load_dataset
from pipeline.generator import InpaintRequest, fit, load
from pipeline.generator.batches import bounding_box, make_batch, object_silhouettes
from pipeline.generator.examples import load_examples
from pipeline.generator.exemplar import augment_exemplar, conditioning
from pipeline.generator.model import DenoiserConfig, build_unet, label_table, widen_from
from pipeline.generator.train import TrainSettings
from pipeline.silhouette import object_silhouette, repaint_mask
from tests.test_generator import _write_scenes

TINY = DenoiserConfig(window=32, block_out_channels=(16, 32), norm_num_groups=8)
PLAIN = dataclasses.replace(TINY, exemplar=False)
QUICK = TrainSettings(verifier_steps=40, checkpoint_every=5)


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return load_dataset(_write_scenes(tmp_path_factory.mktemp("scenes")))


@pytest.fixture(scope="module")
def plain_model(scenes, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("plain")
    fit(scenes, out_dir=out, steps=4, batch_size=4, config=PLAIN, settings=QUICK, command=["rarefill", "fit"])
    return out


@pytest.fixture(scope="module")
def exemplar_model(scenes, plain_model, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("exemplar")
    fit(scenes, out_dir=out, steps=4, batch_size=4, config=TINY, settings=QUICK, init=plain_model, command=["x"])
    return out


def _placed(scenes, *, seed: int, scene: int = 0, annotation: int = 0, shift: int = 0) -> InpaintRequest:
    """An exemplar request: a real object of ``scene`` copied ``shift`` px to the left, over the scene."""
    s = scenes.scenes[scene]
    image = s.load_rgb()
    x, y, w, h = s.annotations[annotation].bbox
    sil = object_silhouette(image, (x, y, w, h)).mask
    moved = np.roll(sil, -shift, axis=1)
    exemplar = image.copy()
    exemplar[moved] = np.roll(image, -shift, axis=1)[moved]
    region = repaint_mask(moved, (x - shift, y, w, h))
    label = scenes.category_names()[s.annotations[annotation].category_id]
    return InpaintRequest(
        image, region.mask, bounding_box(region.mask), label, seed, None, exemplar, moved.astype(np.float32)
    )


def test_exemplar_batches_mask_the_grown_silhouette_and_carry_a_changed_copy(scenes):
    examples = load_examples(scenes)
    labels = label_table(examples.classes)
    silhouettes = object_silhouettes(examples)
    batch = make_batch(
        examples,
        labels,
        np.random.default_rng(3),
        batch_size=12,
        window=32,
        background_share=0.0,
        exemplar_share=1.0,
        silhouettes=silhouettes,
    )
    assert batch.exemplars.shape == (12, 3, 32, 32) and batch.alphas.shape == (12, 1, 32, 32)
    inside = batch.alphas > 0.5
    assert inside.any(axis=(1, 2, 3)).all()
    # the (slightly shifted) exemplar lies inside the repaint mask, apart from its shift of a few per cent
    assert (inside & (batch.masks == 0)).sum() <= 0.05 * inside.sum()
    # the copy is changed (colour, blur, position), but still resembles the object
    diff = np.abs(batch.exemplars - batch.images)[np.broadcast_to(inside, batch.images.shape)]
    assert 0.01 < diff.mean() < 0.5
    again = make_batch(
        examples,
        labels,
        np.random.default_rng(3),
        batch_size=12,
        window=32,
        background_share=0.0,
        exemplar_share=1.0,
        silhouettes=silhouettes,
    )
    assert np.array_equal(again.exemplars, batch.exemplars)


def test_augmented_exemplar_keeps_its_footprint_and_changes_its_light():
    rng = np.random.default_rng(0)
    window = np.full((32, 32, 3), 100, np.uint8)
    window[10:24, 8:22] = (180, 60, 40)
    alpha = np.zeros((32, 32), np.float32)
    alpha[10:24, 8:22] = 1.0
    means = []
    for _ in range(20):
        shown, moved = augment_exemplar(window, alpha, rng)
        assert moved.shape == alpha.shape and shown.dtype == np.uint8
        rows, cols = np.nonzero(moved > 0.5)
        assert abs(rows.max() - 23) <= 1 and abs((cols.min() + cols.max()) / 2 - 14.5) <= 1.5  # bottom centre stays
        means.append(shown[moved > 0.5].astype(float).mean(axis=0))
    assert np.std(np.array(means)[:, 0]) > 5  # brightness / colour really vary


def test_conditioning_without_an_exemplar_is_zero_in_the_exemplar_channels():
    known = torch.rand(2, 3, 8, 8) * 2 - 1
    mask = torch.zeros(2, 1, 8, 8)
    mask[:, :, 2:6, 2:6] = 1
    alpha = torch.zeros(2, 1, 8, 8)
    alpha[0, :, 3:5, 3:5] = 1
    shown = torch.ones(2, 3, 8, 8)
    channels = conditioning(known, mask, shown, alpha)
    assert channels.shape == (2, 8, 8, 8)
    assert torch.equal(channels[1, 4:], torch.zeros(4, 8, 8))
    assert torch.equal(channels[0, 4:7, 3:5, 3:5], torch.ones(3, 2, 2))
    assert torch.equal(channels[0, 4:7, 2, 2], torch.zeros(3))  # in the mask, off the silhouette: nothing shown
    assert torch.equal(channels[0, 4:7, 0, 0], known[0, :, 0, 0])  # outside the mask: the scene
    assert torch.equal(conditioning(known, mask), channels[:, :4])


def test_widened_model_with_zero_exemplar_channels_is_the_source_model():
    torch.manual_seed(0)
    source = build_unet(PLAIN, 4).eval()
    wide = build_unet(TINY, 4).eval()
    widen_from(wide, source)
    x = torch.randn(2, 7, 32, 32)
    t = torch.tensor([10, 500])
    labels = torch.tensor([1, 2])
    with torch.no_grad():
        expected = source(x, t, class_labels=labels).sample
        got = wide(torch.cat([x, torch.zeros(2, 4, 32, 32)], dim=1), t, class_labels=labels).sample
    assert torch.allclose(got, expected, atol=1e-6)
    with pytest.raises(ValueError, match="more than"):
        widen_from(source, wide)


def test_warm_start_is_recorded_and_needs_the_same_classes(scenes, plain_model, exemplar_model, tmp_path):
    meta = json.loads((exemplar_model / "rarefill_model.json").read_text())
    assert meta["init"]["folder"] == plain_model.name and meta["init"]["in_channels"] == 7
    assert meta["init"]["steps_done"] == 4 and len(meta["init"]["sha256"]) == 64
    assert meta["history"][0]["init"]["sha256"] == meta["init"]["sha256"]
    assert load(exemplar_model).accepts_exemplar is True
    other = load_dataset(_write_scenes(tmp_path / "other", n=3, seed=1))
    coco = json.loads(Path(other.source).read_text())
    coco["categories"] = [{"id": 1, "name": "striped"}, {"id": 2, "name": "dotted"}]
    Path(other.source).write_text(json.dumps(coco))
    from pipeline.errors import ModelError

    with pytest.raises(ModelError, match="labels"):
        fit(load_dataset(other.source), out_dir=tmp_path / "m", steps=1, config=TINY, settings=QUICK, init=plain_model)


def test_old_seven_channel_folder_loads_and_refuses_exemplars(scenes, plain_model):
    generator = load(plain_model)
    assert generator.accepts_exemplar is False and generator.info()["accepts_exemplar"] is False
    request = _placed(scenes, seed=1)
    plain = dataclasses.replace(request, exemplar=None, exemplar_alpha=None)
    frame = generator.inpaint([plain], steps=2, guidance=1.0)[0]
    assert np.array_equal(frame[~plain.mask], plain.image[~plain.mask])
    with pytest.raises(ValueError, match="no exemplar channels"):
        generator.inpaint([request], steps=2, guidance=1.0)


@pytest.mark.parametrize("strength", [1.0, 0.5])
def test_exemplar_inpainting_is_seeded_batch_independent_and_only_inside_the_mask(scenes, exemplar_model, strength):
    generator = load(exemplar_model)
    requests = [_placed(scenes, seed=7, shift=3), _placed(scenes, seed=8, scene=1, annotation=1)]
    plain = dataclasses.replace(requests[0], exemplar=None, exemplar_alpha=None, seed=9)
    mixed = generator.inpaint([requests[0], plain, requests[1]], steps=2, guidance=1.0, strength=strength)
    alone = generator.inpaint([requests[0]], steps=2, guidance=1.0, strength=strength)[0]
    # Batched and single runs may differ by bf16 rounding of batched matmuls (thread-count dependent):
    # a grey level or two on a few pixels, never a different sample.
    diff = np.abs(mixed[0].astype(int) - alone)
    assert diff.max() <= 2 and (diff > 0).mean() < 0.02
    assert np.array_equal(generator.inpaint([requests[0]], steps=2, guidance=1.0, strength=strength)[0], alone)
    for request, frame in zip((requests[0], plain, requests[1]), mixed, strict=True):
        assert frame.shape == request.image.shape and frame.dtype == np.uint8
        assert np.array_equal(frame[~request.mask], request.image[~request.mask])
        assert not np.array_equal(frame[request.mask], request.image[request.mask])
    reseeded = generator.inpaint([dataclasses.replace(requests[0], seed=70)], steps=2, guidance=1.0, strength=strength)
    assert not np.array_equal(reseeded[0], alone)
    # the plain request is what the same request gives on its own (the exemplar path does not leak into it)
    assert np.abs(generator.inpaint([plain], steps=2, guidance=1.0)[0].astype(int) - mixed[1]).max() <= 2


def test_exemplar_inpainting_checks_its_strength(scenes, exemplar_model):
    generator = load(exemplar_model)
    with pytest.raises(ValueError, match="strength"):
        generator.inpaint([_placed(scenes, seed=1)], steps=2, guidance=1.0, strength=0.0)


def test_exemplar_model_survives_a_save_load_round_trip(scenes, exemplar_model, tmp_path, monkeypatch):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    shutil.copytree(exemplar_model, tmp_path / "copy")
    request = _placed(scenes, seed=3)
    first = load(exemplar_model).inpaint([request], steps=2, guidance=1.0)[0]
    second = load(tmp_path / "copy").inpaint([request], steps=2, guidance=1.0)[0]
    assert np.array_equal(first, second)


def test_fit_help_teaches_the_warm_start_and_the_model_kind():
    from typer.testing import CliRunner

    from pipeline.cli import app

    result = CliRunner().invoke(app, ["fit", "--help"], env={"COLUMNS": "200"})
    assert result.exit_code == 0
    for option in ("--init", "--exemplar", "--no-exemplar", "self-supervision"):
        assert option in result.output
