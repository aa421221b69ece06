"""Step 4 of a merge: place the images (links, copies or the originals) and assemble the COCO file."""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..dataset import Dataset, Scene, annotation_entry, default_images_dir, image_entry
from ..errors import DatasetWarning, RunError
from ..files import write_bytes_atomic
from ..provenance import KEY, file_sha256
from .summary import MergeSummary

IMAGES_MODES = ("relative", "copy", "link")
"""How merged images are referenced: hard links (the default) or copies beside the output, or the original
files."""


def place_images(
    real: Dataset, picked: Sequence[tuple[int, Scene]], out: Path, images_mode: str
) -> dict[tuple[int, int], str]:
    """file_name of each merged image, keyed by (set, image id) with set -1 for the real split.

    Names are relative to the folder rarefill's loader will read the output's images from
    (:func:`pipeline.dataset.default_images_dir`), so that the merged file loads back as it is. ``link``
    and ``copy`` put the files in ``<out stem>_images/{real,synthetic-K}/`` there; ``relative`` names the
    original files, with one :class:`DatasetWarning` if some lie outside that folder (``../``: the loader
    refuses those, most trainers accept them).
    """
    root = default_images_dir(out).resolve()
    items = [((-1, s.id), s, f"real/{s.file_name}") for s in real.scenes]
    items += [((k, s.id), s, f"synthetic-{k + 1}/{s.file_name}") for k, s in picked]
    names: dict[tuple[int, int], str] = {}
    folder = f"{out.stem}_images"
    for key, scene, target in items:
        if images_mode == "relative":
            names[key] = Path(os.path.relpath(scene.path, root)).as_posix()
            continue
        destination = root / folder / target
        if images_mode == "copy":
            write_bytes_atomic(destination, scene.path.read_bytes())
        else:
            _link(scene.path, destination)
        names[key] = f"{folder}/{target}"
    outside = sum(name.startswith("../") for name in names.values())
    if outside:
        warnings.warn(
            DatasetWarning(
                f"{outside} file_name(s) climb out of the image folder {root} (../); pycocotools and most "
                "trainers accept that, rarefill's own loader does not: write the output in a folder above "
                "the images, or use --images-mode link (the default) or copy"
            ),
            stacklevel=3,
        )
    return names


def _link(source: Path, destination: Path) -> None:
    if destination.exists() and destination.samefile(source):
        return
    destination.parent.mkdir(parents=True, exist_ok=True)
    temporary = destination.with_name(f".{destination.name}.link")
    try:
        temporary.unlink(missing_ok=True)
        os.link(source, temporary)
        os.replace(temporary, destination)
    except OSError as exc:
        raise RunError(
            f"cannot hard-link {source} to {destination} ({exc})",
            hint="use --images-mode copy (hard links need both folders on one file system)",
        ) from None


def merge_info(summary: MergeSummary, *, caps, rare_below, images_mode, inputs: Sequence[Path], out: Path) -> dict:
    """The merged file's ``info``: the parameters and every input file's hash, no clock time."""
    base = out.resolve().parent
    files = [{"file": Path(os.path.relpath(p.resolve(), base)).as_posix(), "sha256": file_sha256(p)} for p in inputs]
    parameters: dict[str, Any] = {"synthetic_share" if summary.mode == "share" else "rare_target": summary.requested}
    parameters.update(
        caps=dict(sorted(caps.items())), rare_below=rare_below, seed=summary.seed, images_mode=images_mode
    )
    return {
        "description": "rarefill merge of a real training split with synthetic images",
        "merge": {
            **parameters,
            "inputs": files,
            "real_images": summary.real_images,
            "synthetic_images": summary.synthetic_selected,
            "excluded_by_guard": dict(summary.excluded),
        },
    }


def assemble(real, picked, to_out, categories, file_names, info) -> dict[str, Any]:
    """The merged COCO object: real images first, then the picked synthetic ones, ids renumbered 1..n."""
    images: list[dict[str, Any]] = []
    annotations: list[dict[str, Any]] = []

    def add(scene: Scene, key: tuple[int, int], table: Mapping[int, int] | None, extra: dict | None) -> None:
        image_id = len(images) + 1
        entry = image_entry(scene, file_name=file_names[key])
        entry["id"] = image_id
        if extra is not None:
            entry[KEY] = {**entry[KEY], "merged_from": extra}
        images.append(entry)
        for ann in scene.annotations:
            item = annotation_entry(ann)
            item.update(id=len(annotations) + 1, image_id=image_id)
            if table is not None:
                item["category_id"] = table[ann.category_id]
            annotations.append(item)

    for scene in real.scenes:
        add(scene, (-1, scene.id), None, None)
    for k, scene in picked:
        add(scene, (k, scene.id), to_out[k], {"synthetic_set": k + 1, "image_id": scene.id})
    out = {key: value for key, value in real.extra.items() if key != "info"}
    return {"info": info, **out, "images": images, "annotations": annotations, "categories": categories}
