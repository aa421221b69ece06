"""How long the realism audit takes for 200 synthetic against 100 real instances of one class.

Goal: under 60 s on 2 cores. The "run" is built from seed_scenes: 200 real training cars marked as
synthetic (the figures are meaningless here; only the time counts), audited against 100 cars of the
validation and test splits. Prints the wall time of each phase and the total, the CPU time the process
used, and the machine's load average (on a shared machine wall time grows with the load; CPU time does not).

Run: python benchmarks/audit_speed.py [--threads N]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import tempfile
import time
from pathlib import Path

from pipeline.audit import audit_run
from pipeline.provenance import file_sha256

SEED = Path(__file__).resolve().parents[1] / "seed_scenes"
N_SYNTHETIC, N_REAL, CLASS = 200, 100, "car"


def _fake_run(folder: Path) -> None:
    train = json.loads((SEED / "train.json").read_text())
    car = next(c["id"] for c in train["categories"] if c["name"] == CLASS)
    cars = [a for a in train["annotations"] if a["category_id"] == car][:N_SYNTHETIC]
    marked = {a["id"] for a in cars}
    keep = {a["image_id"] for a in cars}
    (folder / "images").mkdir(parents=True)
    images, manifest = [], []
    for image in train["images"]:
        if image["id"] not in keep:
            continue
        path = SEED / "images" / image["file_name"]
        shutil.copy(path, folder / "images" / image["file_name"])
        source = {"image_id": image["id"], "file_name": image["file_name"], "sha256": file_sha256(path)}
        record = {"synthetic": True, "stage": {"kind": "insert"}, "source": source}
        images.append({k: image[k] for k in ("id", "file_name", "width", "height")} | {"rarefill": record})
        manifest.append(
            {
                "job": f"s0-{image['id']:06d}",
                "accepted": True,
                "verdicts": [],
                "file_name": f"images/{image['file_name']}",
            }
        )
    annotations = [
        {k: a[k] for k in ("id", "image_id", "category_id", "bbox", "area")}
        | {"rarefill": {"synthetic": a["id"] in marked}}
        for a in train["annotations"]
        if a["image_id"] in keep
    ]
    labels = {"images": images, "annotations": annotations, "categories": train["categories"]}
    (folder / "labels.json").write_text(json.dumps(labels))
    (folder / "manifest.jsonl").write_text("".join(json.dumps(m) + "\n" for m in manifest))


def _heldout(path: Path) -> None:
    """Val and test images together, with their first 100 cars as the only annotations."""
    images, annotations = [], []
    for split in ("val", "test"):
        data = json.loads((SEED / f"{split}.json").read_text())
        offset = 10_000 if split == "test" else 0
        for image in data["images"]:
            images.append({**image, "id": image["id"] + offset})
        car = next(c["id"] for c in data["categories"] if c["name"] == CLASS)
        for a in data["annotations"]:
            if a["category_id"] == car and len(annotations) < N_REAL:
                annotations.append({**a, "id": a["id"] + offset, "image_id": a["image_id"] + offset})
    path.write_text(json.dumps({"images": images, "annotations": annotations, "categories": data["categories"]}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        _fake_run(root / "run")
        _heldout(root / "heldout.json")
        cpu = time.process_time()
        marks = [("start", time.perf_counter())]
        result = audit_run(
            root / "run",
            root / "heldout.json",
            images=SEED / "images",
            train=SEED / "train.json",
            threads=args.threads,
            progress=lambda line: marks.append((line, time.perf_counter())),
        )
        marks.append(("written", time.perf_counter()))
        cpu = time.process_time() - cpu
    figures = result["classes"][CLASS]
    print(f"audit of {figures['n_synthetic']} synthetic vs {figures['n_real']} real {CLASS} instances")
    for (line, start), (_, end) in zip(marks, marks[1:], strict=False):
        print(f"  {end - start:7.1f} s  after: {line}")
    print(f"total {marks[-1][1] - marks[0][1]:.1f} s with {args.threads} torch thread(s); goal < 60 s on 2 cores")
    # CPU time is what the audit itself used: about its wall time on cores nothing else competes for.
    print(f"CPU time {cpu:.1f} s (all threads of this process)")
    print(f"load average (1, 5, 15 min): {', '.join(f'{v:.1f}' for v in os.getloadavg())} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
