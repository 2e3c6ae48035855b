"""Grid metrics and operators on the sphere, checked against outside references."""

from __future__ import annotations

import gsw
import metpy.calc as mpcalc
import numpy as np
import pyproj
import pytest
import xarray as xr

from coastmon.grid import (
    EARTH_RADIUS_M,
    GridMetrics,
    beta_parameter,
    coriolis_parameter,
    geostrophic_velocity,
    gradient,
    okubo_weiss,
    vorticity,
)
from coastmon.grid.operators import vorticity_dual

G = 9.80665


def _grid(lon0, lon1, lat0, lat1, step):
    lon = np.arange(lon0, lon1 + step / 2, step)
    lat = np.arange(lat0, lat1 + step / 2, step)
    return np.meshgrid(lon, lat)


def _local_xy(lon, lat, lon0, lat0):
    """Local tangent-plane coordinates (m) about (lon0, lat0)."""
    x = EARTH_RADIUS_M * np.cos(np.deg2rad(lat0)) * np.deg2rad(lon - lon0)
    y = EARTH_RADIUS_M * np.deg2rad(lat - lat0)
    return x, y


def test_solid_body_rotation_gives_cell_mean_of_2_omega_sin_phi():
    lon, lat = _grid(-20.0, -5.0, -30.0, -10.0, 0.5)  # off south-west Africa
    omega = 1.0e-5
    u = omega * EARTH_RADIUS_M * np.cos(np.deg2rad(lat))
    v = np.zeros_like(u)
    zeta = vorticity_dual(u, v, GridMetrics.from_lonlat(lon, lat))
    phi = np.deg2rad(lat)
    expected = omega * (np.sin(phi[:-1, :-1]) + np.sin(phi[1:, :-1]))
    # check: Vallis 2017 §2.2 (solid-body rotation has vorticity 2 omega sin(phi)); cell mean
    # over latitude by integrating sin*cos, exact for the circulation theorem
    np.testing.assert_allclose(zeta, expected, rtol=1e-10)


def test_coriolis_parameter_matches_gsw():
    lat = np.linspace(-80.0, 80.0, 33)
    # check: gsw.f (TEOS-10); Omega differs by 2e-6 relative (7.2921e-5 vs 7.292115e-5)
    np.testing.assert_allclose(coriolis_parameter(lat), gsw.f(lat), rtol=1e-5, atol=1e-12)


def test_beta_matches_finite_difference_of_gsw_f():
    lat = np.linspace(-70.0, 70.0, 15)
    h = 1e-3
    dfdy = (gsw.f(lat + h) - gsw.f(lat - h)) / (2 * np.deg2rad(h) * EARTH_RADIUS_M)
    # check: centred difference of gsw.f (TEOS-10) along a meridian of the same sphere
    np.testing.assert_allclose(beta_parameter(lat), dfdy, rtol=1e-5)


def test_vorticity_matches_metpy_on_latlon_grid():
    lon, lat = _grid(-15.0, -10.0, 35.0, 40.0, 0.1)  # off western Iberia
    u = 0.3 * np.sin(8 * np.deg2rad(lat)) * np.cos(5 * np.deg2rad(lon))
    v = 0.2 * np.cos(6 * np.deg2rad(lat)) * np.sin(7 * np.deg2rad(lon))
    ds = xr.Dataset(
        {"u": (("lat", "lon"), u, {"units": "m/s"}), "v": (("lat", "lon"), v, {"units": "m/s"})},
        coords={"lat": ("lat", lat[:, 0], {"units": "degrees_north"}),
                "lon": ("lon", lon[0], {"units": "degrees_east"})},
    )
    ds = ds.metpy.parse_cf().metpy.assign_crs(grid_mapping_name="latitude_longitude",
                                              earth_radius=EARTH_RADIUS_M)
    ref = mpcalc.vorticity(ds["u"], ds["v"]).metpy.dequantify().values
    ours = vorticity(u, v, GridMetrics.from_lonlat(lon, lat))
    inner = (slice(2, -2), slice(2, -2))
    err = np.max(np.abs(ours[inner] - ref[inner])) / np.max(np.abs(ref[inner]))
    # check: metpy.calc.vorticity with spherical metric terms (latitude_longitude CRS)
    assert err < 2e-4


def test_grid_lengths_match_pyproj_geodesic():
    lon, lat = _grid(-80.0, -75.0, -40.0, -20.0, 0.25)  # off western South America
    m = GridMetrics.from_lonlat(lon, lat)
    geod = pyproj.Geod(ellps="WGS84")
    _, _, dx_ref = geod.inv(lon[:, 1:-1] - 0.125, lat[:, 1:-1], lon[:, 1:-1] + 0.125, lat[:, 1:-1])
    _, _, dy_ref = geod.inv(lon[1:-1], lat[1:-1] - 0.125, lon[1:-1], lat[1:-1] + 0.125)
    # check: pyproj geodesic on WGS84; a sphere of mean radius differs by < 0.5 %
    np.testing.assert_allclose(m.dx_m[:, 1:-1], dx_ref, rtol=5e-3)
    np.testing.assert_allclose(m.dy_m[1:-1], dy_ref, rtol=5e-3)


def test_okubo_weiss_of_solid_body_rotation_and_pure_strain():
    lon0, lat0 = -12.0, 15.0  # off north-west Africa
    lon, lat = _grid(lon0 - 0.3, lon0 + 0.3, lat0 - 0.3, lat0 + 0.3, 0.02)
    x, y = _local_xy(lon, lat, lon0, lat0)
    m = GridMetrics.from_lonlat(lon, lat)
    rate = 2.0e-5
    w_rot = okubo_weiss(-rate * y, rate * x, m)
    # check: Okubo 1970 / Weiss 1991: rigid rotation has no strain, W = -zeta^2 = -(2 rate)^2
    np.testing.assert_allclose(w_rot, -(2 * rate) ** 2, rtol=2e-2)
    w_strain = okubo_weiss(rate * x, -rate * y, m)
    # check: Okubo 1970 / Weiss 1991: pure strain u = a x, v = -a y has s_n = 2a, W = s^2
    np.testing.assert_allclose(w_strain, (2 * rate) ** 2, rtol=2e-2)


def test_geostrophic_velocity_of_gaussian_bump_matches_analytic():
    lam0, phi0, sig = np.deg2rad(-15.0), np.deg2rad(30.0), np.deg2rad(0.5)
    lon, lat = _grid(-17.0, -13.0, 28.0, 32.0, 0.02)
    lam, phi = np.deg2rad(lon), np.deg2rad(lat)
    amp = 0.3
    eta = amp * np.exp(-((lam - lam0) ** 2 + (phi - phi0) ** 2) / (2 * sig**2))
    deta_dx = -eta * (lam - lam0) / sig**2 / (EARTH_RADIUS_M * np.cos(phi))
    deta_dy = -eta * (phi - phi0) / sig**2 / EARTH_RADIUS_M
    f = 2 * 7.2921e-5 * np.sin(phi)
    u_ref, v_ref = -G / f * deta_dy, G / f * deta_dx
    ug, vg = geostrophic_velocity(eta, GridMetrics.from_lonlat(lon, lat))
    inner = (slice(1, -1), slice(1, -1))
    scale = np.max(np.hypot(u_ref, v_ref))
    # check: Gill 1982 §7.6 geostrophic balance, derivative of the Gaussian by hand
    assert np.max(np.abs(ug[inner] - u_ref[inner])) < 2e-3 * scale
    assert np.max(np.abs(vg[inner] - v_ref[inner])) < 2e-3 * scale


def test_gradient_of_a_constant_field_is_zero():
    lon, lat = _grid(-17.0, -13.0, 28.0, 32.0, 0.1)
    m = GridMetrics.from_lonlat(lon, lat)
    gx, gy = gradient(np.full(lon.shape, 1.0), m)
    # check: analytic, the gradient of a constant vanishes (Vallis 2017 §2.2, spherical
    # gradient (1/(a cos phi)) d/d lambda, (1/a) d/d phi)
    assert np.max(np.abs(gx)) < 1e-12 and np.max(np.abs(gy)) < 1e-12
    ug, vg = geostrophic_velocity(np.full(lon.shape, 1.0), m)
    # check: Gill 1982 §7.6, a level sea surface carries no geostrophic current
    assert np.nanmax(np.abs(ug)) < 1e-6 and np.nanmax(np.abs(vg)) < 1e-6


def test_geostrophic_velocity_is_nan_in_equator_band():
    lon, lat = _grid(-30.0, -20.0, -6.0, 6.0, 0.5)
    eta = 0.1 * np.sin(np.deg2rad(lon)) * np.cos(np.deg2rad(lat))
    ug, vg = geostrophic_velocity(eta, GridMetrics.from_lonlat(lon, lat), equator_band_deg=3.0)
    band = np.abs(lat) < 3.0
    # check: Gill 1982 §7.6, the balance fails where f -> 0; band width per the setting
    assert np.isnan(ug[band]).all() and np.isnan(vg[band]).all()
    assert np.isfinite(ug[~band]).all() and np.isfinite(vg[~band]).all()


@pytest.mark.parametrize("flip_lat", [False, True])
def test_vorticity_same_on_0_360_longitudes_and_flipped_latitude(flip_lat):
    lon, lat = _grid(-10.0, 10.0, 10.0, 20.0, 0.25)
    u = 0.2 * np.cos(np.deg2rad(3 * lon)) * np.sin(np.deg2rad(5 * lat))
    v = 0.1 * np.sin(np.deg2rad(4 * lon + 2 * lat))
    ref = vorticity(u, v, GridMetrics.from_lonlat(lon, lat))
    lon360 = lon % 360.0
    lat_in, u_in, v_in = lat, u, v
    if flip_lat:
        lat_in, u_in, v_in, lon360 = lat[::-1], u[::-1], v[::-1], lon360[::-1]
    out = vorticity(u_in, v_in, GridMetrics.from_lonlat(lon360, lat_in))
    if flip_lat:
        out = out[::-1]
    # check: common practice, no source (vorticity is independent of how the grid is labelled)
    np.testing.assert_allclose(out, ref, rtol=1e-9, atol=1e-18)
