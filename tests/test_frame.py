"""The along-shore frame: sampler accuracy, normals, rays, and the layout contract."""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
from scipy.interpolate import RegularGridInterpolator
from shapely.geometry import LineString

from coastmon.config import CoastSettings
from coastmon.geometry import bilinear_sampler, build_frame, extract_coastline, find_capes

GEOD = pyproj.Geod(ellps="WGS84")


def _regular(lon0, lat0, n_lon, n_lat, dlon, dlat):
    lon1 = lon0 + dlon * np.arange(n_lon)
    lat1 = lat0 + dlat * np.arange(n_lat)
    lon, lat = np.meshgrid(lon1, lat1)
    return lon1, lat1, lon, lat


def _planted(lon0, lat0, half_km, step_km):
    """Regular grid and km coordinates from pyproj's own azimuthal equidistant projection."""
    n = int(round(2 * half_km / step_km)) + 1
    dlat = step_km / 111.0
    dlon = step_km / (111.0 * np.cos(np.radians(lat0)))
    lat1 = lat0 + dlat * (np.arange(n) - (n - 1) / 2)
    lon1 = lon0 + dlon * (np.arange(n) - (n - 1) / 2)
    lon, lat = np.meshgrid(lon1, lat1)
    proj = pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, datum="WGS84", units="km")
    x, y = proj(lon, lat)
    return lon, lat, np.asarray(x), np.asarray(y), proj


def test_sampler_is_exact_for_a_linear_field_on_a_regular_grid():
    lon1, lat1, lon, lat = _regular(-20.0, 30.0, 40, 30, 0.1, 0.08)
    field = 3.0 + 2.0 * lon - 5.0 * lat
    rng = np.random.default_rng(0)
    plon = rng.uniform(lon1[0], lon1[-1], 500)
    plat = rng.uniform(lat1[0], lat1[-1], 500)
    sampler, valid = bilinear_sampler(lon, lat, np.ones(lon.shape, int), plon, plat)
    assert valid.all()
    # check: common practice, bilinear interpolation is exact for linear functions
    np.testing.assert_allclose(sampler @ field.ravel(), 3.0 + 2.0 * plon - 5.0 * plat,
                               rtol=0, atol=1e-10)


def test_sampler_matches_scipy_regular_grid_interpolator():
    lon1, lat1, lon, lat = _regular(170.0, -40.0, 50, 45, 0.25, 0.2)
    field = np.sin(np.radians(4 * lon)) * np.cos(np.radians(7 * lat)) + 0.01 * lon * lat
    rng = np.random.default_rng(1)
    plon = rng.uniform(lon1[0], lon1[-1], 400)
    plat = rng.uniform(lat1[0], lat1[-1], 400)
    sampler, valid = bilinear_sampler(lon, lat, np.ones(lon.shape, int), plon, plat)
    reference = RegularGridInterpolator((lat1, lon1), field, method="linear")(
        np.column_stack([plat, plon]))
    assert valid.all()
    # check: scipy.interpolate.RegularGridInterpolator (linear)
    np.testing.assert_allclose(sampler @ field.ravel(), reference, rtol=0, atol=1e-12)


def test_sampler_on_a_rotated_curvilinear_grid_is_exact_for_a_field_linear_in_km():
    lon0, lat0 = 12.0, -25.0
    proj = pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, datum="WGS84", units="km")
    angle = np.radians(30.0)
    i, j = np.meshgrid(np.arange(-20, 21) * 5.0, np.arange(-20, 21) * 5.0, indexing="ij")
    gx = j * np.cos(angle) - i * np.sin(angle)
    gy = j * np.sin(angle) + i * np.cos(angle)
    lon, lat = proj(gx, gy, inverse=True)
    lon, lat = np.asarray(lon), np.asarray(lat)
    field = 1.0 + 0.3 * gx - 0.7 * gy
    rng = np.random.default_rng(2)
    px, py = rng.uniform(-60, 60, 300), rng.uniform(-60, 60, 300)
    plon, plat = proj(px, py, inverse=True)
    sampler, valid = bilinear_sampler(lon, lat, np.ones(lon.shape, int), plon, plat)
    assert valid.all()
    # check: common practice, bilinear interpolation on parallelogram cells is exact for
    # linear functions; the grid is parallelogram in pyproj's projection, and the sampler
    # inverts it in its own (slightly different centre) projection, hence 1e-4 of the range
    np.testing.assert_allclose(sampler @ field.ravel(), 1.0 + 0.3 * px - 0.7 * py, atol=5e-3)


def test_sampler_uses_only_sea_points_and_renormalises():
    lon1, lat1, lon, lat = _regular(0.0, 0.0, 10, 10, 1.0, 1.0)
    mask = np.ones(lon.shape, int)
    mask[:, :5] = 0
    plon = np.array([4.5, 4.25, 2.0, 20.0])
    plat = np.array([3.5, 3.0, 3.0, 3.0])
    sampler, valid = bilinear_sampler(lon, lat, mask, plon, plat)
    dense = sampler.toarray()
    # check: common practice, no source (renormalised weights over the sea neighbours)
    assert valid.tolist() == [True, True, False, False]
    np.testing.assert_allclose(dense.sum(axis=1), [1.0, 1.0, 0.0, 0.0])
    land_columns = np.flatnonzero(mask.ravel() == 0)
    assert np.all(dense[:, land_columns] == 0)
    # check: common practice, bilinear weights 0.5/0.5 between rows 3 and 4 on column 5
    row = dense[0]
    assert row[3 * 10 + 5] == pytest.approx(0.5) and row[4 * 10 + 5] == pytest.approx(0.5)


@pytest.fixture(scope="module")
def straight_coast():
    """A straight north-south coast at x = 0 km, sea to the west, at 35 N."""
    lon, lat, x, y, proj = _planted(-10.0, 35.0, 250.0, 5.0)
    mask = (x < 0.0).astype(int)
    cfg = CoastSettings(ray_length_km=200.0, ray_spacing_km=10.0)
    coast = extract_coastline(lon, lat, mask, cfg)
    return lon, lat, mask, cfg, coast, build_frame(coast, lon, lat, mask, cfg)


def test_frame_layout_follows_the_contract(straight_coast):
    lon, lat, mask, cfg, coast, frame = straight_coast
    s, o, r = frame.n_stations, len(cfg.offsets_km), frame.ray_km.size
    assert frame.sampler.shape == (s * o + s * r, lon.size)
    assert frame.valid.shape == (s * o + s * r,)
    assert frame.section_lon.shape == (s, o) and frame.ray_lon.shape == (s, r)
    assert list(frame.stations.columns) == ["station_id", "segment_id", "alongshore_km", "lon",
                                            "lat", "normal_az_deg", "ray_dir",
                                            "ring_length_km"]
    # check: common practice, no source (split inverts the station-major row layout)
    field = np.arange(lon.size, dtype=float) % 7
    samples = frame.sampler @ field
    section, rays = frame.split(np.stack([samples, 2 * samples]))
    assert section.shape == (2, s, o) and rays.shape == (2, s, r)
    np.testing.assert_array_equal(section[1, 3, 2], 2 * samples[3 * o + 2])
    np.testing.assert_array_equal(rays[0, 4, 1], samples[s * o + 4 * r + 1])
    invalid = ~frame.valid
    assert np.all(np.isnan(np.concatenate([frame.section_lon.ravel(),
                                           frame.ray_lon.ravel()])[invalid]))


def test_stations_normals_and_westward_rays_on_a_straight_coast(straight_coast):
    lon, lat, mask, cfg, coast, frame = straight_coast
    st = frame.stations
    # check: common practice, no source (station spacing along the coast)
    np.testing.assert_allclose(np.diff(st["alongshore_km"]), cfg.station_spacing_km)
    # check: planted truth, sea to the west, so the offshore normal points west (270)
    np.testing.assert_allclose(st["normal_az_deg"], 270.0, atol=1.5)
    assert np.all(st["ray_dir"] == -1)
    k = len(st) // 2
    ok = np.isfinite(frame.ray_lon[k])
    assert ok.sum() == frame.ray_km.size
    _, _, dist = GEOD.inv(np.full(ok.sum(), st["lon"][k]), np.full(ok.sum(), st["lat"][k]),
                          frame.ray_lon[k, ok], frame.ray_lat[k, ok])
    # check: pyproj geodesic; along a parallel the geodesic is shorter than the parallel
    # arc by well under 0.1 % at these distances
    np.testing.assert_allclose(dist / 1000.0, frame.ray_km[ok], rtol=1e-3)
    np.testing.assert_array_equal(frame.ray_lat[k, ok], st["lat"][k])
    _, _, dsec = GEOD.inv(np.full(len(cfg.offsets_km), st["lon"][k]),
                          np.full(len(cfg.offsets_km), st["lat"][k]),
                          frame.section_lon[k], frame.section_lat[k])
    # check: pyproj geodesic (offsets measured from the station)
    np.testing.assert_allclose(dsec / 1000.0, cfg.offsets_km, atol=0.5)


def test_ray_goes_east_from_a_western_boundary_and_stops_at_land():
    lon, lat, x, y, proj = _planted(60.0, -20.0, 250.0, 5.0)
    island = (np.abs(x - 150.0) < 15.0) & (np.abs(y) < 40.0)
    mask = ((x > 0.0) & ~island).astype(int)
    cfg = CoastSettings(ray_length_km=220.0, ray_spacing_km=10.0, min_segment_km=300.0)
    coast = extract_coastline(lon, lat, mask, cfg)
    frame = build_frame(coast, lon, lat, mask, cfg)
    st = frame.stations
    # check: planted truth, sea to the east of the coast (a western boundary)
    assert np.all(st["ray_dir"] == 1)
    sx, sy = proj(st["lon"].to_numpy(), st["lat"].to_numpy())
    blocked = np.abs(sy) < 30.0
    rx, _ = proj(frame.ray_lon, frame.ray_lat)
    for k in np.flatnonzero(blocked):
        ok = np.isfinite(frame.ray_lon[k])
        # check: planted truth, the land block spans x = 135..165 km; the ray stops before it
        assert np.all(rx[k, ok] < 135.0 + 5.0)
        assert not ok[-1]
        assert np.all(np.diff(ok.astype(int)) <= 0)
    free = np.abs(sy) > 60.0
    # check: planted truth, rays that miss the land block run their full length
    assert np.all(np.isfinite(frame.ray_lon[free]))


def test_normals_neither_cross_land_nor_each_other_at_a_concave_bend():
    lon, lat, x, y, proj = _planted(-30.0, 20.0, 220.0, 2.5)
    radius = 40.0
    # straight coast at x = 0 (sea west) with a round bay of radius 40 km cut into the land
    land = (x >= 0.0) & (np.hypot(x, y) >= radius)
    mask = (~land).astype(int)
    cfg = CoastSettings(offsets_km=(0.0, 10.0, 20.0, 30.0, 40.0, 60.0, 80.0))
    coast = extract_coastline(lon, lat, mask, cfg)
    frame = build_frame(coast, lon, lat, mask, cfg)
    lines = []
    for k in range(frame.n_stations):
        ok = np.isfinite(frame.section_lon[k])
        if ok.sum() < 2:
            continue
        sx, sy = proj(frame.section_lon[k, ok], frame.section_lat[k, ok])
        lines.append(LineString(np.column_stack([sx, sy])))
        t = np.linspace(0.0, 1.0, 50)
        dense_x = np.interp(t * (len(sx) - 1), np.arange(len(sx)), sx)
        dense_y = np.interp(t * (len(sy) - 1), np.arange(len(sy)), sy)
        on_land = (dense_x >= 0.5) & (np.hypot(dense_x, dense_y) >= radius + 0.5)
        # check: planted truth, no section passes over the planted land
        assert not on_land.any(), k
    crossings = sum(a.crosses(b) for i, a in enumerate(lines) for b in lines[i + 1:])
    # check: common practice, no source (sections do not fold over each other)
    assert crossings == 0
    inside_bay = [ln for ln in lines if abs(ln.coords[0][1]) < 20.0 and ln.coords[0][0] > 20.0]
    assert len(inside_bay) >= 3


def test_cape_and_sections_on_a_rotated_curvilinear_grid():
    proj = pyproj.Proj(proj="aeqd", lat_0=-30.0, lon_0=-72.0, datum="WGS84", units="km")
    angle = np.radians(25.0)
    i, j = np.meshgrid(np.arange(-60, 61) * 4.0, np.arange(-60, 61) * 4.0, indexing="ij")
    gx = j * np.cos(angle) - i * np.sin(angle)
    gy = j * np.sin(angle) + i * np.cos(angle)
    lon, lat = (np.asarray(v) for v in proj(gx, gy, inverse=True))
    mask = (gx < 60.0 - 25.0 * np.exp(-0.5 * (gy / 12.0) ** 2)).astype(int)
    cfg = CoastSettings()
    coast = extract_coastline(lon, lat, mask, cfg)
    capes = find_capes(coast, cfg)
    cx, cy = proj(capes["lon"].to_numpy(), capes["lat"].to_numpy())
    # check: planted truth, one cape at the bump apex (35, 0) km, within one 4 km cell
    assert len(capes) == 1 and np.hypot(cx[0] - 35.0, cy[0]) < 4.0 * np.sqrt(2)
    frame = build_frame(coast, lon, lat, mask, cfg)
    section, _ = frame.split(frame.sampler @ (1.0 + 0.3 * gx - 0.7 * gy).ravel())
    sx, sy = proj(frame.section_lon, frame.section_lat)
    offshore = np.isfinite(sx[:, 1:])
    assert offshore.sum() > 100
    # check: common practice, bilinear interpolation on parallelogram cells is exact for
    # linear functions (all four neighbours at sea beyond the first offset)
    np.testing.assert_allclose(section[:, 1:][offshore],
                               (1.0 + 0.3 * sx - 0.7 * sy)[:, 1:][offshore], atol=1e-5)
    # check: planted truth, the sea lies west (rays westward)
    assert np.all(frame.stations["ray_dir"] == -1)
