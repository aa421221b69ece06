"""How well the exemplar model fits a displaced real object back into its scene, and how fast.

Each held-out object (not touching the image edge, overlapping no other box by more than 10%) is masked
with the insert stage's repaint region (silhouette grown by 3 px plus the
shadow band) and given an augmented copy of itself as exemplar (the training augmentation: colour,
brightness, contrast, blur, a few per cent of shift and scale), composited over the scene whose masked
part is filled by OpenCV's Telea inpainting (the ground without the object's own shadow, as a new place
would be). The model repaints the region; its output is compared with the original frame:

- inside the silhouette (alpha > 0.5) and in the shadow band outside it;
- mean absolute error in grey levels (0-255) of the full image and of its low frequencies (Gaussian,
  sigma 2 px), the part the insert stage takes from the model;
- against the unharmonised exemplar composite (what pasting gives) as the baseline;
- "model lows + exemplar highs": the model's low frequencies plus the exemplar's high frequencies inside
  the silhouette, which is what the insert stage keeps.

It also prints seconds per window (batched) and writes a contact sheet: masked input | exemplar
composite | output | original, one object per row.

Example:
    python benchmarks/exemplar_harmonisation.py --model models/default --data seed_scenes/val.json \
        --sheet /tmp/harmonise.png

References
----------
A. Telea, "An image inpainting technique based on the fast marching method", J. Graphics Tools 9 (2004)
(``cv2.INPAINT_TELEA``).
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import cv2
import numpy as np
import torch

from pipeline.dataset import load_dataset
from pipeline.generator import InpaintRequest, load
from pipeline.generator.batches import OVERLAP_LIMIT, bounding_box, overlap_share
from pipeline.generator.exemplar import augment_exemplar
from pipeline.generator.windows import context_window, crop_window
from pipeline.silhouette import object_silhouette, repaint_mask


def displaced_exemplar(image: np.ndarray, box, rng: np.random.Generator):
    """(request parts) for one real object: mask, band, silhouette, exemplar frame and its alpha."""
    sil = object_silhouette(image, box).mask
    region = repaint_mask(sil, box)
    win = context_window(bounding_box(region.mask), image.shape[:2])
    side = win.size
    crop = crop_window(image, win, side)
    alpha = crop_window(sil.astype(np.float32), win, side, border=cv2.BORDER_CONSTANT)
    shown, moved = augment_exemplar(crop, alpha, rng)
    ground = cv2.inpaint(image, region.mask.astype(np.uint8), 3, cv2.INPAINT_TELEA)
    exemplar = ground.copy()
    full_alpha = np.zeros(image.shape[:2], np.float32)
    y0, x0 = max(win.y0, 0), max(win.x0, 0)
    y1, x1 = min(win.y0 + side, image.shape[0]), min(win.x0 + side, image.shape[1])
    part = (slice(y0 - win.y0, y1 - win.y0), slice(x0 - win.x0, x1 - win.x0))
    a = moved[part][..., None]
    exemplar[y0:y1, x0:x1] = np.clip(np.rint(a * shown[part] + (1 - a) * ground[y0:y1, x0:x1]), 0, 255)
    full_alpha[y0:y1, x0:x1] = moved[part]
    # Only the repaint region may show the exemplar; outside it the frame is the scene itself.
    full_alpha *= region.mask
    exemplar = np.where(region.mask[..., None], exemplar, image)
    return region, sil, exemplar.astype(np.uint8), full_alpha


def low(image: np.ndarray, sigma: float = 2.0) -> np.ndarray:
    return cv2.GaussianBlur(image.astype(np.float32), (0, 0), sigma)


def errors(result: np.ndarray, original: np.ndarray, where: np.ndarray) -> tuple[float, float]:
    full = np.abs(result.astype(np.float32) - original)[where].mean()
    lows = np.abs(low(result) - low(original))[where].mean()
    return float(full), float(lows)


def sheet_row(parts: list[np.ndarray], win, scale: int = 3) -> np.ndarray:
    tiles = [
        cv2.resize(crop_window(p, win, 64), (64 * scale, 64 * scale), interpolation=cv2.INTER_NEAREST) for p in parts
    ]
    return np.concatenate([np.pad(t, ((2, 2), (2, 2), (0, 0)), constant_values=255) for t in tiles], axis=1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--model", type=Path, default=Path("models/default"))
    parser.add_argument("--data", type=Path, default=Path("seed_scenes/val.json"))
    parser.add_argument("--images", type=Path, default=None, help="folder the file names are relative to")
    parser.add_argument("--n", type=int, default=48, help="objects to test (the first ones at least --min-px tall)")
    parser.add_argument("--min-px", type=float, default=14.0)
    parser.add_argument("--steps", type=int, default=4)
    parser.add_argument("--strength", type=float, default=0.5)
    parser.add_argument("--guidance", type=float, default=1.0)
    parser.add_argument("--sheet", type=Path, default=None, help="write a PNG contact sheet here")
    parser.add_argument("--sheet-rows", type=int, default=12)
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)

    generator = load(args.model)
    data = load_dataset(args.data, args.images)
    names = data.category_names()
    rng = np.random.default_rng(0)
    cases = []
    for scene in data.scenes:
        image = scene.load_rgb()
        for ann in scene.annotations:
            label = names[ann.category_id].lower()
            if ann.iscrowd or ann.bbox[3] < args.min_px or label not in generator.classes:
                continue
            x, y, w, h = ann.bbox
            if x < 1 or y < 1 or x + w > image.shape[1] - 1 or y + h > image.shape[0] - 1:
                continue
            others = np.array([a.bbox for a in scene.annotations], dtype=np.float64).reshape(-1, 4)
            if overlap_share(ann.bbox, others) > OVERLAP_LIMIT:  # partly hidden: not an exemplar the stage uses
                continue
            region, sil, exemplar, alpha = displaced_exemplar(image, ann.bbox, rng)
            request = InpaintRequest(
                image, region.mask, bounding_box(region.mask), label, len(cases), None, exemplar, alpha
            )
            cases.append((request, sil, region))
            if len(cases) == args.n:
                break
        if len(cases) == args.n:
            break
    requests = [c[0] for c in cases]
    generator.inpaint(requests[:2], steps=2, guidance=1.0, strength=args.strength)  # warm-up
    started = time.perf_counter()
    outputs = generator.inpaint(requests, steps=args.steps, guidance=args.guidance, strength=args.strength)
    seconds = (time.perf_counter() - started) / len(requests)

    totals: dict[str, list] = {}
    rows = []
    for (request, sil, region), out in zip(cases, outputs, strict=True):
        band = region.band & ~sil
        inside = request.exemplar_alpha > 0.5
        highs = request.exemplar.astype(np.float32) - low(request.exemplar)
        combined = np.where(inside[..., None], np.clip(low(out) + highs, 0, 255), out).astype(np.uint8)
        for name, result in (
            ("exemplar_composite", request.exemplar),
            ("model", out),
            ("model_lows_exemplar_highs", combined),
        ):
            for where_name, where in (("silhouette", sil), ("shadow_band", band)):
                if where.any():
                    totals.setdefault(f"{name}/{where_name}", []).append(errors(result, request.image, where))
        if len(rows) < args.sheet_rows:
            masked = np.where(request.mask[..., None], 0, request.image).astype(np.uint8)
            win = context_window(request.box, request.image.shape[:2])
            rows.append(sheet_row([masked, request.exemplar, out, request.image], win))
    report = {
        "model": str(args.model),
        "data": str(args.data),
        "objects": len(cases),
        "steps": args.steps,
        "strength": args.strength,
        "guidance": args.guidance,
        "seconds_per_window_batched": round(seconds, 3),
        "mean_abs_error_grey_levels [full, low-pass]": {
            k: [round(float(np.mean([v[0] for v in vals])), 2), round(float(np.mean([v[1] for v in vals])), 2)]
            for k, vals in sorted(totals.items())
        },
    }
    print(json.dumps(report, indent=2))
    if args.sheet is not None and rows:
        cv2.imwrite(str(args.sheet), np.concatenate(rows, axis=0)[..., ::-1])
        print(f"wrote {args.sheet}")


if __name__ == "__main__":
    main()
