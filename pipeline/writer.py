"""Atomic, resumable run output.

Layout of a run folder::

    run.json         what the folder holds: recipe hash, plan fingerprint, shard, stages, categories; and,
                     once the run finished, its ``summary`` per stage (see :mod:`pipeline.tally`)
    chunks/NNNNNN.json   one committed chunk: every attempt of its jobs with verdicts, accepted outputs
    images/          accepted images (PNG)
    rejects/         thumbnails of rejected candidates (JPEG, half size)
    labels.json      COCO: accepted images with the source's real annotations plus the new ones
    manifest.jsonl   every candidate, accepted or not, with all verdicts, in plan order
    run.log          wall-clock times (kept apart so that labels never depend on the clock)

A chunk's images are written (atomically) before its chunk file; the chunk file is the commit. After a
crash, committed chunks are skipped and uncommitted ones are redone, rewriting the same bytes.
``labels.json`` and ``manifest.jsonl`` are assembled from the chunk files in plan order, so ids never
depend on the order in which chunks finished.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import cv2
import numpy as np

from .errors import RunError
from .files import write_bytes_atomic, write_json_atomic

RUN_FORMAT = "rarefill.run/1"

SUMMARY_KEY = "summary"
"""Key of ``run.json`` that a finished run adds; it is not part of the run's identity."""

REAL_BOX_RGB = (40, 170, 255)
"""Colour of real (kept) boxes in thumbnails: a light blue."""
NEW_BOX_RGB = (255, 120, 0)
"""Colour of new (synthetic, re-fitted) boxes in thumbnails: orange, apart from the blue for colour-blind readers."""
REQUESTED_BOX_RGB = (255, 255, 255)
"""Colour of the box a stage asked the generator to fill, in reject thumbnails: white."""


def encode_png(image: np.ndarray) -> bytes:
    """Lossless, deterministic PNG bytes of an ``(H, W, 3) uint8`` RGB image."""
    ok, data = cv2.imencode(".png", np.ascontiguousarray(image[:, :, ::-1]), [cv2.IMWRITE_PNG_COMPRESSION, 6])
    if not ok:
        raise RunError("could not encode a PNG image")
    return data.tobytes()


def encode_thumbnail(image: np.ndarray, boxes: Sequence[Mapping[str, Any]] = ()) -> bytes:
    """Half-size JPEG of an RGB image, for rejected candidates, with the candidate's boxes drawn.

    ``boxes`` are manifest boxes (``bbox``, ``new`` and, for new objects, ``requested_bbox``; COCO
    ``[x, y, w, h]`` in the image's pixels): the requested box in :data:`REQUESTED_BOX_RGB`, a new object's
    re-fitted box in :data:`NEW_BOX_RGB`, a kept object's box in :data:`REAL_BOX_RGB`.
    """
    small = cv2.resize(image, (max(1, image.shape[1] // 2), max(1, image.shape[0] // 2)), interpolation=cv2.INTER_AREA)
    small = np.ascontiguousarray(small)
    scale = (small.shape[1] / image.shape[1], small.shape[0] / image.shape[0])
    for box in boxes:
        if box.get("requested_bbox") is not None:
            _draw_box(small, box["requested_bbox"], scale, REQUESTED_BOX_RGB)
        _draw_box(small, box["bbox"], scale, NEW_BOX_RGB if box.get("new") else REAL_BOX_RGB)
    # without chroma subsampling (4:4:4) a drawn 1 px box keeps its colour
    params = [cv2.IMWRITE_JPEG_QUALITY, 85, cv2.IMWRITE_JPEG_SAMPLING_FACTOR, cv2.IMWRITE_JPEG_SAMPLING_FACTOR_444]
    ok, data = cv2.imencode(".jpg", np.ascontiguousarray(small[:, :, ::-1]), params)
    if not ok:
        raise RunError("could not encode a JPEG thumbnail")
    return data.tobytes()


def _draw_box(image: np.ndarray, box: Sequence[float], scale: tuple[float, float], colour: tuple) -> None:
    x, y, w, h = box
    top_left = (round(x * scale[0]), round(y * scale[1]))
    bottom_right = (round((x + w) * scale[0]) - 1, round((y + h) * scale[1]) - 1)
    cv2.rectangle(image, top_left, bottom_right, colour, 1, cv2.LINE_8)


class RunFolder:
    """One run's output folder: where images, rejects and chunk records go."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root)

    @classmethod
    def claim(cls, root: Path, identity: Mapping[str, Any]) -> RunFolder:
        """Open ``root`` for the run described by ``identity``: new, or an earlier start of the same run.

        Raises
        ------
        RunError
            The folder holds another run (other recipe, seed, counts or shard) or other files.
        """
        folder = cls(root)
        folder._check_identity(dict(identity))
        for sub in ("chunks", "images", "rejects"):
            (folder.root / sub).mkdir(parents=True, exist_ok=True)
            for stale in (folder.root / sub).glob(".*.tmp"):
                stale.unlink(missing_ok=True)  # left by a process killed mid-write
        for stale in folder.root.glob(".*.tmp"):
            stale.unlink(missing_ok=True)
        return folder

    @classmethod
    def inspect(cls, root: Path, identity: Mapping[str, Any]) -> set[int] | None:
        """What :meth:`claim` would find, writing nothing: None for a new folder, else the committed chunks.

        Raises
        ------
        RunError
            As :meth:`claim`.
        """
        folder = cls(root)
        folder._check_identity(dict(identity), write=False)
        return folder.committed() if (folder.root / "run.json").exists() else None

    def _check_identity(self, identity: dict[str, Any], *, write: bool = True) -> None:
        path = self.root / "run.json"
        if path.exists():
            try:
                existing = json.loads(path.read_text(encoding="utf-8"))
            except (OSError, json.JSONDecodeError) as exc:
                raise RunError(f"{path}: unreadable ({exc})", hint="delete the output folder and run again") from None
            existing.pop(SUMMARY_KEY, None)
            if existing != identity:
                keys = set(existing) | set(identity)
                changed = sorted(k for k in keys if existing.get(k) != identity.get(k))
                raise RunError(
                    f"{self.root} holds another run (differs in: {', '.join(changed)})",
                    hint="choose another output folder (--out), or delete this one to start over",
                )
        elif self.root.exists() and any(p for p in self.root.iterdir() if p.name != "run.log"):
            raise RunError(
                f"{self.root} exists and is not a rarefill run folder",
                hint="choose an empty or new output folder (--out)",
            )
        elif write:
            write_json_atomic(path, identity, indent=2)

    def chunk_path(self, chunk: int) -> Path:
        return self.root / "chunks" / f"{chunk:06d}.json"

    def committed(self) -> set[int]:
        """Chunks whose results are on disk."""
        return {int(p.stem) for p in (self.root / "chunks").glob("*.json") if p.stem.isdigit()}

    def write_image(self, name: str, image: np.ndarray) -> str:
        """Write an accepted image; returns its path relative to the run folder."""
        write_bytes_atomic(self.root / "images" / name, encode_png(image))
        return f"images/{name}"

    def write_reject(self, name: str, image: np.ndarray, boxes: Sequence[Mapping[str, Any]] = ()) -> str:
        """Write a rejected candidate's thumbnail with its boxes drawn; returns its path relative to the run folder."""
        write_bytes_atomic(self.root / "rejects" / name, encode_thumbnail(image, boxes))
        return f"rejects/{name}"

    def write_summary(self, summary: Mapping[str, Any]) -> None:
        """Add a finished run's summary to ``run.json`` (replacing an earlier one)."""
        path = self.root / "run.json"
        identity = json.loads(path.read_text(encoding="utf-8"))
        identity.pop(SUMMARY_KEY, None)
        write_json_atomic(path, {**identity, SUMMARY_KEY: dict(summary)}, indent=2)

    def commit(self, chunk: int, jobs: Sequence[Mapping[str, Any]]) -> None:
        """Commit a chunk's job records (written last, after every image it names)."""
        write_json_atomic(self.chunk_path(chunk), {"chunk": chunk, "jobs": list(jobs)})

    def log(self, message: str) -> None:
        """Append a time-stamped line to run.log (never read back by rarefill)."""
        stamp = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime())
        with open(self.root / "run.log", "a", encoding="utf-8") as handle:
            handle.write(f"{stamp} {message}\n")


def read_chunks(root: Path, chunks: Iterable[int]) -> list[dict]:
    """The committed chunk records of ``chunks``, in the order given."""
    records = []
    for chunk in chunks:
        path = Path(root) / "chunks" / f"{chunk:06d}.json"
        try:
            records.append(json.loads(path.read_text(encoding="utf-8")))
        except FileNotFoundError:
            raise RunError(f"{path}: chunk {chunk} is missing", hint="run the recipe again to finish it") from None
        except json.JSONDecodeError as exc:
            raise RunError(f"{path}: unreadable ({exc})") from None
    return records


def assemble(root: Path, chunks: Iterable[int], *, categories: list, info: Mapping[str, Any]) -> dict[str, int]:
    """Write labels.json and manifest.jsonl from committed chunks, in the order given.

    Image and annotation ids count from 1 in that order. Here, in plan order, the near-duplicate filter
    runs: an accepted output that repeats an earlier one (see :func:`duplicate_of`) is turned into a
    rejection and its image removed. Doing it here rather than per job keeps every job independent of the
    others, so resumed, parallel and sharded runs still end with the same bytes. Returns counts.
    """
    images: list[dict] = []
    annotations: list[dict] = []
    manifest: list[str] = []
    attempted = duplicates = 0
    earlier: dict[int, list[tuple[dict, str]]] = {}
    for record in read_chunks(root, chunks):
        for job in record["jobs"]:
            attempts = [dict(a) for a in job["attempts"]]
            output = job.get("output")
            if output is not None and "dedupe" in output:
                same_source = earlier.setdefault(output["dedupe"]["source"], [])
                verdict = duplicate_of(output["dedupe"], same_source)
                if verdict is None:
                    same_source.append((output["dedupe"], output["image"]["file_name"]))
                else:
                    (Path(root) / "images" / output["image"]["file_name"]).unlink(missing_ok=True)
                    attempts[-1].update(accepted=False, rejected_by=["duplicate"])
                    attempts[-1]["verdicts"] = [*attempts[-1]["verdicts"], verdict]
                    attempts[-1].pop("file_name", None)
                    duplicates += 1
                    output = None
            for attempt in attempts:
                attempted += 1
                manifest.append(json.dumps({"job": job["key"], **attempt}, ensure_ascii=False, allow_nan=False))
            if output is None:
                continue
            image_id = len(images) + 1
            images.append({"id": image_id, **output["image"]})
            for ann in output["annotations"]:
                annotations.append({"id": len(annotations) + 1, "image_id": image_id, **ann})
    labels = {"info": dict(info), "images": images, "annotations": annotations, "categories": categories}
    write_json_atomic(Path(root) / "labels.json", labels)
    write_bytes_atomic(Path(root) / "manifest.jsonl", ("\n".join(manifest) + "\n" if manifest else "").encode())
    counts = {"attempted": attempted, "accepted": len(images), "annotations": len(annotations)}
    return {**counts, "duplicates": duplicates}


def duplicate_of(mark: Mapping[str, Any], earlier: Sequence[tuple[Mapping[str, Any], str]]) -> dict | None:
    """The rejecting verdict (as a dict) if ``mark`` repeats an earlier output of the same source, else None.

    A mark is ``{"source", "box", "hash", "limit"}``: the source image id, the box around everything the
    stage changed, the pHash of that region, and the least Hamming distance between distinct outputs. Two
    outputs repeat each other when their changed regions overlap (IoU >= 0.5) and look alike (hash distance
    under the limit); outputs that changed different places of one scene are not duplicates, although
    their whole-image hashes are close.
    """
    for other, file_name in earlier:
        if _iou(mark["box"], other["box"]) < 0.5:
            continue
        distance = (int(mark["hash"], 16) ^ int(other["hash"], 16)).bit_count()
        if distance < mark["limit"]:
            reason = f"{distance} bits from {file_name} over the same region (limit {mark['limit']}): near-duplicate"
            return {"name": "duplicate", "passed": False, "value": distance, "limit": mark["limit"], "reason": reason}
    return None


def _iou(a: Sequence[float], b: Sequence[float]) -> float:
    ix = max(0.0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = a[2] * a[3] + b[2] * b[3] - inter
    return inter / union if union > 0 else 0.0
