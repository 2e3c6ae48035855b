"""Ingest of regular-grid NetCDF/Zarr files into the canonical dataset."""

from __future__ import annotations

import hashlib
import json

import cftime
import dask.array as dsa
import numpy as np
import pint
import pytest
import xarray as xr

from coastmon.config import IngestSettings
from coastmon.errors import InputError, RecordError
from coastmon.io.ingest import open_dataset, open_mask
from coastmon.io.units import scale_factor, udunits_to_pint

NT, NY, NX = 6, 9, 12
LON = np.linspace(-15.0, 7.0, NX)  # across the prime meridian, off north-west Africa/Iberia
LAT = np.linspace(30.0, 38.0, NY)


def _fields(nt=NT, lat=LAT, lon=LON):
    t = np.arange(nt)[:, None, None]
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    u = 0.3 * np.sin(np.deg2rad(3 * lo) + 0.2 * t) * np.cos(np.deg2rad(5 * la))
    v = 0.2 * np.cos(np.deg2rad(4 * lo) - 0.1 * t) * np.sin(np.deg2rad(2 * la))
    land = lo > lon[-3]  # the easternmost two columns are land
    u = np.where(land, np.nan, u)
    v = np.where(land, np.nan, v)
    return u, v, land


def _write(path, u, v, lat=LAT, lon=LON, time=None, u_units="m s-1", v_units="m s-1",
           calendar="standard", extra=None, fmt="NETCDF4", names=("u", "v")):
    nt = u.shape[0]
    time = np.arange(nt, dtype=float) if time is None else np.asarray(time, dtype=float)
    ds = xr.Dataset(
        {names[0]: (("time", "lat", "lon"), u,
                    {"standard_name": "eastward_sea_water_velocity", "units": u_units}),
         names[1]: (("time", "lat", "lon"), v,
                    {"standard_name": "northward_sea_water_velocity", "units": v_units})},
        coords={"time": ("time", time, {"units": "days since 2001-01-01", "calendar": calendar,
                                        "standard_name": "time"}),
                "lat": ("lat", lat, {"units": "degrees_north", "standard_name": "latitude"}),
                "lon": ("lon", lon, {"units": "degrees_east", "standard_name": "longitude"})},
    )
    for name, (dims, values, attrs) in (extra or {}).items():
        ds[name] = (dims, values, attrs)
    ds.to_netcdf(path, format=fmt)
    return path


@pytest.fixture
def velocity_file(tmp_path):
    u, v, land = _fields()
    return _write(tmp_path / "flow.nc", u, v), u, v, land


def test_udunits_strings_convert_like_pint():
    ureg = pint.UnitRegistry()
    cases = {"cm s-1": "cm/s", "meter second-1": "meter/second", "m.s-1": "m/s",
             "m s^-1": "m/s", "km h-1": "km/hour", "mm": "mm", "cm/s": "cm/s"}
    for udunits, plain in cases.items():
        target = "m" if udunits == "mm" else "m s-1"
        expected = ureg.Quantity(1.0, plain).to("m" if udunits == "mm" else "m/s").magnitude
        # check: pint (unit definitions of the reference library)
        assert scale_factor(udunits, target, "test") == pytest.approx(expected, rel=1e-12)
    assert udunits_to_pint("m s-1") == "m * s**-1"
    # check: pint — the same unit spelled the same way (answered without loading pint) is 1
    assert scale_factor("m s-1", "m s-1", "test") == ureg.Quantity(1.0, "m/s").to("m/s").magnitude
    # check: pint, degrees to radians
    assert scale_factor("degrees", "radian", "test") == pytest.approx(np.pi / 180, rel=1e-12)


@pytest.mark.parametrize("bad", ["furlongz s-1", "degC", "m"])
def test_unknown_or_wrong_units_raise_input_error(tmp_path, bad):
    u, v, _ = _fields()
    path = _write(tmp_path / "units.nc", u, v, u_units=bad)
    with pytest.raises(InputError) as err:
        open_dataset([path], IngestSettings())
    assert "units.nc" in str(err.value) and "'u'" in str(err.value) and bad in str(err.value)


def test_cm_per_s_input_gives_same_canonical_u(tmp_path, velocity_file):
    path_m, u, v, _ = velocity_file
    path_cm = _write(tmp_path / "cm.nc", u * 100.0, v * 100.0, u_units="cm s-1", v_units="cm/s")
    a = open_dataset([path_m], IngestSettings())
    b = open_dataset([path_cm], IngestSettings())
    # check: pint / SI definition, 1 cm = 0.01 m (float32 output)
    np.testing.assert_allclose(b.u.values, a.u.values, rtol=2e-7, equal_nan=True)
    np.testing.assert_allclose(b.v.values, a.v.values, rtol=2e-7, equal_nan=True)
    np.testing.assert_allclose(a.u.values, u, rtol=1e-6, equal_nan=True)


def test_canonical_layout_lazy_and_chunked_along_time(velocity_file):
    path, u, _, land = velocity_file
    ds = open_dataset([path], IngestSettings(time_chunk=4))
    assert ds.u.dims == ("time", "y", "x") and ds.mask.dtype == np.int8
    assert isinstance(ds.u.data, dsa.Array)
    assert ds.u.chunks == ((4, 2), (NY,), (NX,))
    # check: common practice, no source (mask from missing values: NaN = land)
    np.testing.assert_array_equal(ds.mask.values, (~land).astype(np.int8))
    assert json.loads(ds.attrs["source_files"]) == [str(path.resolve())]
    assert ds.attrs["velocity_kind"] == "velocity"


def test_longitude_convention_and_latitude_order_do_not_matter(tmp_path, velocity_file):
    path, u, v, _ = velocity_file
    ref = open_dataset([path], IngestSettings())
    lon360 = LON % 360.0
    order = np.argsort(lon360)
    alt = _write(tmp_path / "alt.nc", u[:, ::-1][:, :, order], v[:, ::-1][:, :, order],
                 lat=LAT[::-1], lon=lon360[order])
    out = open_dataset([alt], IngestSettings())
    # check: common practice, no source (same data, other labelling)
    np.testing.assert_array_equal(out.lon.values, ref.lon.values)
    np.testing.assert_array_equal(out.lat.values, ref.lat.values)
    np.testing.assert_array_equal(out.u.values, ref.u.values)
    np.testing.assert_array_equal(out.mask.values, ref.mask.values)
    assert ref.lat.values[0, 0] < ref.lat.values[-1, 0] and ref.lon.values[0, 0] == -15.0


def test_domain_across_antimeridian_is_continuous(tmp_path):
    lon_east = np.arange(170.0, 190.1, 2.0)  # 0..360 convention
    u, v, _ = _fields(lon=lon_east)
    a = open_dataset([_write(tmp_path / "a.nc", u, v, lon=lon_east)], IngestSettings())
    lon_pm = (lon_east + 180.0) % 360.0 - 180.0  # -180..180 convention, same order
    b = open_dataset([_write(tmp_path / "b.nc", u, v, lon=lon_pm)], IngestSettings())
    # check: common practice, no source (continuous longitude past 180 across the antimeridian)
    np.testing.assert_allclose(a.lon.values[0], lon_east)
    np.testing.assert_allclose(b.lon.values[0], lon_east)
    np.testing.assert_array_equal(a.u.values, b.u.values)


@pytest.mark.parametrize("calendar", ["360_day", "noleap", "365_day"])
def test_model_calendars_load(tmp_path, calendar):
    u, v, _ = _fields()
    time = np.arange(NT) * 45.0
    ds = open_dataset([_write(tmp_path / "cal.nc", u, v, time=time, calendar=calendar)],
                      IngestSettings())
    expected = cftime.num2date(time, "days since 2001-01-01", calendar=calendar)
    # check: cftime.num2date for the file's calendar
    assert list(ds.time.values) == list(expected)


def test_files_in_any_order_are_joined_along_time(tmp_path):
    u, v, _ = _fields(nt=8)
    late = _write(tmp_path / "late.nc", u[4:], v[4:], time=np.arange(4, 8.0))
    early = _write(tmp_path / "early.nc", u[:4], v[:4], time=np.arange(4.0))
    ds = open_dataset([late, early], IngestSettings(time_chunk=3))
    # check: common practice, no source (concatenation in time order)
    np.testing.assert_allclose(ds.u.values, u, rtol=1e-6, equal_nan=True)
    assert json.loads(ds.attrs["source_files"]) == [str(early.resolve()), str(late.resolve())]


@pytest.mark.filterwarnings("ignore:Consolidated metadata")
@pytest.mark.parametrize("consolidated", [False, True])
def test_zarr_store_input(tmp_path, velocity_file, consolidated):
    path, u, _, _ = velocity_file
    store = tmp_path / "flow.zarr"
    xr.open_dataset(path).to_zarr(store, consolidated=consolidated)
    ds = open_dataset([store], IngestSettings())
    # check: common practice, no source (same values through Zarr)
    np.testing.assert_allclose(ds.u.values, u, rtol=1e-6, equal_nan=True)


def _levels_file(tmp_path, depth_values, positive):
    z = np.asarray(depth_values, dtype=float)
    depth_axis = np.abs(z)
    profile = 0.5 * np.exp(-depth_axis / 100.0)  # speed decays with depth
    u = np.broadcast_to(profile[None, :, None, None], (NT, z.size, NY, NX)).copy()
    ds = xr.Dataset(
        {"u": (("time", "depth", "lat", "lon"), u,
               {"standard_name": "eastward_sea_water_velocity", "units": "m s-1"}),
         "v": (("time", "depth", "lat", "lon"), 0.5 * u,
               {"standard_name": "northward_sea_water_velocity", "units": "m s-1"})},
        coords={"time": ("time", np.arange(NT, dtype=float), {"units": "days since 2001-01-01"}),
                "depth": ("depth", z, {"units": "m", "positive": positive}),
                "lat": ("lat", LAT, {"units": "degrees_north"}),
                "lon": ("lon", LON, {"units": "degrees_east"})})
    path = tmp_path / f"levels_{positive}.nc"
    ds.to_netcdf(path)
    return path, depth_axis, profile


@pytest.mark.parametrize("positive", ["down", "up"])
@pytest.mark.parametrize("method", ["nearest", "linear"])
def test_depth_selection_nearest_and_linear(tmp_path, positive, method):
    levels = np.array([5.0, 15.0, 30.0, 60.0, 120.0])
    path, depths, profile = _levels_file(tmp_path, levels if positive == "down" else -levels,
                                         positive)
    ds = open_dataset([path], IngestSettings(depth_m=40.0, depth_method=method))
    if method == "linear":
        expected = np.interp(40.0, depths, profile)  # check: numpy.interp
    else:
        expected = profile[np.argmin(np.abs(depths - 40.0))]  # check: numpy.argmin nearest
    np.testing.assert_allclose(ds.u.values[0, 0, 0], expected, rtol=1e-6)
    assert ds.attrs["depth_m"] == 40.0
    top = open_dataset([path], IngestSettings())
    # check: common practice, no source (default = the level nearest the surface)
    np.testing.assert_allclose(top.u.values[0, 0, 0], profile[0], rtol=1e-6)


def test_depth_below_deepest_level_is_an_error(tmp_path):
    path, _, _ = _levels_file(tmp_path, [5.0, 15.0, 30.0], "down")
    with pytest.raises(InputError, match="levels_down.nc"):
        open_dataset([path], IngestSettings(depth_m=500.0))


def test_mask_from_cf_variables_and_mask_only_file(tmp_path):
    la, lo = np.meshgrid(LAT, LON, indexing="ij")
    land = (lo > 2.0) | (la > 37.0)
    cases = {
        "sea_binary_mask": (~land).astype(np.int8),
        "land_binary_mask": land.astype(np.int8),
        "land_area_fraction": np.where(land, 0.8, 0.2),
    }
    for std, values in cases.items():
        ds = xr.Dataset({"landsea": (("lat", "lon"), values, {"standard_name": std})},
                        coords={"lat": ("lat", LAT, {"units": "degrees_north"}),
                                "lon": ("lon", LON, {"units": "degrees_east"})})
        path = tmp_path / f"{std}.nc"
        ds.to_netcdf(path)
        out = open_mask([path], IngestSettings())
        # check: CF standard name table (sea_binary_mask 1 = sea, land_binary_mask 1 = land,
        # land_area_fraction is the land fraction of the cell)
        np.testing.assert_array_equal(out.mask.values, (~land).astype(np.int8))
        with pytest.raises(InputError, match=f"{std}.nc"):
            open_dataset([path], IngestSettings())


def test_bathymetry_is_read_positive_down(tmp_path):
    la, lo = np.meshgrid(LAT, LON, indexing="ij")
    elevation = -1000.0 - 10.0 * lo  # metres, positive up
    ds = xr.Dataset({"elev": (("lat", "lon"), elevation,
                              {"units": "m", "positive": "up"}),
                     "mask": (("lat", "lon"), (elevation < 0).astype(np.int8),
                              {"standard_name": "sea_binary_mask"})},
                    coords={"lat": ("lat", LAT, {"units": "degrees_north"}),
                            "lon": ("lon", LON, {"units": "degrees_east"})})
    path = tmp_path / "bathy.nc"
    ds.to_netcdf(path)
    out = open_mask([path], IngestSettings(bathymetry_var="elev"))
    # check: CF 'positive' attribute (up = height), so depth = -elevation
    np.testing.assert_allclose(out.bathymetry.values, -elevation)


def test_zero_filled_land_is_detected_with_a_warning(tmp_path):
    u, v, land = _fields()
    u, v = np.nan_to_num(u), np.nan_to_num(v)
    path = _write(tmp_path / "zeros.nc", u, v)
    with pytest.warns(UserWarning, match="exactly 0"):
        ds = open_dataset([path], IngestSettings())
    # check: common practice, no source (zero-filled land)
    np.testing.assert_array_equal(ds.mask.values, (~land).astype(np.int8))


def test_surface_geostrophic_velocity_is_labelled_geostrophic(tmp_path):
    u, v, _ = _fields()
    ds = xr.Dataset(
        {"ug": (("time", "lat", "lon"), u, {
            "standard_name": "surface_geostrophic_eastward_sea_water_velocity_assuming_mean_sea_level",
            "units": "m s-1"}),
         "vg": (("time", "lat", "lon"), v, {
             "standard_name": "surface_geostrophic_northward_sea_water_velocity_assuming_mean_sea_level",
             "units": "m s-1"})},
        coords={"time": ("time", np.arange(NT, dtype=float), {"units": "days since 2001-01-01"}),
                "lat": ("lat", LAT, {"units": "degrees_north"}),
                "lon": ("lon", LON, {"units": "degrees_east"})})
    path = tmp_path / "geo.nc"
    ds.to_netcdf(path)
    out = open_dataset([path], IngestSettings())
    assert out.attrs["velocity_kind"] == "geostrophic"
    # check: common practice, no source (values pass through unchanged in m s-1)
    np.testing.assert_allclose(out.u.values, u, rtol=1e-6, equal_nan=True)


def test_inputs_are_never_modified(velocity_file):
    path = velocity_file[0]
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    ds = open_dataset([path], IngestSettings())
    ds.u.values  # noqa: B018 - the read of the stream pass
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


# --------------------------------------------------------------------------- errors


def _message(exc_info) -> str:
    return str(exc_info.value)


def test_missing_empty_foreign_and_truncated_files(tmp_path, velocity_file):
    with pytest.raises(InputError, match="nowhere.nc"):
        open_dataset([tmp_path / "nowhere.nc"], IngestSettings())
    empty = tmp_path / "empty.nc"
    empty.write_bytes(b"")
    with pytest.raises(InputError, match="empty.nc"):
        open_dataset([empty], IngestSettings())
    text = tmp_path / "notes.nc"
    text.write_text("u,v\n1,2\n")
    with pytest.raises(InputError, match="notes.nc"):
        open_dataset([text], IngestSettings())
    u, v, _ = _fields()
    for fmt in ("NETCDF4", "NETCDF3_64BIT"):
        full = _write(tmp_path / f"full_{fmt}.nc", u, v, fmt=fmt)
        data = full.read_bytes()
        cut = tmp_path / f"cut_{fmt}.nc"
        cut.write_bytes(data[: len(data) * 2 // 3])
        with pytest.raises(InputError, match=f"cut_{fmt}.nc"):
            open_dataset([cut], IngestSettings())


def test_no_velocity_lists_variables_and_settings(tmp_path):
    ds = xr.Dataset({"temp": (("time", "lat", "lon"), np.ones((NT, NY, NX)),
                              {"standard_name": "sea_water_temperature"})},
                    coords={"time": ("time", np.arange(NT, dtype=float),
                                     {"units": "days since 2001-01-01"}),
                            "lat": ("lat", LAT), "lon": ("lon", LON)})
    path = tmp_path / "temperature.nc"
    ds.to_netcdf(path)
    with pytest.raises(InputError) as err:
        open_dataset([path], IngestSettings())
    msg = _message(err)
    assert "temperature.nc" in msg and "temp (sea_water_temperature)" in msg
    assert "ingest.u_var" in msg and "ingest.ssh_var" in msg


def test_no_latitude_longitude(tmp_path):
    u, v, _ = _fields()
    ds = xr.Dataset({"u": (("time", "j", "i"), u, {"standard_name": "eastward_sea_water_velocity",
                                                    "units": "m s-1"}),
                     "v": (("time", "j", "i"), v, {"standard_name": "northward_sea_water_velocity",
                                                    "units": "m s-1"})},
                    coords={"time": ("time", np.arange(NT, dtype=float),
                                     {"units": "days since 2001-01-01"})})
    path = tmp_path / "nocoords.nc"
    ds.to_netcdf(path)
    with pytest.raises(InputError, match="nocoords.nc"):
        open_dataset([path], IngestSettings())


def test_all_missing_values(tmp_path):
    nan = np.full((NT, NY, NX), np.nan)
    with pytest.raises(InputError, match="allnan.nc"):
        open_dataset([_write(tmp_path / "allnan.nc", nan, nan)], IngestSettings())


def test_mismatched_shapes(tmp_path):
    u, v, _ = _fields()
    ds = xr.Dataset({"u": (("time", "lat", "lon"), u, {"standard_name": "eastward_sea_water_velocity",
                                                        "units": "m s-1"}),
                     "v": (("time", "lat2", "lon"), v[:, :4],
                           {"standard_name": "northward_sea_water_velocity", "units": "m s-1"})},
                    coords={"time": ("time", np.arange(NT, dtype=float),
                                     {"units": "days since 2001-01-01"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}),
                            "lon": ("lon", LON, {"units": "degrees_east"})})
    path = tmp_path / "shapes.nc"
    ds.to_netcdf(path)
    with pytest.raises(InputError, match="shapes.nc"):
        open_dataset([path], IngestSettings())


def test_latitude_out_of_range(tmp_path):
    u, v, _ = _fields()
    with pytest.raises(InputError, match="badlat.nc"):
        open_dataset([_write(tmp_path / "badlat.nc", u, v, lat=np.linspace(80, 120, NY))],
                     IngestSettings())


def test_single_time_step_is_a_record_error(tmp_path):
    u, v, _ = _fields(nt=1)
    path = _write(tmp_path / "one.nc", u, v)
    with pytest.raises(RecordError, match="one.nc"):
        open_dataset([path], IngestSettings())
    # geometry only needs no record; appending to a record accepts one step
    assert open_mask([path], IngestSettings()).mask.values.sum() > 0
    assert open_dataset([path], IngestSettings(), min_time_steps=1).sizes["time"] == 1


def test_repeated_or_backward_time_is_a_record_error(tmp_path):
    u, v, _ = _fields(nt=8)
    a = _write(tmp_path / "first.nc", u[:5], v[:5], time=np.arange(5.0))
    b = _write(tmp_path / "overlap.nc", u[4:], v[4:], time=np.arange(4.0, 8.0))
    with pytest.raises(RecordError, match="overlap.nc"):
        open_dataset([a, b], IngestSettings())
    back = _write(tmp_path / "backwards.nc", u, v, time=[0, 1, 2, 5, 4, 6, 7, 8])
    with pytest.raises(RecordError, match="backwards.nc"):
        open_dataset([back], IngestSettings())


def test_absurd_values_at_first_step_and_later(tmp_path):
    u, v, _ = _fields()
    bad_first = u.copy()
    bad_first[0, 2, 3] = 1.0e4
    with pytest.raises(InputError, match="absurd_first.nc") as err:
        open_dataset([_write(tmp_path / "absurd_first.nc", bad_first, v)], IngestSettings())
    assert "1 values" in str(err.value) and "y=2, x=3" in str(err.value)
    bad_later = u.copy()
    bad_later[4, 1, 1] = np.inf
    ds = open_dataset([_write(tmp_path / "absurd_later.nc", bad_later, v)],
                      IngestSettings(time_chunk=2))
    with pytest.raises(InputError, match="absurd_later.nc"):
        ds.u.values  # noqa: B018 - the stream pass meets the bad chunk


def test_time_chunks_are_whole_file_chunks(tmp_path):
    from coastmon.io.ingest import _aligned_chunk

    var = xr.DataArray(np.zeros((40, 3, 4), dtype=np.float32), dims=("time", "y", "x"))
    var.encoding["chunksizes"] = (7, 3, 4)
    # check: common practice, no source (a time block made of whole file chunks decompresses
    # each chunk once; 20 steps would cut the third chunk in two)
    assert _aligned_chunk(20, var, "time", IngestSettings()) == 14
    assert _aligned_chunk(5, var, "time", IngestSettings()) == 5  # file chunks longer: kept
    assert _aligned_chunk(20, var, "time", IngestSettings(time_chunk=20)) == 20  # user's choice
    var.encoding = {"preferred_chunks": {"time": 10, "y": 3, "x": 4}}  # as Zarr stores give it
    assert _aligned_chunk(25, var, "time", IngestSettings()) == 20
