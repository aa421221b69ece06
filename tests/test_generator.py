"""Tests of pipeline.generator: windows, training, sampling, save/load, bring-your-own pipeline, verifier.

Tiny models and 2 denoising steps throughout (diffusers' own test practice); the committed default
model is only used by the slow-marked test.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from pipeline.dataset import load_dataset
from pipeline.errors import ModelError
from pipeline.generator import BACKGROUND, InpaintRequest, fit, load
from pipeline.generator.batches import make_batch
from pipeline.generator.examples import load_examples
from pipeline.generator.model import DenoiserConfig, label_table, sampling_scheduler, training_scheduler
from pipeline.generator.request import check_request
from pipeline.generator.train import TrainSettings, _train_step
from pipeline.generator.verifier import crop_box, load_verifier
from pipeline.generator.windows import (
    Window,
    box_mask,
    context_window,
    crop_window,
    feather_alpha,
    object_mask_box,
    paste_window,
    window_mask,
)

REPO = Path(__file__).resolve().parents[1]
TINY = DenoiserConfig(window=32, block_out_channels=(16, 32), norm_num_groups=8)
QUICK = TrainSettings(verifier_steps=40, checkpoint_every=5)


# --------------------------------------------------------------------------------------------------
# tiny synthetic data


def _write_scenes(folder: Path, *, n: int = 6, seed: int = 0) -> Path:
    """Sky over road, one red-and-white striped block (class 1) and one blue block (class 2) each."""
    rng = np.random.default_rng(seed)
    width, height = 96, 64
    (folder / "images").mkdir(parents=True)
    images, annotations = [], []
    for i in range(n):
        img = np.empty((height, width, 3), np.uint8)
        img[: height // 2] = (150, 180, 220)
        img[height // 2 :] = (90, 90, 90)
        img = np.clip(img + rng.integers(-6, 7, img.shape), 0, 255).astype(np.uint8)
        for category, x0 in ((1, 0), (2, width // 2)):
            w, h = int(rng.integers(10, 18)), int(rng.integers(8, 14))
            x, y = x0 + int(rng.integers(0, width // 2 - w)), int(rng.integers(height // 2 - 4, height - h))
            img[y : y + h, x : x + w] = (200, 30, 30) if category == 1 else (30, 40, 200)
            if category == 1:
                img[y : y + h : 3, x : x + w] = 250
            annotations.append(
                {"id": len(annotations) + 1, "image_id": i + 1, "category_id": category, "bbox": [x, y, w, h]}
            )
        Image.fromarray(img).save(folder / "images" / f"s{i}.png")
        images.append({"id": i + 1, "file_name": f"s{i}.png", "width": width, "height": height})
    categories = [{"id": 1, "name": "striped"}, {"id": 2, "name": "plain"}]
    path = folder / "train.json"
    path.write_text(json.dumps({"images": images, "annotations": annotations, "categories": categories}))
    return path


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    return load_dataset(_write_scenes(tmp_path_factory.mktemp("scenes")))


@pytest.fixture(scope="module")
def tiny_model(scenes, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("model")
    fit(scenes, out_dir=out, steps=6, batch_size=4, config=TINY, settings=QUICK, command=["rarefill", "fit"])
    return out


def _request(scenes, *, label="striped", seed=1, box=(40, 36, 14, 10)) -> InpaintRequest:
    image = scenes.scenes[0].load_rgb()
    return InpaintRequest(image, box_mask(image.shape[:2], box, dilate_px=1), box, label, seed)


# --------------------------------------------------------------------------------------------------
# windows


def test_context_window_is_twice_the_box_and_centred():
    assert context_window((100, 50, 20, 10), (224, 384)) == Window(90, 35, 40)


def test_context_window_shifts_inside_the_image_at_borders():
    win = context_window((0, 200, 30, 20), (224, 384))
    assert (win.x0, win.y0, win.size) == (0, 224 - 60, 60)


def test_context_window_larger_than_image_is_centred_and_padded():
    image = np.full((20, 30, 3), 7, np.uint8)
    win = context_window((5, 5, 20, 10), (20, 30))
    assert win.size == 40 and win.y0 < 0 and win.x0 < 0
    assert (crop_window(image, win, 16) == 7).all()


def test_box_mask_takes_pixels_whose_centres_lie_in_the_box():
    mask = box_mask((10, 10), (2, 3, 4, 2))
    assert mask.sum() == 8 and mask[3:5, 2:6].all()
    assert box_mask((10, 10), (2.6, 3, 1, 1)).sum() == 1  # centre 3.5 lies in [2.6, 3.6)


def test_object_mask_box_matches_the_insert_stage_mask():
    from pipeline.stages.insert import object_mask

    box = (20.0, 30.0, 10.0, 20.0)
    ours = box_mask((64, 96), object_mask_box(box, margin=0.1))
    assert np.array_equal(ours, object_mask(box, (64, 96), 0.1))
    assert ours.sum() == 12 * 24  # 1 px each side, 2 px on top, 2 px below


def test_feather_alpha_is_zero_outside_and_ramps_inside():
    mask = np.zeros((11, 11), bool)
    mask[2:9, 2:9] = True
    alpha = feather_alpha(mask, feather_px=2.0)
    assert (alpha[~mask] == 0).all()
    assert alpha[5, 5] == 1.0 and 0 < alpha[2, 5] < 1


def test_paste_keeps_pixels_outside_the_mask_bit_identical():
    rng = np.random.default_rng(0)
    image = rng.integers(0, 256, (50, 70, 3), dtype=np.uint8)
    box = (20, 15, 12, 9)
    mask = box_mask(image.shape[:2], box, dilate_px=2)
    win = context_window(box, image.shape[:2])
    patch = np.full((64, 64, 3), 255, np.uint8)
    out = paste_window(image, mask, win, patch, feather_px=2)
    assert np.array_equal(out[~mask], image[~mask])
    centre = box_mask(image.shape[:2], box, dilate_px=-3)
    assert (out[centre] == 255).all()


def test_paste_refuses_a_mask_outside_its_window():
    image = np.zeros((50, 70, 3), np.uint8)
    mask = box_mask(image.shape[:2], (0, 0, 70, 50))
    with pytest.raises(ValueError, match="outside the context window"):
        paste_window(image, mask, context_window((30, 20, 4, 4), (50, 70)), np.zeros((8, 8, 3), np.uint8))


def test_window_mask_covers_every_masked_pixel():
    mask = box_mask((224, 384), (100, 100, 3, 3))
    win = context_window((90, 90, 40, 40), (224, 384))
    small = window_mask(mask, win, 64)
    # Window (70, 70, side 80) -> 64 px: image rows/cols 100-102 span model pixels 24.0-26.4.
    assert small[24:27, 24:27].all() and small.sum() == 9


# --------------------------------------------------------------------------------------------------
# model and schedules


def test_label_table_puts_null_then_background_first():
    assert label_table(("car", "tractor")) == ("", BACKGROUND, "car", "tractor")
    with pytest.raises(ValueError):
        label_table(("car", BACKGROUND))


def test_cosine_schedule_matches_the_published_formula():
    # Nichol & Dhariwal, "Improved DDPM", ICML 2021, eq. 17: alpha_bar(t) = f(t)/f(0),
    # f(t) = cos^2(((t/T + s)/(1 + s)) * pi/2), s = 0.008, betas clipped at 0.999.
    scheduler = training_scheduler()
    t = np.arange(1, 1001) / 1000
    f = np.cos((t + 0.008) / 1.008 * np.pi / 2) ** 2 / np.cos(0.008 / 1.008 * np.pi / 2) ** 2
    assert np.allclose(scheduler.alphas_cumprod.numpy()[:900], f[:900], rtol=1e-3)
    assert sampling_scheduler(scheduler.config).config.algorithm_type == "dpmsolver++"


# --------------------------------------------------------------------------------------------------
# training


def test_batches_hold_masked_objects_and_background(scenes):
    examples = load_examples(scenes)
    labels = label_table(examples.classes)
    batch = make_batch(examples, labels, np.random.default_rng(0), batch_size=32, window=32, background_share=0.3)
    images, masks, ids = batch.images, batch.masks, batch.label_ids
    assert images.shape == (32, 3, 32, 32) and masks.shape == (32, 1, 32, 32)
    assert images.min() >= -1 and images.max() <= 1
    assert set(ids.tolist()) == {1, 2, 3}
    assert (masks.sum(axis=(1, 2, 3)) > 0).all()


@pytest.mark.parametrize("exemplar", [True, False])
def test_loss_falls_on_a_fixed_batch(scenes, exemplar):
    from dataclasses import replace

    from pipeline.generator.batches import object_silhouettes
    from pipeline.generator.model import build_unet

    config = replace(TINY, exemplar=exemplar)
    examples = load_examples(scenes)
    labels = label_table(examples.classes)
    silhouettes = object_silhouettes(examples) if exemplar else None
    torch.manual_seed(0)
    unet = build_unet(config, len(labels))
    assert unet.config.in_channels == (11 if exemplar else 7)
    optimizer = torch.optim.AdamW(unet.parameters(), lr=2e-3)
    alphas = training_scheduler().alphas_cumprod.float()
    settings = TrainSettings(drop_label=0.0, use_bf16=False, exemplar_share=1.0, background_share=0.0)
    # The same (seed, step) gives the same batch, noise and timesteps: a fixed batch.
    step = (unet, optimizer, examples, labels, alphas, 0, 0, 8, config, settings, silhouettes)
    losses = [_train_step(*step) for _ in range(30)]
    assert np.mean(losses[-5:]) < 0.7 * np.mean(losses[:5])


def test_fit_writes_a_complete_diffusers_folder(tiny_model):
    meta = json.loads((tiny_model / "rarefill_model.json").read_text())
    assert meta["classes"] == ["striped", "plain"] and meta["steps_done"] == 6 and meta["window"] == 32
    assert meta["command"] == ["rarefill", "fit"] and len(meta["data_hash"]) == 64
    for name in ("unet/config.json", "scheduler/scheduler_config.json", "verifier.safetensors", "verifier.json"):
        assert (tiny_model / name).is_file()


def test_fit_resumes_from_its_checkpoint(scenes, tiny_model, tmp_path):
    import shutil

    shutil.copytree(tiny_model, tmp_path / "m")
    result = fit(scenes, out_dir=tmp_path / "m", steps=8, batch_size=4, config=TINY, settings=QUICK)
    assert result.resumed_from == 6 and result.steps_done == 8
    history = json.loads((tmp_path / "m" / "rarefill_model.json").read_text())["history"]
    assert [h["steps"] for h in history] == [[0, 6], [6, 8]]
    with pytest.raises(ModelError, match="seed"):
        fit(scenes, out_dir=tmp_path / "m", steps=9, seed=5, batch_size=4, config=TINY, settings=QUICK)


def test_a_minutes_budget_covers_the_verifier_and_then_the_denoiser(scenes, tmp_path):
    import time

    settings = dataclasses.replace(QUICK, verifier_steps=50)  # one verifier progress event, at its end
    minutes = 0.1
    events: list[tuple[float, object]] = []
    started = time.monotonic()
    result = fit(
        scenes,
        out_dir=tmp_path / "m",
        minutes=minutes,
        batch_size=2,
        config=TINY,
        settings=settings,
        progress=lambda event: events.append((time.monotonic(), event)),
    )
    phases = [event.phase for _, event in events]
    assert phases == ["verifier"] + ["denoiser"] * result.steps_done and result.steps_done >= 1
    # The verifier's steps are fixed; the denoiser trains for what they left of the budget (at least one
    # step) and stops at the first step that ends past it: so it overruns by at most its longest step.
    verifier_seconds = events[0][0] - started
    times = [t for t, _ in events]
    longest_step = max(b - a for a, b in zip(times, times[1:], strict=False))
    denoiser_seconds = events[-1][1].elapsed_s
    assert denoiser_seconds <= max(0.0, minutes * 60 - verifier_seconds) + longest_step + 0.5
    assert (tmp_path / "m" / "verifier.json").is_file() and (tmp_path / "m" / "rarefill_model.json").is_file()


def test_fit_checks_its_budget(scenes, tmp_path):
    with pytest.raises(ValueError, match="exactly one"):
        fit(scenes, out_dir=tmp_path, steps=3, minutes=1.0)
    with pytest.raises(ValueError, match="steps"):
        fit(scenes, out_dir=tmp_path, steps=0)


# --------------------------------------------------------------------------------------------------
# sampling


def test_inpaint_changes_only_masked_pixels(tiny_model, scenes):
    generator = load(tiny_model)
    requests = [_request(scenes, label="striped"), _request(scenes, label=BACKGROUND, seed=2)]
    frames = generator.inpaint(requests, steps=2, guidance=1.0)
    for request, frame in zip(requests, frames, strict=True):
        assert frame.shape == request.image.shape and frame.dtype == np.uint8
        assert np.array_equal(frame[~request.mask], request.image[~request.mask])
        assert not np.array_equal(frame[request.mask], request.image[request.mask])


def test_inpaint_is_deterministic_per_seed_and_batch_independent(tiny_model, scenes):
    generator = load(tiny_model)
    a = _request(scenes, seed=7)
    first = generator.inpaint([a, _request(scenes, seed=8)], steps=2, guidance=2.0)[0]
    again = generator.inpaint([a], steps=2, guidance=2.0)[0]
    other = generator.inpaint([_request(scenes, seed=9)], steps=2, guidance=2.0)[0]
    # Batched and single runs may differ by float rounding of batched matmuls; one grey level at most.
    assert np.abs(first.astype(int) - again).max() <= 1
    assert np.array_equal(generator.inpaint([a], steps=2, guidance=2.0)[0], again)
    assert not np.array_equal(again, other)


@pytest.mark.parametrize("native", [True, False])
def test_bf16_autocast_is_used_only_where_the_cpu_computes_bf16(tiny_model, monkeypatch, native):
    # Without native bf16 (an AVX2-only CPU) torch's bf16 convolutions take a slow reference path, many
    # times slower than float32, so the default follows the CPU; an explicit choice still wins.
    from pipeline.generator import sample

    monkeypatch.setattr(sample, "native_bf16", lambda: native)
    assert sample.load_trained(tiny_model).use_bf16 is native
    assert sample.load_trained(tiny_model, use_bf16=not native).use_bf16 is (not native)


def test_save_load_round_trip_gives_identical_samples(tiny_model, scenes, tmp_path, monkeypatch):
    import shutil

    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    shutil.copytree(tiny_model, tmp_path / "copy")
    request = _request(scenes, seed=3)
    first = load(tiny_model).inpaint([request], steps=2, guidance=1.0)[0]
    second = load(tmp_path / "copy").inpaint([request], steps=2, guidance=1.0)[0]
    assert np.array_equal(first, second)
    assert load(tiny_model).info()["folder_sha256"] == load(tmp_path / "copy").info()["folder_sha256"]


def test_inpaint_rejects_bad_requests(tiny_model, scenes):
    generator = load(tiny_model)
    good = _request(scenes)
    with pytest.raises(ValueError, match="label"):
        generator.inpaint([_request(scenes, label="bus")], steps=2, guidance=1.0)
    with pytest.raises(ValueError, match="mask"):
        generator.inpaint([InpaintRequest(good.image, good.mask[:-1], good.box, "plain", 0)], steps=2, guidance=1.0)
    with pytest.raises(ValueError, match="condition"):
        generator.inpaint([InpaintRequest(good.image, good.mask, good.box, "plain", 0, "fog")], steps=2, guidance=1.0)
    with pytest.raises(ValueError, match="guidance"):
        generator.inpaint([good], steps=2, guidance=0.5)


def test_check_request_validates_exemplars(scenes):
    good = _request(scenes)
    alpha = good.mask.astype(np.float32)
    with_exemplar = dataclasses.replace(good, exemplar=good.image.copy(), exemplar_alpha=alpha)
    check_request(with_exemplar, 0, ("plain", "striped"), accepts_exemplar=True)
    with pytest.raises(ValueError, match="does not take exemplars"):
        check_request(with_exemplar, 0, ("plain", "striped"))
    with pytest.raises(ValueError, match="go together"):
        check_request(dataclasses.replace(good, exemplar=good.image), 0, ("plain", "striped"), accepts_exemplar=True)
    with pytest.raises(ValueError, match=r"exemplar must be"):
        bad = dataclasses.replace(with_exemplar, exemplar=good.image[:-1])
        check_request(bad, 0, ("plain", "striped"), accepts_exemplar=True)
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        bad = dataclasses.replace(with_exemplar, exemplar_alpha=alpha * 2)
        check_request(bad, 0, ("plain", "striped"), accepts_exemplar=True)


def test_info_names_kind_classes_window_and_hash(tiny_model):
    info = load(tiny_model).info()
    assert info["kind"] == "rarefill-inpaint" and info["classes"] == ["striped", "plain"]
    assert info["window"] == 32 and len(info["folder_sha256"]) == 64


# --------------------------------------------------------------------------------------------------
# loading errors


def test_missing_folder_is_a_model_error(tmp_path):
    with pytest.raises(ModelError, match="not found"):
        load(tmp_path / "nope")


def test_incomplete_folder_names_what_is_missing(tiny_model, tmp_path):
    import shutil

    shutil.copytree(tiny_model, tmp_path / "m")
    (tmp_path / "m" / "unet" / "diffusion_pytorch_model.safetensors").unlink()
    with pytest.raises(ModelError, match="missing unet/diffusion_pytorch_model.safetensors"):
        load(tmp_path / "m")
    with pytest.raises(ModelError, match="neither"):
        load(tmp_path)


# --------------------------------------------------------------------------------------------------
# verifier


def test_verifier_tells_striped_blocks_from_plain_ones_and_background(tiny_model, scenes):
    verifier = load_verifier(tiny_model)
    assert verifier.classes == (BACKGROUND, "striped", "plain")
    scene = scenes.scenes[1]
    image = scene.load_rgb()
    boxes = [a.bbox for a in scene.annotations]
    probabilities = verifier.probabilities(image, boxes)
    assert probabilities.shape == (2, 3) and np.allclose(probabilities.sum(axis=1), 1, atol=1e-5)
    assert 0.0 <= verifier.present_probability(image, boxes[0], "striped") <= 1.0
    with pytest.raises(ValueError):
        verifier.present_probability(image, boxes[0], "bus")


def test_crop_box_pads_at_the_border():
    image = np.full((10, 10, 3), 9, np.uint8)
    assert (crop_box(image, (0, 0, 4, 4), size=8, margin=0.5) == 9).all()


def test_loading_the_shipped_model_prints_nothing(capfd):
    import logging
    import warnings

    folder = REPO / "models" / "default"
    if not (folder / "rarefill_model.json").is_file():
        pytest.skip("the shipped model folder models/default is not present")
    # diffusers logs through its own handler, made on whatever stderr was when it was imported (under
    # pytest, a capture that capfd does not see): so listen on its logger as well as on the descriptors.
    records: list[logging.LogRecord] = []
    listener = logging.Handler(logging.INFO)
    listener.emit = records.append
    logger = logging.getLogger("diffusers")
    logger.addHandler(listener)
    capfd.readouterr()
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            generator = load(folder)
            load_verifier(folder)
    finally:
        logger.removeHandler(listener)
    assert generator.classes
    assert [r.getMessage() for r in records if r.levelno >= logging.WARNING] == []
    assert [str(w.message) for w in caught] == []
    assert capfd.readouterr() == ("", "")


# --------------------------------------------------------------------------------------------------
# bring your own diffusers inpainting pipeline


def _tiny_inpaint_pipeline(folder: Path) -> Path:
    from diffusers import AutoencoderKL, DDIMScheduler, StableDiffusionInpaintPipeline, UNet2DConditionModel
    from transformers import CLIPTextConfig, CLIPTextModel, CLIPTokenizer

    letters = [chr(c) for c in range(ord("a"), ord("z") + 1)]
    vocab = {"<|startoftext|>": 0, "<|endoftext|>": 1}
    for token in letters + [letter + "</w>" for letter in letters]:
        vocab[token] = len(vocab)
    (folder / "tok").mkdir(parents=True)
    (folder / "tok" / "vocab.json").write_text(json.dumps(vocab))
    (folder / "tok" / "merges.txt").write_text("#version: 0.2\n")
    tokenizer = CLIPTokenizer(
        str(folder / "tok" / "vocab.json"), str(folder / "tok" / "merges.txt"), model_max_length=77
    )
    torch.manual_seed(0)
    text_config = CLIPTextConfig(
        bos_token_id=0,
        eos_token_id=1,
        pad_token_id=1,
        hidden_size=32,
        intermediate_size=37,
        num_attention_heads=4,
        num_hidden_layers=2,
        vocab_size=len(vocab),
    )
    unet = UNet2DConditionModel(
        sample_size=16,
        in_channels=9,
        out_channels=4,
        block_out_channels=(32, 64),
        layers_per_block=1,
        down_block_types=("DownBlock2D", "CrossAttnDownBlock2D"),
        up_block_types=("CrossAttnUpBlock2D", "UpBlock2D"),
        cross_attention_dim=32,
        attention_head_dim=8,
    )
    vae = AutoencoderKL(
        block_out_channels=(32, 64),
        down_block_types=("DownEncoderBlock2D",) * 2,
        up_block_types=("UpDecoderBlock2D",) * 2,
        latent_channels=4,
    )
    pipeline = StableDiffusionInpaintPipeline(
        vae=vae,
        text_encoder=CLIPTextModel(text_config),
        tokenizer=tokenizer,
        unet=unet,
        scheduler=DDIMScheduler(steps_offset=1),
        safety_checker=None,
        feature_extractor=None,
        requires_safety_checker=False,
    )
    pipeline.save_pretrained(folder / "pipeline")
    return folder / "pipeline"


def test_own_diffusers_pipeline_loads_offline_and_inpaints(tmp_path, monkeypatch, scenes):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    folder = _tiny_inpaint_pipeline(tmp_path)
    with pytest.raises(ModelError, match="prompt"):
        load(folder)
    generator = load(folder, prompts={"tractor": "a farm tractor", BACKGROUND: "an empty road"})
    assert generator.classes == ("tractor",) and generator.info()["window"] == 32
    requests = [_request(scenes, label="tractor", seed=1), _request(scenes, label=BACKGROUND, seed=2)]
    frames = generator.inpaint(requests, steps=2, guidance=1.0)
    for request, frame in zip(requests, frames, strict=True):
        assert np.array_equal(frame[~request.mask], request.image[~request.mask])
        assert not np.array_equal(frame[request.mask], request.image[request.mask])
    again = generator.inpaint(requests[:1], steps=2, guidance=1.0)[0]
    assert np.abs(again.astype(int) - frames[0]).max() <= 1
    # A text-prompted pipeline has no exemplar inputs: it says so and refuses exemplar requests.
    assert generator.accepts_exemplar is False
    placed = dataclasses.replace(
        requests[0], exemplar=requests[0].image.copy(), exemplar_alpha=requests[0].mask.astype(np.float32)
    )
    with pytest.raises(ValueError, match="does not take exemplars"):
        generator.inpaint([placed], steps=2, guidance=1.0)


# --------------------------------------------------------------------------------------------------
# the committed default model (slow: needs the seed scenes and the model folder)


@pytest.mark.slow
def test_default_verifier_separates_rare_crops_from_background():
    from pipeline.generator.examples import load_examples as examples_of

    folder, val = REPO / "models" / "default", REPO / "seed_scenes" / "val.json"
    if not (folder / "verifier.json").exists() or not val.exists():
        pytest.skip("default model or seed scenes not present")
    verifier = load_verifier(folder)
    examples = examples_of(load_dataset(val))
    rng = np.random.default_rng(0)
    correct = total = 0
    for label in ("tractor", "works_trailer"):
        for ref in examples.objects[label]:
            probability = verifier.present_probability(examples.images[ref.scene], ref.box, label)
            correct += probability >= 0.5
            total += 1
            scene, box = examples.sample_background_box(rng)
            probability = verifier.present_probability(examples.images[scene], box, label)
            correct += probability < 0.5
            total += 1
    assert total >= 20
    assert correct / total >= 0.9
