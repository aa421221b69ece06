"""Step 2 of a merge, the leakage guard: no synthetic image made from a held-out image enters training.

A synthetic image is left out when its source (provenance ``rarefill.source``) has the file hash
(SHA-256) of a guarded image, or the same ``(image_id, file_name)`` as a guarded image entry; a real
training image byte-identical to a guarded image is an error. See :mod:`pipeline.merge` for why both keys.
"""

from __future__ import annotations

import re
import warnings
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

from ..dataset import Dataset, Scene
from ..errors import DatasetError, DatasetWarning
from ..provenance import KEY, file_sha256

_SHA256 = re.compile(r"[0-9a-f]{64}")


class GuardIndex(NamedTuple):
    """What identifies a guarded image (a pair, so ``hashes, keys = guard_index(...)`` also works).

    Attributes
    ----------
    hashes : mapping of str -> str
        SHA-256 hex digest of every guarded image file on disk -> ``"<COCO file>: <file_name>"``.
    keys : frozenset of (int, str)
        ``(image id, file_name)`` of every guarded image entry, its file present or not.
    """

    hashes: Mapping[str, str]
    keys: frozenset[tuple[int, str]]

    def match(self, source: Mapping[str, Any]) -> str | None:
        """Which key a provenance source shares with a guarded image: ``"hash"``, ``"id+file_name"`` or None."""
        if source["sha256"] in self.hashes:
            return "hash"
        if (source["image_id"], source["file_name"]) in self.keys:
            return "id+file_name"
        return None


def guard_index(guards: Sequence[Dataset]) -> GuardIndex:
    """Hash every guarded image file and collect every guarded ``(id, file_name)``.

    Shared by the merge's leakage guard and the realism audit's check that its held-out split made no
    synthetic image. A guarded split whose image files are (partly) absent gives one
    :class:`DatasetWarning`: those images are guarded by id and file name only.
    """
    hashes: dict[str, str] = {}
    keys: set[tuple[int, str]] = set()
    for dataset in guards:
        missing = 0
        for scene in dataset.scenes:
            keys.add((scene.id, scene.file_name))
            if scene.path.is_file():
                hashes.setdefault(file_sha256(scene.path), f"{dataset.source}: {scene.file_name}")
            else:
                missing += 1
        if missing:
            warnings.warn(
                DatasetWarning(
                    f"{dataset.source}: {missing} guarded image file(s) not found under {dataset.images_dir}; "
                    "those are guarded by id and file name only"
                ),
                stacklevel=2,
            )
    return GuardIndex(hashes, frozenset(keys))


def refuse_real_leaks(real: Dataset, index: GuardIndex) -> None:
    """Raise :class:`DatasetError` if a real training image is byte-identical to a guarded image."""
    for i, scene in enumerate(real.scenes):
        twin = index.hashes.get(file_sha256(scene.path))
        if twin is not None:
            raise DatasetError(
                real.source,
                f"images[{i}]",
                f"training image {scene.file_name} is byte-identical to held-out image {twin}",
                hint="the splits overlap; remove the image from one of them before merging",
            )


def synthetic_source(scene: Scene, dataset: Dataset, index: int) -> dict[str, Any]:
    """The provenance source of synthetic image ``index`` of ``dataset``, checked: the guard needs it.

    Raises
    ------
    DatasetError
        The source is missing, or its ``image_id``, ``file_name`` or ``sha256`` is malformed.
    """
    where = f"images[{index}].{KEY}.source"
    record = scene.extra.get(KEY)
    source = record.get("source") if isinstance(record, dict) else None
    hint = "synthetic sets must be run folders written by `rarefill run` (their provenance names the source)"
    if not isinstance(source, dict):
        raise DatasetError(dataset.source, where, "missing; the leakage guard needs the source image", hint=hint)
    image_id, file_name, sha = source.get("image_id"), source.get("file_name"), source.get("sha256")
    if not isinstance(image_id, int) or isinstance(image_id, bool):
        raise DatasetError(dataset.source, f"{where}.image_id", f"must be an integer, got {image_id!r}", hint=hint)
    if not isinstance(file_name, str) or not file_name:
        raise DatasetError(dataset.source, f"{where}.file_name", f"must be a file name, got {file_name!r}", hint=hint)
    if not isinstance(sha, str) or not _SHA256.fullmatch(sha):
        raise DatasetError(dataset.source, f"{where}.sha256", f"must be a SHA-256 hex digest, got {sha!r}", hint=hint)
    return source


def leave_out_guarded(sets: Sequence[Dataset], index: GuardIndex) -> tuple[list[tuple[int, Scene]], Counter[str]]:
    """The synthetic images that may be merged, as (set index, scene), and how many were left out by which key.

    Leaving any out gives one :class:`DatasetWarning` with the counts.
    """
    allowed: list[tuple[int, Scene]] = []
    excluded: Counter[str] = Counter()
    for k, dataset in enumerate(sets):
        for i, scene in enumerate(dataset.scenes):
            key = index.match(synthetic_source(scene, dataset, i))
            if key is None:
                allowed.append((k, scene))
            else:
                excluded[key] += 1
    if excluded:
        warnings.warn(
            DatasetWarning(
                f"left out {sum(excluded.values())} synthetic image(s) made from held-out images "
                f"(same file hash: {excluded['hash']}, same id and file name: {excluded['id+file_name']})"
            ),
            stacklevel=3,
        )
    return allowed, excluded
