"""The report's realism-audit section: the per-class table of ``RUN_DIR/audit.json`` (written by
``rarefill audit``) and, per class, the synthetic instances the classifier found most and least real,
each beside its nearest real training crop."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from .markup import _esc, _url


def _pair_card(item: Mapping[str, Any], prefix: str) -> str:
    synthetic = f'<img src="{prefix}{_url(item["crop"])}" alt="synthetic instance" width="96" height="96">'
    if item.get("neighbour"):
        near = f'<img src="{prefix}{_url(item["neighbour"])}" alt="nearest real training crop" width="96" height="96">'
        distance = "" if item.get("distance") is None else f", distance {item['distance']:.2f}"
        near_note = f"right: nearest training crop ({_esc(item['neighbour_file'])}{distance})"
    else:
        near, near_note = "", "no training crop of this class"
    caption = (
        f"P(synthetic) {item['score']:.2f} &middot; {_esc(item['file_name'])} annotation "
        f"{_esc(item['annotation_id'])}<br>{near_note}"
    )
    return f'<figure class="pair">{synthetic} {near}<figcaption>{caption}</figcaption></figure>'


def _examples_html(name: str, examples: Mapping[str, Sequence[Mapping[str, Any]]] | None, prefix: str) -> str:
    if not examples:
        return f'<h3>{_esc(name)}</h3><p class="note">No examples (the two-sample test did not run).</p>'
    parts = [f"<h3>{_esc(name)}</h3>"]
    for key, title in (("most_real", "found most real"), ("least_real", "found least real")):
        cards = "".join(_pair_card(item, prefix) for item in examples.get(key, ()))
        parts.append(
            f'<p class="note">Synthetic instances the classifier {title} (left), each beside its nearest real '
            f'training crop (right):</p><div class="pairs" data-end="{key}">{cards}</div>'
        )
    return "\n".join(parts)


def audit_html(run_root: Path, prefix: str = "") -> str:
    """The section's HTML, or ``""`` when the run folder holds no ``audit.json``."""
    from ..audit import read_audit  # here, not at import: the audit reads runs through this package
    from ..audit.table import COLUMNS, legend, rows

    result = read_audit(run_root)
    if result is None:
        return ""
    head = "".join(f"<th>{_esc(c)}</th>" for c in COLUMNS)
    body = "".join(
        f'<tr data-class="{_esc(row[0])}">' + "".join(f"<td>{_esc(cell)}</td>" for cell in row) + "</tr>"
        for row in rows(result)
    )
    model = result.get("model") or {}
    digest = str(model.get("folder_sha256", ""))[:12]
    model_note = f" Model: {_esc(model.get('folder', '?'))} (folder sha256 {_esc(digest)}...)." if model else ""
    notes = "".join(
        f"<li>{_esc(name)}: {_esc(note)}</li>" for name, c in result["classes"].items() for note in c["notes"]
    )
    examples = "\n".join(_examples_html(n, c.get("examples"), prefix) for n, c in result["classes"].items())
    return (
        '<section id="audit"><h2>Realism audit</h2>\n'
        f'<p class="note">Synthetic instances of this run against real held-out instances of '
        f"{_esc(Path(result['heldout']).name)}; features and near-copies from {_esc(Path(result['train']).name)}; "
        f"seed {_esc(result['seed'])}.{model_note}</p>\n"
        f'<table class="audit"><tr>{head}</tr>{body}</table>\n'
        f'<p class="note">{_esc(legend(result))}</p>\n'
        + (f'<ul class="note">{notes}</ul>\n' if notes else "")
        + f"{examples}</section>"
    )
