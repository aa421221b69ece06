"""Seconds per inpainted instance (one at a time and batched, blending included), fit time and memory.

Inpainting: requests at boxes of real objects in held-out scenes, 10-20 DPM-Solver++ steps, guidance 1
and 2. With an exemplar-conditioned model also exemplar requests (the object itself as exemplar inside the
insert stage's repaint region), 4-8 steps from the exemplar noised to ``strength`` of the schedule.
Other processes on the machine inflate wall times (the report gives the load average); CPU seconds
per instance with ``OMP_NUM_THREADS=1`` approximate the time on an otherwise idle single core.
Fit: a short run (``--fit-steps``) on the training split into a temporary folder gives seconds per
step and the process's peak resident memory (``resource.getrusage``); the default model's recorded
training time is read from its metadata.

Example:
    python benchmarks/generator_speed.py --model models/default
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import tempfile
import time
from pathlib import Path

import torch

from pipeline.dataset import load_dataset
from pipeline.generator import InpaintRequest, fit, load
from pipeline.generator.batches import bounding_box
from pipeline.generator.windows import box_mask
from pipeline.silhouette import object_silhouette, repaint_mask


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


def exemplar_requests_from(data, label: str, n: int) -> list[InpaintRequest]:
    out = []
    for scene in data.scenes:
        image = scene.load_rgb()
        for ann in scene.annotations:
            silhouette = object_silhouette(image, ann.bbox).mask
            mask = repaint_mask(silhouette, ann.bbox).mask
            alpha = silhouette.astype("float32")
            out.append(InpaintRequest(image, mask, bounding_box(mask), label, len(out), None, image, alpha))
            if len(out) == n:
                return out
    return out


def per_instance(generator, requests, *, steps: int, guidance: float, batched: bool, **options) -> tuple[float, float]:
    """Wall seconds and CPU seconds (all threads) per request."""
    wall, cpu = time.perf_counter(), time.process_time()
    if batched:
        generator.inpaint(requests, steps=steps, guidance=guidance, **options)
    else:
        for request in requests:
            generator.inpaint([request], steps=steps, guidance=guidance, **options)
    return (time.perf_counter() - wall) / len(requests), (time.process_time() - cpu) / len(requests)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--model", type=Path, default=Path("models/default"))
    parser.add_argument("--train", type=Path, default=Path("seed_scenes/train.json"))
    parser.add_argument("--held-out", type=Path, default=Path("seed_scenes/test.json"))
    parser.add_argument("--label", default="tractor")
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--fit-steps", type=int, default=30, help="0 skips the short fit run")
    args = parser.parse_args()

    generator = load(args.model)
    requests = requests_from(load_dataset(args.held_out), args.label, args.batch)
    generator.inpaint(requests[:2], steps=2, guidance=1.0)  # warm-up: first calls allocate
    report: dict = {
        "machine": f"{platform.processor() or platform.machine()}, {torch.get_num_threads()} threads",
        "load_average_1min_before": os.getloadavg()[0],
    }
    for steps, guidance in ((10, 1.0), (12, 1.0), (20, 1.0), (12, 2.0)):
        single = per_instance(generator, requests[:4], steps=steps, guidance=guidance, batched=False)
        batched = per_instance(generator, requests, steps=steps, guidance=guidance, batched=True)
        report[f"steps_{steps}_guidance_{guidance:g}"] = {
            "wall_s_per_instance_batch_1": round(single[0], 3),
            f"wall_s_per_instance_batch_{len(requests)}": round(batched[0], 3),
            "cpu_s_per_instance_batch_1": round(single[1], 3),
            f"cpu_s_per_instance_batch_{len(requests)}": round(batched[1], 3),
        }
    if getattr(generator, "accepts_exemplar", False):
        placed = exemplar_requests_from(load_dataset(args.held_out), args.label, args.batch)
        for steps, strength in ((4, 0.5), (6, 0.6), (8, 0.6), (12, 1.0)):
            single = per_instance(generator, placed[:4], steps=steps, guidance=1.0, batched=False, strength=strength)
            batched = per_instance(generator, placed, steps=steps, guidance=1.0, batched=True, strength=strength)
            report[f"exemplar_steps_{steps}_strength_{strength:g}"] = {
                "wall_s_per_window_batch_1": round(single[0], 3),
                f"wall_s_per_window_batch_{len(placed)}": round(batched[0], 3),
                f"cpu_s_per_window_batch_{len(placed)}": round(batched[1], 3),
            }
    meta = json.loads((args.model / "rarefill_model.json").read_text())
    report["default_model"] = {
        "steps_done": meta["steps_done"],
        "denoiser_train_minutes": round(meta.get("denoiser_train_seconds", float("nan")) / 60, 1),
        "command": meta["command"],
    }
    if args.fit_steps == 0:
        print(json.dumps(report, indent=2))
        return
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
