"""Render the committed seed set: COCO splits, PNG images and drivable-surface masks.

Every image has its own seed derived from (set seed, split, index), so any one image re-renders
alone; the whole set is bit-identical for the same seed and :data:`RENDERER_VERSION`.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import cv2
import numpy as np

from ..files import write_bytes_atomic, write_json_atomic
from .layout import sample_scene
from .render import RenderedScene, render_scene
from .scene import CATEGORIES, RARE, SceneSpec

RENDERER_VERSION = "demo-world-1"
DEFAULT_SEED = 3
DEFAULT_COUNTS: dict[str, int] = {"train": 150, "val": 40, "test": 60}
SPLITS = ("train", "val", "test")
# rare instances per image, per rare class: about 20 in 150 train images (rare there); val and test
# hold at least 40 of each
RARE_RATE: dict[str, float] = {"train": 20 / 150, "val": 1.1, "test": 0.75}
COMMON_WEIGHTS = {"car": 0.62, "van": 0.24, "bus": 0.14}
MAX_OBJECTS = 6


def image_seed(seed: int, split: str, index: int) -> int:
    """The seed of image ``index`` of ``split`` (stored as ``render_truth.seed``)."""
    return int(np.random.SeedSequence([seed, SPLITS.index(split), index]).generate_state(1)[0])


def plan_split(split: str, n_images: int, rng: np.random.Generator) -> list[list[str]]:
    """Which classes each image of ``split`` holds: rare ones spread evenly, then 1-6 objects in all."""
    per_image = [[] for _ in range(n_images)]
    for rare in RARE:
        total = int(round(n_images * RARE_RATE[split]))
        base, extra = divmod(total, n_images) if n_images else (0, 0)
        counts = np.full(n_images, base)
        counts[rng.permutation(n_images)[:extra]] += 1
        for i, k in enumerate(counts):
            per_image[i] += [rare] * int(k)
    names = list(COMMON_WEIGHTS)
    probs = np.asarray(list(COMMON_WEIGHTS.values()))
    for wanted in per_image:
        room = MAX_OBJECTS - len(wanted)
        if room > 0:
            n_common = int(rng.integers(1, room + 1))
            wanted += [names[int(i)] for i in rng.choice(len(names), size=n_common, p=probs / probs.sum())]
    return per_image


def encode_png(array: np.ndarray) -> bytes:
    """PNG bytes (compression 9) of an RGB ``(H, W, 3)`` or single-channel ``(H, W)`` uint8 array."""
    if array.ndim == 3:
        array = cv2.cvtColor(array, cv2.COLOR_RGB2BGR)
    ok, data = cv2.imencode(".png", array, [cv2.IMWRITE_PNG_COMPRESSION, 9])
    if not ok:
        raise RuntimeError("PNG encoding failed")
    return data.tobytes()


def coco_entries(
    spec: SceneSpec,
    rendered: RenderedScene,
    *,
    image_id: int,
    first_ann_id: int,
    file_name: str,
    mask_name: str,
    seed: int,
) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    """The COCO image entry and annotation entries of one rendered scene."""
    cam = spec.camera
    image = {
        "id": image_id,
        "file_name": file_name,
        "width": cam.width,
        "height": cam.height,
        "drivable_mask": mask_name,
        "render_truth": {**cam.to_dict(), "seed": seed, "renderer_version": RENDERER_VERSION,
                         "lighting": spec.lighting.kind},
    }  # fmt: skip
    annotations = []
    for k, (obj, box) in enumerate(zip(spec.objects, rendered.boxes, strict=True)):
        annotations.append(
            {
                "id": first_ann_id + k,
                "image_id": image_id,
                "category_id": CATEGORIES.index(obj.category) + 1,
                "bbox": [round(v, 2) for v in box],
                "area": int((rendered.owner == k + 1).sum()),
                "iscrowd": 0,
                "render_truth": {
                    "X_m": obj.x_m,
                    "Z_m": obj.z_m,
                    "height_m": obj.height_m,
                    "width_m": obj.width_m,
                    "length_m": obj.length_m,
                    "view": obj.view,
                    "visible_fraction": round(rendered.visible_fraction[k], 4),
                },
            }
        )
    return image, annotations


def seed_set_plan(seed: int, counts: Mapping[str, int] | None = None) -> dict[str, list[list[str]]]:
    """The classes of every image of every split with more than 0 images (see :func:`plan_split`)."""
    counts = dict(DEFAULT_COUNTS if counts is None else counts)
    unknown = set(counts) - set(SPLITS)
    if unknown:
        raise ValueError(f"counts has unknown splits {sorted(unknown)}; known: {SPLITS}")
    if any(not isinstance(n, int) or isinstance(n, bool) or n < 0 for n in counts.values()):
        raise ValueError(f"counts must be integers >= 0, got {counts}")
    return {
        split: plan_split(split, counts[split], np.random.default_rng([seed, SPLITS.index(split)]))
        for split in SPLITS
        if counts.get(split, 0) > 0
    }


def render_seed_image(
    seed: int, split: str, index: int, categories: Sequence[str]
) -> tuple[SceneSpec, RenderedScene, int]:
    """Sample and render image ``index`` of ``split``: ``(spec, rendered, image seed)``."""
    s = image_seed(seed, split, index)
    spec = sample_scene(s, categories=categories)
    return spec, render_scene(spec), s


def render_seed_set(
    out_dir: str | os.PathLike[str], *, seed: int = DEFAULT_SEED, counts: Mapping[str, int] | None = None
) -> dict[str, Path]:
    """Render the demo seed set into ``out_dir``.

    Writes ``{split}.json`` (COCO, categories 1 car, 2 van, 3 bus, 4 tractor, 5 works_trailer),
    ``images/{split}_{i:04d}.png`` and ``images/surfaces/{split}_{i:04d}.png`` (0/255 drivable mask).

    Parameters
    ----------
    out_dir : path
    seed : int
        Set seed; each image's seed is derived from it (see :func:`image_seed`).
    counts : mapping split -> number of images
        Default :data:`DEFAULT_COUNTS`. Splits may be left out or set to 0.

    Returns
    -------
    dict
        Split name to the JSON file written.
    """
    out = Path(out_dir)
    written: dict[str, Path] = {}
    categories = [{"id": i + 1, "name": name, "supercategory": "vehicle"} for i, name in enumerate(CATEGORIES)]
    for split, plan in seed_set_plan(seed, counts).items():
        images, annotations = [], []
        for i, wanted in enumerate(plan):
            stem = f"{split}_{i + 1:04d}"
            spec, rendered, s = render_seed_image(seed, split, i, wanted)
            write_bytes_atomic(out / "images" / f"{stem}.png", encode_png(rendered.image))
            mask_name = f"surfaces/{stem}.png"
            write_bytes_atomic(out / "images" / mask_name, encode_png(rendered.drivable.astype(np.uint8) * 255))
            image, anns = coco_entries(
                spec,
                rendered,
                image_id=i + 1,
                first_ann_id=len(annotations) + 1,
                file_name=f"{stem}.png",
                mask_name=mask_name,
                seed=s,
            )
            images.append(image)
            annotations += anns
        coco = {
            "info": {
                "description": "rarefill demo seed scenes: RENDERED (not photographed) rural road scenes "
                "from a level pinhole camera, made by pipeline.demo_world for the demo and tests only",
                "version": RENDERER_VERSION,
                "seed": seed,
                "split": split,
            },
            "images": images,
            "annotations": annotations,
            "categories": categories,
        }
        path = out / f"{split}.json"
        write_json_atomic(path, coco)
        written[split] = path
    return written
