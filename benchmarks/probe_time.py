"""How long `rarefill probe` takes: per training step, per model, per whole probe, on the seed scenes.

Times preparing the splits (reading and scaling the images), training steps at each input scale, and
predicting + scoring (COCOeval) the test split; then prints the wall time of a probe with the given
epochs, seeds and conditions (real + 2 shares filtered + 2 shares unfiltered = 5 by default).

Run: /work/venv/bin/python benchmarks/probe_time.py [--epochs 30 --seeds 3 --conditions 5 --steps 20 --threads 1]
(two copies with --threads 1 side by side show what `rarefill probe --workers 2` gets from two cores).
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import torch

from pipeline.dataset import load_dataset, to_coco
from pipeline.probe import TrainSettings, evaluate, predict, prepare, train_detector
from pipeline.probe.evaluation import detections_to_coco

SEED_SCENES = Path(__file__).resolve().parents[1] / "seed_scenes"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=float, default=30.0)
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--conditions", type=int, default=5)
    parser.add_argument("--steps", type=int, default=20, help="training steps to time per scale")
    parser.add_argument("--scales", default="0.5,1.0")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads(), help="torch threads")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)

    train = load_dataset(SEED_SCENES / "train.json")
    test = load_dataset(SEED_SCENES / "test.json")
    names = tuple(c.name for c in train.categories)
    ids = [test.category_by_name(n).id for n in names]
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads; {len(train.scenes)} train images")
    for scale in (float(s) for s in args.scales.split(",")):
        settings = TrainSettings(steps=args.steps, input_scale=scale)
        start = time.perf_counter()
        train_data = prepare(train, names, input_scale=scale)
        test_data = prepare(test, names, input_scale=scale)
        prepared = time.perf_counter() - start
        stamps: list[float] = []
        detector = train_detector(
            train_data, settings=settings, rng=0, progress=lambda *_, s=stamps: s.append(time.perf_counter())
        )
        per_step = (stamps[-1] - stamps[1]) / (len(stamps) - 2)  # the first two steps warm up
        start = time.perf_counter()
        evaluate(to_coco(test), detections_to_coco(predict(detector, test_data), test_data.image_ids, ids))
        scored = time.perf_counter() - start
        steps = math.ceil(args.epochs * len(train.scenes) / settings.batch_size)
        per_model = steps * per_step + scored
        models = args.seeds * args.conditions
        canvas = "x".join(str(v) for v in train_data.images.shape[2:0:-1])
        print(f"\ninput scale {scale:g} (canvas {canvas} px, batch {settings.batch_size}, width {settings.width})")
        print(f"  prepare train + test splits        {prepared:8.1f} s")
        print(
            f"  one training step                  {per_step:8.3f} s  ({settings.batch_size / per_step:.1f} images/s)"
        )
        print(f"  predict + COCOeval on {len(test.scenes)} test images {scored:8.1f} s")
        print(f"  one model, {args.epochs:g} epochs = {steps} steps    {per_model / 60:8.1f} min")
        print(f"  probe of {models} models                {models * per_model / 60:8.1f} min (+ merges and preparing)")


if __name__ == "__main__":
    main()
