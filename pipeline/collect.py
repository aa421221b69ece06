"""Merge the outputs of a sharded run into one run folder, identical to a single-machine run.

Nothing is merged until the shard folders are known to make one whole, finished run: every folder holds
a run of the same plan (the ``plan_sha256`` and the rest of ``run.json`` agree), each shard ``0/N`` to
``N-1/N`` is there exactly once, and each has committed all of its chunks, with every image and thumbnail
its chunks name. Otherwise :class:`~pipeline.errors.ShardError` names the shard and what is wrong.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .errors import ShardError
from .files import write_bytes_atomic
from .tally import read_manifest, summary_record, tally_stages
from .writer import SUMMARY_KEY, RunFolder, assemble, read_chunks

_RERUN = "run that shard again with the same command: it resumes where it stopped"


@dataclass(frozen=True)
class ShardFolder:
    """One shard's output folder as read from its ``run.json``."""

    path: Path
    identity: dict[str, Any]
    index: int
    count: int

    @property
    def name(self) -> str:
        """How messages name it: ``shard 2/4 (parts/2)``."""
        return f"shard {self.index}/{self.count} ({self.path})"

    def chunks(self) -> list[int]:
        """The plan's chunks this shard makes: index, index + count, ..."""
        return list(range(self.index, self.identity["chunks"], self.count))


def read_shard(folder: Path) -> ShardFolder:
    """Read ``folder/run.json``.

    Raises
    ------
    ShardError
        There is no readable ``run.json`` with a shard in it.
    """
    path = Path(folder) / "run.json"
    try:
        identity = json.loads(path.read_text(encoding="utf-8"))
        index, count = (int(v) for v in identity["shard"].split("/"))
        int(identity["chunks"])
    except FileNotFoundError:
        raise ShardError(
            f"{path}: not found; {folder} is not a rarefill run folder (or its shard never started)", hint=_RERUN
        ) from None
    except (json.JSONDecodeError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ShardError(f"{path}: unreadable ({type(exc).__name__}: {exc})") from None
    if count < 1 or not 0 <= index < count:
        raise ShardError(f"{path}: shard {identity['shard']!r} is not i/N with 0 <= i < N")
    return ShardFolder(Path(folder), identity, index, count)


def verify_shards(shard_dirs: Sequence[Path]) -> list[ShardFolder]:
    """Check that ``shard_dirs`` are the finished shards ``0/N .. N-1/N`` of one plan; return them in order.

    Raises
    ------
    ShardError
        A folder is not a run folder, comes from another plan or run, a shard is missing or given twice,
        or a shard has not finished (the message says which chunks it still lacks).
    """
    if not shard_dirs:
        raise ShardError("no shard folders given")
    shards = [read_shard(Path(folder)) for folder in shard_dirs]
    _check_same_run(shards)
    by_index: dict[int, ShardFolder] = {}
    for shard in shards:
        if shard.index in by_index:
            raise ShardError(
                f"shard {shard.index}/{shard.count} is given twice: {by_index[shard.index].path} and {shard.path}",
                hint="give each shard's folder once",
            )
        by_index[shard.index] = shard
    count = shards[0].count
    missing = [i for i in range(count) if i not in by_index]
    if missing:
        names = ", ".join(f"{i}/{count}" for i in missing)
        given = ", ".join(f"{s.index}/{s.count} {s.path}" for s in sorted(shards, key=lambda s: s.index))
        raise ShardError(
            f"shard{'s' if len(missing) > 1 else ''} {names} missing; collect needs all {count} (given: {given})",
            hint="add the missing shard folders, or run the missing shards first",
        )
    ordered = [by_index[i] for i in range(count)]
    short = [reason for reason in map(_unfinished, ordered) if reason]
    if short:
        raise ShardError(f"not finished: {'; '.join(short)}", hint=_RERUN)
    return ordered


def _check_same_run(shards: Sequence[ShardFolder]) -> None:
    first = shards[0]
    for shard in shards[1:]:
        if shard.identity.get("plan_sha256") != first.identity.get("plan_sha256"):
            raise ShardError(
                f"{shard.name} comes from another plan than {first.name}: plan_sha256 "
                f"{str(shard.identity.get('plan_sha256'))[:12]}... vs {str(first.identity.get('plan_sha256'))[:12]}...",
                hint="collect only the shards of one recipe, seed and --limit; rerun the odd one out",
            )
        # the summary a shard's run wrote when it finished is its own; the shards share everything else
        keys = (set(shard.identity) | set(first.identity)) - {"shard", SUMMARY_KEY}
        changed = sorted(k for k in keys if shard.identity.get(k) != first.identity.get(k))
        if changed:
            raise ShardError(
                f"{shard.name} belongs to another run than {first.name} (differs in: {', '.join(changed)})",
                hint="collect only the shards of one recipe, seed and --limit",
            )
        if shard.count != first.count:
            raise ShardError(
                f"{shard.name} is one of {shard.count} shards, but {first.name} is one of {first.count}",
                hint="collect the shards of one split (the same N in --shard i/N)",
            )


def _unfinished(shard: ShardFolder) -> str:
    """Why ``shard`` is not finished ("" if it is): missing chunks, files or labels."""
    wanted = shard.chunks()
    committed = RunFolder(shard.path).committed()
    lacking = [c for c in wanted if c not in committed]
    if lacking:
        shown = ", ".join(map(str, lacking[:8])) + (", ..." if len(lacking) > 8 else "")
        done = len(wanted) - len(lacking)
        return f"{shard.name} committed {done} of {len(wanted)} chunks, {len(lacking)} short (chunks {shown})"
    for record in read_chunks(shard.path, wanted):
        for name in _files_of(record):
            if not (shard.path / name).is_file():
                return f"{shard.name} lacks {name}, named by chunk {record['chunk']}"
    if not (shard.path / "labels.json").is_file():
        return f"{shard.name} committed every chunk but stopped before writing labels.json"
    return ""


def _files_of(record: dict) -> list[str]:
    return [
        attempt[key]
        for job in record["jobs"]
        for attempt in job["attempts"]
        for key in ("file_name", "reject")
        if key in attempt
    ]


def collect(shard_dirs: Sequence[Path], out: Path) -> dict[str, int]:
    """Verify shard folders ``0/N .. N-1/N`` of one run (see :func:`verify_shards`), then merge them into ``out``.

    The result holds the same bytes as the same recipe run on one machine (``run.json`` says shard 0/1).
    Returns the counts of :func:`pipeline.writer.assemble`.

    Raises
    ------
    ShardError
        The folders are not one whole, finished run; nothing is written then.
    """
    shards = verify_shards(shard_dirs)
    first = shards[0].identity
    identity = {k: "0/1" if k == "shard" else v for k, v in first.items() if k != SUMMARY_KEY}
    target = RunFolder.claim(Path(out), identity)
    for shard in shards:
        for record in read_chunks(shard.path, shard.chunks()):
            for name in _files_of(record):
                write_bytes_atomic(target.root / name, (shard.path / name).read_bytes())
            target.commit(record["chunk"], record["jobs"])
    info = json.loads((shards[0].path / "labels.json").read_text(encoding="utf-8"))["info"]
    counts = assemble(
        target.root, range(first["chunks"]), categories=first["categories"], info={**info, "shard": "0/1"}
    )
    target.write_summary(summary_record(tally_stages(read_manifest(target.root), first.get("stages", ()))))
    return counts
