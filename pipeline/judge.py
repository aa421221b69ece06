"""Apply the plausibility filters to a candidate: every verdict, for every object the stage is answerable for."""

from __future__ import annotations

from .filters import Verdict, check_geometry, scale, seam, surface
from .geometry import ground_for
from .stages.base import Candidate, StageContext

PRESENT_FILTER = "present"


def judge(candidate: Candidate, ctx: StageContext) -> list[Verdict]:
    """All verdicts on one candidate; it is accepted when every one passes.

    For each checked new object: scale, surface, overlap, gap and objects-per-image against every other
    labelled object. For each checked kept (real) object, only scale and surface: its placement among the
    other real objects is real, but its new surroundings must still carry it. For each new object, whether
    the verifier sees the wanted class in its box; for the whole image, the blend seam around the
    generated region.
    """
    names = ctx.dataset.category_names()
    surface_mask = ctx.surface(candidate.scene).mask
    image_id = candidate.scene.id
    ground = ground_for(ctx.ground, candidate.scene)
    verdicts: list[Verdict] = []
    for index in candidate.checked:
        if index >= 0:
            ann = candidate.kept[index]
            verdicts.append(scale(ann.bbox, names[ann.category_id], ground, ctx.limits, image_id=image_id))
            verdicts.append(surface(ann.bbox, surface_mask, ctx.limits))
            continue
        j = -1 - index
        obj = candidate.new[j]
        others = [a.bbox for a in candidate.kept if not a.iscrowd] + [
            n.bbox for i, n in enumerate(candidate.new) if i != j
        ]
        verdicts += check_geometry(
            obj.bbox, names[obj.category_id], others, ground, surface_mask, ctx.limits, image_id=image_id
        )
    if ctx.verifier is not None:
        for obj in candidate.new:
            verdicts.append(present(candidate, obj.bbox, names[obj.category_id], ctx))
    if candidate.changed.any():
        verdicts.append(seam(candidate.image, candidate.changed, ctx.limits))
    return verdicts


def present(candidate: Candidate, box, label: str, ctx: StageContext) -> Verdict:
    """Does the verifier, trained on real crops only, see a ``label`` object in ``box``?"""
    probability = float(ctx.verifier.present_probability(candidate.image, box, label))
    limit = ctx.limits.min_present_probability
    passed = probability >= limit
    reason = f"verifier gives {probability:.2f} for {label} (limit {limit:g})"
    return Verdict(
        PRESENT_FILTER, passed, probability, limit, reason if passed else reason + ": object not recognisable"
    )
