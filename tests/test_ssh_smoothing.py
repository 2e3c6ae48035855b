"""Optional smoothing of gridded SSH before geostrophic velocity."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coastmon.config import IngestSettings
from coastmon.grid.metrics import EARTH_RADIUS_M, coriolis_parameter
from coastmon.io.ingest import open_dataset, smooth_ssh

G = 9.80665


def test_smoothing_keeps_a_constant_field_next_to_land():
    h = np.full((30, 40), 0.7)
    h[:, 30:] = np.nan
    out = smooth_ssh(h, (3.0, 3.0))
    # check: common practice, no source (normalised convolution preserves constants)
    np.testing.assert_allclose(out[:, :30], 0.7, rtol=1e-12)
    assert np.isnan(out[:, 30:]).all()


def _bump_file(path, noise_m, seed=0):
    lat = np.arange(30.0, 36.0, 0.05)
    lon = np.arange(-40.0, -33.0, 0.05)
    lon2, lat2 = np.meshgrid(lon, lat)
    lat0, lon0, r_km, amp = 33.0, -36.5, 60.0, 0.3
    x = np.deg2rad(lon2 - lon0) * EARTH_RADIUS_M * np.cos(np.deg2rad(lat0)) / 1000.0
    y = np.deg2rad(lat2 - lat0) * EARTH_RADIUS_M / 1000.0
    rng = np.random.default_rng(seed)
    n_t = 6
    eta = amp * np.exp(-(x**2 + y**2) / r_km**2)
    ssh = eta[None] + noise_m * rng.standard_normal((n_t, *eta.shape))
    ds = xr.Dataset(
        {"zos": (("time", "lat", "lon"), ssh.astype("f8"),
                 {"standard_name": "sea_surface_height_above_geoid", "units": "m"})},
        coords={"time": pd.date_range("2001-01-01", periods=n_t),
                "lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
                "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"})},
    )
    ds.to_netcdf(path)
    return x, y, r_km, amp, lat2


def _analytic_u(x, y, r2, amp, lat2):
    """u_g = -(g/f) d(eta)/dy for eta = amp exp(-(x^2+y^2)/r2), x, y in km."""
    f = coriolis_parameter(lat2)
    deta_dy = amp * np.exp(-(x**2 + y**2) / r2) * (-2.0 * y / r2) / 1000.0
    return -(G / f) * deta_dy


def test_smoothing_reduces_noise_in_geostrophic_velocity(tmp_path):
    x, y, r_km, amp, lat2 = _bump_file(tmp_path / "ssh.nc", noise_m=0.005)
    sigma_km = 15.0
    raw = open_dataset([tmp_path / "ssh.nc"], IngestSettings(ssh_var="zos"))
    smooth = open_dataset([tmp_path / "ssh.nc"], IngestSettings(ssh_var="zos",
                                                               ssh_smooth_km=sigma_km))
    inner = (slice(20, -20), slice(20, -20))
    u_raw = raw["u"].values[:, inner[0], inner[1]]
    u_smooth = smooth["u"].values[:, inner[0], inner[1]]
    # A Gaussian of e-folding radius R smoothed by a Gaussian kernel of standard deviation
    # sigma is a Gaussian of radius sqrt(R^2 + 2 sigma^2) and amplitude R^2 / (R^2 + 2 sigma^2).
    r2s = r_km**2 + 2 * sigma_km**2
    ref_raw = _analytic_u(x, y, r_km**2, amp, lat2)[inner]
    ref_smooth = _analytic_u(x, y, r2s, amp * r_km**2 / r2s, lat2)[inner]
    err_raw = np.sqrt(np.nanmean((u_raw - ref_raw) ** 2))
    err_smooth = np.sqrt(np.nanmean((u_smooth - ref_smooth) ** 2))
    # check: Gill 1982 §7.6 (geostrophic balance) and the convolution of two Gaussians
    # (textbook result), with 5 mm white noise planted on the bump
    assert err_smooth < 0.25 * err_raw
    assert err_smooth < 0.02 * np.abs(ref_smooth).max()


@pytest.mark.slow
def test_smoothed_noisy_altimetry_recovers_the_planted_sources(tmp_path):
    import dataclasses

    from planted import ranks_of_planted
    from test_native_end_to_end import _params

    from coastmon.cli import main
    from coastmon.scenario import make_scenario, native

    # The scenario's default SSH noise (2 mm) on a 0.1 degree grid: differentiated twice it
    # hides the weaker eddies; 10 km of smoothing brings them back.
    params = dataclasses.replace(_params(), noise_ssh_m=0.002)
    nc, truth_path = make_scenario(params, tmp_path)
    ssh_nc = native.write_ssh_only(nc, tmp_path / "height.nc", var_name="surface_height")
    out = tmp_path / "out"
    assert main(["analyze", str(ssh_nc), "--out", str(out), "--ssh-var", "surface_height",
                 "--ssh-smooth", "10", "--no-progress", "--gis", "csv"]) == 0
    truth = json.loads(truth_path.read_text())
    # check: planted truth (cape of each source; ssh = f psi / g, Gill 1982 s. 7.6)
    ranks = ranks_of_planted(pd.read_csv(out / "sources.csv"), truth)
    assert ranks == sorted(ranks) and ranks[0] == 1
