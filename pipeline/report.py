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

import html
import json
import os
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

import cv2
import numpy as np
from PIL import Image, UnidentifiedImageError

from .dataset import Annotation, Category, Dataset, Scene, load_dataset, read_rgb
from .errors import DatasetError, RunError
from .files import write_bytes_atomic
from .geometry import GroundModel, fit_ground, is_usable
from .provenance import KEY
from .report_plots import save_class_counts, save_scale_plot, save_size_histograms

REAL_BOX_RGB = (40, 170, 255)
"""Colour of real (kept) boxes in thumbnails: a light blue."""
NEW_BOX_RGB = (255, 120, 0)
"""Colour of new (synthetic) boxes in thumbnails: orange, apart from the blue for colour-blind readers."""
THUMB_WIDTH = 320
"""Width of accepted-image thumbnails in pixels (shown at up to 300 px)."""
ASSETS = "report"
"""Folder below the run folder that holds the report's plots, thumbnails and further pages."""


@dataclass(frozen=True)
class RunRecord:
    """A finished run folder as the report reads it.

    Attributes
    ----------
    root : Path
    identity : mapping
        ``run.json`` (recipe name, hash, shard); empty when the folder has none.
    labels : Dataset
        ``labels.json`` with image paths below ``root / "images"``.
    manifest : tuple of mapping
        ``manifest.jsonl``, one entry per candidate in plan order.
    """

    root: Path
    identity: Mapping[str, Any]
    labels: Dataset
    manifest: tuple[Mapping[str, Any], ...]


@dataclass(frozen=True)
class Funnel:
    """How many candidates were tried, accepted and rejected by each filter.

    Attributes
    ----------
    jobs : int
        Images wanted (one job each).
    filled : int
        Jobs that ended with an accepted image.
    attempted, accepted : int
        Candidates tried and accepted (a job tries again after a rejection).
    rejected_by : dict of str to int
        Candidates each filter rejected, most first. A candidate failing two filters counts for both,
        so these may add up to more than ``attempted - accepted``.
    """

    jobs: int
    filled: int
    attempted: int
    accepted: int
    rejected_by: dict[str, int]

    @property
    def rejected(self) -> int:
        return self.attempted - self.accepted


@dataclass(frozen=True)
class ReportResult:
    """What :func:`write_report` wrote."""

    path: Path
    funnel: Funnel
    pages: int
    thumbnails_made: int
    ground_note: str


# --------------------------------------------------------------------------------------------------
# reading a run


def read_run(run_dir: str | os.PathLike[str]) -> RunRecord:
    """Read ``labels.json``, ``manifest.jsonl`` and (if present) ``run.json`` of a finished run folder.

    Raises
    ------
    RunError
        The folder is not a finished run (no labels or manifest), a manifest line is malformed, or the
        accepted lines of the manifest and the images of the labels disagree.
    DatasetError
        ``labels.json`` is not valid COCO or an image it names is missing.
    """
    root = Path(run_dir)
    labels_path, manifest_path = root / "labels.json", root / "manifest.jsonl"
    for path in (labels_path, manifest_path):
        if not path.is_file():
            raise RunError(
                f"{path}: not found; {root} is not a finished rarefill run folder",
                hint="give the folder `rarefill run` wrote to (its labels.json appears when the run ends)",
            )
    identity: dict[str, Any] = {}
    if (root / "run.json").is_file():
        identity = _read_json_object(root / "run.json")
    labels = load_dataset(labels_path, root / "images")
    manifest = tuple(_read_manifest(manifest_path))
    accepted = {line["file_name"] for line in manifest if line["accepted"]}
    listed = {f"images/{scene.file_name}" for scene in labels.scenes}
    if accepted != listed:
        odd = sorted(accepted ^ listed)[:3]
        raise RunError(
            f"{manifest_path}: accepted candidates and {labels_path.name} images disagree (e.g. {', '.join(odd)})",
            hint="the run was changed after it finished; run the recipe again to rebuild labels and manifest",
        )
    return RunRecord(root=root, identity=identity, labels=labels, manifest=manifest)


def _read_json_object(path: Path) -> dict[str, Any]:
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise RunError(f"{path}: unreadable ({exc})") from None
    if not isinstance(value, dict):
        raise RunError(f"{path}: must hold a JSON object")
    return value


def _read_manifest(path: Path) -> Iterable[dict[str, Any]]:
    with open(path, encoding="utf-8") as handle:
        for number, text in enumerate(handle, start=1):
            if not text.strip():
                continue
            where = f"{path}: line {number}"
            try:
                line = json.loads(text)
            except json.JSONDecodeError as exc:
                raise RunError(f"{where}: malformed JSON ({exc.msg})") from None
            if not isinstance(line, dict):
                raise RunError(f"{where}: must be a JSON object")
            _check_manifest_line(line, where)
            yield line


def _check_manifest_line(line: Mapping[str, Any], where: str) -> None:
    if not isinstance(line.get("accepted"), bool):
        raise RunError(f"{where}: 'accepted' must be true or false, got {line.get('accepted')!r}")
    if not isinstance(line.get("job"), str):
        raise RunError(f"{where}: 'job' must be the job's key (a string)")
    if not isinstance(line.get("verdicts"), list) or not all(isinstance(v, dict) for v in line["verdicts"]):
        raise RunError(f"{where}: 'verdicts' must be a list of objects")
    if line["accepted"]:
        if not isinstance(line.get("file_name"), str):
            raise RunError(f"{where}: an accepted candidate needs 'file_name' (images/...)")
        return
    if not isinstance(line.get("rejected_by"), list) or not line["rejected_by"]:
        raise RunError(f"{where}: a rejected candidate needs 'rejected_by' (the filters that failed)")
    if "reject" in line and not isinstance(line["reject"], str):
        raise RunError(f"{where}: 'reject' must be a path (rejects/...)")


def funnel(manifest: Sequence[Mapping[str, Any]]) -> Funnel:
    """Count jobs, candidates, acceptances and rejections per filter in manifest entries."""
    jobs = {line["job"] for line in manifest}
    filled = {line["job"] for line in manifest if line["accepted"]}
    rejected_by = Counter(name for line in manifest if not line["accepted"] for name in set(line["rejected_by"]))
    return Funnel(
        jobs=len(jobs),
        filled=len(filled),
        attempted=len(manifest),
        accepted=sum(1 for line in manifest if line["accepted"]),
        rejected_by=dict(sorted(rejected_by.items(), key=lambda kv: (-kv[1], kv[0]))),
    )


# --------------------------------------------------------------------------------------------------
# which boxes are real and which are new


def _is_synthetic(ann: Annotation, labels: Dataset) -> bool:
    record = ann.extra.get(KEY)
    if not isinstance(record, Mapping) or not isinstance(record.get("synthetic"), bool):
        raise RunError(
            f"{labels.source}: annotation {ann.id}: needs the provenance key {KEY!r} with 'synthetic' true or false"
        )
    return record["synthetic"]


def real_from_labels(labels: Dataset) -> Dataset:
    """The real annotations a run carried along (``synthetic: false``), once per source image.

    Several outputs may come from one source image: its annotations are kept once, by their source
    annotation id, so that the ground model is not fitted on copies. Scenes take the id and file name of
    the source image from the image provenance; their ``path`` is the run's output image (no pixels
    are read).

    Raises
    ------
    RunError
        An image or annotation lacks its provenance.
    """
    scenes: dict[int, tuple[Scene, dict[int, Annotation]]] = {}
    for scene in labels.scenes:
        source = scene.extra.get(KEY, {}).get("source") if isinstance(scene.extra.get(KEY), Mapping) else None
        if not isinstance(source, Mapping) or not isinstance(source.get("image_id"), int):
            raise RunError(f"{labels.source}: image {scene.file_name}: provenance lacks {KEY}.source.image_id")
        sid = source["image_id"]
        if sid not in scenes:
            real_scene = Scene(
                sid, str(source.get("file_name", scene.file_name)), scene.width, scene.height, scene.path
            )
            scenes[sid] = (real_scene, {})
        kept = scenes[sid][1]
        for ann in scene.annotations:
            if not _is_synthetic(ann, labels):
                aid = ann.extra[KEY].get("source_annotation_id", ann.id)
                kept.setdefault(aid, Annotation(aid, sid, ann.category_id, ann.bbox, ann.area, ann.iscrowd))
    built = tuple(Scene(s.id, s.file_name, s.width, s.height, s.path, tuple(a.values())) for s, a in scenes.values())
    return Dataset(scenes=built, categories=labels.categories, images_dir=labels.images_dir, source=labels.source)


def _boxes_by_class(
    items: Iterable[tuple[Annotation, Scene]], categories: Sequence[Category], *, usable_only: bool = False
) -> dict[str, np.ndarray]:
    names = {c.id: c.name for c in categories}
    rows: dict[str, list] = {}
    for ann, scene in items:
        if ann.iscrowd or (usable_only and not is_usable(ann, scene)):
            continue
        rows.setdefault(names[ann.category_id], []).append(ann.bbox)
    return {name: np.asarray(boxes, dtype=np.float64).reshape(-1, 4) for name, boxes in rows.items()}


def _pairs(dataset: Dataset) -> list[tuple[Annotation, Scene]]:
    return [(a, s) for s in dataset.scenes for a in s.annotations]


# --------------------------------------------------------------------------------------------------
# thumbnails


def annotated_thumbnail(
    image: np.ndarray,
    real_boxes: Sequence[Sequence[float]],
    new_boxes: Sequence[tuple[Sequence[float], str]],
    *,
    width: int = THUMB_WIDTH,
) -> np.ndarray:
    """A small copy of ``image`` with real boxes in :data:`REAL_BOX_RGB` and new ones in :data:`NEW_BOX_RGB`.

    Parameters
    ----------
    image : (H, W, 3) uint8 ndarray
        RGB.
    real_boxes : sequence of (x, y, w, h)
        COCO boxes in the image's pixels.
    new_boxes : sequence of ((x, y, w, h), label)
        New boxes with the class name written above each.
    width : int
        Thumbnail width; the height keeps the aspect ratio. Images narrower than this are not enlarged.

    Returns
    -------
    (h, w, 3) uint8 ndarray
        RGB.
    """
    if image.ndim != 3 or image.shape[2] != 3 or image.dtype != np.uint8:
        raise ValueError(f"image must be (H, W, 3) uint8, got {image.shape} {image.dtype}")
    if width < 1:
        raise ValueError(f"width must be >= 1, got {width}")
    scale = min(1.0, width / image.shape[1])
    size = (max(1, round(image.shape[1] * scale)), max(1, round(image.shape[0] * scale)))
    thumb = np.ascontiguousarray(cv2.resize(image, size, interpolation=cv2.INTER_AREA))

    def corners(box: Sequence[float]) -> tuple[tuple[int, int], tuple[int, int]]:
        x, y, w, h = (float(v) * scale for v in box)
        return (round(x), round(y)), (round(x + w) - 1, round(y + h) - 1)

    for box in real_boxes:
        cv2.rectangle(thumb, *corners(box), REAL_BOX_RGB, 1, cv2.LINE_8)
    for box, label in new_boxes:
        top_left, bottom_right = corners(box)
        cv2.rectangle(thumb, top_left, bottom_right, NEW_BOX_RGB, 2, cv2.LINE_8)
        (tw, th), base = cv2.getTextSize(label, cv2.FONT_HERSHEY_SIMPLEX, 0.35, 1)
        # The label sits above the box, or inside it when the box touches the top edge.
        y_text = top_left[1] - 3 if top_left[1] - th - base - 3 >= 0 else top_left[1] + th + 3
        cv2.rectangle(thumb, (top_left[0], y_text - th - 2), (top_left[0] + tw + 2, y_text + base), NEW_BOX_RGB, -1)
        cv2.putText(thumb, label, (top_left[0] + 1, y_text), cv2.FONT_HERSHEY_SIMPLEX, 0.35, (0, 0, 0), 1, cv2.LINE_AA)
    return thumb


def _thumbnail_name(scene: Scene) -> str:
    return f"{ASSETS}/thumbs/{Path(scene.file_name).with_suffix('.jpg').as_posix()}"


def _make_thumbnails(run: RunRecord) -> tuple[dict[int, tuple[str, int, int]], int]:
    """Thumbnail path (relative to the run folder) and size per labels image id; and how many were made.

    A thumbnail newer than both its image and labels.json is reused, so a second report of a large run
    is quick.
    """
    names = run.labels.category_names()
    labels_time = (run.root / "labels.json").stat().st_mtime
    out: dict[int, tuple[str, int, int]] = {}
    made = 0
    for scene in run.labels.scenes:
        relative = _thumbnail_name(scene)
        target = run.root / relative
        if target.is_file() and target.stat().st_mtime >= max(labels_time, scene.path.stat().st_mtime):
            with Image.open(target) as img:
                out[scene.id] = (relative, *img.size)
            continue
        real = [a.bbox for a in scene.annotations if not _is_synthetic(a, run.labels)]
        new = [(a.bbox, names[a.category_id]) for a in scene.annotations if _is_synthetic(a, run.labels)]
        thumb = annotated_thumbnail(read_rgb(scene.path), real, new)
        ok, data = cv2.imencode(".jpg", np.ascontiguousarray(thumb[:, :, ::-1]), [cv2.IMWRITE_JPEG_QUALITY, 88])
        if not ok:
            raise RunError(f"could not encode the thumbnail of {scene.path}")
        write_bytes_atomic(target, data.tobytes())
        out[scene.id] = (relative, thumb.shape[1], thumb.shape[0])
        made += 1
    return out, made


def _image_size(path: Path, where: str) -> tuple[int, int]:
    try:
        with Image.open(path) as img:
            return img.size
    except FileNotFoundError:
        raise RunError(f"{where}: image {path} not found") from None
    except (UnidentifiedImageError, OSError) as exc:
        raise RunError(f"{where}: image {path} cannot be read ({exc})") from None


# --------------------------------------------------------------------------------------------------
# plots


def _plots(run: RunRecord, real: Dataset | None) -> str:
    """Fit the ground model, draw the three plots; return the note saying what "real" is."""
    labels = run.labels
    reference = real if real is not None else real_from_labels(labels)
    if real is not None:
        what = f"the real data set {real.source.name if real.source else ''} ({len(real.scenes)} images)"
    else:
        what = f"the kept (real) annotations of the run's {len(reference.scenes)} source images"
    try:
        ground: GroundModel | None = fit_ground(reference)
        note = f"ground model fitted on {what}"
    except DatasetError as exc:
        ground = None
        note = f"no ground model: {exc.reason} (tried on {what})"

    new_pairs = [(a, s) for a, s in _pairs(labels) if _is_synthetic(a, labels)]
    kept_pairs = [(a, s) for a, s in _pairs(labels) if not _is_synthetic(a, labels)]
    new = _boxes_by_class(new_pairs, labels.categories)
    assets = run.root / ASSETS
    height = max([s.height for s in labels.scenes] + [s.height for s in reference.scenes] + [1])
    save_scale_plot(
        _boxes_by_class(_pairs(reference), reference.categories, usable_only=True),
        new,
        assets / "scale.png",
        ground=ground,
        image_height=height,
        note=note,
    )
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


def _plots_html(note: str, prefix: str) -> str:
    figures = [
        ("scale.png", "", "Box height against bottom row, with the fitted ground lines; new instances as diamonds"),
        ("counts.png", "", "Instances per class before and after the run"),
        ("sizes.png", "wide", "Box size per class, real against new"),
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
    new_text = ", ".join(_esc(name) if n == 1 else f"{_esc(name)} &times;{n}" for name, n in new.items())
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
        f'<span class="meta">{_esc(what)} &middot; {new.total()} new ({new_text}) &middot; '
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
        [_funnel_html(counts), _plots_html(note, ""), gallery("accepted", 1, ""), gallery("rejected", 1, "")]
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
