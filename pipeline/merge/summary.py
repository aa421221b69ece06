"""What a merge reached: instances per class, the share, the groups, and what could not be met."""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

from .selection import Candidate


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


def summarise(
    candidates: Sequence[Candidate],
    chosen: Sequence[int],
    *,
    categories: Sequence[Mapping[str, Any]],
    real_counts: Mapping[str, int],
    rare: Sequence[str],
    caps: Mapping[str, int],
    n_real: int,
    n_wanted: int | None,
    synthetic_share: float | None,
    rare_target: int | None,
    excluded: Mapping[str, int],
    out: str,
    seed: int,
) -> MergeSummary:
    """Count what the chosen candidates give each class and say what was not met (see :func:`shortfalls`)."""
    syn_counts: Counter[str] = Counter()
    for i in chosen:
        syn_counts.update(candidates[i].counts)
    classes = tuple(
        ClassCount(c["name"], real_counts[c["name"]], syn_counts[c["name"]], c["name"] in rare, caps.get(c["name"]))
        for c in categories
    )
    n_syn = len(chosen)
    share = n_syn / (n_real + n_syn) if n_real + n_syn else 0.0
    missed = shortfalls(
        classes,
        n_wanted=n_wanted,
        n_syn=n_syn,
        n_real=n_real,
        share=synthetic_share,
        reached=share,
        rare_target=rare_target,
        available=len(candidates),
    )
    groups: dict[str, list[int]] = {}
    chosen_set = set(chosen)
    for i, cand in enumerate(candidates):
        counts = groups.setdefault(cand.group or "(none)", [0, 0])
        counts[0] += 1
        counts[1] += i in chosen_set
    return MergeSummary(
        out=out,
        mode="share" if synthetic_share is not None else "target",
        requested=synthetic_share if synthetic_share is not None else rare_target,
        seed=seed,
        real_images=n_real,
        synthetic_available=len(candidates),
        synthetic_wanted=n_wanted,
        synthetic_selected=n_syn,
        share=share,
        excluded={"hash": excluded.get("hash", 0), "id+file_name": excluded.get("id+file_name", 0)},
        groups={g: (a, s) for g, (a, s) in sorted(groups.items())},
        classes=classes,
        shortfalls=tuple(missed),
    )


def shortfalls(classes, *, n_wanted, n_syn, n_real, share, reached, rare_target, available) -> list[str]:
    """One message per unmet request: the share's image count, or each rare class below the target."""
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
