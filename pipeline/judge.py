"""Apply the plausibility filters to a candidate: every verdict, for every object the stage is answerable for."""

from __future__ import annotations

from .filters import Verdict, check_geometry, seam
from .stages.base import Candidate, StageContext

PRESENT_FILTER = "present"


def judge(candidate: Candidate, ctx: StageContext) -> list[Verdict]:
    """All verdicts on one candidate; it is accepted when every one passes.

    For each checked object: scale, surface, overlap, gap and objects-per-image against every other
    labelled object; for each new object, whether the verifier sees the wanted class in its box; for the
    whole image, the blend seam around the generated region.
    """
    names = ctx.dataset.category_names()
    boxes = candidate.boxes()
    surface_mask = ctx.surface(candidate.scene).mask
    verdicts: list[Verdict] = []
    for index in candidate.checked:
        position = index if index >= 0 else len(boxes) - len(candidate.new) + (-1 - index)
        box, category_id = boxes[position]
        others = [b for i, (b, _) in enumerate(boxes) if i != position]
        verdicts += check_geometry(
            box, names[category_id], others, ctx.ground, surface_mask, ctx.limits, image_id=candidate.scene.id
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
