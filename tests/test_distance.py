"""The distance map of a photo without a depth sensor: ground plane, vertical world, sky, objects."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.weather import contact, distance, fog, sky

F, H_CAM = 300.0, 1.5


def street(height: int = 120, width: int = 160, *, horizon: float = 50.0, seed: int = 0):
    """A small street photo: blue sky on top, a brick building on the left standing on the ground at row 80,
    a far hedge beyond the road on the right, textured grey asphalt below."""
    rng = np.random.default_rng(seed)
    image = np.zeros((height, width, 3), np.uint8)
    sky_colour = np.array([110, 160, 235])
    image[:] = sky_colour
    image[int(horizon) - 6 : int(horizon) + 2, 70:] = (50, 90, 40)  # far hedge near the horizon
    asphalt = rng.normal(105, 6, size=(height - int(horizon) - 2, width, 1)).clip(0, 255)
    image[int(horizon) + 2 :] = asphalt.repeat(3, axis=2).astype(np.uint8)
    brick = np.array([150, 70, 50])
    image[5:80, 10:60] = brick
    image[5:80, 10:60:8] = (90, 40, 30)  # mortar joints: vertical outlines
    image[20:70:12, 10:60] = (230, 230, 225)  # windows' sills
    return image, horizon


def test_ground_plane_is_the_pinhole_over_a_plane_and_koschmieder_holds_on_it():
    # Hartley & Zisserman 2004: Z = f h / (v - v_h); Koschmieder 1924 via Sakaridis et al. 2018:
    # t = exp(-beta d) with beta = ln(20) / V, V the meteorological optical range (WMO-No. 8).
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    dmap = distance.distance_map(image, horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found)
    beta = math.log(20) / 80.0
    t = fog.transmission(dmap.distance, beta)
    for row in (90, 100, 119):
        z = F * H_CAM / (row + 0.5 - horizon)
        assert dmap.distance[row, 120] == pytest.approx(z)
        assert t[row, 120] == pytest.approx(math.exp(-math.log(20) * z / 80.0))
    assert dmap.source[100, 120] == distance.Source.GROUND


def test_a_building_column_is_no_farther_than_its_ground_contact():
    # Hoiem, Efros, Hebert 2005 ("vertical world"): upright things stand where they meet the ground
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    dmap = distance.distance_map(image, horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found)
    contact = dmap.contact_row
    assert np.all(np.abs(contact[15:55] - 80) <= 2)  # the building's foot found within 2 rows
    for col in range(15, 55):
        foot = int(contact[col])
        ground_at_foot = F * H_CAM / (foot + 0.5 - horizon)
        column = dmap.distance[:foot, col][~found[:foot, col]]
        assert column.size and np.all(column <= ground_at_foot * (1 + 1e-9))
    # the building below the horizon is at its foot's distance, nearer than the ground plane at those rows
    assert dmap.distance[70, 30] < F * H_CAM / (70.5 - horizon)
    # fog at 80 m: the building's face keeps more of its contrast than the far road near the horizon
    t = fog.transmission(dmap.distance, math.log(20) / 80.0)
    assert t[30, 30] > 2 * t[53, 100]
    assert set(np.unique(dmap.source[10:70, 20:50])) <= {distance.Source.VERTICAL}


def test_sky_is_at_the_far_limit_and_marked_as_a_guess():
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    assert found[:4, 70:].all() and not found[10:70, 15:55].any()
    dmap = distance.distance_map(image, horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found)
    assert np.all(dmap.distance[found] == distance.FAR_LIMIT_M)
    assert np.all(dmap.source[found] == distance.Source.SKY) and dmap.guessed[found].all()
    assert np.all(np.isfinite(dmap.distance)) and dmap.distance.max() <= distance.FAR_LIMIT_M


def _object_scene(matte: np.ndarray):
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    placed = [distance.PlacedObject(matte, 110.0, given=False)]
    dmap = distance.distance_map(
        image, horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found, objects=placed
    )
    return fog.transmission(dmap.distance, math.log(20) / 80.0), dmap


def test_no_step_in_transmission_along_a_box_edge_where_the_silhouette_does_not_run():
    # an object whose silhouette (a disc) fills only the middle of its box [80:110, 90:140]
    rows, cols = np.mgrid[0:120, 0:160]
    disc = (((rows - 97) / 12.0) ** 2 + ((cols - 115) / 20.0) ** 2 <= 1).astype(np.float32)
    t, dmap = _object_scene(disc)
    bare, _ = _object_scene(np.zeros((120, 160), np.float32))
    box = np.zeros((120, 160), bool)
    box[80:110, 90:140] = True
    edge = (
        box & ~np.roll(box, 1, 0) | box & ~np.roll(box, -1, 0) | box & ~np.roll(box, 1, 1) | box & ~np.roll(box, -1, 1)
    )
    away = edge & (disc == 0)
    # along the box edge where the silhouette does not run, the fog is that of the scene without the object:
    # nothing there knows a box exists (and nothing inside the box off the silhouette either)
    assert away.sum() > 100 and np.array_equal(t[away], bare[away])
    assert np.array_equal(t[box & (disc == 0)], bare[box & (disc == 0)])
    # where the silhouette runs there is a real step (the object is nearer than the ground behind it)
    assert t[86, 115] > bare[86, 115] + 0.05
    assert dmap.source[97, 115] == distance.Source.OBJECT_ESTIMATED


def test_a_soft_matte_leaves_no_box_shaped_step():
    # an object whose silhouette could not be estimated: a matte 1 in the core falling to 0 at the box edge
    from pipeline.stages.restyle_scene import object_matte

    class Ann:
        bbox = (90.0, 80.0, 5.0, 30.0)  # 5 px wide: too thin for a cut
        segmentation = None

    matte, given = object_matte(np.zeros((120, 160, 3), np.uint8), Ann())
    assert not given and matte[95, 92] == 1.0 and matte[79].max() == 0 and matte[:, 89].max() == 0
    t, _ = _object_scene(matte)
    bare, _ = _object_scene(np.zeros((120, 160), np.float32))
    full = t[82, 92] - bare[82, 92]  # the change the object makes in its core
    assert full > 0.05
    # on the box's own edge pixels the change is a small part of that: the matte ramps, it does not step
    for edge in (t[80, 90:95] - bare[80, 90:95], t[80:110, 90] - bare[80:110, 90], t[80:110, 94] - bare[80:110, 94]):
        assert np.abs(edge).max() < 0.45 * full


def test_objects_are_never_pushed_behind_what_the_scene_puts_in_front():
    # a loose box of an object behind the building: its matte over the building must not make it farther
    matte = np.zeros((120, 160), np.float32)
    matte[40:60, 20:40] = 1.0
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    kwargs = dict(horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found)
    plain = distance.distance_map(image, **kwargs)
    behind = distance.distance_map(image, **kwargs, objects=[distance.PlacedObject(matte, 60.0, given=True)])
    assert np.array_equal(behind.distance, plain.distance)  # footprint at 45 m, building at about 15 m


def test_a_measured_depth_is_used_exactly_and_only_where_measured():
    image, horizon = street()
    found = sky.sky_mask(image, horizon)
    depth = np.full((120, 160), np.nan)
    depth[60:, :80] = np.linspace(3.0, 40.0, 60)[:, None]
    dmap = distance.distance_map(image, horizon_row=horizon, focal_px=F, camera_height_m=H_CAM, sky=found, depth=depth)
    measured = np.isfinite(depth)
    assert np.array_equal(dmap.distance[measured], depth[measured])
    assert np.all(dmap.source[measured] == distance.Source.MEASURED) and not dmap.guessed[measured].any()
    assert dmap.distance[100, 120] == pytest.approx(F * H_CAM / (100.5 - horizon))  # estimated beside it


def test_contact_line_is_the_cheapest_split_and_smooth():
    # two columns' evidence: ground from row 6 in one, from row 3 in the other
    p = np.zeros((10, 2), np.float32)
    p[6:, 0] = 1.0
    p[3:, 1] = 1.0
    assert list(contact.contact_rows(p, 0.0, smoothness=0.0)) == [6, 3]
    # a jump of 3 rows costs 3 x 2.0, more than the 3 mislabelled pixels it saves: one row for both
    line = contact.contact_rows(p, 0.0, smoothness=2.0)
    assert line[0] == line[1] and line[0] in range(3, 7)
