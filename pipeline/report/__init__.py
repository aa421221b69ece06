"""The HTML report of a run folder: funnel, plots, thumbnails of accepted and rejected candidates, provenance.

``write_report`` writes ``RUN_DIR/report.html`` and its assets below ``RUN_DIR/report/``:

* ``scale.png``, ``sizes.png``, ``counts.png``: plots (see :mod:`pipeline.report_plots`);
* ``thumbs/``: small JPEG thumbnails of the accepted images with real boxes and new boxes drawn in two
  colours (JPEG rather than PNG: a 10,000-image run would otherwise carry a gigabyte of thumbnails);
* ``accepted-NNNN.html``, ``rejected-NNNN.html``: gallery pages 2, 3, ... (page 1 of each gallery is in
  report.html itself).

The pages load nothing from the network: images are relative links into the run folder, the style and
the one small script are inline. Every gallery image is ``loading="lazy"`` with its size given, and a
gallery page holds at most ``page_size`` items, so a run of 10,000 candidates opens quickly.

The inline script sets ``document.body.dataset.imagesLoaded`` to ``"ok"`` once every image on the page has
decoded (``"broken N"`` if any failed); opening a page with ``?eager=1`` turns lazy loading off, so a
headless browser can check a whole page.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from ..dataset import Annotation, Dataset, Scene
from ..errors import DatasetError
from ..files import write_bytes_atomic
from ..geometry import CameraGroups, fit_cameras
from ..provenance import KEY
from ..report_plots import ScalePanel, save_class_counts, save_scale_plot, save_size_histograms
from ..tally import tally_stages
from .audit_section import audit_html
from .markup import (
    _accepted_card,
    _document,
    _esc,
    _funnel_html,
    _gallery,
    _plots_html,
    _rejected_card,
    _source_links,
    _stages_html,
)
from .run_record import Funnel, RunRecord, _boxes_by_class, _is_synthetic, _pairs, funnel, read_run, real_from_labels
from .thumbnails import ASSETS, NEW_BOX_RGB, REAL_BOX_RGB, _make_thumbnails, annotated_thumbnail

__all__ = [
    "NEW_BOX_RGB",
    "REAL_BOX_RGB",
    "Funnel",
    "ReportResult",
    "RunRecord",
    "annotated_thumbnail",
    "funnel",
    "read_run",
    "real_from_labels",
    "write_report",
]


@dataclass(frozen=True)
class ReportResult:
    """What :func:`write_report` wrote."""

    path: Path
    funnel: Funnel
    pages: int
    thumbnails_made: int
    ground_note: str


# --------------------------------------------------------------------------------------------------
# plots


def _scale_panels(
    fitted: CameraGroups, reference: Dataset, labels: Dataset, new_pairs: list[tuple[Annotation, Scene]]
) -> list[ScalePanel]:
    """One scale panel per camera group: the group's real boxes, and the new ones made from its images."""
    panels = []
    for name, model in fitted.groups.items():
        own = [(a, s) for a, s in _pairs(reference) if fitted.image_groups.get(s.id) == name]
        made = [(a, s) for a, s in new_pairs if fitted.image_groups.get(_source_image_id(s)) == name]
        panels.append(
            ScalePanel(
                name,
                _boxes_by_class(own, reference.categories, usable_only=True),
                _boxes_by_class(made, labels.categories),
                model,
                model.image_height,
            )
        )
    return panels


def _source_image_id(scene: Scene) -> int | None:
    record = scene.extra.get(KEY)
    source = record.get("source") if isinstance(record, Mapping) else None
    return source.get("image_id") if isinstance(source, Mapping) else None


def _plots(run: RunRecord, real: Dataset | None) -> str:
    """Fit the ground model, draw the three plots; return the note saying what "real" is."""
    labels = run.labels
    reference = real if real is not None else real_from_labels(labels)
    if real is not None:
        what = f"the real data set {real.source.name if real.source else ''} ({len(real.scenes)} images)"
    else:
        what = f"the kept (real) annotations of the run's {len(reference.scenes)} source images"
    try:
        fitted: CameraGroups | None = fit_cameras(reference)
        note = f"ground model fitted on {what}"
    except DatasetError as exc:
        fitted = None
        note = f"no ground model: {exc.reason} (tried on {what})"

    new_pairs = [(a, s) for a, s in _pairs(labels) if _is_synthetic(a, labels)]
    kept_pairs = [(a, s) for a, s in _pairs(labels) if not _is_synthetic(a, labels)]
    new = _boxes_by_class(new_pairs, labels.categories)
    assets = run.root / ASSETS
    height = max([s.height for s in labels.scenes] + [s.height for s in reference.scenes] + [1])
    real_boxes = _boxes_by_class(_pairs(reference), reference.categories, usable_only=True)
    if fitted is None or len(fitted.groups) == 1:
        ground = None if fitted is None else next(iter(fitted.groups.values()))
        save_scale_plot(real_boxes, new, assets / "scale.png", ground=ground, image_height=height, note=note)
    else:
        save_scale_plot({}, {}, assets / "scale.png", ground=None, image_height=height, note=note,
                        groups=_scale_panels(fitted, reference, labels, new_pairs))  # fmt: skip
    order = [c.name for c in labels.categories]
    before = _boxes_by_class(_pairs(reference), reference.categories)
    save_size_histograms(before, new, assets / "sizes.png")
    kept = _boxes_by_class(kept_pairs, labels.categories)
    save_class_counts(
        {n: len(before.get(n, ())) for n in order},
        {n: len(kept.get(n, ())) for n in order},
        {n: len(new.get(n, ())) for n in order},
        assets / "counts.png",
        before_label="before: real data set" if real is not None else "before: real (source images only)",
    )
    return note


def write_report(
    run_dir: str | os.PathLike[str],
    *,
    real: Dataset | None = None,
    page_size: int = 200,
) -> ReportResult:
    """Write ``RUN_DIR/report.html`` with the funnel, plots and paged galleries of a finished run.

    Parameters
    ----------
    run_dir : path
        A folder written by ``rarefill run`` (or ``rarefill collect``).
    real : Dataset, optional
        The real data set the run drew from: the ground model is fitted on it and it is the "before" of
        the class counts. Default: the run's kept (``synthetic: false``) annotations, once per source image.
    page_size : int
        Gallery items per page.

    Returns
    -------
    ReportResult

    Raises
    ------
    RunError, DatasetError
        See :func:`read_run`; also a rejected candidate's thumbnail that is missing.
    ValueError
        ``page_size < 1``.
    """
    # 1. check inputs and read the run
    if page_size < 1:
        raise ValueError(f"page_size must be >= 1, got {page_size}")
    run = read_run(run_dir)
    counts = funnel(run.manifest)

    # 2. thumbnails and plots
    thumbs, made = _make_thumbnails(run)
    note = _plots(run, real)

    # 3. gallery cards; page 1 of each gallery is in report.html, the others one folder down
    names = run.labels.category_names()
    sources = _source_links(run, real)
    rejected_lines = [line for line in run.manifest if not line["accepted"]]
    render = {
        "accepted": lambda i, prefix: _accepted_card(
            run.labels.scenes[i], thumbs=thumbs, sources=sources, names=names, prefix=prefix, labels=run.labels
        ),
        "rejected": lambda i, prefix: _rejected_card(rejected_lines[i], run.root, prefix, i),
    }
    totals = {"accepted": len(run.labels.scenes), "rejected": len(rejected_lines)}
    pages_of = {kind: max(1, -(-total // page_size)) for kind, total in totals.items()}
    titles = {"accepted": "Accepted outputs", "rejected": "Rejected candidates"}
    recipe = run.identity.get("recipe") if isinstance(run.identity.get("recipe"), Mapping) else {}
    run_name = str(recipe.get("name") or run.root.resolve().name)
    shard = run.identity.get("shard")
    subtitle = _esc(run.root.resolve()) + (f" &middot; shard {_esc(shard)}" if shard else "")

    def gallery(kind: str, page: int, prefix: str) -> str:
        indices = range((page - 1) * page_size, min(page * page_size, totals[kind]))
        cards = [render[kind](i, prefix) for i in indices]
        return _gallery(kind, titles[kind], cards, page, pages_of[kind], totals[kind], prefix)

    # 4. the overview page
    header = f"<h1>rarefill report: {_esc(run_name)}</h1><p>{subtitle}</p>"
    body = "\n".join(
        [
            _funnel_html(counts),
            _stages_html(tally_stages(run.manifest, run.identity.get("stages") or ())),
            audit_html(run.root),
            _plots_html(note, ""),
            gallery("accepted", 1, ""),
            gallery("rejected", 1, ""),
        ]
    )
    path = run.root / "report.html"
    write_bytes_atomic(path, _document(f"rarefill report: {run_name}", header, body).encode("utf-8"))

    # 5. further gallery pages, and none left over from an earlier, longer report
    written = set()
    for kind, pages in pages_of.items():
        for page in range(2, pages + 1):
            page_header = (
                f"<h1>rarefill report: {_esc(run_name)}</h1>"
                f"<p>{_esc(titles[kind])}, page {page} of {pages} &middot; "
                '<a href="../report.html">back to the overview</a></p>'
            )
            target = run.root / ASSETS / f"{kind}-{page:04d}.html"
            document = _document(f"{run_name}: {kind}, page {page}", page_header, gallery(kind, page, "../"))
            write_bytes_atomic(target, document.encode("utf-8"))
            written.add(target)
    for stale in (run.root / ASSETS).glob("*-[0-9][0-9][0-9][0-9].html"):
        if stale not in written:
            stale.unlink()
    pages = 1 + sum(n - 1 for n in pages_of.values())
    return ReportResult(path=path, funnel=counts, pages=pages, thumbnails_made=made, ground_note=note)
