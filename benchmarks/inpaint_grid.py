"""Inpaint rare objects into held-out scenes, save a before/after grid and the verifier's acceptance.

For each rare class, requests go to held-out scenes at plausible boxes: first the boxes of real objects
of that class (masked out and redrawn), then boxes of other real objects reshaped to the class's median
aspect ratio with the same bottom centre (where a vehicle stands on the road). Each tile shows the
context window before | after; its border is green when the verifier accepts the object (probability
of the requested class >= 0.5), red otherwise.

Example:
    python benchmarks/inpaint_grid.py --model models/default --out outputs/inpaint_grid.png
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import cv2
import numpy as np

from pipeline.dataset import load_dataset
from pipeline.generator import InpaintRequest, load
from pipeline.generator.verifier import load_verifier
from pipeline.generator.windows import box_mask, context_window, crop_window, object_mask_box

TILE = 80


def plausible_boxes(datasets, label: str, aspect: float, n: int, rng: np.random.Generator):
    """(scene, box) pairs: boxes of real ``label`` objects, then reshaped boxes of other objects."""
    own, other = [], []
    for data in datasets:
        names = data.category_names()
        for scene in data.scenes:
            for ann in scene.annotations:
                if names[ann.category_id] == label:
                    own.append((scene, ann.bbox))
                else:
                    x, y, w, h = ann.bbox
                    new_w = min(h * aspect, scene.width - 1.0)
                    x_new = min(max(x + w / 2 - new_w / 2, 0.0), scene.width - new_w)
                    other.append((scene, (x_new, y, new_w, h)))
    picks = list(own)
    order = rng.permutation(len(other))
    picks += [other[i] for i in order[: max(0, n - len(picks))]]
    return picks[:n]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--model", type=Path, default=Path("models/default"))
    parser.add_argument("--train", type=Path, default=Path("seed_scenes/train.json"))
    parser.add_argument(
        "--held-out", type=Path, nargs="+", default=[Path("seed_scenes/test.json"), Path("seed_scenes/val.json")]
    )
    parser.add_argument("--classes", nargs="+", default=["tractor", "works_trailer"])
    parser.add_argument("--per-class", type=int, default=32)
    parser.add_argument("--steps", type=int, default=20)
    parser.add_argument("--guidance", type=float, default=1.0)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=Path("outputs/inpaint_grid.png"))
    args = parser.parse_args()

    rng = np.random.default_rng(args.seed)
    generator = load(args.model)
    verifier = load_verifier(args.model)
    train = load_dataset(args.train, check_images=False)
    held_out = [load_dataset(path) for path in args.held_out]

    tiles, summary, started, count = [], {}, time.perf_counter(), 0
    for label in args.classes:
        category = train.category_by_name(label).id
        aspects = [a.bbox[2] / a.bbox[3] for a in train.annotations() if a.category_id == category]
        picks = plausible_boxes(held_out, label, float(np.median(aspects)), args.per_class, rng)
        requests, object_boxes = [], []
        for k, (scene, box) in enumerate(picks):
            image = scene.load_rgb()
            # Masked as the insert stage masks a new object (default mask_margin 0.12); the window is
            # centred on the mask's box, and the verifier looks at the object's box.
            mask_box = object_mask_box(box, margin=0.12)
            mask = box_mask(image.shape[:2], mask_box)
            rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
            mask_box = (cols[0], rows[0], cols[-1] + 1 - cols[0], rows[-1] + 1 - rows[0])
            request = InpaintRequest(image, mask, mask_box, label, seed=args.seed * 100_000 + count + k)
            requests.append(request)
            object_boxes.append(box)
        count += len(requests)
        frames = generator.inpaint(requests, steps=args.steps, guidance=args.guidance)
        accepted = 0
        for request, frame, box in zip(requests, frames, object_boxes, strict=True):
            probability = verifier.present_probability(frame, box, label)
            accepted += probability >= 0.5
            window = context_window(request.box, frame.shape[:2])
            before = crop_window(request.image, window, TILE)
            after = crop_window(frame, window, TILE)
            tile = np.concatenate([before, np.full((TILE, 2, 3), 255, np.uint8), after], axis=1)
            colour = (0, 200, 0) if probability >= 0.5 else (220, 0, 0)
            tiles.append(cv2.copyMakeBorder(tile, 3, 3, 3, 3, cv2.BORDER_CONSTANT, value=colour))
        summary[label] = {"requests": len(requests), "accepted": int(accepted), "share": accepted / len(requests)}
    seconds = time.perf_counter() - started

    columns = 6
    blank = np.zeros_like(tiles[0])
    tiles += [blank] * (-len(tiles) % columns)
    rows = [np.concatenate(tiles[i : i + columns], axis=1) for i in range(0, len(tiles), columns)]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    cv2.imwrite(str(args.out), cv2.cvtColor(np.concatenate(rows, axis=0), cv2.COLOR_RGB2BGR))
    total = sum(s["accepted"] for s in summary.values()) / sum(s["requests"] for s in summary.values())
    report = {"model": str(args.model), "steps": args.steps, "guidance": args.guidance, "classes": summary}
    report.update({"accepted_share": total, "seconds": round(seconds, 1), "grid": str(args.out)})
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
