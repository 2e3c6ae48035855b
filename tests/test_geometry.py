"""Coastline extraction, curvature and capes, checked against analytic and outside references."""

from __future__ import annotations

import re

import numpy as np
import pyogrio
import pyproj
import pytest
from global_land_mask import globe
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from coastmon.config import CoastSettings
from coastmon.errors import GeometryError
from coastmon.geometry import (
    capes_layer,
    coastline_layer,
    curvature,
    extract_coastline,
    find_capes,
)

GEOD = pyproj.Geod(ellps="WGS84")
SLOW_PROPERTY = settings(max_examples=4, deadline=None,
                         suppress_health_check=[HealthCheck.too_slow])


def _uniform_closed(x: np.ndarray, y: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Resample a densely sampled closed curve to n points at uniform arclength."""
    xx, yy = np.append(x, x[0]), np.append(y, y[0])
    s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(xx), np.diff(yy)))])
    su = np.arange(n) * s[-1] / n
    return np.interp(su, s, xx), np.interp(su, s, yy)


def _grid(lon0: float, lat0: float, half_km: float, step_km: float):
    """Regular lon/lat grid around (lon0, lat0) and the local km coordinates of its points.

    The km coordinates come from pyproj's azimuthal equidistant projection (independent of
    the code under test), so shapes can be planted in km.
    """
    dlat = step_km / 111.0
    dlon = step_km / (111.0 * np.cos(np.radians(lat0)))
    n_lat = int(round(2 * half_km / step_km)) + 1
    lat1 = lat0 + dlat * (np.arange(n_lat) - (n_lat - 1) / 2)
    lon1 = lon0 + dlon * (np.arange(n_lat) - (n_lat - 1) / 2)
    lon, lat = np.meshgrid(lon1, lat1)
    proj = pyproj.Proj(proj="aeqd", lat_0=lat0, lon_0=lon0, datum="WGS84", units="km")
    x, y = proj(lon, lat)
    return lon, lat, np.asarray(x), np.asarray(y), proj


def _bumpy_island(x, y, phi0, r0=40.0, h=20.0, w=0.3):
    """Land (0) inside r(phi) = r0 + h exp(-(phi - phi0)^2 / (2 w^2)); sea (1) elsewhere."""
    rho = np.hypot(x, y)
    dphi = np.angle(np.exp(1j * (np.arctan2(y, x) - phi0)))
    radius = r0 + h * np.exp(-0.5 * (dphi / w) ** 2)
    return (rho >= radius).astype(int)


def _nearest_cape(capes, lon, lat):
    _, _, dist = GEOD.inv(capes["lon"].to_numpy(), capes["lat"].to_numpy(),
                          np.full(len(capes), lon), np.full(len(capes), lat))
    k = int(np.argmin(dist))
    return capes.iloc[k], dist[k] / 1000.0


# --- curvature -----------------------------------------------------------------------


def test_circle_curvature_is_inverse_radius():
    t = np.linspace(0.0, 2 * np.pi, 2000, endpoint=False)
    radius = 50.0
    k = curvature(radius * np.cos(t), radius * np.sin(t), 1.0, closed=True)
    # check: analytic, a circle of radius R has curvature 1/R (do Carmo 1976, sec. 1-5)
    np.testing.assert_allclose(k, 1.0 / radius, rtol=1e-3)


def test_smoothed_circle_shrinks_as_published():
    t = np.linspace(0.0, 2 * np.pi, 1000, endpoint=False)
    radius, sigma = 50.0, 20.0
    k = curvature(radius * np.cos(t), radius * np.sin(t), sigma, closed=True)
    # check: Mokhtarian & Mackworth 1992 (Gaussian smoothing shrinks a circle to
    # R exp(-sigma^2 / 2R^2))
    np.testing.assert_allclose(k, np.exp(sigma**2 / (2 * radius**2)) / radius, rtol=2e-3)


def test_ellipse_vertex_curvature():
    a, b = 120.0, 60.0
    t = np.linspace(0.0, 2 * np.pi, 20000, endpoint=False)
    x, y = _uniform_closed(a * np.cos(t), b * np.sin(t), 1200)
    k = curvature(x, y, 0.5, closed=True)
    end_major = int(np.argmax(x))
    end_minor = int(np.argmax(y))
    # check: analytic, ellipse curvature a/b^2 at the ends of the major axis (do Carmo 1976)
    assert k[end_major] == pytest.approx(a / b**2, rel=0.01)
    # check: analytic, ellipse curvature b/a^2 at the ends of the minor axis (do Carmo 1976)
    assert k[end_minor] == pytest.approx(b / a**2, rel=0.01)


def test_curvature_of_nonuniform_points_matches_uniform():
    t = np.sort(np.random.default_rng(1).uniform(0, 2 * np.pi, 800))
    radius = 30.0
    k = curvature(radius * np.cos(t), radius * np.sin(t), 4.0, closed=True)
    # check: analytic, a circle has curvature 1/R however it is sampled (do Carmo 1976)
    np.testing.assert_allclose(k, 1.0 / radius, rtol=0.02)


def test_open_straight_line_has_zero_curvature_to_its_ends():
    s = np.linspace(0.0, 100.0, 101)
    k = curvature(3.0 + 0.6 * s, -2.0 + 0.8 * s, 20.0, closed=False)
    # check: analytic, a straight line has zero curvature (do Carmo 1976)
    np.testing.assert_allclose(k, 0.0, atol=1e-9)


def test_open_arc_curvature_away_from_ends():
    t = np.linspace(0.0, np.pi, 600)
    radius = 40.0
    k = curvature(radius * np.cos(t), radius * np.sin(t), 1.0, closed=False)
    # check: analytic, an arc of radius R has curvature 1/R (do Carmo 1976)
    np.testing.assert_allclose(k[50:-50], 1.0 / radius, rtol=2e-3)


# --- extraction, orientation and sign ----------------------------------------------------


def test_land_disc_is_anticlockwise_island_with_positive_curvature():
    lon, lat, x, y, _ = _grid(10.0, 0.0, 120.0, 2.0)
    radius = 50.0
    mask = (np.hypot(x, y) > radius).astype(int)
    coast = extract_coastline(lon, lat, mask, CoastSettings())
    assert len(coast.segments) == 1
    seg = coast.segments[0]
    assert seg.closed and seg.island
    k = curvature(seg.x_km, seg.y_km, 10.0, closed=True)
    assert np.all(k > 0)
    # check: analytic, circle of radius R has curvature 1/R (do Carmo 1976); traced on a
    # 2 km grid, so a few percent
    assert np.mean(k) == pytest.approx(1.0 / radius, rel=0.04)
    # check: analytic, circumference 2 pi R (grid-traced, a few percent)
    assert seg.length_km == pytest.approx(2 * np.pi * radius, rel=0.03)


def test_round_island_has_no_cape():
    lon, lat, x, y, _ = _grid(10.0, 0.0, 120.0, 2.0)
    mask = (np.hypot(x, y) > 50.0).astype(int)
    capes = find_capes(extract_coastline(lon, lat, mask, CoastSettings()), CoastSettings())
    # check: common practice, no source (a disc has no point standing out from its shore)
    assert len(capes) == 0


def test_bump_of_land_into_sea_is_a_cape_with_positive_curvature():
    lon, lat, x, y, proj = _grid(-20.0, 30.0, 200.0, 2.0)
    h, w = 25.0, 12.0
    coast_x = -h * np.exp(-0.5 * (y / w) ** 2)
    mask = (x < coast_x).astype(int)
    cfg = CoastSettings()
    coast = extract_coastline(lon, lat, mask, cfg)
    assert len(coast.segments) == 1 and not coast.segments[0].closed
    capes = find_capes(coast, cfg)
    apex_lon, apex_lat = proj(-h, 0.0, inverse=True)
    cape, dist = _nearest_cape(capes, apex_lon, apex_lat)
    # check: planted truth, the apex of the bump at (-h, 0) km; within one grid cell
    assert dist < 2.0 * np.sqrt(2)
    assert cape["curvature_per_km"] > 0
    # check: planted truth, the bump faces west (sea to the west)
    assert abs(cape["normal_az_deg"] - 270.0) < 5.0
    # check: common practice, no source (protrusion is below the bump height and above
    # the height left after smoothing at the largest scale, h w / sqrt(w^2 + sigma^2))
    assert h * w / np.hypot(w, cfg.scales_km[-1]) < cape["protrusion_km"] <= h + 2.0
    assert len(capes) == 1


def test_bay_has_negative_curvature_and_no_cape():
    lon, lat, x, y, _ = _grid(-20.0, 30.0, 200.0, 2.0)
    coast_x = 25.0 * np.exp(-0.5 * (y / 15.0) ** 2)
    mask = (x < coast_x).astype(int)
    cfg = CoastSettings()
    coast = extract_coastline(lon, lat, mask, cfg)
    seg = coast.segments[0]
    k = curvature(seg.x_km, seg.y_km, 10.0, closed=False)
    middle = int(np.argmin(np.abs(seg.y_km)))
    # check: analytic, a bay (concave toward the sea) has negative curvature with sea on the right
    assert k[middle] < 0
    # check: planted truth, the coast has no seaward bump
    assert len(find_capes(coast, cfg)) == 0


def test_domain_edge_is_never_coastline():
    lon, lat, x, y, _ = _grid(0.0, -20.0, 150.0, 3.0)
    mask = (np.hypot(x, y) > 40.0).astype(int)
    mask[0, :] = mask[-1, :] = mask[:, 0] = mask[:, -1] = 0
    coast = extract_coastline(lon, lat, mask, CoastSettings())
    # check: planted truth, only the island is coast; the land wall around the domain is not
    assert len(coast.segments) == 1 and coast.segments[0].island


def test_coast_running_off_the_domain_is_open_and_stays_inside():
    lon, lat, x, y, _ = _grid(0.0, -20.0, 150.0, 3.0)
    mask = (x < 20.0 + 0.2 * y).astype(int)
    coast = extract_coastline(lon, lat, mask, CoastSettings(min_segment_km=10.0))
    assert len(coast.segments) == 1
    seg = coast.segments[0]
    assert not seg.closed
    lat1 = lat[:, 0]
    dlat = lat1[1] - lat1[0]
    # check: planted truth, the ends lie within the domain, inside the outermost cell row
    assert seg.lat.min() >= lat1[1] - 1e-9 and seg.lat.max() <= lat1[-2] + 1e-9
    assert seg.lat.min() < lat1[1] + dlat and seg.lat.max() > lat1[-2] - dlat


def test_alongshore_length_agrees_with_geodesic_length():
    lon1 = np.arange(-11.5, -7.0, 0.03)
    lat1 = np.arange(36.3, 44.2, 0.03)
    lon, lat = np.meshgrid(lon1, lat1)
    mask = (~globe.is_land(lat, lon)).astype(int)
    coast = extract_coastline(lon, lat, mask, CoastSettings())
    seg = coast.segments[0]
    geodesic_km = GEOD.line_length(seg.lon, seg.lat) / 1000.0
    # check: pyproj geodesic (Geod.line_length, WGS84); local projection error < 0.5 %
    assert seg.length_km == pytest.approx(geodesic_km, rel=5e-3)
    layer = coastline_layer(coast)
    # check: pyproj geodesic (Geod.line_length, WGS84)
    assert layer["length_km"].iloc[0] == pytest.approx(geodesic_km, rel=1e-9)


def test_isobath_boundary_follows_planted_depth_contour():
    lon, lat, x, y, _ = _grid(5.0, -30.0, 150.0, 3.0)
    depth = 10.0 * (60.0 - x)
    mask = (depth > 0).astype(int)
    cfg = CoastSettings(boundary="isobath", isobath_m=200.0)
    coast = extract_coastline(lon, lat, mask, cfg, bathymetry=depth)
    seg = coast.segments[0]
    proj = pyproj.Proj(proj="aeqd", lat_0=-30.0, lon_0=5.0, datum="WGS84", units="km")
    px, _ = proj(seg.lon, seg.lat)
    # check: planted truth, depth = 10 (60 - x) reaches 200 m at x = 40 km (linear in x, so
    # marching squares is exact up to the projection of the grid)
    np.testing.assert_allclose(px, 40.0, atol=0.2)
    # check: planted truth, the deep side (x < 40 km, west) is the sea; the sea is on the right
    # of a segment running north to south
    assert seg.lat[-1] < seg.lat[0]


@pytest.mark.parametrize(
    ("mask_value", "words"), [(1, "no land"), (0, "no sea")]
)
def test_uniform_mask_raises_geometry_error(mask_value, words):
    lon, lat = np.meshgrid(np.linspace(0, 2, 30), np.linspace(40, 42, 30))
    with pytest.raises(GeometryError, match=words):
        extract_coastline(lon, lat, np.full(lon.shape, mask_value), CoastSettings())


def test_coast_shorter_than_smallest_scale_raises():
    lon, lat, x, y, _ = _grid(0.0, 0.0, 60.0, 1.0)
    mask = (np.hypot(x, y) > 2.0).astype(int)
    cfg = CoastSettings(min_segment_km=1.0, scales_km=(20.0, 40.0))
    with pytest.raises(GeometryError, match="shorter than the smallest"):
        extract_coastline(lon, lat, mask, cfg)


def test_isobath_without_bathymetry_raises():
    lon, lat = np.meshgrid(np.linspace(0, 2, 30), np.linspace(40, 42, 30))
    mask = (lon > 1).astype(int)
    with pytest.raises(GeometryError, match="bathymetry"):
        extract_coastline(lon, lat, mask, CoastSettings(boundary="isobath"))


# --- invariance properties (hypothesis, few small examples) -------------------------------


@SLOW_PROPERTY
@given(phi0=st.floats(0.0, 2 * np.pi))
def test_cape_follows_rotation_of_the_coast(phi0):
    lon, lat, x, y, proj = _grid(30.0, 10.0, 100.0, 2.0)
    cfg = CoastSettings()
    capes = find_capes(extract_coastline(lon, lat, _bumpy_island(x, y, phi0), cfg), cfg)
    reference = find_capes(extract_coastline(lon, lat, _bumpy_island(x, y, 0.0), cfg), cfg)
    apex_lon, apex_lat = proj(60.0 * np.cos(phi0), 60.0 * np.sin(phi0), inverse=True)
    cape, dist = _nearest_cape(capes, apex_lon, apex_lat)
    # check: planted truth, apex at r0 + h = 60 km in direction phi0; within one grid cell
    assert dist < 2.0 * np.sqrt(2)
    assert len(capes) == 1 and len(reference) == 1
    # check: analytic, curvature is invariant under rotation (do Carmo 1976); the traced
    # grid steps differ between rotations, hence 10 %
    assert cape["curvature_per_km"] == pytest.approx(
        reference["curvature_per_km"].iloc[0], rel=0.10)
    assert cape["protrusion_km"] == pytest.approx(reference["protrusion_km"].iloc[0], abs=2.0)


@SLOW_PROPERTY
@given(phi0=st.floats(0.0, 2 * np.pi))
def test_cape_is_stable_when_grid_resolution_doubles(phi0):
    cfg = CoastSettings()
    coarse_step = 3.0
    found = []
    for step in (coarse_step, coarse_step / 2):
        lon, lat, x, y, proj = _grid(-40.0, -15.0, 100.0, step)
        capes = find_capes(extract_coastline(lon, lat, _bumpy_island(x, y, phi0), cfg), cfg)
        assert len(capes) == 1
        found.append(capes.iloc[0])
    _, _, dist = GEOD.inv(found[0]["lon"], found[0]["lat"], found[1]["lon"], found[1]["lat"])
    # check: common practice, no source (position within one coarse cell)
    assert dist / 1000.0 < coarse_step * np.sqrt(2)
    # check: common practice, no source (curvature of the same shape within 10 %)
    assert found[0]["curvature_per_km"] == pytest.approx(found[1]["curvature_per_km"], rel=0.10)


@SLOW_PROPERTY
@given(lon0=st.floats(-179.9, 179.9), phi0=st.floats(0.0, 2 * np.pi))
@example(lon0=179.8, phi0=1.0)
def test_capes_do_not_depend_on_longitude_convention(lon0, phi0):
    lon, lat, x, y, _ = _grid(lon0, 45.0, 100.0, 2.5)
    mask = _bumpy_island(x, y, phi0)
    cfg = CoastSettings()
    west_east = np.mod(lon + 180.0, 360.0) - 180.0
    zero_360 = np.mod(lon, 360.0)
    a = find_capes(extract_coastline(west_east, lat, mask, cfg), cfg)
    b = find_capes(extract_coastline(zero_360, lat, mask, cfg), cfg)
    assert len(a) == len(b) == 1
    # check: common practice, no source (the same meridian written two ways)
    assert np.mod(a["lon"].iloc[0] - b["lon"].iloc[0] + 180.0, 360.0) - 180.0 == pytest.approx(
        0.0, abs=1e-6)
    assert a["lat"].iloc[0] == pytest.approx(b["lat"].iloc[0], abs=1e-6)
    assert a["curvature_per_km"].iloc[0] == pytest.approx(b["curvature_per_km"].iloc[0],
                                                          rel=1e-6)


# --- real coasts ------------------------------------------------------------------------


def _real_capes(lon1, lat1):
    lon, lat = np.meshgrid(lon1, lat1)
    mask = (~globe.is_land(lat, lon)).astype(int)
    cfg = CoastSettings()
    return find_capes(extract_coastline(lon, lat, mask, cfg), cfg)


@pytest.mark.parametrize(
    ("name", "lat", "lon"),
    [
        ("Cabo Finisterre", 42.88, -9.27),
        ("Cabo da Roca", 38.78, -9.50),
        ("Cabo de Sao Vicente", 37.02, -8.99),
    ],
)
def test_headlands_of_western_iberia_are_found(iberia_capes, name, lat, lon):
    _, dist = _nearest_cape(iberia_capes, lon, lat)
    # check: from memory (headland coordinates); within 30 km on a ~3 km land mask
    assert dist < 30.0, name


@pytest.fixture(scope="module")
def iberia_capes():
    return _real_capes(np.arange(-11.5, -7.0, 0.03), np.arange(36.3, 44.2, 0.03))


def test_headlands_of_south_western_africa_are_found():
    capes = _real_capes(np.arange(15.5, 20.5, 0.03), np.arange(-35.5, -30.5, 0.03))
    for name, lat, lon in [("Cape of Good Hope", -34.36, 18.47),
                           ("Cape Columbine", -32.83, 17.85)]:
        _, dist = _nearest_cape(capes, lon, lat)
        # check: from memory (headland coordinates); within 30 km on a ~3 km land mask
        assert dist < 30.0, name
    # check: common practice, no source (a catalogue of tens, not hundreds)
    assert 2 <= len(capes) <= 30


def test_iberian_catalogue_is_short(iberia_capes):
    # check: common practice, no source (a catalogue of tens, not hundreds)
    assert 3 <= len(iberia_capes) <= 30
    # ids are the tip positions rounded to 0.1 degree: C<lat><N|S><lon><E|W>
    for cid, lon, lat in zip(iberia_capes["cape_id"], iberia_capes["lon"], iberia_capes["lat"],
                             strict=True):
        m = re.fullmatch(r"C(\d\d\.\d)([NS])(\d\d\d\.\d)([EW])(-\d+)?", cid)
        assert m, cid
        code_lat = float(m[1]) * (1 if m[2] == "N" else -1)
        code_lon = float(m[3]) * (1 if m[4] == "E" else -1)
        # check: arithmetic (rounding to the nearest 0.1 moves a value by at most 0.05)
        assert abs(code_lat - lat) <= 0.05 + 1e-9 and abs(code_lon - lon) <= 0.05 + 1e-9
    assert iberia_capes["cape_id"].is_unique


# --- GIS layers -------------------------------------------------------------------------


def test_layers_round_trip_through_geopackage(tmp_path, iberia_capes):
    lon1, lat1 = np.arange(-11.5, -7.0, 0.03), np.arange(36.3, 44.2, 0.03)
    lon, lat = np.meshgrid(lon1, lat1)
    mask = (~globe.is_land(lat, lon)).astype(int)
    coast = extract_coastline(lon, lat, mask, CoastSettings())
    path = tmp_path / "map.gpkg"
    pyogrio.write_dataframe(coastline_layer(coast), path, layer="coastline")
    pyogrio.write_dataframe(capes_layer(iberia_capes), path, layer="capes")
    lines = pyogrio.read_dataframe(path, layer="coastline")
    points = pyogrio.read_dataframe(path, layer="capes")
    # check: GDAL via pyogrio (GeoPackage round trip keeps CRS, geometry type and rows)
    assert lines.crs.to_epsg() == 4326 and points.crs.to_epsg() == 4326
    assert set(lines.geom_type) == {"LineString"} and set(points.geom_type) == {"Point"}
    assert len(points) == len(iberia_capes)
    np.testing.assert_allclose(points.geometry.x, iberia_capes["lon"], atol=1e-9)
    assert {"cape_id", "curvature_per_km", "scale_km", "protrusion_km"} <= set(points.columns)
    assert {"segment_id", "length_km", "closed", "island"} <= set(lines.columns)
