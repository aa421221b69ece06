"""The downstream probe: does synthetic data help a detector on real held-out data?

For every seed, one detector is trained on each training set and scored on the real test split:

* ``real``: the real training split alone (share 0, the baseline);
* ``filtered``: the real split merged with the synthetic run folders at each share (pipeline.merge,
  with the held-out splits guarded);
* ``unfiltered`` (optional): the same with a run made with permissive plausibility limits, the
  control that shows what the filters are worth.

Every model gets the same number of optimiser steps (``epochs`` passes over the *real* split, or a
wall-time budget turned into steps once by timing), so a larger merged set does not also buy more
training. The seed drives the weights, the batches, the flips and the choice of synthetic images.
"""

from __future__ import annotations

import hashlib
import json
import math
import multiprocessing
import os
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import torch

from ..dataset import load_dataset, to_coco
from ..errors import DatasetError, RunError, UsageError
from ..files import write_json_atomic
from ..merge import merge
from ..provenance import file_sha256
from .evaluation import Evaluation, detections_to_coco, evaluate
from .training import Prepared, TrainSettings, predict, prepare, train_detector

KINDS = ("real", "filtered", "unfiltered")
CALIBRATION_STEPS = 6
"""Steps timed to turn a wall-time budget into a step count (the first two are left out as warm-up)."""


@dataclass(frozen=True)
class ProbeRun:
    """One trained and scored model."""

    kind: str
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
        return condition_name(self.kind, self.share)

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


@dataclass(frozen=True)
class ProbeResult:
    """Every run of a probe, with what is needed to summarise them."""

    runs: tuple[ProbeRun, ...]
    class_names: tuple[str, ...]
    rare_classes: tuple[str, ...]
    settings: TrainSettings
    shares: tuple[float, ...]
    seeds: tuple[int, ...]
    inputs: Mapping[str, Any]


def condition_name(kind: str, share: float) -> str:
    """``real`` for the baseline, else ``kind@share`` (e.g. ``filtered@0.25``)."""
    return "real" if kind == "real" else f"{kind}@{share:g}"


def rare_ap50(evaluation: Evaluation, rare: Sequence[str]) -> float | None:
    """Mean AP50 over the rare classes that have test instances (``None`` if none has)."""
    values = [evaluation.per_class_ap50.get(name) for name in rare]
    values = [v for v in values if v is not None]
    return float(np.mean(values)) if values else None


def run_probe(
    real_json: str | os.PathLike[str],
    *,
    test_json: str | os.PathLike[str],
    guards: Sequence[str | os.PathLike[str]],
    synthetic: Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    unfiltered: str | os.PathLike[str] | None = None,
    shares: Sequence[float] = (0.0, 0.25, 0.5),
    seeds: int = 3,
    epochs: float | None = None,
    minutes: float | None = None,
    settings: TrainSettings | None = None,
    rare_below: int = 50,
    workers: int = 1,
    threads: int | None = None,
    progress: Callable[[str], None] | None = None,
) -> ProbeResult:
    """Train and score detectors on real, real + filtered synthetic and real + unfiltered synthetic data.

    Parameters
    ----------
    real_json : path
        COCO file of the real training split (images in ``images/`` beside it).
    test_json : path
        The real held-out split every model is scored on; it is also guarded in the merges.
    guards : sequence of path
        Further held-out splits to keep out of training (e.g. val).
    synthetic : sequence of path
        Run folders of ``rarefill run`` made with the normal (filtering) limits.
    out : path
        Folder for ``sets/`` (merged COCO files with hard links to the images) and ``runs/`` (one JSON
        per trained model). A run whose JSON exists with the same inputs and settings is not trained
        again, so an interrupted probe continues where it stopped.
    unfiltered : path, optional
        A run folder made with permissive limits (see ``recipes/demo-unfiltered.toml``).
    shares : sequence of float
        Synthetic shares of the merged training images, each in [0, 1); 0 is the real-only baseline,
        which is always trained.
    seeds : int
        Repeats; seed ``s`` (0..seeds-1) is shared by all conditions, so differences can be paired.
    epochs : float, optional
        Steps per model = ``ceil(epochs * real images / batch size)``.
    minutes : float, optional
        Training wall time per model, turned once into a step count by timing a few steps.
        Give exactly one of ``epochs`` and ``minutes``.
    settings : TrainSettings, optional
        Network and optimiser settings; its ``steps`` is replaced. Default: :class:`TrainSettings`.
    rare_below : int
        A class with fewer real training instances than this is rare (as in :func:`pipeline.merge.merge`).
    workers : int
        Models trained side by side, each in its own process (one worker: in this process). Small
        networks use two cores better as two processes of one thread than as one of two threads.
    threads : int, optional
        Torch threads per model; default ``cpu_count // workers``. (For one worker, this process's
        thread count is set for the probe and restored after it.)
    progress : callable, optional
        Called with one line of text as the probe advances.

    Returns
    -------
    ProbeResult

    Raises
    ------
    UsageError
        Options out of range or contradicting each other.
    DatasetError
        An input is invalid, or the test split's categories differ from the training split's.
    """
    # 1. check options
    say = progress or (lambda _message: None)
    shares = _check_shares(shares)
    if (epochs is None) == (minutes is None):
        raise UsageError("give exactly one of --epochs and --minutes")
    if epochs is not None and not epochs > 0:
        raise UsageError(f"--epochs must be > 0, got {epochs}")
    if minutes is not None and not minutes > 0:
        raise UsageError(f"--minutes must be > 0, got {minutes}")
    if not isinstance(seeds, int) or seeds < 1:
        raise UsageError(f"--seeds must be an integer >= 1, got {seeds!r}")
    if not isinstance(workers, int) or workers < 1:
        raise UsageError(f"--workers must be an integer >= 1, got {workers!r}")
    if threads is None:
        threads = max(1, (os.cpu_count() or 1) // workers)
    if not isinstance(threads, int) or threads < 1:
        raise UsageError(f"--threads must be an integer >= 1, got {threads!r}")
    if not synthetic:
        raise UsageError("give at least one synthetic run folder (--synthetic RUN_DIR)")
    for folder in [*synthetic, *([unfiltered] if unfiltered is not None else [])]:
        if not (Path(folder) / "labels.json").is_file():
            raise UsageError(
                f"{folder} is not a run folder (no labels.json)", hint="pass a folder `rarefill run` wrote"
            )
    test_path = Path(test_json).resolve()
    if test_path == Path(real_json).resolve():
        raise UsageError(f"--test {test_json} is also the training split (--real); score on a held-out split")
    if test_path in {Path(g).resolve() for g in guards}:
        raise UsageError(
            f"--test {test_json} is also given as --guard",
            hint="the test split is always guarded; drop it from --guard",
        )
    if unfiltered is not None and Path(unfiltered).resolve() in {Path(s).resolve() for s in synthetic}:
        raise UsageError(f"--unfiltered {unfiltered} is also given as --synthetic; the control must differ")
    settings = settings or TrainSettings(steps=1)
    out = Path(out)

    # 2. load the real and test splits; one class list for both
    real = load_dataset(real_json)
    test = load_dataset(test_json)
    class_names = tuple(c.name for c in real.categories)
    if sorted(class_names) != sorted(c.name for c in test.categories):
        ours, theirs = ", ".join(class_names), ", ".join(c.name for c in test.categories)
        raise DatasetError(test_json, "categories", f"names differ from the training split's ({theirs} vs {ours})")
    counts = {name: 0 for name in class_names}
    names = real.category_names()
    for ann in real.annotations():
        if not ann.iscrowd:
            counts[names[ann.category_id]] += 1
    rare = tuple(name for name in class_names if counts[name] < rare_below)

    # 3. make the training sets (seed-major, so the first results already pair up)
    conditions = [("real", 0.0)] + [(kind, s) for kind in ("filtered", "unfiltered") for s in shares if s > 0]
    if unfiltered is None:
        conditions = [c for c in conditions if c[0] != "unfiltered"]
    runs_by_kind = {"filtered": [Path(s) for s in synthetic], "unfiltered": [Path(unfiltered)] if unfiltered else []}
    held_out = [Path(test_json), *map(Path, guards)]
    jobs: list[_Job] = []
    for seed in range(seeds):
        for kind, share in conditions:
            if kind == "real":
                set_file, images_dir, n_syn, reached = Path(real_json), real.images_dir, 0, 0.0
            else:
                set_file = out / "sets" / f"{kind}-{share:g}-seed{seed}.json"
                summary = merge(
                    real_json,
                    synthetic=runs_by_kind[kind],
                    guards=held_out,
                    out=set_file,
                    synthetic_share=share,
                    images_mode="link",
                    seed=seed,
                )
                images_dir, n_syn, reached = set_file.parent, summary.synthetic_selected, summary.share
            name = condition_name(kind, share)
            record = out / "runs" / f"{name}-seed{seed}.json"
            jobs.append(
                _Job(kind, share, seed, str(set_file), str(images_dir), str(test_json), class_names, settings,
                     n_syn, reached, str(record))
            )  # fmt: skip
    say(f"made {len(jobs)} training sets in {out / 'sets'}")

    # 4. fix the number of steps: equal for every model
    if epochs is not None:
        steps = math.ceil(epochs * len(real.scenes) / settings.batch_size)
    else:
        # time as many models side by side as will train side by side
        timings = [t for _, t in _in_parallel(_seconds_per_step, [jobs[0]] * workers, workers, threads)]
        seconds = float(np.mean(timings))
        steps = max(1, math.floor(minutes * 60 / seconds))
        say(f"timed {seconds:.2f} s per step: {steps} steps per model for {minutes:g} min")
    settings = replace(settings, steps=steps)
    jobs = [replace(job, settings=settings) for job in jobs]

    # 5. train and score (models already trained with the same inputs are read back)
    runs: list[ProbeRun | None] = [_reuse(Path(job.record), _run_key(job)) for job in jobs]
    if any(runs):
        say(f"reusing {sum(r is not None for r in runs)} model(s) trained before with the same inputs")
    todo = [i for i, run in enumerate(runs) if run is None]
    for k, run in _in_parallel(_train_job, [jobs[i] for i in todo], workers, threads):
        runs[todo[k]] = run
        say(
            f"[{sum(r is not None for r in runs)}/{len(jobs)}] {run.condition}, seed {run.seed}: "
            f"AP50 {run.evaluation.ap50:.3f}, rare AP50 {_fmt(rare_ap50(run.evaluation, rare))}, "
            f"{run.train_seconds:.0f} s"
        )
    inputs = {
        "real": str(real_json),
        "test": str(test_json),
        "guards": [str(g) for g in guards],
        "synthetic": [str(s) for s in synthetic],
        "unfiltered": None if unfiltered is None else str(unfiltered),
        "real_instances": counts,
        "rare_below": rare_below,
    }
    return ProbeResult(
        tuple(r for r in runs if r is not None), class_names, rare, settings, shares, tuple(range(seeds)), inputs
    )


def parse_shares(text: str) -> tuple[float, ...]:
    """Parse a comma-separated list of shares (``"0,0.25,0.5"``) and check it as :func:`run_probe` does.

    Raises
    ------
    UsageError
        An item is not a number, is outside [0, 1), or is repeated.
    """
    values = []
    for item in text.split(","):
        try:
            values.append(float(item))
        except ValueError:
            raise UsageError(f"--shares must be comma-separated numbers like 0,0.25,0.5, got {text!r}") from None
    return _check_shares(values)


def _check_shares(shares: Sequence[float]) -> tuple[float, ...]:
    values = tuple(float(s) for s in shares)
    if not values:
        raise UsageError("give at least one synthetic share (--shares 0,0.25,0.5)")
    for s in values:
        if not 0 <= s < 1:
            raise UsageError(f"--shares: each share must be in [0, 1), got {s:g}")
    if len(set(values)) != len(values):
        raise UsageError(f"--shares: a share is given twice in {', '.join(f'{s:g}' for s in values)}")
    return tuple(sorted(values))


@dataclass(frozen=True)
class _Job:
    """One model to train: everything a worker process needs, as plain picklable values."""

    kind: str
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


def _in_parallel(function: Callable[[_Job], Any], jobs: Sequence[_Job], workers: int, threads: int) -> Iterator:
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


def _load(job: _Job) -> tuple[Prepared, Prepared, dict[str, Any], list[int]]:
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


def _seconds_per_step(job: _Job) -> float:
    data = _load(job)[0]
    stamps: list[float] = []
    settings = replace(job.settings, steps=CALIBRATION_STEPS)
    train_detector(data, settings=settings, rng=0, progress=lambda *_: stamps.append(time.perf_counter()))
    return (stamps[-1] - stamps[1]) / (len(stamps) - 2)


def _train_job(job: _Job) -> ProbeRun:
    data, test_data, test_truth, test_ids = _load(job)
    detector = train_detector(data, settings=job.settings, rng=job.seed)
    if not all(math.isfinite(v) for v in detector.losses):
        name = condition_name(job.kind, job.share)
        raise RunError(f"training diverged ({name}, seed {job.seed}): the loss is not finite")
    results = detections_to_coco(predict(detector, test_data), test_data.image_ids, test_ids)
    run = ProbeRun(
        kind=job.kind,
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
    write_json_atomic(job.record, {"key": _run_key(job), "run": run.to_dict()}, indent=1)
    return run


def _run_key(job: _Job) -> str:
    """What a trained model depends on: its training set's bytes, the settings, the seed, the test split."""
    parts = {
        "set": file_sha256(job.set_file),
        "settings": asdict(job.settings),
        "seed": job.seed,
        "test": file_sha256(job.test_json),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()


def _reuse(record: Path, key: str) -> ProbeRun | None:
    if not record.is_file():
        return None
    try:
        raw = json.loads(record.read_text(encoding="utf-8"))
        return ProbeRun.from_dict(raw["run"]) if raw.get("key") == key else None
    except (json.JSONDecodeError, KeyError, TypeError):
        return None


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.3f}"
