"""Commands that look at a data set: stats, ground, render-demo."""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path
from typing import Annotated

import typer
from rich.table import Table

from ..geometry import GroundModel
from .base import ImagesOption, app, reports_errors, stdout


@app.command()
@reports_errors
def stats(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file.")],
    images: ImagesOption = None,
    rare_below: Annotated[
        int, typer.Option("--rare-below", min=0, help="Flag categories with fewer instances than this as rare.")
    ] = 50,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.")] = False,
    clip_boxes: Annotated[
        bool, typer.Option("--clip-boxes", help="Clip boxes that leave their image instead of refusing the file.")
    ] = False,
) -> None:
    """Count images and instances per category, box sizes and COCO size buckets; flag rare classes.

    Size buckets follow COCO's evaluation: small < 32^2 px area, medium < 96^2, large above.

    Example: rarefill stats seed_scenes/train.json --rare-below 30
    """
    from ..dataset import load_dataset
    from ..stats import category_stats, stats_as_dict

    data = load_dataset(dataset, images, clip_boxes=clip_boxes)
    rows = category_stats(data, rare_below=rare_below)
    if as_json:
        typer.echo(json.dumps(stats_as_dict(data, rows), indent=2))
        return
    table = Table(title=f"{dataset}: {len(data.scenes)} images, {sum(r.instances for r in rows)} instances")
    for column in ("category", "images", "instances", "median h (px)", "small", "medium", "large", ""):
        table.add_column(column, justify="left" if column in ("category", "") else "right")
    for r in rows:
        height = "-" if r.median_box_height is None else f"{r.median_box_height:.1f}"
        table.add_row(
            r.name,
            str(r.images),
            str(r.instances),
            height,
            f"{r.small:.0%}",
            f"{r.medium:.0%}",
            f"{r.large:.0%}",
            "[bold red]rare[/]" if r.rare else "",
        )
    stdout().print(table)


@app.command()
@reports_errors
def ground(
    ctx: typer.Context,
    dataset: Annotated[Path, typer.Argument(help="COCO detection JSON file.")],
    images: ImagesOption = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of tables.")] = False,
    plot: Annotated[
        Path | None,
        typer.Option("--plot", help="Write a PNG of box height vs. bottom row with the fitted lines, by camera group."),
    ] = None,
) -> None:
    """Fit the ground-plane model from the labels: per camera group a horizon row and a camera height,
    per class its height / camera height and one real height in metres shared by the groups.

    Box height = (H / h_cam) x (bottom row - horizon row) for a level camera (Hoiem et al., 2006). Images
    are grouped by their `camera` name, else their `intrinsics` {fx, fy, cx, cy}, else their size. A box's
    own 3D height (`height_m`, or `dim_hwl_m` [h, w, l] in metres) sets the metres before the built-in priors.

    Example: rarefill ground seed_scenes/train.json --plot ground.png
    """
    from ..dataset import load_dataset
    from ..geometry import fit_cameras
    from ..plots import save_ground_plot

    data = load_dataset(dataset, images, check_images=False)
    model = fit_cameras(data)
    if plot is not None:
        save_ground_plot(data, model, plot)
    if as_json:
        typer.echo(json.dumps(model.to_dict(), indent=2))
        return
    out = stdout()
    counts = Counter(model.image_groups.values())
    for name, group in model.groups.items():
        out.print(_group_table(name, group, counts[name]))
    for name, reason in model.unfitted.items():
        out.print(f"camera {name} ({counts[name]} images): no ground model: {reason}")
    table = Table(title="real class heights, shared by the camera groups")
    for column in ("category", "height (m)", "known (m)", "known from"):
        table.add_column(column, justify="left" if column in ("category", "known from") else "right")
    for name, h in model.class_heights.items():
        shown = [f"{v:.2f}" if v is not None else "-" for v in (h.metres, h.known_m)]
        table.add_row(name, *shown, h.known_from or "-")
    out.print(table)


def _group_table(name: str, group: GroundModel, n_images: int) -> Table:
    camera = "unknown" if group.camera_height_m is None else f"{group.camera_height_m:.2f} m"
    horizon = f"horizon row {group.horizon_row:.1f}"
    if group.horizon_source != "fitted":
        horizon += " = principal row (too few boxes to fit it: level camera assumed)"
    elif group.intrinsics is not None:
        pitch = group.intrinsics.pitch_deg(group.horizon_row)
        horizon += f", principal row {group.intrinsics.cy:.1f} (pitch {pitch:+.2f} deg)"
    title = f"camera {name} ({n_images} images): {horizon}; camera height {camera}"
    table = Table(title=title)
    for column in ("category", "H / h_cam", "spread (log sd)", "boxes used", "source"):
        table.add_column(column, justify="left" if column in ("category", "source") else "right")
    for cls_name, c in group.classes.items():
        table.add_row(cls_name, f"{c.height_ratio:.3f}", f"{c.spread:.3f}", str(c.n_boxes), c.source)
    return table


@app.command("render-demo")
@reports_errors
def render_demo(
    ctx: typer.Context,
    out_dir: Annotated[Path, typer.Argument(help="Folder for {train,val,test}.json and images/.")],
    seed: Annotated[
        int | None, typer.Option("--seed", help="Set seed (default: the seed of the committed seed_scenes/).")
    ] = None,
    train: Annotated[int, typer.Option("--train", min=0, help="Number of train images.")] = 150,
    val: Annotated[int, typer.Option("--val", min=0, help="Number of val images.")] = 40,
    test: Annotated[int, typer.Option("--test", min=0, help="Number of test images.")] = 60,
) -> None:
    """Render the demo seed scenes (rural roads, known camera); bit-identical for the same seed.

    Example: rarefill render-demo seed_scenes
    """
    from ..demo_world import DEFAULT_SEED, render_seed_set

    written = render_seed_set(
        out_dir, seed=DEFAULT_SEED if seed is None else seed, counts={"train": train, "val": val, "test": test}
    )
    for split, path in written.items():
        stdout().print(f"{split}: {path}")
    stdout().print(f"images and drivable masks: {out_dir / 'images'}")
