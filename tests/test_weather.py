"""Physically based conditions checked against the published formulas they implement."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.weather import colour, distance, fog, night, rain, sky, snow


def srgb_decode(v: float) -> float:
    """IEC 61966-2-1 (sRGB) transfer curve, written out independently of the module."""
    v = v / 255.0
    return v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4


# --------------------------------------------------------------------------------------------------
# fog


def test_transmission_at_the_meteorological_optical_range():
    # WMO-No. 8 / CIE: the MOR V is where a beam keeps 5%; with Koschmieder's t = exp(-beta d) and
    # beta = ln(20) / V, t(V) = 0.05 and t(V / 2) = sqrt(0.05).
    for visibility in (50.0, 150.0, 300.0, 1000.0):
        beta = fog.extinction_coefficient(visibility)
        assert abs(float(fog.transmission(visibility, beta)) - 0.05) < 1e-3
        assert abs(float(fog.transmission(visibility / 2, beta)) - math.sqrt(0.05)) < 1e-3


def test_extinction_matches_sakaridis_visibilities():
    # Sakaridis, Dai, Van Gool, IJCV 2018: beta 0.005, 0.01, 0.02 per metre correspond to visibilities of
    # about 600, 300 and 150 m (FACTS.md).
    for beta, visibility in ((0.005, 600.0), (0.01, 300.0), (0.02, 150.0)):
        assert fog.extinction_coefficient(visibility) == pytest.approx(beta, rel=0.002)


def test_two_percent_threshold_gives_the_older_meteorological_range():
    # AMS meteorological range: 2% threshold, V = 3.912 / beta (FACTS.md).
    assert fog.extinction_coefficient(1000.0, contrast=0.02) == pytest.approx(3.912 / 1000.0, rel=1e-3)


def test_sky_and_far_ground_tend_to_the_airlight_as_visibility_shrinks():
    image = np.zeros((40, 30, 3), np.uint8)
    image[:10] = (90, 140, 220)  # sky
    image[10:] = (60, 70, 50)  # ground
    plane = distance.ground_plane_distance((40, 30), horizon_row=10.0, focal_px=300.0, camera_height_m=1.5)
    airlight = np.array([0.85, 0.87, 0.9])
    target = np.rint(airlight * 255)
    errors = []
    for visibility in (300.0, 100.0, 30.0, 10.0):
        t = fog.transmission(plane, fog.extinction_coefficient(visibility))
        fogged = fog.apply_fog(image, t, airlight).astype(float)
        # Koschmieder: the sky at the far limit (1 km, many times V) shows the airlight.
        assert np.abs(fogged[:10] - target).max() <= 1
        errors.append(np.abs(fogged[10:20] - target).max())
    assert all(a > b for a, b in zip(errors, errors[1:], strict=False))
    assert errors[-1] <= 1


def test_apply_fog_is_koschmieder_in_linear_light():
    # I = J t + A (1 - t) (Koschmieder; Sakaridis et al. 2018) on radiance, i.e. decoded sRGB.
    image = np.full((2, 2, 3), (40, 120, 200), np.uint8)
    airlight = np.array([200, 210, 220]) / 255.0
    t = np.full((2, 2), 0.3)
    out = fog.apply_fog(image, t, airlight)[0, 0]
    for channel, (j, a) in enumerate(zip((40, 120, 200), (200, 210, 220), strict=True)):
        expected = srgb_decode(j) * 0.3 + srgb_decode(a) * 0.7
        assert abs(srgb_decode(int(out[channel])) - expected) < 0.006


def test_srgb_round_trip_and_reference_value():
    values = np.arange(256, dtype=np.uint8).reshape(16, 16, 1).repeat(3, axis=2)
    assert np.array_equal(colour.linear_to_srgb(colour.srgb_to_linear(values)), values)
    # IEC 61966-2-1: sRGB 128 decodes to 0.2158605 (from memory; matches the written-out curve above)
    assert float(colour.srgb_to_linear(np.full((1, 1, 3), 128, np.uint8))[0, 0, 0]) == pytest.approx(0.2158605, 1e-5)


def test_ground_plane_follows_the_pinhole_over_a_plane():
    # Hartley & Zisserman 2004: a ground point imaged at row v lies at Z = f h_cam / (v - v_h).
    plane = distance.ground_plane_distance((60, 50), horizon_row=20.0, focal_px=200.0, camera_height_m=1.5, far_m=500.0)
    assert (plane[:20] == 500.0).all()
    for row in (25, 45, 59):
        assert plane[row, 45] == pytest.approx(200.0 * 1.5 / (row + 0.5 - 20.0))
    assert plane[20, 0] == 500.0  # 0.5 rows below the horizon: 600 m, capped at the far limit


def test_sky_mask_stops_at_outlines():
    image = np.zeros((60, 80, 3), np.uint8)
    image[:30, :, 2] = np.linspace(235, 175, 30).astype(np.uint8)[:, None]  # a smooth blue sky gradient
    image[:30, :, 1] = (image[:30, :, 2] * 0.8).astype(np.uint8)
    image[:30, :, 0] = image[:30, :, 2] // 2
    image[5:40, 50:70] = (40, 90, 30)  # a tree crown
    image[0:5, 58:62] = (40, 90, 30)  # and its tip at the top edge: foliage is no seed of the sky
    image[30:] = (90, 100, 70)
    found = sky.sky_mask(image, horizon_row=30.0)
    assert found[:30, :45].all() and not found[5:30, 50:70].any() and not found[30:].any()


def test_a_grey_wall_reaching_the_top_is_not_sky():
    # overcast sky (white, low saturation) on the left; a duller smooth grey facade on the right, both at the top
    image = np.full((60, 80, 3), (90, 95, 85), np.uint8)
    image[:30, :40] = (245, 246, 248)
    image[:45, 40:] = (150, 152, 155)
    found = sky.sky_mask(image, horizon_row=30.0)
    assert found[:30, :38].all() and not found[:, 42:].any()


def test_airlight_comes_from_the_haziest_sky_not_a_bright_object():
    image = np.zeros((100, 100, 3), np.uint8)
    image[:40] = (80, 130, 230)  # blue sky
    image[5:25, 60:90] = (235, 235, 240)  # a cloud bank: the brightest dark channel
    image[40:] = (70, 90, 60)
    image[70:72, 10:12] = 255  # a small white object below the horizon
    above = np.zeros((100, 100), bool)
    above[:40] = True
    airlight = fog.estimate_airlight(image, above, patch_px=7)
    assert np.allclose(airlight * 255, (235, 235, 240), atol=1)


def test_airlight_of_a_synthetic_hazy_image_is_recovered():
    # He, Sun, Tang, CVPR 2009: in a haze-free scene most patches hold a dark channel near 0; under haze
    # I = J t + A (1 - t) the brightest dark-channel pixels are the most haze-opaque, so their colour is ~A.
    rng = np.random.default_rng(3)
    height, width = 120, 160
    clear = rng.integers(0, 256, size=(height // 4, width // 4, 3)).astype(np.uint8)
    clear = np.kron(clear, np.ones((4, 4, 1), np.uint8))  # colourful 4 px tiles: each patch has a dark channel
    depth = np.linspace(5.0, 900.0, height)[::-1, None] * np.ones((1, width))  # far at the top
    known = np.array([0.78, 0.8, 0.84])
    hazy = fog.apply_fog(clear, fog.transmission(depth, fog.extinction_coefficient(150.0)), known)
    assert np.allclose(fog.estimate_airlight(hazy), known, atol=2 / 255)


def test_object_contrast_is_weber_contrast_for_a_uniform_object():
    lum = np.full((30, 30), 0.4, np.float32)
    lum[10:20, 10:20] = 0.1
    region = np.zeros((30, 30), bool)
    region[10:20, 10:20] = True
    ring = fog.ring_mask((10, 10, 10, 10), (30, 30))
    assert not (ring & region).any() and ring.any()
    # Weber contrast |L_o - L_b| / L_b
    assert fog.object_contrast(lum, region, ring) == pytest.approx(0.75)


def test_fogged_contrast_falls_as_transmission():
    # Koschmieder: the apparent contrast of an object against a background at its own distance is C0 t(d).
    image = np.full((40, 40, 3), 150, np.uint8)
    image[15:25, 15:25] = 40
    region = np.zeros((40, 40), bool)
    region[15:25, 15:25] = True
    ring = fog.ring_mask((15, 15, 10, 10), (40, 40))
    clear = fog.object_contrast(colour.luminance(colour.srgb_to_linear(image)), region, ring)
    for t in (0.8, 0.4, 0.1):
        fogged = fog.apply_fog(image, np.full((40, 40), t), np.array([0.9, 0.9, 0.9]))
        seen = fog.object_contrast(colour.luminance(colour.srgb_to_linear(fogged)), region, ring)
        # background brightens too (A (1 - t)), so C = t (J_o - J_b) / (t J_b + A (1 - t)): work it out exactly
        jo, jb, a = srgb_decode(40), srgb_decode(150), srgb_decode(round(0.9 * 255))
        expected = t * abs(jo - jb) / (t * jb + a * (1 - t))
        assert seen == pytest.approx(expected, rel=0.05)
        assert seen < clear


def test_bad_fog_inputs_are_refused():
    with pytest.raises(ValueError, match="visibility_m"):
        fog.extinction_coefficient(0.0)
    with pytest.raises(ValueError, match="contrast"):
        fog.extinction_coefficient(100.0, contrast=1.5)
    with pytest.raises(ValueError, match="distances"):
        fog.transmission(np.array([-1.0]), 0.01)
    with pytest.raises(ValueError, match="transmission_map"):
        fog.apply_fog(np.zeros((4, 4, 3), np.uint8), np.full((4, 4), 1.5), np.array([0.5, 0.5, 0.5]))
    with pytest.raises(ValueError, match="airlight"):
        fog.apply_fog(np.zeros((4, 4, 3), np.uint8), np.ones((4, 4)), np.array([2.0, 0.5, 0.5]))
    with pytest.raises(ValueError, match="uint8"):
        fog.estimate_airlight(np.zeros((4, 4, 3)), 2.0)


# --------------------------------------------------------------------------------------------------
# rain and snow


def test_rain_rate_mapping_is_monotone():
    rates = [0.5, 1.0, 5.0, 25.0, 100.0, 300.0]
    density = [rain.visible_drop_density(r) for r in rates]
    wet = [rain.wetness(r) for r in rates]
    diameter = [rain.mean_visible_diameter_mm(r) for r in rates]
    assert all(a < b for a, b in zip(density, density[1:], strict=False))
    assert all(a < b for a, b in zip(wet, wet[1:], strict=False)) and 0 < wet[0] and wet[-1] <= 1
    assert all(a < b for a, b in zip(diameter, diameter[1:], strict=False))


def test_visible_drop_density_integrates_marshall_palmer():
    # Marshall & Palmer 1948 (from memory): N(D) = 8000 exp(-4.1 R^-0.21 D) per m^3 per mm; integrate D >= 1 mm
    # numerically and compare with the closed form.
    for rate in (5.0, 100.0):
        slope = 4.1 * rate**-0.21
        d = np.linspace(1.0, 30.0, 200_001)
        numeric = np.trapezoid(8000.0 * np.exp(-slope * d), d)
        assert rain.visible_drop_density(rate) == pytest.approx(numeric, rel=1e-4)


def test_terminal_velocity_matches_gunn_kinzer_measurements():
    # Gunn & Kinzer, J. Meteorology 6, 1949 (from memory): 1 mm 4.03 m/s, 2 mm 6.49, 3 mm 8.06, 5 mm 9.09.
    for diameter, measured in ((1.0, 4.03), (2.0, 6.49), (3.0, 8.06), (5.0, 9.09)):
        assert rain.terminal_velocity(diameter) == pytest.approx(measured, abs=0.15)


def test_particles_are_longer_near_the_camera_and_hidden_behind_near_surfaces():
    distance = np.full((120, 120), np.inf)
    layer = [rain.Layer(1.0, 1.2, 1)]
    far = [rain.Layer(8.0, 9.0, 1)]
    common = dict(focal_px=300.0, diameter_m=0.002, fall_speed_m_s=6.5, angle_deg=0.0, opacity=1.0, defocus_px_m=0.0)
    near_alpha = rain.particle_alpha(distance, layer, rng=1, **common)
    far_alpha = rain.particle_alpha(distance, far, rng=1, **common)
    near_len = np.count_nonzero(near_alpha.max(axis=1) > 0.05)
    far_len = np.count_nonzero(far_alpha.max(axis=1) > 0.005)
    # streak length f v T / Z: about 30 px at 1.1 m, 4 px at 8.5 m
    assert near_len == pytest.approx(300.0 * 6.5 / 60 / math.sqrt(1.2), abs=3)
    assert far_len < near_len / 4
    hidden = rain.particle_alpha(np.full((120, 120), 0.5), layer, rng=1, **common)
    assert hidden.max() == 0.0


def test_particle_layers_fill_the_frustum_volume():
    # A slab z0..z1 of a frustum W/f x H/f per metre holds (W/f)(H/f)(z1^3 - z0^3)/3 cubic metres.
    layers = rain.particle_layers(
        (200, 300), focal_px=300.0, density_per_m3=1e4, near_m=1.0, far_m=3.0, n_layers=1, rng=0
    )
    expected = 1e4 * (300 / 300) * (200 / 300) * (27 - 1) / 3
    assert layers[0].count == pytest.approx(expected, rel=0.01)


def test_snow_visibility_grades():
    # US National Weather Service (from memory): light snow >= 1 km visibility, heavy <= 400 m.
    assert snow.snow_visibility_m(0.0) == pytest.approx(1000.0)
    assert snow.snow_visibility_m(1.0) == pytest.approx(200.0)
    assert snow.snow_visibility_m(0.6) < 400.0 < snow.snow_visibility_m(0.5)
    with pytest.raises(ValueError, match="intensity"):
        snow.snow_visibility_m(1.2)


def test_wet_road_darkens_only_the_road():
    image = np.full((10, 10, 3), (120, 110, 90), np.uint8)
    road = np.zeros((10, 10), bool)
    road[5:] = True
    out = rain.wet_road(image, road, wetness_level=1.0)
    assert np.array_equal(out[:5], image[:5])
    assert out[5:].astype(int).sum() < image[5:].astype(int).sum()


# --------------------------------------------------------------------------------------------------
# dusk and night


def test_low_light_curve_matches_lv_et_al():
    # Lv, Li, Lu, IJCV 2021: I_out = b (a I)^g
    image = np.array([[[0, 64, 128], [200, 255, 10]]], np.uint8)
    a, b, g = 0.93, 0.6, 2.7
    out = night.low_light_curve(image, a=a, b=b, g=g)
    for value, got in zip(image.ravel(), out.ravel(), strict=True):
        assert got == pytest.approx(b * (a * value / 255.0) ** g, rel=1e-5, abs=1e-7)
    with pytest.raises(ValueError, match="g >= 1"):
        night.low_light_curve(image, a=0.9, b=0.5, g=0.5)


def test_sampled_low_light_parameters_stay_in_the_published_ranges():
    # Lv et al. 2021: a in [0.9, 1], b in [0.5, 1], g in [1.5, 5]
    for condition in ("dusk", "night"):
        for seed in range(20):
            p = night.sample_low_light(condition, seed)
            assert 0.9 <= p.a <= 1 and 0.5 <= p.b <= 1 and 1.5 <= p.g <= 5


def test_poisson_gaussian_noise_has_the_model_variance():
    # Foi et al. 2008: var = I / photons + sigma^2 for a Poisson-Gaussian sensor
    image = np.full((300, 300, 3), 0.2, np.float32)
    noisy = night.poisson_gaussian_noise(image, photons=100.0, read_sigma=0.01, rng=0)
    assert float(noisy.mean()) == pytest.approx(0.2, abs=0.002)
    assert float(noisy.var()) == pytest.approx(0.2 / 100 + 0.01**2, rel=0.05)


def test_lamps_sit_inside_the_box_and_glow():
    box = (40.0, 30.0, 50.0, 30.0)
    for kind in ("head", "tail", "amber"):
        for col, row, radius in night.lamp_positions(box, kind):
            assert 40 < col < 90 and 30 <= row < 60 and radius > 0
    light = night.lamp_light((100, 140), [(60.0, 50.0, 3.0, "tail")], brightness=1.0)
    assert light[50, 60, 0] > 0.9 and light[50, 60, 1] < 0.3  # a red core
    assert 0 < light[50, 70, 0] < light[50, 60, 0]  # glow falls off around it
    with pytest.raises(ValueError, match="lamp kind"):
        night.lamp_positions(box, "blue")
