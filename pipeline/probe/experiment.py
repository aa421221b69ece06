"""The downstream probe: does synthetic data help a detector on real held-out data, and which kind?

For every seed, one detector is trained on each training set and scored on the real test split:

* ``real``: the real training split alone (share 0, the baseline);
* one condition per arm and share: the real split merged with that arm's synthetic run folders at the
  share (pipeline.merge, with the held-out splits guarded). Typical arms, made from one plan so that
  only the tested thing differs: ``paste`` (the same exemplars at the same places, alpha-pasted: the
  classic copy-paste baseline), ``exemplar`` (exemplar-guided insertion, filtered), ``exemplar-unfiltered``
  (the same with the filters off: what the filters are worth) and ``generated`` (class-conditional drawing).

Every model gets the same number of optimiser steps (``epochs`` passes over the *real* split, or a
wall-time budget turned into steps once by timing), so a larger merged set does not also buy more
training. The seed drives the weights, the batches, the flips and the choice of synthetic images.
Confidence intervals come from :mod:`.bootstrap` (see :mod:`.compare`).
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..dataset import Dataset, load_dataset
from ..errors import DatasetError, UsageError
from ..merge import merge
from .evaluation import Evaluation
from .jobs import Job, ProbeRun, condition_name, in_parallel, record_file, reuse, run_key, seconds_per_step, train_job
from .training import TrainSettings

ARM_NAME = re.compile(r"[A-Za-z0-9_-]+")
"""What an arm may be called (it names files below the probe folder)."""


@dataclass(frozen=True)
class Preset:
    """Default seeds, shares, epochs and bootstrap replicates of a probe."""

    seeds: int
    shares: tuple[float, ...]
    epochs: float
    resamples: int


def preset(quick: bool) -> Preset:
    """The full probe (about 40 minutes for four arms on 2 cores), or ``quick`` (about 10: a rough answer)."""
    return Preset(3, (0.0, 0.5), 15.0, 300) if quick else Preset(5, (0.0, 0.25, 0.5), 30.0, 1000)


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
    arms: Mapping[str, Sequence[str | os.PathLike[str]]],
    out: str | os.PathLike[str],
    baseline: str | None = None,
    shares: Sequence[float] = (0.0, 0.25, 0.5),
    seeds: int = 5,
    epochs: float | None = None,
    minutes: float | None = None,
    settings: TrainSettings | None = None,
    rare_below: int = 50,
    workers: int = 1,
    threads: int | None = None,
    progress: Callable[[str], None] | None = None,
) -> ProbeResult:
    """Train and score detectors on the real split alone and on the real split plus each arm's synthetic data.

    Parameters
    ----------
    real_json : path
        COCO file of the real training split (images in ``images/`` beside it).
    test_json : path
        The real held-out split every model is scored on; it is also guarded in the merges.
    guards : sequence of path
        Further held-out splits to keep out of training (e.g. val).
    arms : mapping of str to sequence of path
        Arm name -> the run folders of ``rarefill run`` whose images that arm adds (e.g. ``paste``,
        ``exemplar``, ``exemplar-unfiltered``, ``generated``). Make the arms from one plan (the same
        recipe seed, data set and jobs), so that only what is tested differs between them.
    out : path
        Folder for ``sets/`` (merged COCO files with hard links to the images) and ``runs/`` (one JSON
        per trained model, its test detections beside it). A model whose record exists with the same
        inputs and settings is not trained again, so an interrupted probe continues where it stopped.
    baseline : str, optional
        An arm that every other arm is also compared with (e.g. ``paste``, the copy-paste control).
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
    threads = _check_budget(epochs=epochs, minutes=minutes, seeds=seeds, workers=workers, threads=threads)
    arms = check_arms(arms, baseline)
    _check_test_split(real_json, test_json, guards)
    settings = settings or TrainSettings(steps=1)
    out = Path(out)

    # 2. load the real and test splits; one class list for both
    real, class_names, counts, rare = _load_splits(real_json, test_json, rare_below)

    # 3. make the training sets (seed-major, so the first results already pair up)
    jobs = _training_sets(real, real_json, test_json, guards, arms, shares, seeds, out, class_names, settings)
    say(f"made {len(jobs)} training sets in {out / 'sets'}")

    # 4. fix the number of steps: equal for every model
    steps = _steps_per_model(
        real, settings, jobs[0], epochs=epochs, minutes=minutes, workers=workers, threads=threads, say=say
    )
    settings = replace(settings, steps=steps)
    jobs = [replace(job, settings=settings) for job in jobs]

    # 5. train and score (models already trained with the same inputs are read back)
    runs = _train_and_score(jobs, rare, workers=workers, threads=threads, say=say)
    inputs = _inputs(real_json, test_json, guards, arms, baseline, out, counts, rare_below)
    return ProbeResult(runs, class_names, rare, settings, shares, tuple(range(seeds)), inputs)


def _check_budget(*, epochs: float | None, minutes: float | None, seeds: int, workers: int, threads: int | None) -> int:
    """Check the training budget, the seeds and the workers; the torch threads per model (default filled in)."""
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
    return threads


def _check_test_split(
    real_json: str | os.PathLike[str], test_json: str | os.PathLike[str], guards: Sequence[str | os.PathLike[str]]
) -> None:
    """The test split must be held out: neither the training split nor one of the guards (it is always guarded)."""
    test_path = Path(test_json).resolve()
    if test_path == Path(real_json).resolve():
        raise UsageError(f"--test {test_json} is also the training split (--real); score on a held-out split")
    if test_path in {Path(g).resolve() for g in guards}:
        raise UsageError(
            f"--test {test_json} is also given as --guard",
            hint="the test split is always guarded; drop it from --guard",
        )


def _load_splits(
    real_json: str | os.PathLike[str], test_json: str | os.PathLike[str], rare_below: int
) -> tuple[Dataset, tuple[str, ...], dict[str, int], tuple[str, ...]]:
    """The real split, its class names (the test split must have the same), its non-crowd instances per class,
    and the rare classes: those with fewer than ``rare_below``."""
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
    return real, class_names, counts, rare


def _training_sets(
    real: Dataset,
    real_json: str | os.PathLike[str],
    test_json: str | os.PathLike[str],
    guards: Sequence[str | os.PathLike[str]],
    arms: Mapping[str, Sequence[Path]],
    shares: Sequence[float],
    seeds: int,
    out: Path,
    class_names: tuple[str, ...],
    settings: TrainSettings,
) -> list[Job]:
    """One job per seed and condition, seed-major: ``real`` alone, then every arm merged at every share > 0."""
    conditions = [("real", 0.0)] + [(arm, s) for arm in arms for s in shares if s > 0]
    held_out = [Path(test_json), *map(Path, guards)]
    jobs: list[Job] = []
    for seed in range(seeds):
        for arm, share in conditions:
            if arm == "real":
                set_file, images_dir, n_syn, reached = Path(real_json), real.images_dir, 0, 0.0
            else:
                set_file = out / "sets" / f"{arm}-{share:g}-seed{seed}.json"
                summary = merge(
                    real_json,
                    synthetic=arms[arm],
                    guards=held_out,
                    out=set_file,
                    synthetic_share=share,
                    images_mode="link",
                    seed=seed,
                )
                images_dir, n_syn, reached = set_file.parent, summary.synthetic_selected, summary.share
            record = record_file(out, condition_name(arm, share), seed)
            jobs.append(
                Job(arm, share, seed, str(set_file), str(images_dir), str(test_json), class_names, settings,
                    n_syn, reached, str(record))
            )  # fmt: skip
    return jobs


def _steps_per_model(
    real: Dataset,
    settings: TrainSettings,
    job: Job,
    *,
    epochs: float | None,
    minutes: float | None,
    workers: int,
    threads: int,
    say: Callable[[str], None],
) -> int:
    """``epochs`` passes over the real split, or as many steps as ``job`` trains in ``minutes`` (timed)."""
    if epochs is not None:
        return math.ceil(epochs * len(real.scenes) / settings.batch_size)
    # time as many models side by side as will train side by side
    timings = [t for _, t in in_parallel(seconds_per_step, [job] * workers, workers, threads)]
    seconds = float(np.mean(timings))
    steps = max(1, math.floor(minutes * 60 / seconds))
    say(f"timed {seconds:.2f} s per step: {steps} steps per model for {minutes:g} min")
    return steps


def _train_and_score(
    jobs: Sequence[Job], rare: Sequence[str], *, workers: int, threads: int, say: Callable[[str], None]
) -> tuple[ProbeRun, ...]:
    """Every job's run: read back when trained before with the same inputs, else trained and scored now."""
    runs: list[ProbeRun | None] = [reuse(Path(job.record), run_key(job)) for job in jobs]
    if any(runs):
        say(f"reusing {sum(r is not None for r in runs)} model(s) trained before with the same inputs")
    todo = [i for i, run in enumerate(runs) if run is None]
    for k, run in in_parallel(train_job, [jobs[i] for i in todo], workers, threads):
        runs[todo[k]] = run
        say(
            f"[{sum(r is not None for r in runs)}/{len(jobs)}] {run.condition}, seed {run.seed}: "
            f"AP50 {run.evaluation.ap50:.3f}, rare AP50 {_fmt(rare_ap50(run.evaluation, rare))}, "
            f"{run.train_seconds:.0f} s"
        )
    return tuple(r for r in runs if r is not None)


def _inputs(
    real_json: str | os.PathLike[str],
    test_json: str | os.PathLike[str],
    guards: Sequence[str | os.PathLike[str]],
    arms: Mapping[str, Sequence[Path]],
    baseline: str | None,
    out: Path,
    counts: Mapping[str, int],
    rare_below: int,
) -> dict[str, Any]:
    """What a probe was given, as JSON-ready values (:attr:`ProbeResult.inputs`)."""
    return {
        "real": str(real_json),
        "test": str(test_json),
        "guards": [str(g) for g in guards],
        "arms": {arm: [str(f) for f in folders] for arm, folders in arms.items()},
        "baseline": baseline,
        "out": str(out),
        "real_instances": counts,
        "rare_below": rare_below,
    }


def check_arms(
    arms: Mapping[str, Sequence[str | os.PathLike[str]]], baseline: str | None
) -> dict[str, tuple[Path, ...]]:
    """The arms as name -> run folders, checked: names of our own, run folders that exist, none shared.

    Raises
    ------
    UsageError
        No arm; a name that is ``real``, empty or not made of letters, digits, ``-`` and ``_``; an arm
        without folders; a folder that is no run folder or is given in two arms; a baseline that is no arm.
    """
    if not arms:
        raise UsageError("give at least one arm (--arm NAME=RUN_DIR)")
    checked: dict[str, tuple[Path, ...]] = {}
    owner: dict[Path, str] = {}
    for name, folders in arms.items():
        if name == "real" or not ARM_NAME.fullmatch(name):
            raise UsageError(
                f"arm name {name!r}: use letters, digits, - and _ (and not 'real', the real-only baseline)"
            )
        if not folders:
            raise UsageError(f"arm {name!r} has no run folder")
        for folder in map(Path, folders):
            if not (folder / "labels.json").is_file():
                raise UsageError(
                    f"{folder} is not a run folder (no labels.json)", hint="pass a folder `rarefill run` wrote"
                )
            key = folder.resolve()
            if key in owner:
                raise UsageError(f"{folder} is given in arm {owner[key]!r} and in arm {name!r}; arms must differ")
            owner[key] = name
        checked[name] = tuple(map(Path, folders))
    if baseline is not None and baseline not in checked:
        raise UsageError(f"--baseline {baseline!r} is not one of the arms ({', '.join(checked)})")
    return checked


def parse_arms(items: Sequence[str]) -> dict[str, list[Path]]:
    """``["paste=outputs/a", "paste=outputs/b", "exemplar=outputs/c"]`` -> ``{"paste": [a, b], "exemplar": [c]}``.

    Raises
    ------
    UsageError
        An item without ``=``.
    """
    arms: dict[str, list[Path]] = {}
    for item in items:
        name, sep, folder = item.partition("=")
        if not sep or not name or not folder:
            raise UsageError(f"--arm must look like NAME=RUN_DIR (e.g. paste=outputs/paste), got {item!r}")
        arms.setdefault(name, []).append(Path(folder))
    return arms


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


def _fmt(value: float | None) -> str:
    return "-" if value is None else f"{value:.3f}"
