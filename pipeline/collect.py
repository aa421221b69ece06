"""Merge the outputs of a sharded run into one run folder, identical to a single-machine run."""

from __future__ import annotations

import json
import shutil
from collections.abc import Sequence
from pathlib import Path

from .errors import RunError, RunInputError
from .tally import read_manifest, summary_record, tally_stages
from .writer import SUMMARY_KEY, RunFolder, assemble, read_chunks


def collect(shard_dirs: Sequence[Path], out: Path) -> dict[str, int]:
    """Combine shard folders ``0/N .. N-1/N`` of one run into ``out`` and assemble its labels.

    Raises
    ------
    RunError
        A folder is not a run folder, the shards come from different runs, a shard is missing or
        doubled, or a shard has not finished its chunks.
    """
    identities = []
    for folder in shard_dirs:
        path = Path(folder) / "run.json"
        try:
            identities.append(json.loads(path.read_text(encoding="utf-8")))
        except FileNotFoundError:
            raise RunInputError(f"{path}: not found; {folder} is not a rarefill run folder") from None
        except json.JSONDecodeError as exc:
            raise RunError(f"{path}: unreadable ({exc})") from None
    # the summary a shard's run wrote when it finished is its own; the shards share everything else
    first = {k: v for k, v in identities[0].items() if k not in ("shard", SUMMARY_KEY)}
    for folder, identity in zip(shard_dirs, identities, strict=True):
        if {k: v for k, v in identity.items() if k not in ("shard", SUMMARY_KEY)} != first:
            raise RunError(
                f"{folder} belongs to another run than {shard_dirs[0]} (recipe, seed, counts or plan differ)"
            )
    shards = sorted(tuple(int(v) for v in identity["shard"].split("/")) for identity in identities)
    count = shards[0][1]
    if shards != [(i, count) for i in range(count)]:
        found = ", ".join(f"{i}/{n}" for i, n in shards)
        raise RunInputError(f"need each shard 0/{count} .. {count - 1}/{count} exactly once, got {found}")

    identity = {k: "0/1" if k == "shard" else v for k, v in identities[0].items() if k != SUMMARY_KEY}
    target = RunFolder.claim(Path(out), identity)
    for folder, shard_identity in zip(shard_dirs, identities, strict=True):
        index = int(shard_identity["shard"].split("/")[0])
        chunks = list(range(index, first["chunks"], count))
        for record in read_chunks(Path(folder), chunks):
            for job in record["jobs"]:
                for attempt in job["attempts"]:
                    for key in ("file_name", "reject"):
                        if key in attempt:
                            _copy(Path(folder) / attempt[key], target.root / attempt[key])
            target.commit(record["chunk"], record["jobs"])
    info = json.loads((Path(shard_dirs[0]) / "labels.json").read_text(encoding="utf-8"))["info"]
    info = {**info, "shard": "0/1"}
    counts = assemble(target.root, range(first["chunks"]), categories=first["categories"], info=info)
    target.write_summary(summary_record(tally_stages(read_manifest(target.root), first.get("stages", ()))))
    return counts


def _copy(source: Path, target: Path) -> None:
    if not source.is_file():
        raise RunError(f"{source}: missing; the shard folder is incomplete", hint="run that shard again to finish it")
    tmp = target.with_name(f".{target.name}.tmp")
    shutil.copyfile(source, tmp)
    tmp.replace(target)
