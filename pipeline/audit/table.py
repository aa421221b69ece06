"""The audit's figures as one row of text per class, shared by the terminal table and the report."""

from __future__ import annotations

from typing import Any

COLUMNS = (
    "class",
    "synthetic / real",
    "real vs synthetic acc.",
    "exemplars held out acc.",
    "exemplars repeated acc.",
    "real vs real acc.",
    "precision",
    "recall",
    "sharpness syn/real",
    "box fit",
    "near-copies",
)
"""Column titles of :func:`rows`."""


def _interval(test: dict[str, Any] | None) -> str:
    if test is None:
        return "n/a"
    return f"{test['accuracy']:.2f} [{test['low']:.2f}, {test['high']:.2f}]"


def _pair(value: float | None, reference: float | None) -> str:
    if value is None:
        return "n/a"
    return f"{value:.2f} (real {reference:.2f})" if reference is not None else f"{value:.2f}"


def _row(name: str, c: dict[str, Any]) -> list[str]:
    cov = c["coverage"] or {}
    sharp = c["sharpness"]["ratio"]
    fit = c["box_fit"]["synthetic"]
    copies = c["near_copies"]
    small = c["skipped_small"]
    skipped = f" (-{small['synthetic']}/-{small['real']})" if any(small.values()) else ""
    return [
        name,
        f"{c['n_synthetic']} / {c['n_real']}{skipped}",
        _interval(c["two_sample"]),
        _interval(c.get("unseen_exemplars")),
        _interval(c.get("repeated_exemplars")),
        _interval(c["floor"]),
        _pair(cov.get("precision"), cov.get("reference_precision")),
        _pair(cov.get("recall"), cov.get("reference_recall")),
        "n/a" if sharp is None else f"{sharp:.2f}",
        "n/a" if fit is None else f"fill {fit['fill']:.2f}, beyond {fit['beyond']:.2f}",
        "n/a" if copies is None or copies["share"] is None else f"{copies['share']:.0%}",
    ]


def rows(result: dict[str, Any]) -> list[list[str]]:
    """One list of cell texts (see :data:`COLUMNS`) per audited class of an :func:`audit_run` result."""
    return [_row(name, figures) for name, figures in result["classes"].items()]


def legend(result: dict[str, Any]) -> str:
    """What the columns mean, with the settings of ``result``."""
    s = result["settings"]
    return (
        f"Accuracy: {s['folds']}-fold held-out accuracy of a small CNN telling real from synthetic crops, "
        f"mean of {s.get('repeats', 1)} tests on new subsamples [95% Wilson interval of one test]; 0.5 means "
        "indistinguishable, and 'real vs real' (two halves of the real instances) is the floor. 'Exemplars "
        "held out': the same test with all instances made from one "
        "exemplar in one fold, so the network judges composites of real objects it has never seen; the gap "
        "to the plain test is what repeating few exemplars gives away. 'Exemplars repeated': the same test "
        "of the real exemplars themselves, in their own scenes, as often as the run used them (crops jittered, "
        "mirrored as the composites): what the pool alone gives away; the plain test cannot be expected "
        "below it without more exemplars. Precision / recall: improved "
        f"precision and recall, k = {s['k']}, in features learned from the real training crops (real half "
        "against real half in brackets). Sharpness: median edge strength synthetic over real within "
        "box-height bands (1 = as crisp). Box fit: share of the box the silhouette fills and share outside "
        f"its bounds (n/a: no silhouette recorded). Near-copies: share closer to a training crop than "
        f"{s['near_copy_quantile']:.0%} of held-out real crops are. Boxes under {s['min_height_px']:g} px "
        "are skipped (counts in brackets)."
    )
