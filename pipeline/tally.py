"""Per stage of a finished run: wanted, accepted, attempted, rejections by filter, acceptance by size band.

Counted from ``manifest.jsonl`` (every candidate in plan order, near-duplicates included), so a single run,
a shard and a collected run are counted alike. A stage falls short when it accepted fewer outputs than it
had jobs; :data:`pipeline.errors.EXIT_SHORT` is the CLI's exit code then.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import RunError

SIZE_BANDS_PX = (16, 32, 64, 128)
"""Edges of the size bands, by the height in pixels of the object an attempt was about: bands an octave
apart, as the levels of a detector's feature pyramid are (common practice)."""

NO_BOX = "no box"
"""Band of attempts that failed before any object had a box (no room to place one, ...)."""

_JOB_KEY = re.compile(r"^s(\d+)-\d+$")


def size_band(height: float) -> str:
    """The size band of an object ``height`` pixels tall: ``"<16 px"``, ``"16-32 px"``, ... ``">=64 px"``."""
    edges = SIZE_BANDS_PX
    if height < edges[0]:
        return f"<{edges[0]} px"
    for low, high in zip(edges, edges[1:], strict=False):
        if height < high:
            return f"{low}-{high} px"
    return f">={edges[-1]} px"


def band_names() -> list[str]:
    """Every band, smallest first, then :data:`NO_BOX`."""
    edges = SIZE_BANDS_PX
    return [f"<{edges[0]} px", *(f"{lo}-{hi} px" for lo, hi in zip(edges, edges[1:], strict=False))] + [
        f">={edges[-1]} px",
        NO_BOX,
    ]


def attempt_band(line: Mapping[str, Any]) -> str:
    """Band of one manifest entry: its smallest object, by the height asked for (new) or labelled (kept)."""
    heights = [float((box.get("requested_bbox") or box["bbox"])[3]) for box in line.get("boxes") or ()]
    return size_band(min(heights)) if heights else NO_BOX


@dataclass(frozen=True)
class StageTally:
    """What one stage of a run made.

    Attributes
    ----------
    index : int
        The stage's position in the recipe.
    kind, target_class : str
        From the recipe (``"?"`` when the run folder does not say).
    wanted : int
        Jobs of this stage in the run (or shard): one accepted output wanted from each.
    accepted, attempted : int
        Jobs that ended with an accepted output; candidates tried.
    rejected_by : dict of str to int
        Candidates each filter rejected, most first (a candidate failing two filters counts for both).
    bands : dict of str to (accepted, attempted)
        Candidates per size band (see :func:`attempt_band`), in :func:`band_names` order, empty bands left out.
    """

    index: int
    kind: str
    target_class: str
    wanted: int
    accepted: int
    attempted: int
    rejected_by: dict[str, int] = field(default_factory=dict)
    bands: dict[str, tuple[int, int]] = field(default_factory=dict)

    @property
    def short(self) -> int:
        """How many wanted outputs are missing (0 when the stage reached its count)."""
        return max(0, self.wanted - self.accepted)

    def to_dict(self) -> dict[str, Any]:
        return {
            "index": self.index,
            "kind": self.kind,
            "class": self.target_class,
            "wanted": self.wanted,
            "accepted": self.accepted,
            "attempted": self.attempted,
            "short": self.short,
            "rejected_by": dict(self.rejected_by),
            "by_size": {band: {"accepted": a, "attempted": n} for band, (a, n) in self.bands.items()},
        }


def stage_of(job_key: str) -> int:
    """The stage index in a job key ``s<stage>-<slot>`` (see :attr:`pipeline.plan.Job.key`)."""
    match = _JOB_KEY.match(job_key)
    if match is None:
        raise RunError(f"job key {job_key!r} is not of the form s<stage>-<slot>")
    return int(match.group(1))


def tally_stages(manifest: Iterable[Mapping[str, Any]], stages: Sequence[Mapping[str, Any]] = ()) -> list[StageTally]:
    """Count manifest entries per stage.

    Parameters
    ----------
    manifest : iterable of mapping
        ``manifest.jsonl`` entries (``job``, ``accepted``, ``rejected_by``, ``boxes``).
    stages : sequence of mapping, optional
        The run's stages as ``run.json`` lists them (``kind``, ``class``); stages beyond it are named ``"?"``.

    Returns
    -------
    list of StageTally
        One per stage of ``stages`` and per other stage seen in the manifest, by index.
    """
    jobs: dict[int, set[str]] = {}
    filled: dict[int, set[str]] = {}
    attempted: Counter = Counter()
    rejected: dict[int, Counter] = {}
    bands: dict[int, dict[str, list[int]]] = {}
    for line in manifest:
        stage = stage_of(line["job"])
        jobs.setdefault(stage, set()).add(line["job"])
        attempted[stage] += 1
        band = bands.setdefault(stage, {}).setdefault(attempt_band(line), [0, 0])
        band[1] += 1
        if line["accepted"]:
            filled.setdefault(stage, set()).add(line["job"])
            band[0] += 1
        else:
            rejected.setdefault(stage, Counter()).update(set(line["rejected_by"]))
    out = []
    order = band_names()
    for index in sorted(set(range(len(stages))) | set(jobs)):
        spec = stages[index] if index < len(stages) else {}
        by_filter = rejected.get(index, Counter())
        seen = bands.get(index, {})
        out.append(
            StageTally(
                index=index,
                kind=str(spec.get("kind", "?")),
                target_class=str(spec.get("class", "?")),
                wanted=len(jobs.get(index, ())),
                accepted=len(filled.get(index, ())),
                attempted=attempted[index],
                rejected_by=dict(sorted(by_filter.items(), key=lambda kv: (-kv[1], kv[0]))),
                bands={b: (seen[b][0], seen[b][1]) for b in order if b in seen},
            )
        )
    return out


def read_manifest(root: Path) -> list[dict[str, Any]]:
    """The entries of ``root/manifest.jsonl``."""
    path = Path(root) / "manifest.jsonl"
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RunError(f"{path}: not found", hint="run the recipe again to finish it") from None
    try:
        return [json.loads(line) for line in text.splitlines() if line.strip()]
    except json.JSONDecodeError as exc:
        raise RunError(f"{path}: malformed JSON ({exc.msg})") from None


def summary_record(tallies: Sequence[StageTally]) -> dict[str, Any]:
    """The ``summary`` that ``run.json`` holds once a run finished: totals and each stage's tally."""
    return {
        "wanted": sum(t.wanted for t in tallies),
        "accepted": sum(t.accepted for t in tallies),
        "attempted": sum(t.attempted for t in tallies),
        "short": sum(t.short for t in tallies),
        "stages": [t.to_dict() for t in tallies],
    }
