"""Seconds per inpainted instance (one at a time and batched, blending included), fit time and memory.

Inpainting: requests at boxes of real objects in held-out scenes, 10 and 20 DPM-Solver++ steps.
Fit: a short run (``--fit-steps``) on the training split into a temporary folder gives seconds per
step and the process's peak resident memory (``resource.getrusage``); the default model's recorded
training time is read from its metadata.

Example:
    python benchmarks/generator_speed.py --model models/default
"""

from __future__ import annotations

import argparse
import json
import platform
import resource
import tempfile
import time
from pathlib import Path

import torch

from pipeline.dataset import load_dataset
from pipeline.generator import InpaintRequest, fit, load
from pipeline.generator.windows import box_mask


def requests_from(data, label: str, n: int) -> list[InpaintRequest]:
    out = []
    for scene in data.scenes:
        image = scene.load_rgb()
        for ann in scene.annotations:
            mask = box_mask(image.shape[:2], ann.bbox, dilate_px=2.0)
            out.append(InpaintRequest(image, mask, ann.bbox, label, seed=len(out)))
            if len(out) == n:
                return out
    return out


def per_instance(generator, requests, *, steps: int, batched: bool) -> float:
    started = time.perf_counter()
    if batched:
        generator.inpaint(requests, steps=steps, guidance=1.0)
    else:
        for request in requests:
            generator.inpaint([request], steps=steps, guidance=1.0)
    return (time.perf_counter() - started) / len(requests)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--model", type=Path, default=Path("models/default"))
    parser.add_argument("--train", type=Path, default=Path("seed_scenes/train.json"))
    parser.add_argument("--held-out", type=Path, default=Path("seed_scenes/test.json"))
    parser.add_argument("--label", default="tractor")
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--fit-steps", type=int, default=30)
    args = parser.parse_args()

    generator = load(args.model)
    requests = requests_from(load_dataset(args.held_out), args.label, args.batch)
    generator.inpaint(requests[:2], steps=2, guidance=1.0)  # warm-up: first calls allocate
    report: dict = {"machine": f"{platform.processor() or platform.machine()}, {torch.get_num_threads()} threads"}
    for steps in (10, 20):
        report[f"steps_{steps}"] = {
            "s_per_instance_batch_1": round(per_instance(generator, requests[:4], steps=steps, batched=False), 3),
            f"s_per_instance_batch_{len(requests)}": round(
                per_instance(generator, requests, steps=steps, batched=True), 3
            ),
        }
    meta = json.loads((args.model / "rarefill_model.json").read_text())
    report["default_model"] = {
        "steps_done": meta["steps_done"],
        "denoiser_train_minutes": round(meta.get("denoiser_train_seconds", float("nan")) / 60, 1),
        "command": meta["command"],
    }
    with tempfile.TemporaryDirectory() as tmp:
        started = time.perf_counter()
        fit(load_dataset(args.train), out_dir=tmp, steps=args.fit_steps)
        seconds = time.perf_counter() - started
    report["fit_short_run"] = {
        "steps": args.fit_steps,
        "wall_s_including_data_loading_and_verifier": round(seconds, 1),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
    }
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
