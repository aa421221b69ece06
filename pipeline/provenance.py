"""What made each synthetic image: recipe, stage, source image, seeds, model, filter values, versions.

Provenance lives in an extra key, :data:`KEY`, of COCO image and annotation entries; pycocotools and COCO
evaluation ignore keys they do not know. Nothing here holds a wall-clock time, so the same recipe and seed
give byte-identical labels (times go to the run log).
"""

from __future__ import annotations

import hashlib
import platform
from collections.abc import Mapping, Sequence
from functools import cache
from importlib import metadata
from pathlib import Path
from typing import Any

from . import __version__

KEY = "rarefill"
"""Extra key of image and annotation entries that carries provenance."""


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, read in blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@cache
def software_versions() -> dict[str, str]:
    """Versions of rarefill, Python and the libraries that shape the pixels."""
    versions = {"rarefill": __version__, "python": platform.python_version()}
    for package in ("torch", "diffusers", "numpy", "opencv-python-headless", "pillow"):
        try:
            versions[package] = metadata.version(package)
        except metadata.PackageNotFoundError:
            continue
    return versions


def image_provenance(
    *,
    recipe_name: str,
    recipe_sha256: str,
    stage: Mapping[str, Any],
    source_image_id: int,
    source_file: str,
    source_sha256: str,
    job_key: str,
    attempt: int,
    seed: int,
    model: Mapping[str, Any],
    verdicts: Sequence[Mapping[str, Any]],
    details: Mapping[str, Any],
) -> dict[str, Any]:
    """The provenance record of one synthetic image entry."""
    return {
        "synthetic": True,
        "recipe": {"name": recipe_name, "sha256": recipe_sha256},
        "stage": dict(stage),
        "source": {"image_id": source_image_id, "file_name": source_file, "sha256": source_sha256},
        "job": {"key": job_key, "attempt": attempt, "seed": seed},
        "model": dict(model),
        "filters": [{k: v[k] for k in ("name", "passed", "value", "limit")} for v in verdicts],
        "details": dict(details),
        "versions": software_versions(),
    }


def new_annotation_provenance(requested: Sequence[float], stage_kind: str, extra: Mapping[str, Any]) -> dict:
    """Provenance of an annotation a stage added: the box asked for (the label is the re-fitted box)."""
    return {"synthetic": True, "stage": stage_kind, "requested_bbox": [round(float(v), 2) for v in requested], **extra}


def kept_annotation_provenance(source_annotation_id: int) -> dict:
    """Provenance of a real annotation carried over from the source image."""
    return {"synthetic": False, "source_annotation_id": source_annotation_id}
