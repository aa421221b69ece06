"""The merge itself: check the options, then vocabulary, leakage guard, selection and output in turn."""

from __future__ import annotations

import math
import os
import warnings
from collections import Counter
from collections.abc import Collection, Mapping, Sequence
from pathlib import Path
from typing import Any

from ..dataset import Dataset, load_dataset
from ..errors import DatasetError, DatasetWarning, UsageError
from ..files import write_json_atomic
from .guard import guard_index, leave_out_guarded, refuse_real_leaks
from .output import IMAGES_MODES, assemble, merge_info, place_images
from .selection import Candidate, candidate_of, select_synthetic
from .summary import MergeSummary, summarise
from .vocabulary import load_mapping, merged_categories


def merge(
    real_json: str | os.PathLike[str],
    *,
    synthetic: Sequence[str | os.PathLike[str]],
    guards: Sequence[str | os.PathLike[str]],
    out: str | os.PathLike[str],
    real_images: str | os.PathLike[str] | None = None,
    synthetic_share: float | None = None,
    rare_target: int | None = None,
    caps: Mapping[str, int] | None = None,
    rare_below: int = 50,
    mapping: str | os.PathLike[str] | None = None,
    images_mode: str = "link",
    seed: int = 0,
) -> MergeSummary:
    """Merge a real training split with synthetic run folders into one COCO file.

    Parameters
    ----------
    real_json : path
        COCO file of the real training split; every one of its images is kept.
    synthetic : sequence of path
        Run folders (``labels.json`` with provenance, images in ``images/``).
    guards : sequence of path
        COCO files of the held-out splits (at least one); their images are read from ``images/`` beside
        each file, else the file's folder (see :func:`pipeline.dataset.load_dataset`).
    out : path
        The merged COCO file to write.
    real_images : path, optional
        Folder of the real split's images (default as for ``guards``).
    synthetic_share : float, optional
        Fraction of the merged images that are synthetic, in [0, 1):
        ``n_syn = round(F / (1 - F) * n_real)`` (halves round up), capped by what is available.
    rare_target : int, optional
        Instances (real + synthetic) each rare class should reach. Give exactly one of the two.
    caps : mapping, optional
        ``{class name: most synthetic instances}``.
    rare_below : int
        A class is rare when the real split has fewer instances of it than this.
    mapping : path, optional
        Category mapping file (see :func:`load_mapping`).
    images_mode : {"link", "copy", "relative"}
        See :func:`.output.place_images`. The default, ``link``, costs no space and always loads back.
    seed : int
        Seeds the selection; recorded in the output's ``info``.

    Returns
    -------
    MergeSummary
        Also when the request could not be met: then ``shortfalls`` says what was reached, and each
        shortfall is also issued as a :class:`DatasetWarning`.

    Raises
    ------
    UsageError
        Contradictory or out-of-range options.
    DatasetError
        An input file is invalid, a synthetic image lacks provenance, a category is unknown and unmapped,
        the mapping file is bad, or a real training image is byte-identical to a guarded image.
    """
    # 1. check options
    out, caps = Path(out), dict(caps or {})
    _check_options(synthetic_share, rare_target, rare_below, images_mode, seed, synthetic, guards)
    inputs = _check_paths(Path(real_json), [Path(s) for s in synthetic], [Path(g) for g in guards], mapping, out)

    # 2. load everything and build the vocabulary
    real = load_dataset(real_json, real_images)
    sets = [_load_run(Path(s)) for s in synthetic]
    categories, to_out = merged_categories(real, sets, load_mapping(mapping) if mapping is not None else {}, mapping)
    out_names = {c["id"]: c["name"] for c in categories}
    _check_caps(caps, out_names.values())

    # 3. leakage guard
    index = guard_index([load_dataset(g, check_images=False) for g in guards])
    refuse_real_leaks(real, index)
    where, excluded = leave_out_guarded([dataset for dataset, _ in sets], index)
    candidates = [candidate_of(scene, sets[k][0], to_out[k], out_names) for k, scene in where]

    # 4. select, summarise and warn about what could not be met
    chosen, summary = _select(
        candidates,
        real,
        categories,
        out_names,
        caps=caps,
        rare_below=rare_below,
        synthetic_share=synthetic_share,
        rare_target=rare_target,
        excluded=excluded,
        out=out,
        seed=seed,
    )

    # 5. write images (if copied or linked), then the labels
    picked = [where[i] for i in chosen]
    file_names = place_images(real, picked, out, images_mode)
    info = merge_info(summary, caps=caps, rare_below=rare_below, images_mode=images_mode, inputs=inputs, out=out)
    write_json_atomic(out, assemble(real, picked, to_out, categories, file_names, info))
    return summary


def _select(
    candidates: Sequence[Candidate],
    real: Dataset,
    categories: Sequence[Mapping[str, Any]],
    out_names: Mapping[int, str],
    *,
    caps: Mapping[str, int],
    rare_below: int,
    synthetic_share: float | None,
    rare_target: int | None,
    excluded: Mapping[str, int],
    out: Path,
    seed: int,
) -> tuple[list[int], MergeSummary]:
    """Steps 4 and 5 of :func:`merge`: the chosen candidates and the summary, with a warning per shortfall."""
    real_counts = Counter(out_names[a.category_id] for a in real.annotations() if not a.iscrowd)
    rare = [c["name"] for c in categories if real_counts[c["name"]] < rare_below]
    if rare_target is not None and not rare:
        warnings.warn(
            DatasetWarning(f"no class has fewer than {rare_below} real instances; nothing is rare"), stacklevel=3
        )
    n_real = len(real.scenes)
    n_wanted = None
    if synthetic_share is not None:
        n_wanted = math.floor(synthetic_share / (1.0 - synthetic_share) * n_real + 0.5)
    chosen = select_synthetic(
        candidates, real_counts=real_counts, rare=rare, n_wanted=n_wanted, rare_target=rare_target, caps=caps, rng=seed
    )
    summary = summarise(
        candidates,
        chosen,
        categories=categories,
        real_counts=real_counts,
        rare=rare,
        caps=caps,
        n_real=n_real,
        n_wanted=n_wanted,
        synthetic_share=synthetic_share,
        rare_target=rare_target,
        excluded=excluded,
        out=str(out),
        seed=seed,
    )
    for message in summary.shortfalls:
        warnings.warn(DatasetWarning(message), stacklevel=3)
    return chosen, summary


def _check_options(share, target, rare_below, images_mode, seed, synthetic, guards) -> None:
    if (share is None) == (target is None):
        raise UsageError("give exactly one of --synthetic-share and --rare-target")
    if share is not None and not (isinstance(share, (int, float)) and 0.0 <= share < 1.0):
        raise UsageError(f"--synthetic-share must be in [0, 1), got {share!r}")
    if target is not None and (not isinstance(target, int) or target < 0):
        raise UsageError(f"--rare-target must be an integer >= 0, got {target!r}")
    if not isinstance(rare_below, int) or rare_below < 0:
        raise UsageError(f"--rare-below must be an integer >= 0, got {rare_below!r}")
    if images_mode not in IMAGES_MODES:
        raise UsageError(f"--images-mode must be one of {', '.join(IMAGES_MODES)}, got {images_mode!r}")
    if not isinstance(seed, int) or seed < 0:
        raise UsageError(f"--seed must be an integer >= 0, got {seed!r}")
    if not synthetic:
        raise UsageError("give at least one synthetic run folder (--synthetic RUN_DIR)")
    if not guards:
        raise UsageError(
            "give the held-out splits to guard (--guard VAL.json --guard TEST.json)",
            hint="the leakage guard cannot be turned off; it needs the held-out COCO files",
        )


def _check_caps(caps: Mapping[str, int], names: Collection[str]) -> None:
    for name in caps:
        if name not in names:
            raise UsageError(f"--cap {name}=...: no category named {name!r} (known: {', '.join(names)})")


def _check_paths(
    real: Path, synthetic: Sequence[Path], guards: Sequence[Path], mapping: str | os.PathLike[str] | None, out: Path
) -> list[Path]:
    """Every input file (hashed into ``info``), after refusing an output that is an input and repeats."""
    inputs = [real, *(s / "labels.json" for s in synthetic), *guards]
    if mapping is not None:
        inputs.append(Path(mapping))
    if out.resolve() in {p.resolve() for p in inputs}:
        raise UsageError(f"--out {out} is one of the input files; choose a new file")
    for option, paths in (("--synthetic", synthetic), ("--guard", guards)):
        resolved = [p.resolve() for p in paths]
        for path in resolved:
            if path == real.resolve():
                raise UsageError(f"{option} {path} is the real training split itself")
            if resolved.count(path) > 1:
                raise UsageError(f"{option} {path} is given twice")
    return inputs


def _load_run(folder: Path) -> tuple[Dataset, Path]:
    labels = folder / "labels.json"
    if not labels.is_file():
        raise DatasetError(
            labels, "", "not found; is this a rarefill run folder?", hint="pass the folder that `rarefill run` wrote"
        )
    return load_dataset(labels, folder / "images"), labels
