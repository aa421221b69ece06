"""Merge a real training split with synthetic run outputs at a chosen ratio, never leaking held-out images.

How the merge works, in the order :func:`merge` does it:

1. *Vocabulary.* Categories are matched by name; the merged file keeps the real split's category ids.
   A synthetic set naming a category the real split lacks is refused unless a mapping file says which
   of our categories it is (``{"their name": "our name"}``); mapping a name to itself adds it as a new
   category (appended after the real ones), so a typo can never create a class silently.
2. *Leakage guard* (always on). Every guarded image file is hashed (SHA-256). A synthetic image is never
   merged when its source (provenance ``rarefill.source``) has the file hash of a guarded image, or the
   same ``(image_id, file_name)`` as a guarded image entry. The second key is strict on purpose: it also
   catches guarded images whose files are absent, at the price of excluding the synthetic images of a
   training image that happens to share id and file name with a held-out one (they are counted, and a
   warning says so). A real training image byte-identical to a guarded image is an error, not a
   warning: the splits themselves leak and no merge can repair that.
3. *Selection*, deterministic by seed, see :func:`select_synthetic`. Every real image is always kept.
4. *Output*. Image and annotation ids are renumbered 1..n (real first, then synthetic, each in input
   order). ``file_name`` is relative to the output JSON's folder: the original files (``relative``), or
   copies / hard links in ``<stem>_images/`` beside it. Top-level ``info`` records the parameters and
   the inputs' hashes but no clock time, so equal inputs give byte-identical output.
"""

from __future__ import annotations

import json
import math
import os
import re
import warnings
from collections import Counter, deque
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .dataset import Dataset, Scene, annotation_entry, category_entry, image_entry, load_dataset
from .errors import DatasetError, DatasetWarning, RunError, UsageError
from .files import write_bytes_atomic, write_json_atomic
from .provenance import KEY, file_sha256

IMAGES_MODES = ("relative", "copy", "link")
"""How merged images are referenced: the original files, copies, or hard links beside the output."""

_SHA256 = re.compile(r"[0-9a-f]{64}")


@dataclass(frozen=True)
class Candidate:
    """One synthetic image offered to the selection.

    ``group`` is the class the image was made for (its stage's target class, else the most frequent
    class among its new objects; ``None`` when neither exists). ``counts`` holds its instances per
    class name (``iscrowd`` regions excluded), carried-over real objects included: each is one more
    training sample of its class.
    """

    group: str | None
    counts: Mapping[str, int]


@dataclass(frozen=True)
class ClassCount:
    """Instances of one category in the merged file."""

    name: str
    real: int
    synthetic: int
    rare: bool
    cap: int | None

    @property
    def total(self) -> int:
        return self.real + self.synthetic


@dataclass(frozen=True)
class MergeSummary:
    """What a merge wrote and whether the request was met (``shortfalls`` empty when it was)."""

    out: str
    mode: str
    requested: float
    seed: int
    real_images: int
    synthetic_available: int
    synthetic_wanted: int | None
    synthetic_selected: int
    share: float
    excluded: Mapping[str, int]
    groups: Mapping[str, tuple[int, int]]
    classes: tuple[ClassCount, ...]
    shortfalls: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (class totals included)."""
        out = asdict(self)
        out["classes"] = [{**asdict(c), "total": c.total} for c in self.classes]
        out["groups"] = {g: {"available": a, "selected": s} for g, (a, s) in self.groups.items()}
        return out


# --------------------------------------------------------------------------------------------------
# small inputs


def parse_caps(items: Sequence[str]) -> dict[str, int]:
    """Parse ``CLASS=N`` strings into ``{class: N}``.

    Raises
    ------
    UsageError
        An item is not ``CLASS=N`` with an integer ``N >= 0``, or a class is capped twice.
    """
    caps: dict[str, int] = {}
    for item in items:
        name, sep, value = item.rpartition("=")
        name = name.strip()
        if not sep or not name or not value.strip().isdigit():
            raise UsageError(f"--cap must look like CLASS=N with N >= 0 (e.g. tractor=40), got {item!r}")
        if name in caps:
            raise UsageError(f"--cap: class {name!r} is capped twice")
        caps[name] = int(value)
    return caps


def load_mapping(path: str | os.PathLike[str]) -> dict[str, str]:
    """Read a category mapping file: a JSON object ``{"their name": "our name"}`` of non-empty strings.

    Raises
    ------
    DatasetError
        The file is missing, not JSON, not an object, or a key or value is not a non-empty string.
    """
    path = Path(path)
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DatasetError(path, "", "mapping file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DatasetError(path, "", f"mapping file cannot be read ({exc})") from None
    except json.JSONDecodeError as exc:
        raise DatasetError(path, "", f"malformed JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}") from None
    hint = 'a mapping file is one JSON object {"their name": "our name", ...}'
    if not isinstance(raw, dict):
        raise DatasetError(path, "", f"must be a JSON object of names, got {type(raw).__name__}", hint=hint)
    for key, value in raw.items():
        if not key:
            raise DatasetError(path, '""', "a category name must not be empty", hint=hint)
        if not isinstance(value, str) or not value:
            raise DatasetError(path, key, f"must map to a non-empty category name, got {value!r}", hint=hint)
    return dict(raw)


# --------------------------------------------------------------------------------------------------
# selection


def select_synthetic(
    candidates: Sequence[Candidate],
    *,
    real_counts: Mapping[str, int],
    rare: Sequence[str],
    n_wanted: int | None = None,
    rare_target: int | None = None,
    caps: Mapping[str, int] | None = None,
    rng: np.random.Generator | int | None = None,
) -> list[int]:
    """Choose synthetic images, stratified by the class each was made for.

    Give exactly one of ``n_wanted`` and ``rare_target``. One seeded random order of all candidates
    decides every tie, so the same inputs and seed give the same choice.

    * ``n_wanted``: the images are dealt round-robin over the groups (each group's images in the
      seeded order, the groups themselves in a seeded order), so every class gets an equal share of the
      budget; a group that runs out leaves its turns to the others.
    * ``rare_target``: repeatedly serve the rare class furthest below ``rare_target`` instances (real +
      synthetic so far; ties by the order of ``rare``) with its next image, preferring images made for
      it over images that merely contain it, until every rare class is served or out of images.

    An image is skipped for good when it would push any class past its cap (instances in the chosen
    synthetic images).

    Parameters
    ----------
    candidates : sequence of Candidate
    real_counts : mapping
        Real instances per class name.
    rare : sequence of str
        The rare classes, in category order.
    n_wanted, rare_target : int, optional
        How many images to choose, or the instance count each rare class should reach.
    caps : mapping, optional
        Largest number of synthetic instances per class name.
    rng : numpy Generator, int or None

    Returns
    -------
    list of int
        Indices into ``candidates``, ascending.
    """
    if (n_wanted is None) == (rare_target is None):
        raise ValueError("give exactly one of n_wanted and rare_target")
    caps = dict(caps or {})
    rng = np.random.default_rng(rng)
    order = [int(i) for i in rng.permutation(len(candidates))]
    used: Counter[str] = Counter()
    taken: list[int] = []

    def take_if_fits(i: int) -> bool:
        counts = candidates[i].counts
        if any(used[name] + n > caps.get(name, math.inf) for name, n in counts.items()):
            return False
        used.update(counts)
        taken.append(i)
        return True

    if n_wanted is not None:
        queues: dict[str | None, deque[int]] = {}
        for i in order:
            queues.setdefault(candidates[i].group, deque()).append(i)
        names = sorted(queues, key=lambda g: (g is None, g or ""))
        turn = deque(names[int(j)] for j in rng.permutation(len(names)))
        while turn and len(taken) < n_wanted:
            group = turn.popleft()
            queue = queues[group]
            while queue and not take_if_fits(queue.popleft()):
                pass
            if queue:
                turn.append(group)
        return sorted(taken)

    assert rare_target is not None
    by_class = {
        name: deque(
            sorted((i for i in order if candidates[i].counts.get(name)), key=lambda i: candidates[i].group != name)
        )
        for name in rare
    }
    chosen: set[int] = set()
    while True:
        needy = [c for c in rare if real_counts.get(c, 0) + used[c] < rare_target and by_class[c]]
        if not needy:
            return sorted(taken)
        name = max(needy, key=lambda c: (rare_target - real_counts.get(c, 0) - used[c], -rare.index(c)))
        queue = by_class[name]
        while queue:
            i = queue.popleft()
            if i not in chosen and take_if_fits(i):
                chosen.add(i)
                break


# --------------------------------------------------------------------------------------------------
# the merge


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
    images_mode: str = "relative",
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
    images_mode : {"relative", "copy", "link"}
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
    out = Path(out)
    caps = dict(caps or {})
    _check_options(synthetic_share, rare_target, rare_below, images_mode, seed, synthetic, guards)
    inputs = [Path(real_json), *(Path(s) / "labels.json" for s in synthetic), *map(Path, guards)]
    if mapping is not None:
        inputs.append(Path(mapping))
    if out.resolve() in {p.resolve() for p in inputs}:
        raise UsageError(f"--out {out} is one of the input files; choose a new file")
    for option, paths in (
        ("--synthetic", [Path(s).resolve() for s in synthetic]),
        ("--guard", [Path(g).resolve() for g in guards]),
    ):
        for path in paths:
            if paths.count(path) > 1 or path.resolve() == Path(real_json).resolve():
                raise UsageError(f"{option} {path} is given twice or is the real training split itself")

    # 2. load everything and build the vocabulary
    real = load_dataset(real_json, real_images)
    sets = [_load_run(Path(s)) for s in synthetic]
    guard_sets = [load_dataset(g, check_images=False) for g in guards]
    names = load_mapping(mapping) if mapping is not None else {}
    categories, to_out = _vocabulary(real, sets, names, Path(mapping) if mapping is not None else None)
    out_names = {c["id"]: c["name"] for c in categories}
    for name in caps:
        if name not in out_names.values():
            raise UsageError(f"--cap {name}=...: no category named {name!r} (known: {', '.join(out_names.values())})")

    # 3. leakage guard
    guard_hashes, guard_keys = guard_index(guard_sets)
    _refuse_real_leaks(real, guard_hashes)
    candidates: list[Candidate] = []
    where: list[tuple[int, Scene]] = []
    excluded: Counter[str] = Counter()
    for k, (dataset, _) in enumerate(sets):
        for i, scene in enumerate(dataset.scenes):
            source = _source(scene, dataset, i)
            if source["sha256"] in guard_hashes:
                excluded["hash"] += 1
            elif (source["image_id"], source["file_name"]) in guard_keys:
                excluded["id+file_name"] += 1
            else:
                candidates.append(_candidate(scene, dataset, to_out[k], out_names))
                where.append((k, scene))
    if excluded:
        warnings.warn(
            DatasetWarning(
                f"left out {sum(excluded.values())} synthetic image(s) made from held-out images "
                f"(same file hash: {excluded['hash']}, same id and file name: {excluded['id+file_name']})"
            ),
            stacklevel=2,
        )

    # 4. select
    real_counts = Counter(out_names[a.category_id] for a in real.annotations() if not a.iscrowd)
    rare = [c["name"] for c in categories if real_counts[c["name"]] < rare_below]
    if rare_target is not None and not rare:
        warnings.warn(
            DatasetWarning(f"no class has fewer than {rare_below} real instances; nothing is rare"), stacklevel=2
        )
    n_real = len(real.scenes)
    n_wanted = None
    if synthetic_share is not None:
        n_wanted = math.floor(synthetic_share / (1.0 - synthetic_share) * n_real + 0.5)
    chosen = select_synthetic(
        candidates,
        real_counts=real_counts,
        rare=rare,
        n_wanted=n_wanted,
        rare_target=rare_target,
        caps=caps,
        rng=seed,
    )

    # 5. summarise and warn about what could not be met
    syn_counts: Counter[str] = Counter()
    for i in chosen:
        syn_counts.update(candidates[i].counts)
    classes = tuple(
        ClassCount(c["name"], real_counts[c["name"]], syn_counts[c["name"]], c["name"] in rare, caps.get(c["name"]))
        for c in categories
    )
    n_syn = len(chosen)
    share = n_syn / (n_real + n_syn) if n_real + n_syn else 0.0
    shortfalls = _shortfalls(
        classes,
        n_wanted=n_wanted,
        n_syn=n_syn,
        n_real=n_real,
        share=synthetic_share,
        reached=share,
        rare_target=rare_target,
        available=len(candidates),
    )
    for message in shortfalls:
        warnings.warn(DatasetWarning(message), stacklevel=2)
    groups: dict[str, list[int]] = {}
    chosen_set = set(chosen)
    for i, cand in enumerate(candidates):
        counts = groups.setdefault(cand.group or "(none)", [0, 0])
        counts[0] += 1
        counts[1] += i in chosen_set
    summary = MergeSummary(
        out=str(out),
        mode="share" if synthetic_share is not None else "target",
        requested=synthetic_share if synthetic_share is not None else rare_target,
        seed=seed,
        real_images=n_real,
        synthetic_available=len(candidates),
        synthetic_wanted=n_wanted,
        synthetic_selected=n_syn,
        share=share,
        excluded={"hash": excluded["hash"], "id+file_name": excluded["id+file_name"]},
        groups={g: (a, s) for g, (a, s) in sorted(groups.items())},
        classes=classes,
        shortfalls=tuple(shortfalls),
    )

    # 6. write images (if copied or linked), then the labels
    picked = [where[i] for i in chosen]
    file_names = _place_images(real, [(k, s) for k, s in picked], out, images_mode)
    info = _info(summary, caps=caps, rare_below=rare_below, images_mode=images_mode, inputs=inputs, out=out)
    coco = _assemble(real, sets, picked, to_out, categories, file_names, info)
    write_json_atomic(out, coco)
    return summary


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


def _load_run(folder: Path) -> tuple[Dataset, Path]:
    labels = folder / "labels.json"
    if not labels.is_file():
        raise DatasetError(
            labels, "", "not found; is this a rarefill run folder?", hint="pass the folder that `rarefill run` wrote"
        )
    return load_dataset(labels, folder / "images"), labels


def _vocabulary(
    real: Dataset, sets: Sequence[tuple[Dataset, Path]], mapping: Mapping[str, str], mapping_file: Path | None
) -> tuple[list[dict[str, Any]], list[dict[int, int]]]:
    """Merged categories (real ones first, ids kept) and, per synthetic set, its id -> merged id."""
    real_names = {c.name: c.id for c in real.categories}
    theirs = {c.name for dataset, _ in sets for c in dataset.categories}
    for key, value in mapping.items():
        if key not in theirs:
            raise DatasetError(
                mapping_file, key, f"names no category of the synthetic sets (theirs: {', '.join(sorted(theirs))})"
            )
        if value not in real_names and value != key:
            raise DatasetError(
                mapping_file,
                key,
                f"maps to {value!r}, which is no category of the real split (ours: {', '.join(real_names)})",
                hint="map a name to itself to add it as a new category",
            )
    categories = [category_entry(c) for c in real.categories]
    ids = dict(real_names)
    next_id = max(real_names.values(), default=0) + 1
    to_out: list[dict[int, int]] = []
    for dataset, labels in sets:
        table: dict[int, int] = {}
        for i, category in enumerate(dataset.categories):
            name = mapping.get(category.name, category.name)
            if name not in ids:
                if category.name not in mapping:
                    raise DatasetError(
                        labels,
                        f"categories[{i}].name",
                        f"category {category.name!r} is not in the real split (ours: {', '.join(real_names)})",
                        hint='give a mapping file (--mapping FILE.json: {"their name": "our name"})',
                    )
                ids[name] = next_id
                categories.append({**category_entry(category), "id": next_id})
                next_id += 1
            table[category.id] = ids[name]
        to_out.append(table)
    return categories, to_out


def guard_index(guards: Sequence[Dataset]) -> tuple[dict[str, str], set[tuple[int, str]]]:
    """File hash -> "file: image" of every guarded image on disk, and every guarded (id, file name).

    Shared by the merge's leakage guard and the realism audit's check that its held-out split made no
    synthetic image. Warns (:class:`DatasetWarning`) about guarded images whose files are absent.
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
                stacklevel=3,
            )
    return hashes, keys


def _refuse_real_leaks(real: Dataset, guard_hashes: Mapping[str, str]) -> None:
    for i, scene in enumerate(real.scenes):
        twin = guard_hashes.get(file_sha256(scene.path))
        if twin is not None:
            raise DatasetError(
                real.source,
                f"images[{i}]",
                f"training image {scene.file_name} is byte-identical to held-out image {twin}",
                hint="the splits overlap; remove the image from one of them before merging",
            )


def _source(scene: Scene, dataset: Dataset, index: int) -> dict[str, Any]:
    """The provenance source of a synthetic image, checked: the guard cannot work without it."""
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


def _candidate(scene: Scene, dataset: Dataset, to_out: Mapping[int, int], out_names: Mapping[int, str]) -> Candidate:
    counts = Counter(out_names[to_out[a.category_id]] for a in scene.annotations if not a.iscrowd)
    record = scene.extra[KEY]
    stage = record.get("stage") if isinstance(record.get("stage"), dict) else {}
    target = stage.get("class")
    their = {c.name: c.id for c in dataset.categories}
    if isinstance(target, str) and target in their:
        return Candidate(out_names[to_out[their[target]]], dict(counts))
    new = Counter(
        out_names[to_out[a.category_id]]
        for a in scene.annotations
        if not a.iscrowd and isinstance(a.extra.get(KEY), dict) and a.extra[KEY].get("synthetic") is True
    )
    group = min(new, key=lambda name: (-new[name], name)) if new else None
    return Candidate(group, dict(counts))


def _shortfalls(classes, *, n_wanted, n_syn, n_real, share, reached, rare_target, available) -> list[str]:
    if n_wanted is not None:
        if n_syn >= n_wanted:
            return []
        return [
            f"synthetic share {share:g} needs {n_wanted} synthetic image(s) beside {n_real} real; "
            f"only {n_syn} of {available} available could be used (guard and caps applied): "
            f"reached share {reached:.4f} ({n_syn} of {n_real + n_syn} images)"
        ]
    messages = []
    for c in classes:
        if c.rare and c.total < rare_target:
            why = (
                f"its cap of {c.cap} synthetic instances"
                if c.cap is not None
                else "too few synthetic images containing it (after the guard and caps)"
            )
            messages.append(
                f"rare target {rare_target} not reached for {c.name}: {c.total} instances "
                f"(real {c.real} + synthetic {c.synthetic}); limited by {why}"
            )
    return messages


def _place_images(
    real: Dataset, picked: Sequence[tuple[int, Scene]], out: Path, images_mode: str
) -> dict[tuple[int, int], str]:
    """file_name of each merged image, keyed by (set, image id) with set -1 for the real split."""
    base = out.resolve().parent
    items = [((-1, s.id), s, f"real/{s.file_name}") for s in real.scenes]
    items += [((k, s.id), s, f"synthetic-{k + 1}/{s.file_name}") for k, s in picked]
    names: dict[tuple[int, int], str] = {}
    folder = f"{out.stem}_images"
    for key, scene, target in items:
        if images_mode == "relative":
            names[key] = Path(os.path.relpath(scene.path, base)).as_posix()
            continue
        destination = base / folder / target
        if images_mode == "copy":
            write_bytes_atomic(destination, scene.path.read_bytes())
        else:
            _link(scene.path, destination)
        names[key] = f"{folder}/{target}"
    outside = sum(name.startswith("../") for name in names.values())
    if outside:
        warnings.warn(
            DatasetWarning(
                f"{outside} file_name(s) climb out of the output folder {base} (../); pycocotools and most "
                "trainers accept that, rarefill's own loader does not: write the output in a folder above "
                "the images, or use --images-mode copy or link"
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


def _info(summary: MergeSummary, *, caps, rare_below, images_mode, inputs: Sequence[Path], out: Path) -> dict:
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


def _assemble(real, sets, picked, to_out, categories, file_names, info) -> dict[str, Any]:
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
