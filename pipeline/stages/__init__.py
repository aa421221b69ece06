"""Stages make candidates. A recipe's ``kind`` picks one through :data:`REGISTRY`.

Each stage module has ``eligible(dataset, spec, limits)`` (which sources it can start from),
``draft(job, attempt, spec, ctx)`` and ``complete(draft, frames, ctx)``. Adding a stage is adding one
module and one line here.
"""

from __future__ import annotations

from types import ModuleType

from ..plan import Job
from ..recipe import StageSpec
from . import insert, rebackground, restyle
from .base import Candidate, Draft, Failure, NewObject, StageContext

REGISTRY: dict[str, ModuleType] = {
    "insert": insert,
    "rebackground": rebackground,
    "restyle": restyle,
}

__all__ = ["REGISTRY", "Candidate", "Draft", "Failure", "NewObject", "StageContext", "run"]


def stage_module(kind: str) -> ModuleType:
    """The module of a stage kind; ``ValueError`` naming the known kinds otherwise."""
    try:
        return REGISTRY[kind]
    except KeyError:
        raise ValueError(f"no stage of kind {kind!r} (known: {', '.join(REGISTRY)})") from None


def run(job: Job, attempt: int, spec: StageSpec, ctx: StageContext) -> Candidate | Failure:
    """One attempt of one job, unbatched: draft, inpaint, complete."""
    module = stage_module(spec.kind)
    drafted = module.draft(job, attempt, spec, ctx)
    if isinstance(drafted, Failure):
        return drafted
    frames = []
    if drafted.requests:
        frames = ctx.generator.inpaint(list(drafted.requests), steps=ctx.steps, guidance=ctx.guidance)
    return module.complete(drafted, frames, ctx)
