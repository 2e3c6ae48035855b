"""The CF-NetCDF results file (``results.nc``).

One file holds three groups of variables, told apart by their dimensions:

- **grid statistics** on ``(y, x)`` with 2-D auxiliary coordinates ``lon(y, x)``,
  ``lat(y, x)`` named in each variable's ``coordinates`` attribute; on a regular grid
  (longitude depending only on x, latitude only on y) the dimensions are written as
  ``lat``, ``lon`` with 1-D coordinate variables instead, which every CF reader maps;
- **along-shore profiles** on ``station`` with auxiliary coordinates ``station_lon``,
  ``station_lat`` and ``alongshore_km``;
- **spectra** on their own dimensions (e.g. ``frequency``, ``wavenumber``, ``period``).

Every variable takes its ``long_name``, ``units`` (UDUNITS) and, where the CF standard
name table has one, ``standard_name`` from the registry :data:`VARIABLES`. A variable not
in the registry must bring its own ``long_name`` and ``units`` attributes. Statistics are
time averages; when the averaging period is given it is stored as ``time_coverage_start``
and ``time_coverage_end`` and ``cell_methods = "time: mean"`` says so (``time`` being a
CF standard name, no time coordinate is needed). A ``crs`` variable
(``grid_mapping_name = "latitude_longitude"``, WGS 84) is referenced by every gridded
variable. The file follows CF-1.8 and is written atomically.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import sys
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from coastmon.errors import InputError
from coastmon.io.atomic import atomic_path
from coastmon.io.owned import critical

CAUTIONS = (
    "Research diagnostics from model output or gridded observations; not for navigation, "
    "search and rescue or any safety-of-life decision; check against local observations and "
    "the responsible agencies."
)
"""The cautions sentence carried by every results file and report."""

REFERENCES = (
    "Okubo 1970 (Deep-Sea Res. 17:445-454); Weiss 1991 (Physica D 48:273-294); "
    "Chan, Golub & LeVeque 1983 (Am. Stat. 37:242-247); "
    "Mokhtarian & Mackworth 1992 (IEEE TPAMI 14:789-805); "
    "Torrence & Compo 1998 (BAMS 79:61-78); Kunsch 1989 (Ann. Stat. 17:1217-1241); "
    "Gill 1982 (Atmosphere-Ocean Dynamics); Vallis 2017 (Atmospheric and Oceanic Fluid "
    "Dynamics, 2nd ed.)"
)

_MEAN = "time: mean"
VARIABLES: dict[str, dict[str, str]] = {
    # grid statistics (y, x) from the streaming pass
    "mean_u": {"long_name": "time-mean eastward velocity", "units": "m s-1",
               "standard_name": "eastward_sea_water_velocity", "cell_methods": _MEAN},
    "mean_v": {"long_name": "time-mean northward velocity", "units": "m s-1",
               "standard_name": "northward_sea_water_velocity", "cell_methods": _MEAN},
    "mean_zeta": {"long_name": "time-mean relative vorticity", "units": "s-1",
                  "standard_name": "ocean_relative_vorticity", "cell_methods": _MEAN},
    "eke": {"long_name": "eddy kinetic energy per unit mass, (u'u' + v'v')/2",
            "units": "m2 s-2", "cell_methods": _MEAN},
    "uu": {"long_name": "eddy covariance u'u' (Reynolds stress per unit density)",
           "units": "m2 s-2", "cell_methods": _MEAN},
    "uv": {"long_name": "eddy covariance u'v' (Reynolds stress per unit density)",
           "units": "m2 s-2", "cell_methods": _MEAN},
    "vv": {"long_name": "eddy covariance v'v' (Reynolds stress per unit density)",
           "units": "m2 s-2", "cell_methods": _MEAN},
    "u_zeta": {"long_name": "eastward eddy vorticity flux u'zeta'", "units": "m s-2",
               "cell_methods": _MEAN},
    "v_zeta": {"long_name": "northward eddy vorticity flux v'zeta'", "units": "m s-2",
               "cell_methods": _MEAN},
    "zeta_var": {"long_name": "variance of relative vorticity", "units": "s-2",
                 "cell_methods": "time: variance"},
    "rossby_var": {"long_name": "variance of the Rossby number zeta/f", "units": "1",
                   "cell_methods": "time: variance"},
    "bt_conversion": {
        "long_name": "barotropic conversion from mean to eddy kinetic energy per unit mass, "
                     "-(u'u' du/dx + u'v' (du/dy + dv/dx) + v'v' dv/dy)",
        "units": "m2 s-3", "cell_methods": _MEAN},
    "ow_core_fraction": {"long_name": "fraction of time inside an Okubo-Weiss eddy core",
                         "units": "1", "cell_methods": _MEAN},
    "n_valid": {"long_name": "number of valid time steps", "units": "1"},
    "mean_ssh": {"long_name": "time-mean sea surface height", "units": "m",
                 "cell_methods": _MEAN},
    "ssh_var": {"long_name": "variance of sea surface height", "units": "m2",
                "cell_methods": "time: variance"},
    "u_ssh": {"long_name": "eddy covariance u'ssh'", "units": "m2 s-1", "cell_methods": _MEAN},
    "v_ssh": {"long_name": "eddy covariance v'ssh'", "units": "m2 s-1", "cell_methods": _MEAN},
    "eke_flux_x": {"long_name": "eastward eddy flux of eddy kinetic energy u'K'",
                   "units": "m3 s-3", "cell_methods": _MEAN},
    "eke_flux_y": {"long_name": "northward eddy flux of eddy kinetic energy v'K'",
                   "units": "m3 s-3", "cell_methods": _MEAN},
    # along-shore profiles (station)
    "alongshore_km": {"long_name": "distance along the coast", "units": "km"},
    "station_lon": {"long_name": "station longitude", "units": "degrees_east"},
    "station_lat": {"long_name": "station latitude", "units": "degrees_north"},
    "normal_az_deg": {"long_name": "azimuth of the offshore normal, clockwise from north",
                      "units": "degree"},
    "curvature_per_km": {"long_name": "signed coastline curvature, positive seaward convex",
                         "units": "km-1"},
    "nearshore_eke": {"long_name": "near-shore mean eddy kinetic energy per unit mass",
                      "units": "m2 s-2", "cell_methods": _MEAN},
    "nearshore_zeta_var": {"long_name": "near-shore variance of relative vorticity",
                           "units": "s-2", "cell_methods": "time: variance"},
    "nearshore_zeta_flux": {"long_name": "near-shore offshore eddy vorticity flux",
                            "units": "m s-2", "cell_methods": _MEAN},
    "eddy_band_power": {"long_name": "along-shore wavelet power in the eddy band",
                        "units": "s-2"},
    "persistence": {"long_name": "fraction of independent time windows with eddy-band "
                                 "variance above the local background", "units": "1"},
    "west_speed_cm_s": {"long_name": "measured westward propagation speed", "units": "cm s-1"},
    "rossby_speed_cm_s": {"long_name": "long baroclinic Rossby wave speed, westward positive",
                          "units": "cm s-1"},
    "deformation_radius_km": {"long_name": "first baroclinic deformation radius",
                              "units": "km"},
    "feed_w_per_m": {"long_name": "net westward eddy-band energy flux across the gate minus "
                                  "the background, per metre of depth", "units": "W m-1"},
    # spectra
    "frequency": {"long_name": "frequency", "units": "d-1"},
    "wavenumber": {"long_name": "zonal wavenumber, positive eastward", "units": "km-1"},
    "period": {"long_name": "Fourier period", "units": "d"},
    "scale_km": {"long_name": "along-shore wavelet Fourier wavelength", "units": "km"},
    "kw_power": {"long_name": "wavenumber-frequency power spectral density of velocity",
                 "units": "m2 s-2 km d"},
    "global_wavelet_power": {"long_name": "time-averaged wavelet power", "units": "s-2"},
    "westward_fraction": {"long_name": "fraction of eddy-band energy propagating westward",
                          "units": "1"},
}
"""Registry: variable name → CF attributes (long_name, units, standard_name, cell_methods)."""

FILL_FLOAT = 1.0e20
"""``_FillValue`` of floating-point variables."""

_REGULAR_ATOL_DEG = 1e-9


@dataclass
class Results:
    """The content of a results file, split as it was written.

    Attributes
    ----------
    stats
        Grid statistics on ``(y, x)`` with 2-D ``lon``, ``lat`` coordinates.
    profiles
        Along-shore profiles on ``station`` (coordinates ``lon``, ``lat``,
        ``alongshore_km`` when written).
    spectra
        Everything on other dimensions (empty Dataset when none was written).
    attrs
        Global attributes.
    """

    stats: xr.Dataset
    profiles: xr.Dataset
    spectra: xr.Dataset
    attrs: dict[str, Any]


def _is_regular(lon: np.ndarray, lat: np.ndarray) -> bool:
    if lon.ndim != 2 or lon.shape[0] < 1 or lon.shape[1] < 2 or lon.shape[0] < 2:
        return False
    return bool(
        np.allclose(lon, lon[:1, :], atol=_REGULAR_ATOL_DEG, rtol=0)
        and np.allclose(lat, lat[:, :1], atol=_REGULAR_ATOL_DEG, rtol=0)
        and np.all(np.diff(lon[0]) > 0) and np.all(np.diff(lat[:, 0]) > 0)
    )


def _attrs_for(name: str, var: xr.DataArray, geostrophic: bool) -> dict[str, str]:
    attrs = dict(VARIABLES.get(name, {}))
    for key in ("long_name", "units", "standard_name", "cell_methods", "comment"):
        if key in var.attrs:
            attrs[key] = str(var.attrs[key])
    if "long_name" not in attrs or "units" not in attrs:
        raise ValueError(
            f"variable {name!r} is not in coastmon.io.results.VARIABLES and lacks "
            "'long_name'/'units' attributes; add it to the registry"
        )
    if geostrophic and attrs.get("standard_name") in (
        "eastward_sea_water_velocity", "northward_sea_water_velocity"
    ):
        attrs["standard_name"] = "geostrophic_" + attrs["standard_name"]
    return attrs


def _bare(var: xr.DataArray, dims: tuple[str, ...]) -> xr.DataArray:
    """The values of ``var`` on ``dims``, without its coordinates, attributes or encoding."""
    return xr.DataArray(np.asarray(var.values), dims=dims)


def _global_attrs(attrs: Mapping[str, Any]) -> dict[str, Any]:
    from coastmon import __version__

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")
    out: dict[str, Any] = {
        "Conventions": "CF-1.8",
        "title": "coastmon results: coastal eddy statistics, along-shore profiles and spectra",
        "institution": "coastmon user",
        "source": f"coastmon {__version__}",
        "history": f"{now} written by coastmon {__version__}",
        "references": REFERENCES,
        "comment": CAUTIONS,
        "date_created": now,
    }
    for key, value in attrs.items():
        if isinstance(value, str | int | float | np.integer | np.floating):
            out[key] = value
        elif value is None:
            continue
        else:
            out[key] = json.dumps(value, default=str, sort_keys=True)
    out["Conventions"] = "CF-1.8"
    return out


def write_results(
    path: str | os.PathLike[str],
    stats: xr.Dataset,
    profiles: xr.Dataset | None,
    spectra: xr.Dataset | None,
    attrs: Mapping[str, Any] | None = None,
    time_bounds: tuple[Any, Any] | None = None,
) -> Path:
    """Write the CF-1.8 results file atomically.

    Parameters
    ----------
    path
        Output file (``results.nc``).
    stats
        Grid statistics on dims ``(y, x)`` with 2-D coordinates ``lon(y, x)``,
        ``lat(y, x)`` in degrees (the ``PassResult.stats`` of the streaming pass).
    profiles
        Along-shore profiles on dim ``station``; coordinates ``lon``, ``lat`` (station
        positions, written as ``station_lon``, ``station_lat``) and ``alongshore_km``
        are used when present. ``None`` for none.
    spectra
        Spectra on their own dims (not ``y``, ``x`` or ``station``); ``None`` for none.
    attrs
        Extra global attributes (dicts and lists are stored as JSON text). Key
        ``velocity_kind = "geostrophic"`` selects the geostrophic velocity standard names.
    time_bounds
        ``(start, end)`` of the averaging period (anything :func:`numpy.datetime64`
        accepts). When given, it is written as the global attributes
        ``time_coverage_start``/``time_coverage_end`` and the time-averaged variables get
        ``cell_methods = "time: mean"`` (or ``"time: variance"``).

    Returns
    -------
    pathlib.Path
        The file written.
    """
    attrs = dict(attrs or {})
    geostrophic = attrs.get("velocity_kind") == "geostrophic"
    if set(stats.dims) - {"y", "x"} or "lon" not in stats.coords or "lat" not in stats.coords:
        raise ValueError("stats must be on dims (y, x) with 2-D lon, lat coordinates")
    lon = np.asarray(stats["lon"].values, dtype="float64")
    lat = np.asarray(stats["lat"].values, dtype="float64")
    regular = _is_regular(lon, lat)
    out = xr.Dataset()
    out["crs"] = xr.DataArray(np.int32(0), attrs={
        "grid_mapping_name": "latitude_longitude",
        "longitude_of_prime_meridian": 0.0,
        "semi_major_axis": 6378137.0,
        "inverse_flattening": 298.257223563,
        "crs_wkt": 'GEOGCRS["WGS 84",DATUM["World Geodetic System 1984",ELLIPSOID['
                   '"WGS 84",6378137,298.257223563]],CS[ellipsoidal,2],AXIS["latitude",north],'
                   'AXIS["longitude",east],ANGLEUNIT["degree",0.0174532925199433],ID["EPSG",4326]]',
    })
    lon_attrs = {"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east"}
    lat_attrs = {"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north"}
    if regular:
        grid_dims = ("lat", "lon")
        coords = {"lat": ("lat", lat[:, 0], {**lat_attrs, "axis": "Y"}),
                  "lon": ("lon", lon[0, :], {**lon_attrs, "axis": "X"})}
        out = out.assign_coords(coords)
    else:
        grid_dims = ("y", "x")
        out = out.assign_coords(
            lon=(grid_dims, lon, lon_attrs), lat=(grid_dims, lat, lat_attrs))
    encoding: dict[str, dict[str, Any]] = {
        "crs": {"_FillValue": None},
        "lon": {"_FillValue": None}, "lat": {"_FillValue": None},
    }
    if time_bounds is not None:
        start, end = (np.datetime_as_string(np.datetime64(t, "s")) + "Z" for t in time_bounds)
        attrs = {"time_coverage_start": start, "time_coverage_end": end, **attrs}

    def add(name: str, var: xr.DataArray, dims: tuple[str, ...]) -> None:
        if name in out.variables:
            raise ValueError(f"variable {name!r} appears twice in the results")
        data = _bare(var, dims)
        data.attrs = _attrs_for(name, var, geostrophic)
        if time_bounds is None:
            data.attrs.pop("cell_methods", None)
        if set(dims) == set(grid_dims):
            data.attrs["grid_mapping"] = "crs"
        out[name] = data
        if np.issubdtype(data.dtype, np.floating):
            encoding[name] = {"_FillValue": FILL_FLOAT, "zlib": True, "complevel": 4,
                              "dtype": "float32" if data.ndim >= 2 else "float64"}
        else:
            encoding[name] = {"_FillValue": None, "dtype": "int32"}

    for name, var in stats.data_vars.items():
        if var.dims != ("y", "x"):
            raise ValueError(f"stats variable {name!r} must be on (y, x), got {var.dims}")
        add(str(name), var, grid_dims)

    if profiles is not None and profiles.sizes:
        if set(profiles.dims) != {"station"}:
            raise ValueError(f"profiles must be on the single dim 'station', got {profiles.dims}")
        renames = {"lon": "station_lon", "lat": "station_lat"}
        prof = profiles.rename({k: v for k, v in renames.items() if k in profiles.variables})
        aux = [c for c in ("station_lat", "station_lon", "alongshore_km") if c in prof.variables]
        for name in aux:
            out = out.assign_coords({name: ("station", np.asarray(prof[name].values, "float64"),
                                            _attrs_for(name, prof[name], False))})
            encoding[name] = {"_FillValue": None}
        for name, var in prof.data_vars.items():
            if str(name) in aux:
                continue
            add(str(name), var, ("station",))

    if spectra is not None:
        clash = set(spectra.dims) & {"y", "x", "station", "lat", "lon"}
        if clash:
            raise ValueError(f"spectra must not use the dims {sorted(clash)}")
        for dim in spectra.dims:
            if dim in spectra.coords:
                c = spectra[dim]
                out = out.assign_coords({str(dim): (str(dim), np.asarray(c.values),
                                                    _attrs_for(str(dim), c, False))})
                encoding[str(dim)] = {"_FillValue": None}
        for name, var in spectra.data_vars.items():
            add(str(name), var, tuple(str(d) for d in var.dims))

    out.attrs = _global_attrs(attrs)
    final = Path(path)
    with atomic_path(final) as tmp:
        with critical(), without_cluster_lookup():
            # (a signal inside xarray's file lock would deadlock its clean-up)
            out.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
    return final


@contextlib.contextmanager
def without_cluster_lookup() -> Iterator[None]:
    """Write in-memory datasets with xarray without importing ``dask.distributed``.

    Before every write ``Dataset.to_netcdf`` asks dask which scheduler is active (to close
    files between the writes of a cluster's workers), and dask and xarray import
    ``dask.distributed`` to answer: 0.19 s of the command's serial end on the benchmark
    machine. When this process has not imported it, no cluster client exists here and
    the write is the same either way, so the import is refused for the duration (both
    libraries take an ImportError as "no cluster"). A process that did import it (the
    ``--scheduler`` option) is left as it is. Another thread importing it meanwhile would
    fail too; coastmon imports it only to start a cluster, before the streaming pass.
    """
    if "distributed" in sys.modules:
        yield
        return
    sys.modules["distributed"] = None   # type: ignore[assignment]  # import fails at once
    try:
        yield
    finally:
        if "distributed" in sys.modules and sys.modules["distributed"] is None:
            del sys.modules["distributed"]


def read_results(path: str | os.PathLike[str]) -> Results:
    """Read a results file written by :func:`write_results`.

    Grid variables come back on ``(y, x)`` with 2-D ``lon``, ``lat`` coordinates whether
    the file stored the grid as regular 1-D axes or as 2-D auxiliary coordinates; station
    coordinates come back as ``lon``, ``lat`` on ``station``.

    Raises
    ------
    coastmon.errors.InputError
        The file is missing or is not a NetCDF file.
    """
    path = Path(path)
    try:
        with xr.open_dataset(path, engine="netcdf4") as ds:
            ds = ds.load()
    except (OSError, ValueError) as exc:
        raise InputError(
            f"Cannot read the results file ({exc})", where=str(path),
            todo="Give the results.nc of a finished coastmon run",
        ) from None
    attrs = dict(ds.attrs)
    ds = ds.drop_vars([v for v in ("crs",) if v in ds.variables])
    if ds["lon"].ndim == 1 and ds["lon"].dims == ("lon",):
        lon1, lat1 = ds["lon"].values, ds["lat"].values
        ds = ds.drop_vars(["lon", "lat"]).rename_dims({"lat": "y", "lon": "x"})
        lon2, lat2 = np.meshgrid(lon1, lat1)
        ds = ds.assign_coords(lon=(("y", "x"), lon2), lat=(("y", "x"), lat2))
    grid = [n for n, v in ds.data_vars.items() if set(v.dims) == {"y", "x"}]
    prof = [n for n, v in ds.data_vars.items() if v.dims == ("station",)]
    rest = [n for n in ds.data_vars if n not in grid and n not in prof]
    stats = ds[grid]
    stats = stats.drop_vars([c for c in stats.coords if c not in ("lon", "lat")])
    profiles = ds[prof].rename({k: v for k, v in (("station_lon", "lon"),
                                                  ("station_lat", "lat"))
                                if k in ds.coords})
    profiles = profiles.drop_vars([c for c in profiles.coords
                                   if "station" not in profiles[c].dims])
    spectra = ds[rest].drop_vars([c for c in ds[rest].coords
                                  if c in ("lon", "lat", "station_lon", "station_lat",
                                           "alongshore_km")])
    for part in (stats, profiles, spectra):
        for var in part.variables.values():
            var.attrs.pop("coordinates", None)
            var.attrs.pop("grid_mapping", None)
    return Results(stats=stats, profiles=profiles, spectra=spectra, attrs=attrs)
