"""An upscaled copy of some seed scenes, to check that runs work on frames of camera resolution."""

from __future__ import annotations

import json
from pathlib import Path

import cv2


def upscaled_copy(source: Path, out: Path, size: tuple[int, int], *, images: int) -> Path:
    """Write the first ``images`` scenes of the COCO file ``source`` resized to ``size`` (width, height).

    Images are enlarged bicubically, drivable masks by nearest neighbour, boxes scaled per axis; the
    ``render_truth`` keys are left out (they hold the small render's camera). Returns the new JSON path.
    """
    data = json.loads(Path(source).read_text())
    root = Path(source).parent / "images"
    width, height = size
    kept = data["images"][:images]
    ids = {image["id"] for image in kept}
    (out / "images" / "surfaces").mkdir(parents=True, exist_ok=True)
    new_images = []
    for image in kept:
        sx, sy = width / image["width"], height / image["height"]
        pixels = cv2.imread(str(root / image["file_name"]), cv2.IMREAD_COLOR)
        cv2.imwrite(str(out / "images" / image["file_name"]), cv2.resize(pixels, size, interpolation=cv2.INTER_CUBIC))
        mask = cv2.imread(str(root / image["drivable_mask"]), cv2.IMREAD_GRAYSCALE)
        cv2.imwrite(
            str(out / "images" / image["drivable_mask"]), cv2.resize(mask, size, interpolation=cv2.INTER_NEAREST)
        )
        new_images.append({k: v for k, v in image.items() if k != "render_truth"} | {"width": width, "height": height})
    annotations = []
    for ann in data["annotations"]:
        if ann["image_id"] not in ids:
            continue
        x, y, w, h = ann["bbox"]
        box = [x * sx, y * sy, w * sx, h * sy]
        annotations.append(
            {k: v for k, v in ann.items() if k != "render_truth"} | {"bbox": box, "area": box[2] * box[3]}
        )
    path = out / "train.json"
    path.write_text(json.dumps({**data, "images": new_images, "annotations": annotations}))
    return path
