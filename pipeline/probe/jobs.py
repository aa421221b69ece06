"""One probe model as a job: what it needs, training and scoring it in worker processes, and its record.

A job's record (``runs/<condition>-seed<s>.json``) holds its key (a hash of everything the model depends
on) and its scores; its detections on the test split go beside it (``.detections.json``), so confidence
intervals can be computed later without training again. A job whose record has the same key is read back.
"""

from __future__ import annotations

import hashlib
import json
import math
import multiprocessing
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import torch

from ..dataset import load_dataset, to_coco
from ..errors import RunError
from ..files import write_json_atomic
from ..provenance import file_sha256
from .evaluation import Evaluation, detections_to_coco, evaluate
from .training import Prepared, TrainSettings, predict, prepare, train_detector

CALIBRATION_STEPS = 6
"""Steps timed to turn a wall-time budget into a step count (the first two are left out as warm-up)."""


@dataclass(frozen=True)
class ProbeRun:
    """One trained and scored model."""

    arm: str
    share: float
    seed: int
    train_images: int
    synthetic_images: int
    reached_share: float
    steps: int
    train_seconds: float
    first_loss: float
    final_loss: float
    evaluation: Evaluation

    @property
    def condition(self) -> str:
        """``real``, or ``kind@share`` (see :func:`condition_name`)."""
        return condition_name(self.arm, self.share)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form, with the condition name; :meth:`from_dict` reads it back."""
        out = asdict(self)
        out["evaluation"] = self.evaluation.to_dict()
        out["condition"] = self.condition
        return out

    @classmethod
    def from_dict(cls, raw: Mapping[str, Any]) -> ProbeRun:
        """Inverse of :meth:`to_dict`."""
        fields = {k: v for k, v in raw.items() if k not in ("condition", "evaluation")}
        return cls(**fields, evaluation=Evaluation(**raw["evaluation"]))


def condition_name(arm: str, share: float) -> str:
    """``real`` for the baseline, else ``arm@share`` (e.g. ``paste@0.25``)."""
    return "real" if arm == "real" else f"{arm}@{share:g}"


@dataclass(frozen=True)
class Job:
    """One model to train: everything a worker process needs, as plain picklable values."""

    arm: str
    share: float
    seed: int
    set_file: str
    images_dir: str
    test_json: str
    class_names: tuple[str, ...]
    settings: TrainSettings
    synthetic_images: int
    reached_share: float
    record: str


def _init_worker(threads: int) -> None:
    torch.set_num_threads(threads)


def in_parallel(function: Callable[[Job], Any], jobs: Sequence[Job], workers: int, threads: int) -> Iterator:
    """Yield ``(index, function(job))`` as each call finishes, in ``workers`` spawned processes with
    ``threads`` torch threads each; one worker runs the calls in order in this process."""
    if workers == 1:
        before = torch.get_num_threads()
        torch.set_num_threads(threads)
        try:
            for i, job in enumerate(jobs):
                yield i, function(job)
        finally:
            torch.set_num_threads(before)
        return
    context = multiprocessing.get_context("spawn")
    pool = ProcessPoolExecutor(workers, mp_context=context, initializer=_init_worker, initargs=(threads,))
    try:
        futures = {pool.submit(function, job): i for i, job in enumerate(jobs)}
        for future in as_completed(futures):
            yield futures[future], future.result()
    finally:
        # on an error, do not wait for the queued models
        pool.shutdown(wait=False, cancel_futures=True)


def _load(job: Job) -> tuple[Prepared, Prepared, dict[str, Any], list[int]]:
    train = load_dataset(job.set_file, job.images_dir)
    test = load_dataset(job.test_json)
    scale = job.settings.input_scale
    test_ids = [test.category_by_name(name).id for name in job.class_names]
    return (
        prepare(train, job.class_names, input_scale=scale),
        prepare(test, job.class_names, input_scale=scale),
        to_coco(test),
        test_ids,
    )


def seconds_per_step(job: Job) -> float:
    data = _load(job)[0]
    stamps: list[float] = []
    settings = replace(job.settings, steps=CALIBRATION_STEPS)
    train_detector(data, settings=settings, rng=0, progress=lambda *_: stamps.append(time.perf_counter()))
    return (stamps[-1] - stamps[1]) / (len(stamps) - 2)


def train_job(job: Job) -> ProbeRun:
    data, test_data, test_truth, test_ids = _load(job)
    detector = train_detector(data, settings=job.settings, rng=job.seed)
    if not all(math.isfinite(v) for v in detector.losses):
        name = condition_name(job.arm, job.share)
        raise RunError(f"training diverged ({name}, seed {job.seed}): the loss is not finite")
    results = detections_to_coco(predict(detector, test_data), test_data.image_ids, test_ids)
    run = ProbeRun(
        arm=job.arm,
        share=job.share,
        seed=job.seed,
        train_images=len(data.images),
        synthetic_images=job.synthetic_images,
        reached_share=job.reached_share,
        steps=job.settings.steps,
        train_seconds=detector.seconds,
        first_loss=detector.losses[0],
        final_loss=float(np.mean(detector.losses[-max(1, len(detector.losses) // 20) :])),
        evaluation=evaluate(test_truth, results),
    )
    # the detections first: a record on disk promises them
    write_json_atomic(detections_file(job.record), results)
    write_json_atomic(job.record, {"key": run_key(job), "run": run.to_dict()}, indent=1)
    return run


def run_key(job: Job) -> str:
    """What a trained model depends on: its training set's bytes, the settings, the seed, the test split."""
    parts = {
        "set": file_sha256(job.set_file),
        "settings": asdict(job.settings),
        "seed": job.seed,
        "test": file_sha256(job.test_json),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()


def reuse(record: Path, key: str) -> ProbeRun | None:
    """The run recorded in ``record`` if it was made with ``key`` and its detections are beside it."""
    if not record.is_file() or not detections_file(record).is_file():
        return None
    try:
        raw = json.loads(record.read_text(encoding="utf-8"))
        return ProbeRun.from_dict(raw["run"]) if raw.get("key") == key else None
    except (json.JSONDecodeError, KeyError, TypeError):
        return None


def detections_file(record: str | Path) -> Path:
    """Where the test-split detections of the run recorded in ``record`` are kept (COCO result entries)."""
    record = Path(record)
    return record.with_name(record.stem + ".detections.json")


def read_detections(record: str | Path) -> list[dict[str, Any]]:
    """The COCO result entries saved beside ``record``; :class:`RunError` when missing or unreadable."""
    path = detections_file(record)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise RunError(f"{path}: cannot read the probe's detections ({exc}); run the probe again") from None


def record_file(out: str | Path, condition: str, seed: int) -> Path:
    """The record of one model of a probe written to ``out``."""
    return Path(out) / "runs" / f"{condition}-seed{seed}.json"
