"""The run report: funnel, thumbnails, rejections with value and limit, provenance, paging, a real browser.

A small run folder is built here in the documented format (notes/INTERFACES.md, "Run folder"): accepted
PNGs with labels.json, manifest.jsonl with accepted and rejected lines, rejects/*.jpg. The page is read
back with the standard library's html.parser and rendered by headless Chromium.
"""

from __future__ import annotations

import html
import json
import subprocess
from collections import Counter
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlsplit

import cv2
import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import RunError
from pipeline.report import NEW_BOX_RGB, REAL_BOX_RGB, annotated_thumbnail, funnel, read_run, write_report
from pipeline.report.markup import change_text

WIDTH, HEIGHT = 640, 360
HORIZON = 150.0
CAR_RATIO = 0.5  # box height = ratio * (bottom row - horizon): the level-camera relation (Hoiem et al., 2006)
TRACTOR_RATIO = 0.8
CATEGORIES = [{"id": 1, "name": "car"}, {"id": 2, "name": "tractor"}]
CHROMIUM = Path("/usr/bin/chromium")


# --------------------------------------------------------------------------------------------------
# a fake run folder


def _road_frame(seed: int) -> np.ndarray:
    """A 640x360 RGB frame: sky, fields, a grey road narrowing to the horizon, some noise."""
    rng = np.random.default_rng(seed)
    frame = np.zeros((HEIGHT, WIDTH, 3), dtype=np.uint8)
    rows = np.arange(HEIGHT)[:, None]
    frame[:] = np.where(rows[..., None] < HORIZON, [150, 190, 235], [90, 140, 70]).astype(np.uint8)
    road = np.array([[300, HORIZON], [340, HORIZON], [600, HEIGHT], [40, HEIGHT]], dtype=np.int32)
    cv2.fillPoly(frame, [road], (120, 120, 125))
    noise = rng.integers(-12, 13, size=frame.shape)
    return np.clip(frame.astype(np.int16) + noise, 0, 255).astype(np.uint8)


def _box_at(bottom: float, centre: float, ratio: float) -> list[float]:
    h = ratio * (bottom - HORIZON)
    w = 1.5 * h
    return [round(centre - w / 2, 2), round(bottom - h, 2), round(w, 2), round(h, 2)]


def _paint(frame: np.ndarray, box: list[float], colour: tuple[int, int, int]) -> None:
    x, y, w, h = (int(round(v)) for v in box)
    cv2.rectangle(frame, (x, y), (x + w - 1, y + h - 1), colour, -1)


def _real_scene_boxes(source: int) -> list[list[float]]:
    """Four cars on the ground line of each source image, at different distances."""
    bottoms = [190 + 10 * source, 230 + 7 * source, 280 + 5 * source, 330 - 3 * source]
    centres = [250, 420, 180, 470]
    return [_box_at(b, c, CAR_RATIO) for b, c in zip(bottoms, centres, strict=True)]


def write_real_set(folder: Path, n_sources: int = 4) -> Path:
    """A real data set of ``n_sources`` images with four cars each; returns its JSON path."""
    images, annotations = [], []
    for source in range(1, n_sources + 1):
        frame = _road_frame(source)
        boxes = _real_scene_boxes(source)
        for box in boxes:
            _paint(frame, box, (200, 40, 40))
        (folder / "images").mkdir(parents=True, exist_ok=True)
        Image.fromarray(frame).save(folder / "images" / f"real_{source}.png")
        images.append({"id": source, "file_name": f"real_{source}.png", "width": WIDTH, "height": HEIGHT})
        for k, box in enumerate(boxes):
            annotations.append(
                {"id": 10 * source + k, "image_id": source, "category_id": 1, "bbox": box, "area": box[2] * box[3]}
            )
    path = folder / "real.json"
    path.write_text(json.dumps({"images": images, "annotations": annotations, "categories": CATEGORIES}))
    return path


def write_run(root: Path, *, accepted: int = 3, n_sources: int = 4) -> dict:
    """Write a finished run folder; return what the tests compare against.

    Job ``i`` fails once on the scale filter (a reject thumbnail), then is accepted; job 0 also had a
    placement failure first (no image). One more job never succeeds (two seam rejections).
    """
    (root / "images").mkdir(parents=True)
    (root / "rejects").mkdir()
    images, annotations, manifest, provenance = [], [], [], {}
    for i in range(accepted):
        source = i % n_sources + 1
        key = f"s0-{i:05d}"
        if i == 0:
            manifest.append(
                {
                    "job": key,
                    "attempt": 0,
                    "seed": 7,
                    "source_image_id": source,
                    "verdicts": [],
                    "accepted": False,
                    "rejected_by": ["placement"],
                    "reason": "no room on the surface for a tractor (tried 200 boxes)",
                }
            )
        frame = _road_frame(source)
        real_boxes = _real_scene_boxes(source)
        for box in real_boxes:
            _paint(frame, box, (200, 40, 40))
        too_big = _box_at(300 + 10 * i, 330, 2.5 * TRACTOR_RATIO)
        reject = frame.copy()
        _paint(reject, too_big, (40, 160, 40))
        reject_name = f"rejects/demo_{key}_a1.jpg"
        cv2.imwrite(str(root / reject_name), cv2.resize(reject, (WIDTH // 2, HEIGHT // 2))[:, :, ::-1])
        manifest.append(
            {
                "job": key,
                "attempt": 1,
                "seed": 100 + i,
                "source_image_id": source,
                "verdicts": [
                    {
                        "name": "scale",
                        "passed": False,
                        "value": 3.41 + i,
                        "limit": 2.5,
                        "reason": f"box height is {3.41 + i:.2f} sd from the ground line (limit 2.5)",
                    },
                    {"name": "surface", "passed": True, "value": 0.97, "limit": 0.8, "reason": "on the road"},
                ],
                "accepted": False,
                "rejected_by": ["scale"],
                "reject": reject_name,
            }
        )
        new_box = _box_at(260 + 15 * i, 330, TRACTOR_RATIO)
        _paint(frame, new_box, (40, 160, 40))
        file_name = f"demo_{key}.png"
        Image.fromarray(frame).save(root / "images" / file_name)
        manifest.append(
            {
                "job": key,
                "attempt": 2,
                "seed": 200 + i,
                "source_image_id": source,
                "verdicts": [{"name": "scale", "passed": True, "value": 0.4, "limit": 2.5, "reason": "in scale"}],
                "accepted": True,
                "rejected_by": [],
                "file_name": f"images/{file_name}",
            }
        )
        image_id = i + 1
        record = {
            "synthetic": True,
            "recipe": {"name": "demo", "sha256": "ab" * 32},
            "stage": {"index": 0, "kind": "insert", "class": "tractor", "options": {}},
            "source": {"image_id": source, "file_name": f"real_{source}.png", "sha256": "cd" * 32},
            "job": {"key": key, "attempt": 2, "seed": 200 + i},
            "model": {"kind": "test-block"},
            "filters": {"scale": {"value": 0.4, "limit": 2.5}},
            "details": {"note": '<b>escaped</b> & "quoted" </pre><script>window.bad = 1</script>'},
            "versions": {"rarefill": "0.test"},
        }
        provenance[file_name] = record
        images.append({"id": image_id, "file_name": file_name, "width": WIDTH, "height": HEIGHT, "rarefill": record})
        for k, box in enumerate(real_boxes):
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": image_id,
                    "category_id": 1,
                    "bbox": box,
                    "area": box[2] * box[3],
                    "iscrowd": 0,
                    "rarefill": {"synthetic": False, "source_annotation_id": 10 * source + k},
                }
            )
        annotations.append(
            {
                "id": len(annotations) + 1,
                "image_id": image_id,
                "category_id": 2,
                "bbox": new_box,
                "area": new_box[2] * new_box[3],
                "iscrowd": 0,
                "rarefill": {"synthetic": True, "stage": "insert", "requested_bbox": new_box},
            }
        )
    for attempt in range(2):
        name = f"rejects/demo_s0-99999_a{attempt}.jpg"
        cv2.imwrite(str(root / name), cv2.resize(_road_frame(99 + attempt), (WIDTH // 2, HEIGHT // 2)))
        manifest.append(
            {
                "job": "s0-99999",
                "attempt": attempt,
                "seed": 900 + attempt,
                "source_image_id": 1,
                "verdicts": [
                    {"name": "seam", "passed": False, "value": (4.2, 2.500012)[attempt], "limit": 2.5, "reason": "edge"}
                ],
                "accepted": False,
                "rejected_by": ["seam"],
                "reject": name,
            }
        )
    labels = {"info": {"description": "test run"}, "images": images, "annotations": annotations}
    labels["categories"] = CATEGORIES
    (root / "labels.json").write_text(json.dumps(labels))
    (root / "manifest.jsonl").write_text("".join(json.dumps(line) + "\n" for line in manifest))
    run = {"format": "rarefill.run/1", "recipe": {"name": "demo", "sha256": "ab" * 32, "seed": 0}, "shard": "0/1"}
    (root / "run.json").write_text(json.dumps(run))
    return {"manifest": manifest, "provenance": provenance, "accepted": accepted}


# --------------------------------------------------------------------------------------------------
# reading the page back


class _Page(HTMLParser):
    """Collects what the tests look at: images, links, data-count cells, details texts, scripts, text."""

    def __init__(self) -> None:
        super().__init__()
        self.images: list[dict] = []
        self.links: list[str] = []
        self.counts: dict[str, str] = {}
        self.details: list[str] = []
        self.filters: list[str] = []
        self.scripts: list[dict] = []
        self.stack: list[str] = []
        self.text: list[str] = []
        self._count_key: str | None = None
        self._in_pre = False
        self._in_filter = False
        self.body: dict = {}

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a)
        if tag == "a" and "href" in a:
            self.links.append(a["href"])
        if tag == "body":
            self.body = a
        if tag == "script":
            self.scripts.append(a)
        if tag == "td" and "data-count" in a:
            self._count_key = a["data-count"]
        if tag == "pre":
            self._in_pre = True
            self.details.append("")
        if tag == "li" and "data-filter" in a:
            self._in_filter = True
            self.filters.append("")

    def handle_endtag(self, tag):
        if tag == "td":
            self._count_key = None
        if tag == "pre":
            self._in_pre = False
        if tag == "li":
            self._in_filter = False

    def handle_data(self, data):
        self.text.append(data)
        if self._count_key is not None:
            self.counts[self._count_key] = self.counts.get(self._count_key, "") + data
        if self._in_pre:
            self.details[-1] += data
        if self._in_filter:
            self.filters[-1] += data


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def _local_targets(page: _Page) -> list[str]:
    return [img["src"] for img in page.images] + [h for h in page.links if not h.startswith("#")]


# --------------------------------------------------------------------------------------------------
# tests


@pytest.fixture
def run_dir(tmp_path: Path) -> tuple[Path, dict]:
    root = tmp_path / "run"
    return root, write_run(root)


def test_funnel_counts_jobs_candidates_and_each_filter(run_dir):
    root, made = run_dir
    counts = funnel(read_run(root).manifest)
    # 3 jobs x (scale reject + accept) + 1 placement failure + 2 seam rejects of the unfilled job
    assert (counts.jobs, counts.filled, counts.attempted, counts.accepted) == (4, 3, 9, 3)
    assert counts.rejected == 6
    assert counts.rejected_by == {"scale": 3, "seam": 2, "placement": 1}


def test_report_page_shows_funnel_thumbnails_rejections_and_provenance(run_dir):
    root, made = run_dir
    result = write_report(root)
    assert result.path == root / "report.html"
    page = _parse(result.path)

    # 1. the funnel, as numbers in the page
    assert page.counts == {
        "attempted": "9",
        "accepted": "3",
        "rejected": "6",
        "filter:scale": "3",
        "filter:seam": "2",
        "filter:placement": "1",
    }

    # 2. one annotated thumbnail per accepted image, linked to the full image
    thumbs = [img for img in page.images if img["src"].startswith("report/thumbs/")]
    assert len(thumbs) == made["accepted"]
    assert all(img["loading"] == "lazy" for img in thumbs)
    for name in made["provenance"]:
        assert f"images/{name}" in page.links
        assert (root / "report" / "thumbs" / name).with_suffix(".jpg").is_file()

    # 3. rejections with the failing filter's value and limit (placement failures with their reason)
    rejects = [img for img in page.images if img["src"].startswith("rejects/")]
    assert len(rejects) == 5
    scale = [f for f in page.filters if f.startswith("scale")]
    assert sorted(scale) == sorted(
        f"scale value {3.41 + i:.4g}, limit 2.5box height is {3.41 + i:.2f} sd from the ground line (limit 2.5)"
        for i in range(3)
    )
    # a value just over its limit shows enough digits to differ from it
    assert sorted(f for f in page.filters if f.startswith("seam")) == [
        "seam value 2.50001, limit 2.5edge",
        "seam value 4.2, limit 2.5edge",
    ]
    assert [f for f in page.filters if f.startswith("placement")] == [
        "placement no valueno room on the surface for a tractor (tried 200 boxes)"
    ]

    # 4. provenance in details elements: the escaped JSON reads back as the record itself
    assert len(page.details) == 3 + 6
    records = [json.loads(text) for text in page.details]
    shown = {r["rarefill"]["job"]["key"]: r["rarefill"] for r in records if "rarefill" in r}
    assert shown == {p["job"]["key"]: p for p in made["provenance"].values()}
    assert [r for r in records if "rarefill" not in r] == [line for line in made["manifest"] if not line["accepted"]]

    # 5. self-contained: one inline script (the provenance's <script> stayed text), no network address,
    #    every local link resolves inside the run folder
    assert page.scripts == [{}]
    assert "http://" not in result.path.read_text() and "https://" not in result.path.read_text()
    for target in _local_targets(page):
        assert urlsplit(target).scheme == ""
        assert (root / unquote(urlsplit(target).path)).is_file(), target

    # 6. plots were drawn
    for name in ("scale.png", "sizes.png", "counts.png"):
        assert Image.open(root / "report" / name).size[0] > 300
    assert "kept (real) annotations" in result.ground_note


def test_cards_say_what_a_stage_changed_when_it_added_no_object(tmp_path):
    import re

    from pipeline.recipe import load_recipe
    from pipeline.runner import run_recipe

    from .conftest import SEED_SCENES
    from .fakes import BlockGenerator

    recipe = tmp_path / "recipe.toml"
    recipe.write_text(
        f'[run]\nname = "cards"\nseed = 1\ndataset = "{SEED_SCENES / "train.json"}"\nmodel = "{tmp_path / "none"}"\n'
        'output = "out"\nsteps = 2\n\n'
        '[[stage]]\nkind = "restyle"\nclass = "works_trailer"\ncount = 1\ncondition = "fog"\nvisibility_m = 80.0\n\n'
        '[[stage]]\nkind = "restyle"\nclass = "tractor"\ncount = 1\ncondition = "night"\n\n'
        '[[stage]]\nkind = "rebackground"\nclass = "tractor"\ncount = 1\n'
    )
    summary = run_recipe(load_recipe(recipe), generator=BlockGenerator(), verifier=None)
    assert summary.accepted == 3
    page = write_report(tmp_path / "out").path.read_text()
    cards = re.findall(r'<figure class="card accepted">.*?"name">(.*?)</span>.*?"meta">(.*?)</span></fig', page)
    metas = [html.unescape(re.sub("<[^>]+>", "", meta)) for _, meta in cards]
    labels = json.loads((tmp_path / "out" / "labels.json").read_text())
    kept = {im["file_name"]: sum(a["image_id"] == im["id"] for a in labels["annotations"]) for im in labels["images"]}
    assert len(cards) == 3 and "new (" not in page
    for (name, _), meta in zip(cards, metas, strict=True):
        assert f", {kept[name]} label" in meta, meta
    texts = sorted(m.split(" · ")[:2] for m in metas)
    assert [t[0] for t in texts] == ["rebackground tractor", "restyle tractor", "restyle works_trailer"]
    assert texts[0][1].startswith("background regenerated (") and "% of the image), " in texts[0][1]
    assert texts[1][1].startswith("night, ")
    assert texts[2][1].startswith("fog, visibility 80 m, ")


def test_card_text_counts_dropped_and_crowded_labels():
    fog = {"stage": {"kind": "restyle"}, "details": {"condition": "fog", "visibility_m": 120.0}}
    dropped = {**fog, "details": {**fog["details"], "dropped": [{"annotation_id": 3}, {"annotation_id": 4}]}}
    assert change_text(dropped, Counter(), 5) == "fog, visibility 120 m, 5 labels kept, 2 dropped (invisible)"
    crowd = {
        "stage": {"kind": "restyle"},
        "details": {"condition": "snow", "snow_intensity": 0.5, "visibility_m": 600.0, "invisible_action": "crowd",
                    "visibility": [{"invisible": True}, {"invisible": False}]},
    }  # fmt: skip
    assert (
        change_text(crowd, Counter(), 2)
        == "snow, intensity 0.5, visibility 600 m, 2 labels kept (1 invisible, as crowd regions)"
    )
    insert = {"stage": {"kind": "insert"}, "details": {}}
    assert change_text(insert, Counter({"tractor": 2, "car": 1}), 1) == "3 new (tractor &times;2, car), 1 label kept"


def test_thumbnail_draws_new_and_real_boxes_at_scaled_positions():
    image = np.full((200, 400, 3), 128, dtype=np.uint8)
    thumb = annotated_thumbnail(image, [(20, 40, 60, 100)], [((200, 80, 120, 100), "tractor")], width=200)
    assert thumb.shape == (100, 200, 3)
    # scale 0.5: the real box spans columns 10..39, rows 20..69; the new box columns 100..159, rows 40..89
    assert tuple(thumb[45, 10]) == REAL_BOX_RGB
    assert tuple(thumb[45, 39]) == REAL_BOX_RGB
    assert tuple(thumb[65, 100]) == NEW_BOX_RGB
    assert tuple(thumb[89, 130]) == NEW_BOX_RGB
    assert tuple(thumb[45, 25]) == (128, 128, 128)  # inside a box: untouched
    assert tuple(thumb[65, 130]) == (128, 128, 128)
    with pytest.raises(ValueError, match="uint8"):
        annotated_thumbnail(image.astype(np.float32), [], [])


def test_galleries_are_paged_and_stale_pages_removed(tmp_path):
    root = tmp_path / "run"
    write_run(root, accepted=5)
    result = write_report(root, page_size=2)
    overview = _parse(result.path)
    assert len([i for i in overview.images if i["src"].startswith("report/thumbs/")]) == 2
    # accepted: 5 items -> 3 pages; rejected: 5 scale + 1 placement + 2 seam = 8 -> 4 pages
    assert result.pages == 1 + 2 + 3
    seen = set()
    for kind, pages in (("accepted", 3), ("rejected", 4)):
        for number in range(2, pages + 1):
            path = root / "report" / f"{kind}-{number:04d}.html"
            page = _parse(path)
            for target in _local_targets(page):
                assert (path.parent / unquote(urlsplit(target).path)).is_file(), (path.name, target)
            seen.update(img["src"] for img in page.images)
    assert len([s for s in seen if "/thumbs/" in s]) == 3
    assert not (root / "report" / "accepted-0004.html").exists()
    write_report(root, page_size=100)
    assert not list((root / "report").glob("*.html"))


def test_real_data_set_fits_the_ground_model_and_links_sources(tmp_path):
    from pipeline.dataset import load_dataset

    real_json = write_real_set(tmp_path / "real")
    root = tmp_path / "run"
    write_run(root)
    result = write_report(root, real=load_dataset(real_json))
    assert result.ground_note.startswith("ground model fitted on the real data set real.json (4 images)")
    page = _parse(result.path)
    sources = [h for h in page.links if h.endswith(".png") and "real_" in h]
    assert len(sources) == 3
    assert all((root / h).is_file() for h in sources)


def test_run_without_accepted_images_still_reports(tmp_path):
    root = tmp_path / "run"
    write_run(root, accepted=0)
    result = write_report(root)
    assert (result.funnel.attempted, result.funnel.accepted, result.funnel.rejected_by) == (2, 0, {"seam": 2})
    assert result.ground_note.startswith("no ground model: ")
    page = _parse(result.path)
    assert [img["src"] for img in page.images if img["src"].startswith("rejects/")] == [
        "rejects/demo_s0-99999_a0.jpg",
        "rejects/demo_s0-99999_a1.jpg",
    ]


def test_file_names_are_url_encoded(tmp_path):
    root = tmp_path / "run"
    write_run(root, accepted=1)
    odd = "demo #1?.png"
    (root / "images" / "demo_s0-00000.png").rename(root / "images" / odd)
    for name in ("labels.json", "manifest.jsonl"):
        (root / name).write_text((root / name).read_text().replace("demo_s0-00000.png", odd))
    page = _parse(write_report(root).path)
    assert "images/demo%20%231%3F.png" in page.links
    for target in _local_targets(page):
        assert (root / unquote(urlsplit(target).path)).is_file(), target


def test_bad_run_folders_are_refused_with_file_and_reason(tmp_path, run_dir):
    with pytest.raises(RunError, match="labels.json: not found"):
        read_run(tmp_path / "nowhere")
    root, _ = run_dir
    lines = (root / "manifest.jsonl").read_text().splitlines()
    (root / "manifest.jsonl").write_text("\n".join([*lines[:2], "{not json", *lines[2:]]) + "\n")
    with pytest.raises(RunError, match=r"manifest.jsonl: line 3: malformed JSON"):
        read_run(root)
    (root / "manifest.jsonl").write_text("\n".join(lines[:-3]) + "\n")  # the last accepted line is gone
    with pytest.raises(RunError, match="disagree"):
        read_run(root)
    with pytest.raises(ValueError, match="page_size"):
        write_report(root, page_size=0)


def test_cli_writes_the_report_and_refuses_bad_options(run_dir, tmp_path):
    root, _ = run_dir
    runner = CliRunner()
    done = runner.invoke(app, ["report", str(root), "--page-size", "50"])
    assert done.exit_code == 0, done.output
    assert "report.html" in done.output and "3 accepted" in done.output
    assert (root / "report.html").is_file()
    lonely = runner.invoke(app, ["report", str(root), "--real-images", str(tmp_path)])
    assert lonely.exit_code == 2
    assert "--real-images needs --real" in lonely.output
    missing = runner.invoke(app, ["report", str(tmp_path / "nowhere")])
    assert missing.exit_code == 2  # a missing run folder is bad input
    assert "not a finished rarefill run folder" in missing.output


# --------------------------------------------------------------------------------------------------
# a real browser


def _chromium(profile: Path, *args: str) -> subprocess.CompletedProcess:
    flags = [
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={profile}",
        "--virtual-time-budget=10000",
    ]
    return subprocess.run([str(CHROMIUM), *flags, *args], capture_output=True, text=True, timeout=120, check=False)


def _body_marker(dom: str) -> str | None:
    page = _Page()
    page.feed(dom)
    return page.body.get("data-images-loaded")


@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium at /usr/bin/chromium (.ci/run installs it)")
def test_page_renders_in_headless_chromium_with_every_image_loaded(run_dir, tmp_path):
    root, _ = run_dir
    result = write_report(root)
    url = result.path.resolve().as_uri() + "?eager=1"

    # 1. every image (thumbnails, rejects, plots) decodes: the page's own script says so
    dom = _chromium(tmp_path / "profile-1", "--dump-dom", url)
    assert _body_marker(dom.stdout) == "ok", dom.stderr[-2000:]

    # 2. the screenshot is a picture, not a blank page
    shot = tmp_path / "shot.png"
    _chromium(tmp_path / "profile-2", f"--screenshot={shot}", "--window-size=1280,1800", "--hide-scrollbars", url)
    pixels = np.asarray(Image.open(shot).convert("RGB"), dtype=np.float64)
    assert pixels.shape[:2] == (1800, 1280)
    assert pixels.std() > 20

    # 3. the marker is not a constant: a missing thumbnail is reported
    next((root / "report" / "thumbs").glob("*.jpg")).unlink()
    dom = _chromium(tmp_path / "profile-3", "--dump-dom", url)
    assert _body_marker(dom.stdout) == "broken 1"
