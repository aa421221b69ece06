"""Turn a recipe into a deterministic list of jobs, grouped in fixed chunks.

Job ``(stage s, slot i)`` stands for the i-th accepted output wanted from stage s. Its seed derives from
(recipe seed, s, i) alone, and attempt ``a`` of it from (job seed, a), so any job reproduces on its own.
Jobs are grouped into chunks of at most ``chunk_size`` consecutive slots of one stage. A chunk is the unit
of batching (its windows are denoised together), of resuming (it is committed whole) and of sharding
(shard k of N takes chunks k, k + N, ...). Because a chunk's contents never depend on how the run is
split or interrupted, a resumed or sharded run produces exactly the bytes of a single uninterrupted one.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .errors import UsageError
from .recipe import Recipe

CHUNK_SIZE = 8
"""Slots per chunk; also the denoising batch (PROBE.md: throughput stops growing beyond batch 8-16)."""


def derive_seed(*parts: int | str) -> int:
    """A 63-bit seed from any sequence of integers and strings (SHA-256, so no two paths collide)."""
    digest = hashlib.sha256("/".join(str(p) for p in parts).encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") >> 1


@dataclass(frozen=True)
class Job:
    """One wanted output: stage index, slot within the stage, its seed, and its sources in attempt order.

    ``sources[a]`` is the (scene index, annotation index or -1) that attempt ``a`` starts from.
    """

    stage: int
    slot: int
    seed: int
    chunk: int
    sources: tuple[tuple[int, int], ...]

    @property
    def key(self) -> str:
        """A stable name for file names and logs: ``s<stage>-<slot>``."""
        return f"s{self.stage}-{self.slot:06d}"

    def attempt_seed(self, attempt: int) -> int:
        """Seed of attempt ``attempt`` (0-based)."""
        return derive_seed(self.seed, "attempt", attempt)


@dataclass(frozen=True)
class Plan:
    """The whole run: jobs in order and the chunks that group them."""

    jobs: tuple[Job, ...]
    chunks: tuple[tuple[int, ...], ...]  # job indices per chunk
    attempts: int

    def shard(self, index: int, count: int) -> list[int]:
        """Chunk numbers of shard ``index`` of ``count`` (0-based): chunks index, index + count, ..."""
        if count < 1 or not 0 <= index < count:
            raise UsageError(f"shard must be i/N with 0 <= i < N, got {index}/{count}")
        return list(range(index, len(self.chunks), count))


def make_plan(recipe: Recipe, sources: Sequence[Sequence[tuple[int, int]]]) -> Plan:
    """Build the plan.

    Parameters
    ----------
    recipe : Recipe
    sources : per stage, the eligible (scene index, annotation index or -1) pairs, in data set order
        (each stage's ``eligible`` decides them).

    Each stage's eligible sources are shuffled once by a seed of (recipe seed, stage) and dealt out
    round-robin, so outputs spread over the data set; attempt ``a`` of slot ``i`` takes the source
    ``a * stride`` further along, so a retry usually starts from another scene.
    """
    if len(sources) != len(recipe.stages):
        raise ValueError(f"need eligible sources for {len(recipe.stages)} stages, got {len(sources)}")
    jobs: list[Job] = []
    chunks: list[tuple[int, ...]] = []
    for spec, eligible in zip(recipe.stages, sources, strict=True):
        if not eligible:
            raise UsageError(
                f"stage[{spec.index}] ({spec.kind}, class {spec.target_class!r}) has no eligible source "
                f"image in {recipe.dataset}"
            )
        order = np.random.default_rng(derive_seed(recipe.seed, "sources", spec.index)).permutation(len(eligible))
        n = len(order)
        stride = max(1, n // recipe.attempts_per_output) if n > 1 else 0
        first_chunk = len(chunks)
        for slot in range(spec.count):
            picks = tuple(
                tuple(int(v) for v in eligible[order[(slot + a * stride) % n]])
                for a in range(recipe.attempts_per_output)
            )
            chunk = first_chunk + slot // CHUNK_SIZE
            jobs.append(Job(spec.index, slot, derive_seed(recipe.seed, spec.index, slot), chunk, picks))
        for start in range(0, spec.count, CHUNK_SIZE):
            base = len(jobs) - spec.count
            chunks.append(tuple(range(base + start, base + min(start + CHUNK_SIZE, spec.count))))
    return Plan(tuple(jobs), tuple(chunks), recipe.attempts_per_output)
