"""The CF results file: the open compliance checker, UDUNITS, the CF standard-name table."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from importlib import resources

import cf_units
import netCDF4
import numpy as np
import pytest
import xarray as xr
from compliance_checker.runner import CheckSuite
from pyproj import CRS

from coastmon.errors import InputError
from coastmon.io.results import CAUTIONS, FILL_FLOAT, VARIABLES, read_results, write_results

STAT_NAMES = ["mean_u", "mean_v", "mean_zeta", "eke", "uu", "uv", "vv", "u_zeta", "v_zeta",
              "zeta_var", "rossby_var", "bt_conversion", "ow_core_fraction", "mean_ssh",
              "ssh_var", "u_ssh", "v_ssh", "eke_flux_x", "eke_flux_y"]


def _grid(curvilinear: bool) -> tuple[np.ndarray, np.ndarray]:
    """A small grid off north-west Africa; rotated by 20 degrees when curvilinear."""
    j, i = np.mgrid[0:6, 0:8].astype(float)
    if curvilinear:
        a = np.deg2rad(20.0)
        lon = -18.0 + 0.25 * (i * np.cos(a) - j * np.sin(a))
        lat = 20.0 + 0.25 * (i * np.sin(a) + j * np.cos(a))
    else:
        lon = -18.0 + 0.25 * i
        lat = 20.0 + 0.25 * j
    return lon, lat


def _inputs(curvilinear: bool):
    lon, lat = _grid(curvilinear)
    rng = np.random.default_rng(3)
    stats = xr.Dataset(
        {name: (("y", "x"), rng.standard_normal(lon.shape)) for name in STAT_NAMES},
        coords={"lon": (("y", "x"), lon), "lat": (("y", "x"), lat)},
    )
    stats["n_valid"] = (("y", "x"), np.full(lon.shape, 365, dtype="int64"))
    stats["eke"][0, :] = np.nan  # a land row
    n = 7
    profiles = xr.Dataset(
        {"nearshore_eke": ("station", rng.random(n)),
         "nearshore_zeta_var": ("station", rng.random(n) * 1e-10),
         "persistence": ("station", rng.random(n)),
         "curvature_per_km": ("station", rng.standard_normal(n) * 0.01)},
        coords={"lon": ("station", np.linspace(-16.9, -16.5, n)),
                "lat": ("station", np.linspace(20.1, 21.6, n)),
                "alongshore_km": ("station", np.arange(n) * 25.0)},
    )
    spectra = xr.Dataset(
        {"kw_power": (("frequency", "wavenumber"), rng.random((5, 9)))},
        coords={"frequency": np.arange(5) / 64.0, "wavenumber": (np.arange(9) - 4) / 400.0},
    )
    return stats, profiles, spectra


@pytest.fixture(scope="module")
def suite() -> CheckSuite:
    checks = CheckSuite()
    checks.load_all_available_checkers()
    return checks


def _high_priority_failures(suite: CheckSuite, path) -> list[str]:
    ds = suite.load_dataset(str(path))
    results, errors = suite.run_all(ds, ["cf:1.8"], skip_checks=[])["cf:1.8"]
    assert not errors
    report = suite.build_structure("cf:1.8", results, str(path))
    return [f"{r.name}: {r.msgs}" for r in report["high_priorities"] if r.value[0] < r.value[1]]


@pytest.mark.parametrize("curvilinear", [False, True])
def test_compliance_checker_finds_no_high_priority_failure(tmp_path, suite, curvilinear):
    stats, profiles, spectra = _inputs(curvilinear)
    path = write_results(tmp_path / "results.nc", stats, profiles, spectra,
                         {"inputs": ["a.nc", "b.nc"], "velocity_kind": "velocity"},
                         time_bounds=("2003-01-01", "2004-01-01"))
    # check: CF-1.8 conventions via the open compliance checker (IOOS compliance-checker)
    assert _high_priority_failures(suite, path) == []


def test_registry_units_are_udunits_and_match_standard_names():
    table = ET.parse(
        resources.files("compliance_checker") / "data" / "cf-standard-name-table.xml")
    canonical = {e.get("id"): e.findtext("canonical_units") for e in table.iter("entry")}
    for name, attrs in VARIABLES.items():
        unit = cf_units.Unit(attrs["units"])  # check: UDUNITS-2 via cf-units
        standard = attrs.get("standard_name")
        if standard:
            # check: CF standard name table (copy shipped with compliance-checker)
            assert standard in canonical, name
            assert unit.is_convertible(cf_units.Unit(canonical[standard])), name
    # check: UDUNITS-2 via cf-units (dimensional consistency of the registry's flux units)
    assert cf_units.Unit(VARIABLES["bt_conversion"]["units"]) == cf_units.Unit("W kg-1")
    assert cf_units.Unit(VARIABLES["u_zeta"]["units"]).is_convertible("m s-1 s-1")


def test_curvilinear_file_structure_via_netcdf4(tmp_path):
    stats, profiles, spectra = _inputs(curvilinear=True)
    path = write_results(tmp_path / "results.nc", stats, profiles, spectra, {})
    with netCDF4.Dataset(path) as nc:
        nc.set_auto_mask(False)
        assert nc.Conventions == "CF-1.8"  # check: CF-1.8 §2.6.1
        assert nc.comment == CAUTIONS
        assert nc.institution == "coastmon user"
        eke = nc["eke"]
        assert set(eke.coordinates.split()) == {"lon", "lat"}  # check: CF-1.8 §5.2
        assert eke.grid_mapping == "crs"
        assert eke.dimensions == ("y", "x")
        # check: netCDF4-python reading raw values (NaN written as the _FillValue)
        np.testing.assert_array_equal(eke[0, :], np.float32(FILL_FLOAT))
        assert eke._FillValue == np.float32(FILL_FLOAT)
        np.testing.assert_allclose(nc["lon"][:], stats["lon"].values, rtol=0, atol=0)
        prof = nc["nearshore_eke"]
        assert set(prof.coordinates.split()) == {"station_lon", "station_lat", "alongshore_km"}
        assert nc["station_lon"].units == "degrees_east"
        crs = CRS.from_cf({k: nc["crs"].getncattr(k) for k in nc["crs"].ncattrs()})
    assert crs.to_epsg() == 4326  # check: pyproj CF grid-mapping reader


def test_regular_grid_written_with_1d_coordinates(tmp_path):
    stats, profiles, _ = _inputs(curvilinear=False)
    path = write_results(tmp_path / "results.nc", stats, profiles, None, {},
                         time_bounds=("2003-01-01", "2004-01-01"))
    with netCDF4.Dataset(path) as nc:
        assert nc["eke"].dimensions == ("lat", "lon")  # check: CF-1.8 §4 coordinate variables
        assert nc["lon"].dimensions == ("lon",) and nc["lon"].axis == "X"
        np.testing.assert_allclose(nc["lat"][:], stats["lat"].values[:, 0])
        assert nc["eke"].cell_methods == "time: mean"  # check: CF-1.8 §7.3
        assert nc["zeta_var"].cell_methods == "time: variance"
        assert nc.time_coverage_start == "2003-01-01T00:00:00Z"


@pytest.mark.parametrize("curvilinear", [False, True])
def test_read_back_matches_the_inputs(tmp_path, curvilinear):
    stats, profiles, spectra = _inputs(curvilinear)
    path = write_results(tmp_path / "results.nc", stats, profiles, spectra, {"depth_m": 50.0})
    back = read_results(path)
    assert set(back.stats.data_vars) == set(stats.data_vars)
    for name in stats.data_vars:
        # check: the constructed input arrays (float32 storage: relative 1e-6)
        np.testing.assert_allclose(back.stats[name].values, stats[name].values, rtol=1e-6,
                                   atol=1e-30, equal_nan=True)
    np.testing.assert_allclose(back.stats["lon"].values, stats["lon"].values)
    np.testing.assert_allclose(back.stats["lat"].values, stats["lat"].values)
    np.testing.assert_allclose(back.profiles["lon"].values, profiles["lon"].values)
    np.testing.assert_allclose(back.profiles["persistence"].values,
                               profiles["persistence"].values)
    np.testing.assert_allclose(back.spectra["kw_power"].values, spectra["kw_power"].values,
                               rtol=1e-6)
    assert back.attrs["depth_m"] == 50.0


def test_geostrophic_velocity_gets_geostrophic_standard_name(tmp_path):
    stats, _, _ = _inputs(curvilinear=False)
    path = write_results(tmp_path / "r.nc", stats[["mean_u", "mean_v"]], None, None,
                         {"velocity_kind": "geostrophic"})
    with netCDF4.Dataset(path) as nc:
        # check: CF standard name table (geostrophic_eastward_sea_water_velocity exists)
        assert nc["mean_u"].standard_name == "geostrophic_eastward_sea_water_velocity"


def test_unregistered_variable_without_units_is_refused(tmp_path):
    stats, _, _ = _inputs(curvilinear=False)
    stats["mystery"] = stats["eke"] * 2
    with pytest.raises(ValueError, match="mystery"):
        write_results(tmp_path / "r.nc", stats, None, None, {})
    assert not (tmp_path / "r.nc").exists()
    assert list(tmp_path.iterdir()) == []


def test_reading_a_non_netcdf_file_is_a_user_error(tmp_path):
    bad = tmp_path / "results.nc"
    bad.write_text("not netcdf")
    with pytest.raises(InputError, match="Cannot read the results file"):
        read_results(bad)


def test_results_are_written_without_importing_the_cluster_library(tmp_path):
    import subprocess
    import sys
    import textwrap

    script = textwrap.dedent(f"""
        import sys
        import numpy as np
        import xarray as xr
        from coastmon.io.results import without_cluster_lookup
        ds = xr.Dataset({{"a": ("x", np.arange(4.0))}})
        with without_cluster_lookup():
            ds.to_netcdf({str(tmp_path / "a.nc")!r}, engine="netcdf4")
        assert "distributed" not in sys.modules, "imported while writing"
        import dask.distributed                      # importable again afterwards
        with without_cluster_lookup():               # a process that has it: left alone
            ds.to_netcdf({str(tmp_path / "b.nc")!r}, engine="netcdf4")
        assert sys.modules["distributed"] is not None
    """)
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                         cwd=tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    # check: netCDF4-python reads back what xarray wrote (the write itself is unchanged)
    with netCDF4.Dataset(tmp_path / "a.nc") as nc:
        np.testing.assert_array_equal(nc["a"][:], np.arange(4.0))
