"""The report's HTML: style, script, the funnel table, gallery cards and pagers."""

from __future__ import annotations

import html
import json
import os
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any
from urllib.parse import quote

from ..dataset import Dataset, Scene
from ..provenance import KEY
from .run_record import Funnel, RunRecord, _is_synthetic
from .thumbnails import ASSETS, NEW_BOX_RGB, REAL_BOX_RGB, _image_size

# --------------------------------------------------------------------------------------------------
# HTML


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _url(relative: str) -> str:
    """A relative file path as an attribute-safe URL (a ``#`` or ``?`` in a file name stays part of it)."""
    return _esc(quote(relative, safe="/"))


def _number(value: Any, *, unlike: Any = None) -> str:
    """``value`` to 4 significant digits, or more when 4 would print it equal to a different ``unlike``."""
    if isinstance(value, bool) or value is None:
        return "n/a" if value is None else str(value)
    if not isinstance(value, (int, float)):
        return _esc(value)
    digits = 4
    # A rejected 0.10004 against a limit of 0.1 must not read "value 0.1, limit 0.1".
    while isinstance(unlike, (int, float)) and value != unlike and digits < 12:
        if f"{value:.{digits}g}" != f"{unlike:.{digits}g}":
            break
        digits += 1
    return f"{value:.{digits}g}"


def _pretty(obj: Any) -> str:
    return _esc(json.dumps(obj, indent=2, ensure_ascii=False, sort_keys=False))


_STYLE = """
:root { --bad: #b3261e; --ink: #1d232a; --muted: #5c6670; --line: #d9dee3; }
* { box-sizing: border-box; }
body { margin: 0; font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: var(--ink);
  background: #f4f6f8; }
header { background: #1d2a36; color: #fff; padding: 14px 28px; }
header h1 { margin: 0; font-size: 20px; font-weight: 600; }
header p { margin: 2px 0 0; color: #c5d0da; font-size: 13px; }
header a { color: #9fd0ff; }
main { max-width: 1320px; margin: 0 auto; padding: 8px 28px 40px; }
section { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: 14px 20px 18px;
  margin: 18px 0; }
h2 { font-size: 17px; margin: 0 0 10px; }
.note { color: var(--muted); font-size: 13px; margin: 4px 0 10px; }
table.funnel { border-collapse: collapse; min-width: 560px; }
table.funnel th { text-align: left; font-weight: 500; padding: 3px 14px 3px 0; white-space: nowrap; }
table.funnel td { padding: 3px 8px; }
table.funnel td.num { text-align: right; font-variant-numeric: tabular-nums; font-weight: 600; }
table.funnel td.share { color: var(--muted); text-align: right; font-variant-numeric: tabular-nums; }
table.funnel tr.filter th { padding-left: 22px; font-weight: 400; }
.bar { height: 12px; border-radius: 3px; background: #8da9c4; min-width: 1px; }
.bar.ok { background: #3f9b5a; } .bar.bad { background: #d9826b; }
td.barcell { width: 360px; }
.plots { display: grid; grid-template-columns: minmax(0, 3fr) minmax(0, 2fr); gap: 14px; align-items: start; }
.plots figure { margin: 0; }
.plots figure.wide { grid-column: 1 / -1; }
.plots img { width: 100%; height: auto; display: block; border: 1px solid var(--line); border-radius: 4px; }
.plots figure.wide img { width: auto; max-width: 100%; }
.legend span { display: inline-block; margin-right: 18px; }
.swatch { display: inline-block; width: 14px; height: 10px; border: 2px solid; margin-right: 5px;
  vertical-align: -1px; }
.swatch.real { border-color: var(--real); } .swatch.new { border-color: var(--new); }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(280px, 1fr)); gap: 14px; }
.card { margin: 0; background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 8px;
  display: flex; flex-direction: column; gap: 6px; min-width: 0; }
.card img { width: 100%; height: auto; display: block; border-radius: 3px; background: #e8ecef; }
.card .noimage { aspect-ratio: 16 / 9; display: flex; align-items: center; justify-content: center;
  background: #eef0f2; color: var(--muted); border-radius: 3px; font-size: 13px; }
.card figcaption { font-size: 12.5px; overflow-wrap: anywhere; }
.card .name { font-weight: 600; }
.card .meta { color: var(--muted); }
.fails { list-style: none; margin: 4px 0 0; padding: 0; }
.fails li { border-left: 3px solid var(--bad); padding: 1px 0 1px 7px; margin: 3px 0; }
.fails .filter { font-weight: 600; color: var(--bad); }
.fails .vl { font-variant-numeric: tabular-nums; }
.fails .why { color: var(--muted); display: block; }
details summary { cursor: pointer; color: #2a5d8f; font-size: 12.5px; }
details pre { max-height: 320px; overflow: auto; background: #f6f8fa; border: 1px solid var(--line);
  padding: 6px 8px; font-size: 11.5px; border-radius: 4px; margin: 6px 0 0; }
nav.pager { margin: 4px 0 12px; font-size: 13px; display: flex; flex-wrap: wrap; gap: 4px; align-items: center; }
nav.pager a, nav.pager span.current { padding: 1px 7px; border-radius: 4px; border: 1px solid var(--line);
  text-decoration: none; color: #2a5d8f; }
nav.pager span.current { background: #1d2a36; color: #fff; border-color: #1d2a36; }
table.audit { border-collapse: collapse; font-variant-numeric: tabular-nums; }
table.audit th, table.audit td { padding: 4px 10px; border-bottom: 1px solid var(--line); text-align: right; }
table.audit th:first-child, table.audit td:first-child { text-align: left; font-weight: 600; }
.pairs { display: flex; flex-wrap: wrap; gap: 10px; margin: 6px 0 12px; }
.pair { margin: 0; border: 1px solid var(--line); border-radius: 6px; padding: 6px; background: #fff; }
.pair img { width: 96px; height: 96px; image-rendering: auto; display: inline-block; border-radius: 3px; }
.pair figcaption { font-size: 11.5px; color: var(--muted); max-width: 200px; overflow-wrap: anywhere; }
"""
_COLOURS = f":root {{ --real: rgb{REAL_BOX_RGB}; --new: rgb{NEW_BOX_RGB}; }}"

_SCRIPT = """
(function () {
  var body = document.body;
  var images = Array.prototype.slice.call(document.images);
  if (/[?&]eager=1(&|$)/.test(location.search) || body.hasAttribute("data-eager")) {
    images.forEach(function (img) { img.loading = "eager"; });
  }
  body.dataset.imagesTotal = String(images.length);
  function check() {
    var done = images.filter(function (img) { return img.complete; });
    var broken = done.filter(function (img) { return img.naturalWidth === 0; }).length;
    body.dataset.imagesDone = String(done.length);
    if (broken) { body.dataset.imagesLoaded = "broken " + broken; }
    else if (done.length === images.length) { body.dataset.imagesLoaded = "ok"; }
  }
  images.forEach(function (img) {
    img.addEventListener("load", check);
    img.addEventListener("error", check);
  });
  check();
})();
"""


def _document(title: str, header: str, body: str) -> str:
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{_esc(title)}</title>\n<style>{_COLOURS}{_STYLE}</style>\n</head>\n"
        f'<body data-images-loaded="pending">\n<header>{header}</header>\n<main>\n{body}\n</main>\n'
        f"<script>{_SCRIPT}</script>\n</body>\n</html>\n"
    )


def _funnel_html(f: Funnel) -> str:
    def row(label: str, key: str, count: int, kind: str, css: str = "") -> str:
        share = count / f.attempted if f.attempted else 0.0
        return (
            f'<tr class="{css}"><th>{_esc(label)}</th><td class="num" data-count="{_esc(key)}">{count}</td>'
            f'<td class="share">{share:.1%}</td>'
            f'<td class="barcell"><div class="bar {kind}" style="width:{100 * share:.1f}%"></div></td></tr>'
        )

    rows = [
        row("candidates attempted", "attempted", f.attempted, ""),
        row("accepted", "accepted", f.accepted, "ok"),
        row("rejected", "rejected", f.rejected, "bad"),
    ]
    rows += [row(f"by {name}", f"filter:{name}", n, "bad", "filter") for name, n in f.rejected_by.items()]
    return (
        '<section id="funnel"><h2>Funnel</h2>\n'
        f'<p class="note">{f.filled} of {f.jobs} wanted images made. Shares are of all candidates; a candidate '
        "failing several filters counts under each.</p>\n"
        f'<table class="funnel">\n{"".join(rows)}\n</table></section>'
    )


def _stages_html(tallies: Sequence[Any]) -> str:
    """The funnel per stage (:class:`pipeline.tally.StageTally`): wanted, accepted, attempts, rejections, sizes."""
    rows = []
    for t in tallies:
        rejected = ", ".join(f"{_esc(name)} {n}" for name, n in t.rejected_by.items()) or "none"
        sizes = ", ".join(f"{_esc(band)} {a}/{n}" for band, (a, n) in t.bands.items()) or "none"
        css = "bad" if t.short else "ok"
        rows.append(
            f'<tr data-stage="{t.index}" data-short="{t.short}"><th>{t.index}: {_esc(t.kind)} {_esc(t.target_class)}'
            f'</th><td class="num">{t.wanted}</td><td class="num {css}">{t.accepted}</td>'
            f'<td class="num">{t.short}</td><td class="num">{t.attempted}</td><td>{rejected}</td><td>{sizes}</td></tr>'
        )
    head = (
        "<tr><th>stage</th><th>wanted</th><th>accepted</th><th>short</th><th>attempts</th>"
        "<th>rejected by</th><th>accepted / attempts by object height</th></tr>"
    )
    return (
        '<section id="stages"><h2>Per stage</h2>\n'
        '<p class="note">A stage is short when it accepted fewer outputs than wanted '
        "(then <code>rarefill run</code> exits 3).</p>\n"
        f'<table class="funnel stages">\n{head}{"".join(rows)}\n</table></section>'
    )


def _plots_html(note: str, prefix: str) -> str:
    figures = [
        ("scale.png", "", "Box height against bottom row, with the fitted ground lines; new instances as diamonds"),
        ("counts.png", "", "Instances per class before and after the run"),
        ("sizes.png", "wide", "Box height per class, real against new, with medians and Kolmogorov-Smirnov distance"),
    ]
    items = "".join(
        f'<figure class="{css}"><img src="{prefix}{ASSETS}/{name}" alt="{_esc(alt)}"></figure>'
        for name, css, alt in figures
    )
    return (
        f'<section id="plots"><h2>Plots</h2>\n<p class="note">{_esc(note)}.</p>\n'
        f'<div class="plots">{items}</div></section>'
    )


def _pager(kind: str, page: int, pages: int, prefix: str) -> str:
    if pages <= 1:
        return ""
    links = []
    for number in range(1, pages + 1):
        if number == page:
            links.append(f'<span class="current">{number}</span>')
        else:
            links.append(f'<a href="{_esc(_page_href(kind, number, prefix))}">{number}</a>')
    return f'<nav class="pager" aria-label="{kind} pages">Pages: {"".join(links)}</nav>'


def _page_href(kind: str, number: int, prefix: str) -> str:
    if number == 1:
        return f"{prefix}report.html#{kind}"
    return f"{prefix}{ASSETS}/{kind}-{number:04d}.html"


def _source_links(run: RunRecord, real: Dataset | None) -> dict[int, str]:
    """Per labels image id, the path (relative to the run folder) of its source image in ``real``.

    Only when the real data set has an image of the provenance's source id and file name, and the file
    exists: a report needs no real pixels, so a data set without its images still makes a report.
    """
    if real is None:
        return {}
    by_id = {scene.id: scene for scene in real.scenes}
    links = {}
    for scene in run.labels.scenes:
        source = scene.extra[KEY]["source"]
        match = by_id.get(source["image_id"])
        if match is not None and match.file_name == source.get("file_name") and match.path.is_file():
            links[scene.id] = Path(os.path.relpath(match.path, run.root)).as_posix()
    return links


def change_text(record: Mapping[str, Any], new: Counter, kept: int) -> str:
    """What a stage did to one accepted image, for its card (HTML-escaped).

    New objects by class when it added some, else what it changed (a restyle's condition and its
    strength, a re-background's regenerated share); then the real labels kept and dropped.

    Parameters
    ----------
    record : mapping
        The image's provenance record (``stage`` and ``details`` are read).
    new : Counter
        New objects per class name.
    kept : int
        Real annotations carried over (crowd regions included).
    """
    stage = record.get("stage") if isinstance(record.get("stage"), Mapping) else {}
    details = record.get("details") if isinstance(record.get("details"), Mapping) else {}
    labels = f"{kept} label{'s' if kept != 1 else ''} kept"
    dropped = len(details.get("dropped", ()))
    if stage.get("kind") == "restyle" and details.get("invisible_action") == "crowd":
        invisible = sum(1 for v in details.get("visibility", ()) if isinstance(v, Mapping) and v.get("invisible"))
        labels += f" ({invisible} invisible, as crowd regions)"
    elif dropped:
        labels += f", {dropped} dropped" + (" (invisible)" if stage.get("kind") == "restyle" else "")
    if new:
        names = ", ".join(_esc(name) if n == 1 else f"{_esc(name)} &times;{n}" for name, n in new.items())
        return f"{new.total()} new ({names}), {_esc(labels)}"
    if stage.get("kind") == "restyle":
        change = _condition_text(details)
    elif stage.get("kind") == "rebackground":
        share = details.get("regenerated_share")
        change = "background regenerated" + (f" ({share:.0%} of the image)" if isinstance(share, float) else "")
    else:
        change = "no new object"
    return _esc(f"{change}, {labels}")


def _condition_text(details: Mapping[str, Any]) -> str:
    """A restyle's condition and the knob that set it: ``fog, visibility 120 m``, ``rain 8 mm/h``, ``night``."""
    condition = str(details.get("condition", "restyled"))

    def number(key: str) -> str | None:
        value = details.get(key)
        return f"{value:g}" if isinstance(value, (int, float)) and not isinstance(value, bool) else None

    if condition == "fog" and number("visibility_m"):
        return f"fog, visibility {number('visibility_m')} m"
    if condition == "rain" and number("rain_mm_per_h"):
        return f"rain {number('rain_mm_per_h')} mm/h"
    if condition == "snow" and number("snow_intensity"):
        seen = f", visibility {number('visibility_m')} m" if number("visibility_m") else ""
        return f"snow, intensity {number('snow_intensity')}{seen}"
    return condition


def _accepted_card(
    scene: Scene,
    *,
    thumbs: Mapping[int, tuple[str, int, int]],
    sources: Mapping[int, str],
    names: Mapping[int, str],
    prefix: str,
    labels: Dataset,
) -> str:
    relative, width, height = thumbs[scene.id]
    record = scene.extra[KEY]
    stage = record.get("stage", {})
    source = record["source"]
    link = sources.get(scene.id)
    source_text = f"source image {_esc(source['image_id'])}"
    if link is not None:
        source_text = f'<a href="{prefix}{_url(link)}">{source_text}</a>'
    new = Counter(names[a.category_id] for a in scene.annotations if _is_synthetic(a, labels))
    kept = len(scene.annotations) - new.total()
    provenance = {
        KEY: record,
        "annotations": [
            {"category": names[a.category_id], "bbox": list(a.bbox), KEY: a.extra.get(KEY)} for a in scene.annotations
        ],
    }
    what = " ".join(str(v) for v in (stage.get("kind"), stage.get("class")) if v)
    return (
        '<figure class="card accepted">'
        f'<a href="{prefix}{_url("images/" + scene.file_name)}"><img src="{prefix}{_url(relative)}" width="{width}" '
        f'height="{height}" loading="lazy" decoding="async" alt="{_esc(scene.file_name)}"></a>'
        f'<figcaption><span class="name">{_esc(scene.file_name)}</span><br>'
        f'<span class="meta">{_esc(what)} &middot; {change_text(record, new, kept)} &middot; '
        f"{source_text}</span></figcaption>"
        f"<details><summary>provenance</summary><pre>{_pretty(provenance)}</pre></details></figure>"
    )


def _rejected_card(line: Mapping[str, Any], root: Path, prefix: str, index: int) -> str:
    failing = {v.get("name"): v for v in line["verdicts"] if not v.get("passed", True)}
    items = []
    for name in line["rejected_by"]:
        verdict = failing.get(name)
        if verdict is not None:
            value, limit = verdict.get("value"), verdict.get("limit")
            value_limit = f"value {_number(value, unlike=limit)}, limit {_number(limit)}"
            why = verdict.get("reason", "")
        else:
            value_limit, why = "no value", line.get("reason", "")
        items.append(
            f'<li data-filter="{_esc(name)}"><span class="filter">{_esc(name)}</span> '
            f'<span class="vl">{value_limit}</span><span class="why">{_esc(why)}</span></li>'
        )
    if "reject" in line:
        path = root / line["reject"]
        width, height = _image_size(path, f"{root / 'manifest.jsonl'}: rejected candidate {index + 1}")
        picture = (
            f'<a href="{prefix}{_url(line["reject"])}"><img src="{prefix}{_url(line["reject"])}" width="{width}" '
            f'height="{height}" loading="lazy" decoding="async" alt="{_esc(line["reject"])}"></a>'
        )
    else:
        picture = '<div class="noimage">no image (failed before generation)</div>'
    attempt = line.get("attempt", "?")
    return (
        f'<figure class="card rejected">{picture}'
        f'<figcaption><span class="name">{_esc(line["job"])}</span> '
        f'<span class="meta">attempt {_esc(attempt)} &middot; source image {_esc(line.get("source_image_id", "?"))}'
        f'</span><ul class="fails">{"".join(items)}</ul></figcaption>'
        f"<details><summary>manifest entry</summary><pre>{_pretty(dict(line))}</pre></details></figure>"
    )


def _gallery(kind: str, title: str, cards: Sequence[str], page: int, pages: int, total: int, prefix: str) -> str:
    legend = ""
    if kind == "accepted":
        legend = (
            '<p class="legend note"><span><i class="swatch real"></i>real boxes</span>'
            '<span><i class="swatch new"></i>new boxes</span>Click a thumbnail for the full image.</p>'
        )
    shown = f'<p class="note">Page {page} of {pages}, {len(cards)} shown here.</p>' if pages > 1 else ""
    return (
        f'<section id="{kind}"><h2>{_esc(title)} ({total})</h2>\n'
        f"{shown}{legend}\n{_pager(kind, page, pages, prefix)}\n"
        f'<div class="grid">\n{chr(10).join(cards)}\n</div>\n{_pager(kind, page, pages, prefix)}</section>'
    )
