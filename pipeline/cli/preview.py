"""Commands that show what a restyle does to a data set's own frames: restyle-preview, restyle-sheet."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from .base import ImagesOption, app, reports_errors, stdout

CameraHeightOption = Annotated[
    float | None,
    typer.Option(
        "--camera-height",
        min=0.1,
        help="Camera height above the road in metres, instead of the one fitted from the labels (which few boxes "
        "cannot tell well); e.g. 1.65 for KITTI's car, 1.51 for nuScenes' front camera.",
    ),
]
PanelOption = Annotated[int, typer.Option("--panel-width", min=64, help="Width of each panel in the sheet (px).")]


@app.command("restyle-preview")
@reports_errors
def restyle_preview(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file (its boxes and ground model are used).")],
    image: Annotated[list[str], typer.Option("--image", help="Image id or file name; repeat for several.")],
    condition: Annotated[str, typer.Option("--condition", help="fog, rain, snow, dusk or night.")] = "fog",
    visibility: Annotated[float | None, typer.Option("--visibility", help="Fog: visibility (MOR) in metres.")] = None,
    rain_rate: Annotated[float | None, typer.Option("--rain-rate", help="Rain: rate in mm/h.")] = None,
    snow_intensity: Annotated[float | None, typer.Option("--snow-intensity", help="Snow: 0..1.")] = None,
    out: Annotated[Path, typer.Option("--out", help="PNG to write.")] = Path("restyle-preview.png"),
    images: ImagesOption = None,
    camera_height: CameraHeightOption = None,
    panel_width: PanelOption = 640,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the particles and the night curve.")] = 0,
) -> None:
    """Write input | distance map | restyled output side by side, one row per image.

    The distance map is colour-mapped from 1 m (red) to 1 km (blue) on a log scale; hatched pixels are
    guesses (ground, upright scenery placed at its ground contact, sky, estimated silhouettes), the white
    line is where upright scenery meets the ground. Without a depth map or drivable mask in the data set,
    most of it is a guess: the preview shows where.

    Example: rarefill restyle-preview data.json --image 0001_000010.png --condition fog --visibility 80
    """
    from ..dataset import load_dataset
    from ..restyle_preview import parse_condition, write_preview

    value = {"fog": visibility, "rain": rain_rate, "snow": snow_intensity}.get(condition)
    chosen = parse_condition(condition if value is None else f"{condition}:{value}")
    data = load_dataset(dataset, images, clip_boxes=True)
    count = write_preview(data, image, [chosen], out, camera_height_m=camera_height, panel_width=panel_width, seed=seed)
    stdout().print(f"{out}: {count} image(s) x input | distance | {chosen.label}")


@app.command("restyle-sheet")
@reports_errors
def restyle_sheet(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file.")],
    out: Annotated[Path, typer.Option("--out", help="PNG to write.")] = Path("restyle-sheet.png"),
    image: Annotated[list[str] | None, typer.Option("--image", help="Image id or file name (default: all).")] = None,
    conditions: Annotated[
        str, typer.Option("--conditions", help='Comma-separated, e.g. "fog:80,fog:300,rain:25,night,snow:0.5".')
    ] = "fog:80,fog:300,rain:25,night",
    images: ImagesOption = None,
    camera_height: CameraHeightOption = None,
    panel_width: PanelOption = 480,
    seed: Annotated[int, typer.Option("--seed", help="Seed of the particles and the night curve.")] = 0,
) -> None:
    """Write a sheet of frames x conditions (input | distance map | each condition) to look at.

    Example: rarefill restyle-sheet data.json --out sheet.png --camera-height 1.65
    """
    from rich.progress import track

    from ..dataset import load_dataset
    from ..restyle_preview import parse_condition, write_preview

    chosen = [parse_condition(c.strip()) for c in conditions.split(",") if c.strip()]
    data = load_dataset(dataset, images, clip_boxes=True)
    total = len(image) if image else len(data.scenes)
    bar = iter(track(range(total), description="restyling", transient=True))
    next(bar, None)
    count = write_preview(
        data, image or [], chosen, out, camera_height_m=camera_height, panel_width=panel_width, seed=seed,
        progress=lambda _scene: next(bar, None),
    )  # fmt: skip
    stdout().print(f"{out}: {count} image(s) x input | distance | {' | '.join(c.label for c in chosen)}")
