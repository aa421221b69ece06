"""The audit of one run folder: per class, every figure of :mod:`pipeline.audit`, saved as ``audit.json``."""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch

from ..dataset import Dataset, load_dataset
from ..errors import DatasetError, UsageError
from ..files import write_json_atomic
from ..generator.verifier import CROP_PX
from ..provenance import KEY, file_sha256
from ..report.run_record import read_run
from . import features as feat
from .examples import write_examples
from .instances import (
    MIN_HEIGHT_PX,
    TEST_CROP_PX,
    Crops,
    Instance,
    by_class,
    check_heldout,
    crop_instances,
    real_instances,
    split_tiny,
    synthetic_instances,
)
from .repeated import exemplar_copies
from .sharpness import box_fit, compare_sharpness
from .two_sample import TwoSampleSettings

AUDIT_JSON = "audit.json"
"""File the audit writes into the run folder (the report's audit section reads it)."""
FORMAT = "rarefill.audit/1"


@contextlib.contextmanager
def torch_threads(threads: int) -> Iterator[None]:
    """Use ``threads`` torch threads inside the block, then restore the previous number."""
    previous = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        yield
    finally:
        torch.set_num_threads(previous)


def find_training_split(labels: Dataset, folder: Path, exclude: Path) -> Path | None:
    """A COCO file in ``folder`` that holds the source images of the run (by file name and hash).

    The run's provenance names each source image's file name and SHA-256 but not its data set; the
    training split is looked for beside the held-out one. Returns ``None`` if no file qualifies.
    """
    wanted = {}
    for scene in labels.scenes:
        record = scene.extra.get(KEY)
        source = record.get("source") if isinstance(record, Mapping) else None
        if isinstance(source, Mapping) and isinstance(source.get("file_name"), str):
            wanted[source["file_name"]] = source.get("sha256")
    if not wanted:
        return None
    for candidate in sorted(folder.glob("*.json")):
        if candidate.resolve() == exclude.resolve():
            continue
        try:
            data = load_dataset(candidate, check_images=False)
        except DatasetError:
            continue
        paths = {s.file_name: s.path for s in data.scenes}
        if not set(wanted) <= set(paths):
            continue
        name, digest = next(iter(wanted.items()))
        if digest is None or (paths[name].is_file() and file_sha256(paths[name]) == digest):
            return candidate
    return None


def _model_identity(labels: Dataset) -> dict[str, Any] | None:
    for scene in labels.scenes:
        record = scene.extra.get(KEY)
        if isinstance(record, Mapping) and isinstance(record.get("model"), Mapping):
            return dict(record["model"])
    return None


def _class_figures(
    syn: Crops,
    real: Crops,
    train: Crops,
    net: torch.nn.Module,
    *,
    tests: TwoSampleSettings,
    rng: np.random.Generator,
    cache: dict[Path, np.ndarray] | None = None,
) -> tuple[dict[str, Any], np.ndarray | None, dict[str, Any] | None]:
    """Figures of one class; also the synthetic held-out scores and the near-copy record (for examples).
    ``cache`` holds decoded images by path (shared with the crops already cut)."""
    out: dict[str, Any] = {"two_sample": None, "floor": None, "coverage": None, "near_copies": None, "notes": []}
    scores = None
    folds = tests.folds
    if min(len(syn), len(real)) >= folds:
        test = tests.run(real.test, syn.test, rng)
        out["two_sample"] = test.to_dict()
        scores = np.full(len(syn), np.nan)
        scores[test.index_b] = test.score_b
    else:
        out["notes"].append(f"two-sample test needs {folds} instances per side, got {len(syn)} and {len(real)}")
    halves = rng.permutation(len(real))
    half = len(real) // 2
    if half >= folds:
        floor = tests.run(real.test[halves[:half]], real.test[halves[half : 2 * half]], rng)
        out["floor"] = floor.to_dict()
    else:
        out["notes"].append(f"real-half floor needs {2 * folds} real instances, got {len(real)}")
    f_syn, f_real, f_train = (feat.embed(net, c.feature) for c in (syn, real, train))
    try:
        out["coverage"] = feat.coverage(f_real, f_syn, rng=rng)
    except ValueError as exc:
        out["notes"].append(f"coverage: {exc}")
    copies = None
    if len(train) and len(real) and len(syn):
        copies = feat.near_copies(f_syn, f_real, f_train)
        out["near_copies"] = {k: v for k, v in copies.items() if k not in ("nearest", "distance")}
    else:
        out["notes"].append("near-copies need training, held-out and synthetic instances of the class")
    out["sharpness"] = compare_sharpness(syn.sharpness, syn.heights, real.sharpness, real.heights)
    out["box_fit"] = {"synthetic": box_fit(syn.instances), "real": box_fit(real.instances)}
    out["unseen_exemplars"] = _unseen_exemplars(syn, real, tests=tests, rng=rng, notes=out["notes"])
    out["repeated_exemplars"] = _repeated_exemplars(syn, real, train, tests=tests, rng=rng, cache=cache)
    return out, scores, copies


def _unseen_exemplars(
    syn: Crops, real: Crops, *, tests: TwoSampleSettings, rng: np.random.Generator, notes: list[str]
) -> dict[str, Any] | None:
    """The two-sample test with each exemplar's instances held out together (``None`` with a note when
    the synthetic instances do not all name an exemplar, or name fewer than ``folds``)."""
    sources = [item.exemplar for item in syn.instances]
    if not sources or any(s is None for s in sources):
        return None
    if min(len(syn), len(real)) < tests.folds:
        return None  # the plain test's note says so
    if len(set(sources)) < tests.folds:
        notes.append(f"the test on unseen exemplars needs {tests.folds} exemplars, got {len(set(sources))}")
        return None
    try:
        return tests.run(real.test, syn.test, rng, groups_b=sources).to_dict()
    except ValueError as exc:
        notes.append(f"the test on unseen exemplars: {exc}")
        return None


def _repeated_exemplars(
    syn: Crops,
    real: Crops,
    train: Crops,
    *,
    tests: TwoSampleSettings,
    rng: np.random.Generator,
    cache: dict[Path, np.ndarray] | None,
) -> dict[str, Any] | None:
    """The plain test of the exemplars themselves, repeated as the run used them, against the held-out
    real instances (:mod:`.repeated`); ``None`` when the synthetic instances do not all name an exemplar
    of the training split."""
    made = exemplar_copies(syn.instances, train.instances, rng)
    if made is None or min(len(syn), len(real)) < tests.folds:
        return None
    items, mirrored = made
    crops = crop_instances(items, images=cache).test
    crops[mirrored] = crops[mirrored][:, :, ::-1]
    return tests.run(real.test, crops, rng).to_dict()


def _groups(
    labels: Dataset, heldout: Dataset, train: Dataset, classes: Sequence[str] | None, root: Path
) -> dict[str, tuple[list[Instance], list[Instance], list[Instance]]]:
    """Per audited class: its synthetic, held-out and training instances (tiny boxes not yet removed)."""
    synthetic = by_class(synthetic_instances(labels))
    order = [c.name for c in labels.categories]
    wanted = list(classes) if classes else [name for name in order if name in synthetic]
    unknown = [name for name in wanted if name not in order]
    if unknown:
        raise UsageError(f"--classes: {', '.join(unknown)} not a class of the run (its classes: {', '.join(order)})")
    if not wanted:
        raise UsageError(f"{root}: the run has no synthetic instances to audit")
    held, trained = by_class(real_instances(heldout)), by_class(real_instances(train))
    return {n: (synthetic.get(n, []), held.get(n, []), trained.get(n, [])) for n in wanted}


def _audit_class(
    root: Path,
    name: str,
    sides: tuple[list[Instance], list[Instance], list[Instance]],
    net: torch.nn.Module,
    cache: dict[Path, np.ndarray],
    *,
    tests: TwoSampleSettings,
    rng: np.random.Generator,
    say: Callable[[str], None],
) -> dict[str, Any]:
    """Crop one class's instances, compute its figures and write its example crops."""
    (syn_items, syn_small), (real_items, real_small), (train_items, _) = (split_tiny(side) for side in sides)
    say(f"{name}: cropping {len(syn_items)} synthetic, {len(real_items)} held-out, {len(train_items)} training")
    syn, real, train = (crop_instances(items, images=cache) for items in (syn_items, real_items, train_items))
    say(f"{name}: two-sample tests, coverage, near-copies")
    figures, scores, copies = _class_figures(syn, real, train, net, tests=tests, rng=rng, cache=cache)
    entry = {
        "n_synthetic": len(syn),
        "n_real": len(real),
        "n_train": len(train),
        "skipped_small": {"synthetic": syn_small, "real": real_small},
        **figures,
        "examples": None,
    }
    if scores is not None:
        used = np.flatnonzero(~np.isnan(scores))
        entry["examples"] = write_examples(
            root,
            name,
            tuple(syn.instances[i] for i in used),
            scores[used],
            [train.instances[copies["nearest"][i]] if copies else None for i in used],
            copies["distance"][used] if copies else None,
            cache,
        )
    return entry


def audit_run(
    run_dir: str | os.PathLike[str],
    real: str | os.PathLike[str],
    *,
    images: str | os.PathLike[str] | None = None,
    train: str | os.PathLike[str] | None = None,
    train_images: str | os.PathLike[str] | None = None,
    classes: Sequence[str] | None = None,
    seed: int = 0,
    folds: int = 5,
    epochs: int = 30,
    repeats: int = 5,
    feature_steps: int = feat.FEATURE_STEPS,
    threads: int = 1,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Audit a run's synthetic instances against real held-out ones, per class; write ``RUN_DIR/audit.json``.

    Parameters
    ----------
    run_dir : path
        A finished ``rarefill run`` folder.
    real : path
        COCO file of a held-out real split that no synthetic image of the run was made from.
    images : path, optional
        Image folder of ``real`` (default: ``images/`` beside it, else its folder).
    train, train_images : path, optional
        The run's real training split (features are learned from it; near-copies are looked for in
        it) and its image folder. Default: the COCO file beside ``real`` that holds the run's source
        images (see :func:`find_training_split`).
    classes : sequence of str, optional
        Classes to audit (default: every class with synthetic instances in the run).
    seed : int
        Seeds every random choice; equal inputs and seed give equal figures.
    folds, epochs : int
        Two-sample test: k of the k-fold cross-validation, and training passes per fold.
    repeats : int
        Two-sample tests per figure, each on a new subsample (see :func:`two_sample_test`); the
        accuracies are their means.
    feature_steps : int
        Training steps of the feature network.
    threads : int
        Torch threads (1 is fastest on a machine shared with other work).
    progress : callable, optional
        Called with one line of text per step.

    Returns
    -------
    dict
        What ``audit.json`` holds: ``format``, ``run``, ``heldout``, ``train``, ``seed``, ``settings``,
        ``model`` (the run's model identity), ``classes`` (per class: ``n_synthetic``, ``n_real``,
        ``n_train``, ``skipped_small``, ``two_sample``, ``floor``, ``unseen_exemplars``,
        ``repeated_exemplars``, ``coverage``, ``near_copies``, ``sharpness``, ``box_fit``, ``examples``,
        ``notes``).

    Raises
    ------
    UsageError
        Bad options, an unknown class, or no training split found.
    DatasetError, RunError
        Unreadable inputs, or a held-out split that made synthetic images of the run.
    """
    # 1. check options
    _check_options(seed=seed, folds=folds, epochs=epochs, repeats=repeats, feature_steps=feature_steps, threads=threads)
    tests = TwoSampleSettings(folds=folds, epochs=epochs, repeats=repeats)
    say = progress or (lambda _line: None)

    # 2. the run, its held-out split (which must not have made any of its images) and its training split
    run = read_run(run_dir)
    heldout = load_dataset(real, images)
    check_heldout(run.labels, heldout)
    train_path = _training_split(run.labels, real, train)
    train_set = load_dataset(train_path, train_images)
    groups = _groups(run.labels, heldout, train_set, classes, run.root)

    # 3. the feature network, then the figures of every class
    with torch_threads(threads):
        say(f"training the feature network on {train_path} ({feature_steps} steps)")
        net = feat.train_feature_net(train_set, steps=feature_steps, rng=seed)
        order = [c.name for c in run.labels.categories]
        figures = _audit_classes(run.root, groups, net, order, seed=seed, tests=tests, say=say)

    # 4. write audit.json
    result = {
        "format": FORMAT,
        "run": str(run.root),
        "heldout": str(real),
        "train": str(train_path),
        "seed": seed,
        "settings": _settings(tests, feature_steps=feature_steps),
        "model": _model_identity(run.labels),
        "classes": figures,
    }
    write_json_atomic(run.root / AUDIT_JSON, result, indent=2)
    return result


def _check_options(*, seed: int, folds: int, epochs: int, repeats: int, feature_steps: int, threads: int) -> None:
    if folds < 2 or epochs < 1 or repeats < 1 or feature_steps < 1 or threads < 1:
        raise UsageError(
            "need folds >= 2, epochs >= 1, repeats >= 1, feature steps >= 1, threads >= 1; got "
            f"{folds}, {epochs}, {repeats}, {feature_steps}, {threads}"
        )
    if not isinstance(seed, int) or seed < 0:
        raise UsageError(f"--seed must be an integer >= 0, got {seed!r}")


def _training_split(labels: Dataset, real: str | os.PathLike[str], train: str | os.PathLike[str] | None) -> Path:
    """``train`` if given, else the COCO file beside ``real`` that holds the run's source images."""
    train_path = Path(train) if train is not None else find_training_split(labels, Path(real).parent, Path(real))
    if train_path is None:
        raise UsageError(
            f"no COCO file beside {real} holds the run's source images",
            hint="give the run's training split with --train TRAIN.json",
        )
    return train_path


def _audit_classes(
    root: Path,
    groups: Mapping[str, tuple[list[Instance], list[Instance], list[Instance]]],
    net: torch.nn.Module,
    order: Sequence[str],
    *,
    seed: int,
    tests: TwoSampleSettings,
    say: Callable[[str], None],
) -> dict[str, dict[str, Any]]:
    """:func:`_audit_class` of every group; a class's seed is ``(seed, its index in order)``, so each
    class's figures do not depend on which other classes are audited. Images are read once for all."""
    cache: dict[Path, np.ndarray] = {}
    return {
        name: _audit_class(
            root,
            name,
            sides,
            net,
            cache,
            tests=tests,
            rng=np.random.default_rng([seed, order.index(name)]),
            say=say,
        )
        for name, sides in groups.items()
    }


def _settings(tests: TwoSampleSettings, *, feature_steps: int) -> dict[str, Any]:
    """The audit's settings as recorded in ``audit.json``, the fixed ones included."""
    return {
        "folds": tests.folds,
        "epochs": tests.epochs,
        "repeats": tests.repeats,
        "test_crop_px": TEST_CROP_PX,
        "feature_crop_px": CROP_PX,
        "min_height_px": MIN_HEIGHT_PX,
        "k": feat.K_NEAREST,
        "feature_steps": feature_steps,
        "near_copy_quantile": feat.NEAR_COPY_QUANTILE,
    }


def read_audit(run_dir: str | os.PathLike[str]) -> dict[str, Any] | None:
    """``RUN_DIR/audit.json`` if the run was audited (and the file is an audit), else ``None``."""
    path = Path(run_dir) / AUDIT_JSON
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    return data if isinstance(data, dict) and data.get("format") == FORMAT else None
