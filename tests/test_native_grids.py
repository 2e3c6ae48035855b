"""Model-native inputs: staggered C-grids (SGRID), rotated grids, s-coordinates, SSH only."""

from __future__ import annotations

import dask.array as dsa
import numpy as np
import pytest
import xarray as xr

from coastmon.config import IngestSettings
from coastmon.grid import EARTH_RADIUS_M, GridMetrics, vorticity
from coastmon.io import sgrid, vertical
from coastmon.io.ingest import open_dataset

A = EARTH_RADIUS_M
G = 9.80665
LON0, LAT0 = -12.0, 20.0  # off north-west Africa
OMEGA_EDDY, L_EDDY = 2.0e-5, 30.0e3
TIME_ATTRS = {"units": "days since 2001-01-01", "calendar": "noleap"}


def _eddy(x, y):
    """Gaussian eddy in a local plane: u = -W y e, v = W x e, e = exp(-r^2/L^2)."""
    e = np.exp(-(x**2 + y**2) / L_EDDY**2)
    return -OMEGA_EDDY * y * e, OMEGA_EDDY * x * e


def _eddy_vorticity(x, y):
    """dv/dx - du/dy of :func:`_eddy`, by hand: W e (2 - 2 r^2 / L^2)."""
    r2 = x**2 + y**2
    return OMEGA_EDDY * np.exp(-r2 / L_EDDY**2) * (2.0 - 2.0 * r2 / L_EDDY**2)


def _to_lonlat(x, y):
    lat = LAT0 + np.rad2deg(y / A)
    lon = LON0 + np.rad2deg(x / (A * np.cos(np.deg2rad(LAT0))))
    return lon, lat


def _from_lonlat(lon, lat):
    return (A * np.cos(np.deg2rad(LAT0)) * np.deg2rad(lon - LON0), A * np.deg2rad(lat - LAT0))


def _rotated_cgrid(path, theta_deg, n=40, step=3.0e3, padding="none", land_cols=0):
    """A C-grid rotated by theta (x-axis anticlockwise from east) with SGRID metadata."""
    th = np.deg2rad(theta_deg)
    c = np.arange(n) - (n - 1) / 2

    def place(ii, jj):
        x = step * (ii * np.cos(th) - jj * np.sin(th))
        y = step * (ii * np.sin(th) + jj * np.cos(th))
        return x, y

    if padding == "none":  # staggered = centres + 1, faces at i - 1/2 .. n - 1/2
        f = np.arange(n + 1) - (n - 1) / 2 - 0.5
    else:  # "both": staggered = centres - 1, faces at i + 1/2 for i = 0 .. n - 2
        f = np.arange(n - 1) - (n - 1) / 2 + 0.5
    jc, ic = np.meshgrid(c, c, indexing="ij")
    ju, iu = np.meshgrid(c, f, indexing="ij")
    jv, iv = np.meshgrid(f, c, indexing="ij")
    xc, yc = place(ic, jc)
    xu, yu = place(iu, ju)
    xv, yv = place(iv, jv)
    nt = 3
    ue, vn = _eddy(xu, yu)
    u_grid = ue * np.cos(th) + vn * np.sin(th)  # component along the grid x-axis
    ue, vn = _eddy(xv, yv)
    v_grid = -ue * np.sin(th) + vn * np.cos(th)  # component along the grid y-axis
    lon_c, lat_c = _to_lonlat(xc, yc)
    mask_c = np.ones((n, n), np.int8)
    if land_cols:
        mask_c[:, -land_cols:] = 0
    ds = xr.Dataset(
        {
            "grid": ((), 0, {"cf_role": "grid_topology", "topology_dimension": 2,
                             "node_dimensions": "xi_s eta_s",
                             "face_dimensions": f"xi_c: xi_s (padding: {padding}) "
                                                f"eta_c: eta_s (padding: {padding})",
                             "face_coordinates": "lon_c lat_c"}),
            "u_x": (("time", "eta_c", "xi_s"), np.broadcast_to(u_grid, (nt, *u_grid.shape)),
                    {"standard_name": "sea_water_x_velocity", "units": "cm s-1"}),
            "v_y": (("time", "eta_s", "xi_c"), np.broadcast_to(v_grid, (nt, *v_grid.shape)),
                    {"standard_name": "sea_water_y_velocity", "units": "cm s-1"}),
            "rot": (("eta_c", "xi_c"), np.full((n, n), theta_deg),
                    {"standard_name": "angle_of_rotation_from_east_to_x", "units": "degrees"}),
            "lon_c": (("eta_c", "xi_c"), lon_c, {"standard_name": "longitude",
                                                 "units": "degrees_east"}),
            "lat_c": (("eta_c", "xi_c"), lat_c, {"standard_name": "latitude",
                                                 "units": "degrees_north"}),
            "mask_c": (("eta_c", "xi_c"), mask_c, {"flag_values": np.array([0, 1], np.int8),
                                                   "flag_meanings": "land sea"}),
        },
        coords={"time": ("time", np.arange(nt, dtype=float), TIME_ATTRS)},
    )
    ds["u_x"] = ds["u_x"] * 100.0
    ds["u_x"].attrs = {"standard_name": "sea_water_x_velocity", "units": "cm s-1"}
    ds["v_y"] = ds["v_y"] * 100.0
    ds["v_y"].attrs = {"standard_name": "sea_water_y_velocity", "units": "cm s-1"}
    ds.to_netcdf(path)
    return path, xc, yc


def _regular(path, step_deg=0.03):
    lon = np.arange(LON0 - 0.6, LON0 + 0.6 + 1e-9, step_deg)
    lat = np.arange(LAT0 - 0.6, LAT0 + 0.6 + 1e-9, step_deg)
    lo, la = np.meshgrid(lon, lat)
    ue, vn = _eddy(*_from_lonlat(lo, la))
    ds = xr.Dataset(
        {"u": (("time", "lat", "lon"), np.broadcast_to(ue, (3, *ue.shape)),
               {"standard_name": "eastward_sea_water_velocity", "units": "m s-1"}),
         "v": (("time", "lat", "lon"), np.broadcast_to(vn, (3, *vn.shape)),
               {"standard_name": "northward_sea_water_velocity", "units": "m s-1"})},
        coords={"time": ("time", np.arange(3.0), TIME_ATTRS),
                "lat": ("lat", lat, {"units": "degrees_north"}),
                "lon": ("lon", lon, {"units": "degrees_east"})})
    ds.to_netcdf(path)
    return path


def _vorticity_error(ds):
    m = GridMetrics.from_lonlat(ds.lon.values, ds.lat.values)
    zeta = vorticity(ds.u.values[0].astype(float), ds.v.values[0].astype(float), m)
    ref = _eddy_vorticity(*_from_lonlat(ds.lon.values, ds.lat.values))
    inner = (slice(2, -2), slice(2, -2))
    return np.nanmax(np.abs(zeta[inner] - ref[inner])) / np.max(np.abs(ref))


@pytest.mark.parametrize("padding", ["none", "both"])
def test_rotated_cgrid_gives_same_vorticity_as_regular_grid(tmp_path, padding):
    reg = open_dataset([_regular(tmp_path / "regular.nc")], IngestSettings())
    path, _, _ = _rotated_cgrid(tmp_path / "native.nc", theta_deg=30.0, padding=padding)
    nat = open_dataset([path], IngestSettings())
    assert isinstance(nat.u.data, dsa.Array)
    err_regular, err_native = _vorticity_error(reg), _vorticity_error(nat)
    # check: analytic vorticity of the Gaussian eddy, W e (2 - 2 r^2/L^2) (hand derivative;
    # Cushman-Roisin & Beckers 2011 ch. 5 for the C-grid averaging); both grids agree with it
    # to discretisation error (~3 km spacing, L = 30 km)
    assert err_regular < 0.03
    assert err_native < 0.03


def test_rotated_cgrid_velocity_is_east_north_at_centres(tmp_path):
    path, xc, yc = _rotated_cgrid(tmp_path / "native.nc", theta_deg=-50.0, land_cols=3)
    ds = open_dataset([path], IngestSettings())
    ue, vn = _eddy(xc, yc)
    sea = ds.mask.values == 1
    inner = np.zeros_like(sea)
    inner[2:-2, 2:-5] = True
    scale = np.max(np.hypot(ue, vn))
    # check: rotation of a vector by the grid angle (CF angle_of_rotation_from_east_to_x) and
    # the face average, second order in the spacing (Cushman-Roisin & Beckers 2011 ch. 5)
    assert np.max(np.abs(ds.u.values[0][inner] - ue[inner])) < 0.02 * scale
    assert np.max(np.abs(ds.v.values[0][inner] - vn[inner])) < 0.02 * scale
    # check: common practice, no source (land cells are NaN; sea cells by the coast keep a value)
    assert np.isnan(ds.u.values[0][:, -3:]).all()
    assert np.isfinite(ds.u.values[0][1:-1, -4]).all()
    assert (ds.mask.values[:, -3:] == 0).all() and sea[:, :-3].all()


def test_sgrid_face_dimensions_parse():
    text = "xi_c: xi_s (padding: none) eta_c: eta_s (padding: both)"
    # check: SGRID conventions 0.3, face_dimensions syntax "face: node (padding: type)"
    assert sgrid.parse_dimension_pairs(text) == (("xi_c", "xi_s", "none"),
                                                 ("eta_c", "eta_s", "both"))
    assert sgrid.layout_from_sizes(10, 11, "none") == "inner"
    assert sgrid.layout_from_sizes(10, 9, "both") == "outer"
    assert sgrid.layout_from_sizes(10, 10, "low") == "low"


def test_parametric_formulas_by_hand():
    s, c, eta, depth, depth_c = -0.5, -0.3, 1.0, 100.0, 10.0
    # check: CF conventions 1.8, Appendix D, ocean_s_coordinate_g1:
    # S = 10*(-0.5) + (100-10)*(-0.3) = -32; z = -32 + 1*(1 - 32/100) = -31.32
    assert vertical.ocean_s_coordinate_g1_z(s, c, eta, depth, depth_c) == pytest.approx(-31.32)
    # check: CF conventions 1.8, Appendix D, ocean_s_coordinate_g2:
    # S = (10*(-0.5) + 100*(-0.3))/110 = -35/110; z = 1 + 101*S
    assert vertical.ocean_s_coordinate_g2_z(s, c, eta, depth, depth_c) == pytest.approx(
        1.0 + 101.0 * (-35.0 / 110.0))
    # check: CF conventions 1.8, Appendix D, ocean_sigma_coordinate: z = 1 + (-0.5)*101
    assert vertical.ocean_sigma_z(s, eta, depth) == pytest.approx(-49.5)
    assert vertical.parse_formula_terms("s: sc C: cs eta: zz depth: hh depth_c: hc") == {
        "s": "sc", "C": "cs", "eta": "zz", "depth": "hh", "depth_c": "hc"}


def _s_coordinate_file(path, std):
    """Unrotated C-grid with s-levels; u = alpha z + beta at the true level heights."""
    n, nk, nt = 6, 8, 4
    s = (np.arange(nk) - nk + 0.5) / nk  # -0.9375 .. -0.0625
    cs = -(s**2)  # a simple stretching curve, C(0) = 0, C(-1) = -1
    hc, depth = 20.0, 150.0
    eta_t = 0.4 * np.sin(np.arange(nt))
    if std == "ocean_s_coordinate_g1":
        big_s = hc * s + (depth - hc) * cs
        z = big_s[None] + eta_t[:, None] * (1 + big_s[None] / depth)
    else:
        big_s = (hc * s + depth * cs) / (hc + depth)
        z = eta_t[:, None] + (eta_t[:, None] + depth) * big_s[None]
    alpha, beta = 0.002, 0.6
    prof = alpha * z + beta  # (time, k)
    lon = LON0 + 0.05 * np.arange(n)
    lat = LAT0 + 0.05 * np.arange(n)
    lo, la = np.meshgrid(lon, lat)
    ds = xr.Dataset(
        {"uu": (("time", "s_c", "eta_c", "xi_s"), np.broadcast_to(prof[:, :, None, None],
                                                                  (nt, nk, n, n + 1))),
         "vv": (("time", "s_c", "eta_s", "xi_c"), np.broadcast_to(-prof[:, :, None, None],
                                                                  (nt, nk, n + 1, n))),
         "zz": (("time", "eta_c", "xi_c"), np.broadcast_to(eta_t[:, None, None], (nt, n, n)),
                {"units": "m"}),
         "hh": (("eta_c", "xi_c"), np.where(np.arange(n) == 0, 40.0, depth)[None, :]
                * np.ones((n, 1)), {"units": "m"}),
         "cs": (("s_c",), cs),
         "hc": ((), hc, {"units": "m"}),
         "lon_c": (("eta_c", "xi_c"), lo, {"units": "degrees_east"}),
         "lat_c": (("eta_c", "xi_c"), la, {"units": "degrees_north"})},
        coords={"time": ("time", np.arange(nt, dtype=float), TIME_ATTRS),
                "s_c": ("s_c", s, {"standard_name": std, "positive": "up",
                                   "formula_terms": "s: s_c C: cs eta: zz depth: hh depth_c: hc"})},
    )
    for name in ("uu", "vv"):
        ds[name].attrs = {"units": "m s-1"}
    ds.to_netcdf(path)
    return path, z, prof


@pytest.mark.parametrize("std", ["ocean_s_coordinate_g1", "ocean_s_coordinate_g2"])
@pytest.mark.parametrize("method", ["linear", "nearest"])
def test_s_coordinate_velocity_at_depth(tmp_path, std, method):
    path, z, prof = _s_coordinate_file(tmp_path / "slev.nc", std)
    settings = IngestSettings(u_var="uu", v_var="vv", depth_m=55.0, depth_method=method)
    ds = open_dataset([path], settings)
    assert isinstance(ds.u.data, dsa.Array) and "ssh" in ds
    if method == "linear":
        # check: CF conventions 1.8, Appendix D, ocean_s_coordinate_g1/g2 (heights computed
        # in the test from the written formula); linear in z is exact for a linear profile
        expected = 0.002 * (-55.0) + 0.6
        np.testing.assert_allclose(ds.u.values[:, 2, 2], expected, rtol=1e-5)
    else:
        k = np.argmin(np.abs(z - (-55.0)), axis=1)
        expected = prof[np.arange(z.shape[0]), k]
        # check: CF conventions 1.8, Appendix D heights; nearest level by numpy.argmin
        np.testing.assert_allclose(ds.u.values[:, 2, 2], expected, rtol=1e-5)
    np.testing.assert_allclose(ds.v.values[:, 2, 2], -ds.u.values[:, 2, 2], rtol=1e-6)
    # check: common practice, no source (a 40 m deep column has no water at 55 m: land there)
    assert (ds.mask.values[:, 0] == 0).all() and np.isnan(ds.u.values[:, :, 0]).all()
    assert (ds.mask.values[:, 1:] == 1).all()


def _ssh_file(path, lat0, lat1, step=0.05, units="m", scale=1.0):
    lon = np.arange(-16.0, -14.0 + 1e-9, step)
    lat = np.arange(lat0, lat1 + 1e-9, step)
    lo, la = np.meshgrid(lon, lat)
    lam, phi = np.deg2rad(lo), np.deg2rad(la)
    lam0, phi0, sig = np.deg2rad(-15.0), np.deg2rad(0.5 * (lat0 + lat1)), np.deg2rad(0.4)
    eta = 0.25 * np.exp(-((lam - lam0) ** 2 + (phi - phi0) ** 2) / (2 * sig**2))
    amp = np.array([1.0, 0.8, 1.2])[:, None, None]
    ds = xr.Dataset(
        {"zeta_s": (("time", "lat", "lon"), amp * eta * scale,
                    {"standard_name": "sea_surface_height_above_geoid", "units": units})},
        coords={"time": ("time", np.arange(3.0), TIME_ATTRS),
                "lat": ("lat", lat, {"units": "degrees_north"}),
                "lon": ("lon", lon, {"units": "degrees_east"})})
    ds.to_netcdf(path)
    deta_dy = -eta * (phi - phi0) / sig**2 / A
    deta_dx = -eta * (lam - lam0) / sig**2 / (A * np.cos(phi))
    f = 2 * 7.2921e-5 * np.sin(phi)
    with np.errstate(divide="ignore", invalid="ignore"):  # f = 0 on the equator row
        return path, amp * (-G / f * deta_dy), amp * (G / f * deta_dx)


def test_ssh_only_gives_geostrophic_velocity(tmp_path):
    path, u_ref, v_ref = _ssh_file(tmp_path / "ssh.nc", 28.0, 32.0, units="mm", scale=1000.0)
    ds = open_dataset([path], IngestSettings(time_chunk=2))
    assert ds.attrs["velocity_kind"] == "geostrophic" and "ssh" in ds
    assert isinstance(ds.u.data, dsa.Array) and ds.u.chunks[0] == (2, 1)
    inner = (slice(None), slice(1, -1), slice(1, -1))
    scale = np.max(np.hypot(u_ref, v_ref))
    # check: Gill 1982 §7.6, u = -(g/f) d(eta)/dy, v = (g/f) d(eta)/dx with the hand
    # derivative of the Gaussian; tolerance is that of the plumbing (units mm -> m, lazy
    # per-chunk evaluation); the operator's own accuracy is tested in test_grid_ops.py
    assert np.max(np.abs(ds.u.values[inner] - u_ref[inner])) < 1.5e-2 * scale
    assert np.max(np.abs(ds.v.values[inner] - v_ref[inner])) < 1.5e-2 * scale
    # check: pint, 1 mm = 0.001 m
    np.testing.assert_allclose(ds.ssh.values.max(), 0.25 * 1.2, rtol=1e-3)


def test_ssh_geostrophic_velocity_nan_near_equator(tmp_path):
    path, _, _ = _ssh_file(tmp_path / "eq.nc", -4.0, 4.0, step=0.25)
    ds = open_dataset([path], IngestSettings(equator_band_deg=2.0))
    band = np.abs(ds.lat.values) < 2.0
    u = ds.u.values
    # check: Gill 1982 §7.6 (f -> 0 at the equator); band from the setting
    assert np.isnan(u[:, band]).all()
    assert np.isfinite(u[:, ~band][:, 10:-10]).all()


@pytest.mark.parametrize("side", ["east", "west"])
def test_equal_size_staggering_placed_by_coordinates(tmp_path, side):
    n, step = 12, 0.05
    lon_c = LON0 + step * np.arange(n)
    lat_c = LAT0 + step * np.arange(n)
    shift = 0.5 * step if side == "east" else -0.5 * step
    lo, la = np.meshgrid(lon_c, lat_c)
    alpha = 0.1  # u = alpha * (lon - LON0), v = alpha * (lat - LAT0), m s-1 per degree
    u_faces = alpha * (lo + shift - LON0)
    v_faces = alpha * (la + shift - LAT0)
    ds = xr.Dataset(
        {"u": (("time", "y_c", "x_u"), np.broadcast_to(u_faces, (2, n, n)), {"units": "m s-1"}),
         "v": (("time", "y_v", "x_c"), np.broadcast_to(v_faces, (2, n, n)), {"units": "m s-1"}),
         "lon_c": (("y_c", "x_c"), lo, {"units": "degrees_east"}),
         "lat_c": (("y_c", "x_c"), la, {"units": "degrees_north"}),
         "lon_u": (("y_c", "x_u"), lo + shift, {"units": "degrees_east"}),
         "lat_u": (("y_c", "x_u"), la, {"units": "degrees_north"}),
         "lon_v": (("y_v", "x_c"), lo, {"units": "degrees_east"}),
         "lat_v": (("y_v", "x_c"), la + shift, {"units": "degrees_north"})},
        coords={"time": ("time", [0.0, 1.0], TIME_ATTRS)})
    path = tmp_path / f"equal_{side}.nc"
    ds.to_netcdf(path)
    out = open_dataset([path], IngestSettings())
    inner = (slice(1, -1), slice(1, -1))
    # check: analytic, the mean of the two faces of a linear field is its centre value
    # (second-order C-grid interpolation, Cushman-Roisin & Beckers 2011 ch. 5)
    np.testing.assert_allclose(out.u.values[0][inner], alpha * (lo - LON0)[inner], atol=1e-6)
    np.testing.assert_allclose(out.v.values[0][inner], alpha * (la - LAT0)[inner], atol=1e-6)
