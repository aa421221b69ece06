"""Restyle on real road photos (../shared/realdata, outside the repository): honest checks of the look.

Frames from KITTI (Geiger, Lenz, Urtasun, CVPR 2012: camera 1.65 m above the road) and nuScenes (front
camera 1.51 m above the ground; nuScenes devkit), with their calibrated intrinsics. They have no drivable
masks and no depth: the distance map is the photo's own estimate.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path

import numpy as np
import pytest

from pipeline.dataset import load_dataset
from pipeline.restyle_preview import find_scene, preview_contexts
from pipeline.stages.restyle_scene import scene_geometry
from pipeline.weather import fog
from pipeline.weather.distance import Source
from pipeline.weather.sky import sky_mask


def _realdata() -> Path | None:
    for root in (Path(__file__).resolve().parents[1].parent / "shared" / "realdata", Path("/work/shared/realdata")):
        if (root / "kitti_tracking_mini6" / "annotations.json").is_file():
            return root
    return None


REAL = _realdata()
pytestmark = pytest.mark.skipif(REAL is None, reason="../shared/realdata (real road frames) not present")


def _load(name: str, camera_height_m: float):
    folder = REAL / name
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dataset = load_dataset(folder / "annotations.json", folder, clip_boxes=True)
    return dataset, preview_contexts(dataset, camera_height_m=camera_height_m)


@pytest.fixture(scope="module")
def kitti():
    dataset, contexts = _load("kitti_tracking_mini6", 1.65)
    out = {}
    for ref in ("0001_000010.png", "0016_000002.png"):
        scene = find_scene(dataset, ref)
        image = scene.load_rgb()
        out[ref] = (image, scene_geometry(image, scene, contexts[(scene.width, scene.height)]))
    return out


def test_fog_never_washes_upright_scenery_out_more_than_the_ground_at_its_foot(kitti):
    # the complaint this was built for: buildings beside the camera went as white as the sky in 80 m fog
    beta = math.log(20) / 80.0  # WMO-No. 8: the MOR V is where contrast falls to 5% (Koschmieder 1924)
    for _image, geometry in kitti.values():
        t = fog.transmission(geometry.distance, beta)
        source = geometry.distance_map.source
        height, width = t.shape
        off_objects = np.ones(t.shape, bool)
        for matte in geometry.mattes:
            off_objects &= matte == 0
        for col in range(0, width, 7):
            foot = int(geometry.distance_map.contact_row[col])
            if foot >= height:
                continue
            upright = source[:foot, col] == Source.VERTICAL
            # the ground plane at the foot: Z = f h / (v - v_h) (Hartley & Zisserman 2004)
            below = foot + 0.5 - geometry.horizon_row
            at_foot = geometry.focal_px * geometry.camera_height_m / below if below > 0 else math.inf
            assert np.all(t[:foot, col][upright] >= math.exp(-beta * min(at_foot, 1000.0)) - 1e-9)
            # on the ground, fog thickens upward from the bottom row (Koschmieder on the ground plane)
            ground = t[foot:, col][(source[foot:, col] == Source.GROUND) & off_objects[foot:, col]]
            assert np.all(np.diff(ground) >= -1e-12)


def test_a_near_wall_stays_clearer_than_the_far_road(kitti):
    # 0001_000010: a long grey wall beside the camera on the right (columns 1000-1150, rows 60-140); the
    # road's far end just below the horizon in the middle (rows 183-188, columns 560-640)
    image, geometry = kitti["0001_000010.png"]
    t = fog.transmission(geometry.distance, math.log(20) / 80.0)
    wall, far_road = np.median(t[60:140, 1000:1150]), np.median(t[183:188, 560:640])
    assert wall > 2 * far_road
    assert np.median(geometry.distance[60:140, 1000:1150]) < 50.0


def test_no_box_shaped_step_around_labelled_objects(kitti):
    # across every edge of every box, off every silhouette and away from the ground contact line (a real
    # edge: the foot of a wall), the fog changes no more than between neighbouring pixels anywhere else
    beta = math.log(20) / 80.0
    for _image, geometry in kitti.values():
        t = fog.transmission(geometry.distance, beta)
        objects = np.zeros(t.shape, bool)
        for matte in geometry.mattes:
            objects |= matte > 0.01
        contact = geometry.distance_map.contact_row
        height, width = t.shape
        for ann in geometry.annotations:
            x, y, w, h = ann.bbox
            c0, c1 = max(1, int(math.floor(x))), min(width - 1, int(math.ceil(x + w)))
            r0, r1 = max(1, int(math.floor(y))), min(height - 1, int(math.ceil(y + h)))
            rows = np.arange(r0, r1)
            for inner, outer in ((c0, c0 - 1), (c1 - 1, c1)):
                ok = ~objects[rows, inner] & ~objects[rows, outer] & (np.abs(rows - contact[inner]) > 2)
                ok &= np.abs(rows - contact[outer]) > 2
                assert np.all(np.abs(t[rows, inner] - t[rows, outer])[ok] <= 0.03), ann.bbox
            cols = np.arange(c0, c1)
            ok = ~objects[r0, cols] & ~objects[r0 - 1, cols] & (np.abs(r0 - contact[cols]) > 2)
            assert np.all(np.abs(t[r0, cols] - t[r0 - 1, cols])[ok] <= 0.03), ann.bbox


def test_the_sky_is_found_and_fogged_uniformly_and_facades_are_not_sky():
    dataset, _ = _load("nuscenes_mmdet3d7", 1.51)
    front = find_scene(dataset, "n015-2018-07-24-11-22-45+0800__CAM_FRONT__1532402927612460.jpg")
    image = front.load_rgb()
    horizon = front.extra["intrinsics"]["cy"]
    found = sky_mask(image, horizon)
    assert found[30:200, 600:1200].mean() > 0.9  # open sky over the street ahead
    assert found[0:400, 0:250].mean() < 0.02  # the building on the left
    fogged = fog.apply_fog(image, np.where(found, 0.0, 1.0), fog.estimate_airlight(image, found))
    assert fogged[found].std(axis=0).max() < 1.0  # a uniform veil, the airlight, all over the sky
    for camera in ("CAM_FRONT_LEFT", "CAM_BACK_LEFT__1532402927647423"):
        scene = next(s for s in dataset.scenes if camera in s.file_name)
        facade = sky_mask(scene.load_rgb(), scene.extra["intrinsics"]["cy"])[:400]
        assert facade.mean() < 0.05, camera  # grey facades up to the top of the frame are not sky
