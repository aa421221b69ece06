"""Step 3 of a merge: which synthetic images to take, stratified by the class each was made for."""

from __future__ import annotations

import math
from collections import Counter, deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from ..dataset import Dataset, Scene
from ..errors import UsageError
from ..provenance import KEY


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


def candidate_of(scene: Scene, dataset: Dataset, to_out: Mapping[int, int], out_names: Mapping[int, str]) -> Candidate:
    """``scene`` of synthetic set ``dataset`` as a selection candidate, in merged category names.

    ``to_out`` maps the set's category ids to merged ids, ``out_names`` merged ids to names.
    """
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
