"""Open gridded ocean output (NetCDF or Zarr) as the canonical dataset.

The canonical dataset (documented in ``docs/canonical-dataset.md``) has dims
``(time, y, x)``, dask chunks along ``time`` only, 2-D ``lon``/``lat`` in degrees,
eastward/northward ``u``, ``v`` in m s-1 with NaN on land, an int8 ``mask`` (1 = sea),
optional ``ssh`` (m) and ``bathymetry`` (m, positive down), on C-grid inputs the native
relative vorticity ``zeta`` (s-1; circulation around the cell corners, see
:mod:`coastmon.io.sgrid`), and the attributes ``source_files``, ``depth_m``,
``velocity_kind``, ``compressed_input`` and ``direct_read``.

Nothing here reads the (time, y, x) data except the first time step (for the land/sea
mask and a sanity check) and one value of the last time step of each file (to catch
truncated files). Every per-time transformation (unit scaling, C-grid averaging and
native C-grid vorticity, rotation to east/north, vertical selection, geostrophic
velocity) is a lazy dask operation that runs inside the one streaming pass.
"""

from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import dask.array as dsa
import numpy as np
import xarray as xr
from xarray.backends import ZarrBackendEntrypoint

from coastmon.compiled import compiled
from coastmon.config import IngestSettings
from coastmon.errors import DataWarning, InputError, RecordError
from coastmon.grid.metrics import GridMetrics
from coastmon.grid.operators import geostrophic_velocity
from coastmon.io import chunks as chunk_reader
from coastmon.io import sgrid, vertical
from coastmon.io.damage import decode_failure
from coastmon.io.gridcheck import calendar_of, grid_differences
from coastmon.io.units import scale_factor

CHUNK_BUDGET_BYTES = 24 * 2**20
"""Target size of one time chunk of the largest input variable (bytes). The pass holds one
chunk per compute thread and per reader, and short chunks fill its pipeline of reads and
computation sooner; below glibc's 32 MiB ceiling for serving large arrays from the heap,
the memory of a chunk read is reused for the next instead of being mapped afresh (and
page-faulted) each time."""
NETCDF_CHUNK_CACHE_BYTES = 4 * 2**20
"""Chunk cache of each variable of each NetCDF-4 file opened for reading (the library's
default, 64 MB, stays allocated while the file is open: with many input files it grew
the pass's memory by over 100 MB per file). The pass reads every file chunk once, in
time blocks aligned with the file's own time chunks, so a small cache loses nothing."""
MAX_SPEED_M_S = 20.0
"""Speeds above this (or infinite) are taken as corrupt data, not ocean currents."""
MAX_SSH_M = 30.0
"""Sea surface heights beyond +/- this are taken as corrupt data."""

_EAST = ("eastward_sea_water_velocity", "barotropic_eastward_sea_water_velocity",
         "baroclinic_eastward_sea_water_velocity")
_NORTH = tuple(name.replace("eastward", "northward") for name in _EAST)
_GEO_EAST = "surface_geostrophic_eastward_sea_water_velocity"
_GEO_NORTH = "surface_geostrophic_northward_sea_water_velocity"
_GRID_X = "sea_water_x_velocity"
_GRID_Y = "sea_water_y_velocity"
_PLAIN_UV = (("u", "v"), ("uvel", "vvel"), ("u_velocity", "v_velocity"),
             ("eastward_velocity", "northward_velocity"))
_SSH_STD = ("sea_surface_height_above_geoid", "sea_surface_height_above_mean_sea_level",
            "sea_surface_height_above_sea_level", "sea_surface_height",
            "sea_surface_elevation", "sea_surface_height_above_reference_ellipsoid")
_SSH_NAMES = ("ssh", "eta", "sea_level", "sea_surface_height", "sla", "adt")
_BATHY_STD = ("sea_floor_depth_below_geoid", "sea_floor_depth_below_mean_sea_level",
              "sea_floor_depth_below_sea_surface", "sea_floor_depth_below_reference_ellipsoid",
              "sea_floor_depth")
_BATHY_NAMES = ("bathymetry", "bathy", "depth", "h", "sea_floor_depth")
_ANGLE_STD = "angle_of_rotation_from_east_to_x"
_LAT_UNITS = {"degrees_north", "degree_north", "degree_n", "degrees_n", "degreen", "degreesn"}
_LON_UNITS = {"degrees_east", "degree_east", "degree_e", "degrees_e", "degreee", "degreese"}


@dataclass
class _Plan:
    """What was found in the first file and how to turn it into the canonical form."""

    where: str
    u: str | None = None
    v: str | None = None
    ssh: str | None = None
    grid_relative: bool = False
    velocity_kind: str = "velocity"
    angle: str | None = None
    mask: str | None = None
    bathymetry: str | None = None
    tdim: str | None = None
    zdim: str | None = None
    ydim: str = ""
    xdim: str = ""
    lat: str = ""
    lon: str = ""
    staggered: bool = False
    layouts: dict[str, str] = field(default_factory=dict)
    face_masks: dict[str, str] = field(default_factory=dict)


# --------------------------------------------------------------------------- files


def _check_path(path: Path) -> str:
    """'zarr' or 'netcdf'; InputError for a missing, empty or foreign file."""
    where = str(path)
    if not path.exists():
        raise InputError("The input file does not exist", where=where,
                         todo="Check the path and spelling; give NetCDF files or Zarr stores")
    if path.is_dir():
        markers = (".zgroup", ".zarray", "zarr.json", ".zmetadata")
        if any((path / m).exists() for m in markers):
            return "zarr"
        raise InputError("The folder is not a Zarr store (no .zgroup or zarr.json inside)",
                         where=where, todo="Give a NetCDF file or the top folder of a Zarr store")
    size = path.stat().st_size
    if size == 0:
        raise InputError("The input file is empty (zero bytes)", where=where,
                         todo="Copy or download the file again")
    with path.open("rb") as fh:
        magic = fh.read(8)
    if magic[:3] == b"CDF":
        _check_classic_size(path)
        return "netcdf"
    if magic == b"\x89HDF\r\n\x1a\n":
        return "netcdf"
    raise InputError("The file is neither NetCDF nor Zarr (its first bytes are not a NetCDF "
                     "or HDF5 signature)", where=where,
                     todo="Convert it to NetCDF (CF conventions) or Zarr first")


def _check_classic_size(path: Path) -> None:
    """A classic-format NetCDF file shorter than its header promises is truncated."""
    from scipy.io import netcdf_file

    with path.open("rb") as fh:
        version = fh.read(4)[3]
    if version not in (1, 2):
        return
    try:
        with netcdf_file(path, mode="r", mmap=True) as nc:
            for var in nc.variables.values():
                if var.data.size:
                    var.data.flat[-1].item()
            del var
    except Exception:  # scipy reports a short file by a failed view of the mapped bytes
        raise InputError("The NetCDF file is truncated: it is shorter than its header says",
                         where=str(path), todo="Copy or download the file again") from None


def _has_consolidated(path: Path) -> bool:
    """Whether a Zarr store carries consolidated metadata (format 2 or 3)."""
    if (path / ".zmetadata").exists():
        return True
    meta = path / "zarr.json"
    if meta.exists():
        try:
            return json.loads(meta.read_text()).get("consolidated_metadata") is not None
        except (OSError, ValueError):
            return False
    return False


def _open(path: Path, kind: str, chunks: dict | None) -> xr.Dataset:
    if kind != "zarr":
        _small_chunk_cache()
    try:
        # Backend classes, not names: naming one would import every installed xarray plugin.
        if kind == "zarr":
            return xr.open_dataset(path, engine=ZarrBackendEntrypoint, chunks=chunks,
                                   consolidated=_has_consolidated(path), decode_timedelta=False)
        return xr.open_dataset(path, engine=chunk_reader.Entrypoint, chunks=chunks,
                               cache=False, decode_timedelta=False)
    except Exception as exc:  # the backends raise OSError, ValueError, KeyError, RuntimeError
        raise InputError(f"The file cannot be read ({type(exc).__name__}: {exc}); it may be "
                         "truncated or damaged", where=str(path),
                         todo="Check the file with a NetCDF or Zarr tool, or copy it again") from None


def _small_chunk_cache() -> None:
    """Give NetCDF-4 files opened from now on a small per-variable chunk cache."""
    import netCDF4

    size, nelems, preemption = netCDF4.get_chunk_cache()
    if size != NETCDF_CHUNK_CACHE_BYTES:
        netCDF4.set_chunk_cache(NETCDF_CHUNK_CACHE_BYTES, nelems, preemption)


# --------------------------------------------------------------------------- discovery


def _std(var: xr.DataArray) -> str:
    return str(var.attrs.get("standard_name", "")).strip()


def _inventory(ds: xr.Dataset) -> str:
    items = []
    for name, var in ds.data_vars.items():
        std = _std(var)
        items.append(f"{name} ({std})" if std else str(name))
    return ", ".join(items) if items else "none"


def _lookup(ds: xr.Dataset, name: str, setting: str, where: str) -> str:
    if name in ds.variables:
        return name
    raise InputError(f"The variable '{name}' named by ingest.{setting} is not in the file "
                     f"(variables found: {_inventory(ds)})", where=where,
                     todo=f"Set ingest.{setting} to one of the variables listed")


def _by_std(ds: xr.Dataset, names: tuple[str, ...], prefix: bool = False) -> str | None:
    for wanted in names:
        for name, var in ds.data_vars.items():
            std = _std(var)
            if std == wanted or (prefix and std.startswith(wanted)):
                return str(name)
    return None


def _by_name(ds: xr.Dataset, names: tuple[str, ...]) -> str | None:
    lower = {str(n).lower(): str(n) for n in ds.data_vars}
    for wanted in names:
        if wanted in lower:
            return lower[wanted]
    return None


def _find_velocity(ds: xr.Dataset, s: IngestSettings, plan: _Plan) -> None:
    if s.u_var or s.v_var:
        if not (s.u_var and s.v_var):
            raise InputError("Only one of ingest.u_var and ingest.v_var is set", where=plan.where,
                             todo="Name both velocity components, or neither")
        plan.u = _lookup(ds, s.u_var, "u_var", plan.where)
        plan.v = _lookup(ds, s.v_var, "v_var", plan.where)
        std = _std(ds[plan.u])
        plan.grid_relative = std.startswith(_GRID_X) or s.angle_var is not None
        plan.velocity_kind = "geostrophic" if "geostrophic" in std else "velocity"
        return
    pairs = [(_EAST, _NORTH, False, "velocity", False),
             ((_GEO_EAST,), (_GEO_NORTH,), False, "geostrophic", True),
             ((_GRID_X,), (_GRID_Y,), True, "velocity", True)]
    for east, north, grid, kind, prefix in pairs:
        u, v = _by_std(ds, east, prefix), _by_std(ds, north, prefix)
        if u and v:
            plan.u, plan.v, plan.grid_relative, plan.velocity_kind = u, v, grid, kind
            return
    for un, vn in _PLAIN_UV:
        u, v = _by_name(ds, (un,)), _by_name(ds, (vn,))
        if u and v:
            plan.u, plan.v = u, v
            return


def _find_ssh(ds: xr.Dataset, s: IngestSettings, plan: _Plan) -> None:
    if s.ssh_var:
        plan.ssh = _lookup(ds, s.ssh_var, "ssh_var", plan.where)
        return
    plan.ssh = _by_std(ds, _SSH_STD) or _by_name(ds, _SSH_NAMES)


def _is_time(ds: xr.Dataset, dim: str) -> bool:
    if dim in ds.variables:
        var = ds[dim]
        if _std(var) == "time" or str(var.attrs.get("axis", "")).upper() == "T":
            return True
        if np.issubdtype(var.dtype, np.datetime64) or var.dtype == object:
            return True
        if " since " in str(var.attrs.get("units", "")):
            return True
    return "time" in dim.lower()


def _is_lat(var: xr.DataArray, name: str) -> bool:
    units = str(var.attrs.get("units", "")).lower()
    return (_std(var) == "latitude" or units in _LAT_UNITS
            or name.lower() in ("lat", "latitude", "nav_lat") or name.lower().startswith("lat_"))


def _is_lon(var: xr.DataArray, name: str) -> bool:
    units = str(var.attrs.get("units", "")).lower()
    return (_std(var) == "longitude" or units in _LON_UNITS
            or name.lower() in ("lon", "longitude", "nav_lon") or name.lower().startswith("lon_"))


def _axes_swapped(ds: xr.Dataset, ydim: str, xdim: str) -> bool:
    """Whether the last two dims are (longitude, latitude): 1-D latitude on the last dim
    and 1-D longitude on the one before (CF allows any order; canonical is (y, x))."""
    def on(test, dim: str) -> bool:
        return any(test(v, str(n)) and v.dims == (dim,) for n, v in ds.variables.items())

    return (on(_is_lat, xdim) and on(_is_lon, ydim)
            and not on(_is_lat, ydim) and not on(_is_lon, xdim))


def _find_latlon(ds: xr.Dataset, ydim: str, xdim: str, where: str) -> tuple[str, str]:
    def pick(test) -> str | None:
        found = [str(n) for n, v in ds.variables.items() if test(v, str(n))]
        for dims in ((ydim, xdim), (ydim,), (xdim,)):
            for name in found:
                if ds[name].dims == dims:
                    return name
        return None

    lat = pick(lambda v, n: _is_lat(v, n) and v.dims in ((ydim, xdim), (ydim,)))
    lon = pick(lambda v, n: _is_lon(v, n) and v.dims in ((ydim, xdim), (xdim,)))
    if lat is None or lon is None:
        raise InputError(f"No latitude/longitude found for the grid dimensions ({ydim}, {xdim}); "
                         "coastmon looks for standard_name latitude/longitude, units "
                         "degrees_north/degrees_east, or names lat/lon", where=where,
                         todo="Add CF attributes (standard_name, units) to the coordinate "
                              "variables, or store 1-D lat/lon coordinates on the grid dims")
    return lat, lon


def _find_mask(ds: xr.Dataset, s: IngestSettings, plan: _Plan) -> list[str]:
    if s.mask_var:
        return [_lookup(ds, s.mask_var, "mask_var", plan.where)]
    std = ("sea_binary_mask", "land_binary_mask", "land_area_fraction", "sea_area_fraction")
    found = [str(n) for n, v in ds.data_vars.items() if _std(v) in std]
    found += [str(n) for n in ds.data_vars
              if str(n) not in found and (str(n).lower() in ("lsm", "landmask", "land_mask")
                                          or str(n).lower().startswith("mask")
                                          or str(n).lower().endswith("mask"))]
    return found


def _find_bathymetry(ds: xr.Dataset, s: IngestSettings, plan: _Plan) -> str | None:
    if s.bathymetry_var:
        return _lookup(ds, s.bathymetry_var, "bathymetry_var", plan.where)
    two_d = xr.Dataset({n: v for n, v in ds.data_vars.items() if v.ndim == 2})
    return _by_std(two_d, _BATHY_STD) or _by_name(two_d, _BATHY_NAMES)


def _horizontal(ds: xr.Dataset, name: str, plan: _Plan) -> tuple[str, str]:
    dims = ds[name].dims
    if len(dims) < 2:
        raise InputError(f"The variable '{name}' is not a map (its dimensions are {dims})",
                         where=plan.where, todo="Give gridded (time, y, x) data")
    return str(dims[-2]), str(dims[-1])


def _centre_dims(ds: xr.Dataset, plan: _Plan) -> None:
    """Decide the cell-centre dims; detect C-grid staggering of u and v."""
    assert plan.u is not None and plan.v is not None
    uy, ux = _horizontal(ds, plan.u, plan)
    vy, vx = _horizontal(ds, plan.v, plan)
    if (uy, ux) == (vy, vx):
        plan.ydim, plan.xdim = uy, ux
        return
    topo = sgrid.find_topology(ds)
    size = ds.sizes
    if topo is not None and len(topo.face_dims) >= 2:
        faces = set(topo.face_dims[:2])
        owners = [v.dims[-2:] for v in ds.variables.values()
                  if v.ndim >= 2 and set(v.dims[-2:]) == faces]
        if not owners:
            raise InputError(f"The SGRID face dimensions {sorted(faces)} are used by no variable",
                             where=plan.where, todo="Check the grid_topology attributes")
        plan.ydim, plan.xdim = str(owners[0][0]), str(owners[0][1])
    else:
        want = (size[uy], size[vx])
        owners = [v.dims[-2:] for n, v in ds.variables.items()
                  if v.ndim >= 2 and tuple(v.shape[-2:]) == want
                  and not {ux, vy} & set(v.dims[-2:])
                  and (_is_lat(v, str(n)) or _is_lon(v, str(n)))]
        if (uy, vx) in owners or not owners:
            plan.ydim, plan.xdim = uy, vx
        else:
            plan.ydim, plan.xdim = str(owners[0][0]), str(owners[0][1])
    ny, nx = size[plan.ydim], size[plan.xdim]
    pad_x = topo.padding_for(plan.xdim) if topo else None
    pad_y = topo.padding_for(plan.ydim) if topo else None
    layout_u = sgrid.layout_from_sizes(nx, size[ux], pad_x)
    layout_v = sgrid.layout_from_sizes(ny, size[vy], pad_y)
    if size[uy] != ny or size[vx] != nx:
        layout_u = layout_v = None
    if layout_u is None and size[ux] == nx and size[uy] == ny:
        layout_u = _layout_from_coords(ds, (uy, ux), plan, axis=1)
    if layout_v is None and size[vy] == ny and size[vx] == nx:
        layout_v = _layout_from_coords(ds, (vy, vx), plan, axis=0)
    if layout_u is None or layout_v is None:
        raise InputError(
            f"The velocity components have mismatched shapes: {plan.u} is "
            f"{dict(zip((uy, ux), ds[plan.u].shape[-2:], strict=True))} and {plan.v} is "
            f"{dict(zip((vy, vx), ds[plan.v].shape[-2:], strict=True))}, which is neither one "
            "grid nor a C-grid around the cell centres", where=plan.where,
            todo="Give u and v on the same grid, or add SGRID metadata (a grid_topology "
                 "variable with face_dimensions) describing the staggering")
    plan.staggered = True
    plan.layouts = {"u": layout_u, "v": layout_v, "u_dim": ux, "v_dim": vy,
                    "u_other": uy, "v_other": vx}


def _layout_from_coords(ds: xr.Dataset, dims: tuple[str, str], plan: _Plan, axis: int) -> str:
    """Equal-size staggering without SGRID padding: place the staggered points by their coords."""
    try:
        slat, slon = _find_latlon(ds, *dims, plan.where)
        clat, clon = _find_latlon(ds, plan.ydim, plan.xdim, plan.where)
    except InputError:
        warnings.warn(f"{plan.where}: u/v are staggered with the same size as the cell centres "
                      "and neither SGRID padding nor coordinates of the staggered points say "
                      "on which side; assuming each value is on the east (u) or north (v) face "
                      "of its cell", stacklevel=3)
        return "low"
    from coastmon.grid.metrics import haversine_m

    def point(lat: str, lon: str, j: int, i: int) -> tuple[float, float]:
        la, lo = ds[lat].values, ds[lon].values
        if la.ndim == 1:
            return float(lo[i]), float(la[j])
        return float(lo[j, i]), float(la[j, i])

    mid = ds.sizes[plan.ydim] // 2 if axis == 1 else ds.sizes[plan.xdim] // 2
    idx = (lambda k: (mid, k)) if axis == 1 else (lambda k: (k, mid))
    s0 = point(slat, slon, *idx(0))
    c0, c1 = point(clat, clon, *idx(0)), point(clat, clon, *idx(1))
    across = haversine_m(s0[0], s0[1], c1[0], c1[1])
    spacing = haversine_m(c0[0], c0[1], c1[0], c1[1])
    return "high" if across > spacing else "low"


def _plan(ds: xr.Dataset, s: IngestSettings, where: str, need_time: bool) -> _Plan:
    plan = _Plan(where=where)
    _find_velocity(ds, s, plan)
    _find_ssh(ds, s, plan)
    masks = _find_mask(ds, s, plan)
    plan.bathymetry = _find_bathymetry(ds, s, plan)
    if plan.u is None and plan.ssh is None and (need_time or not (masks or plan.bathymetry)):
        raise InputError(
            "No velocity or sea surface height variable was found (variables in the file: "
            f"{_inventory(ds)}). coastmon looks for CF standard names such as "
            "eastward_sea_water_velocity / northward_sea_water_velocity, sea_water_x_velocity / "
            "sea_water_y_velocity, surface_geostrophic_eastward_sea_water_velocity, or "
            "sea_surface_height_above_geoid", where=where,
            todo="Name the variables with the settings ingest.u_var and ingest.v_var (or "
                 "ingest.ssh_var); for the coast command a land/sea mask (ingest.mask_var) "
                 "is enough")
    main = plan.u or plan.ssh
    if main is not None:
        dims = ds[main].dims
        plan.tdim = str(dims[0]) if dims and _is_time(ds, str(dims[0])) else None
        if plan.u is not None:
            _centre_dims(ds, plan)
        else:
            plan.ydim, plan.xdim = _horizontal(ds, main, plan)
        if not plan.staggered and _axes_swapped(ds, plan.ydim, plan.xdim):
            plan.ydim, plan.xdim = plan.xdim, plan.ydim  # stored (..., lon, lat): transposed
        middle = [str(d) for d in dims if d != plan.tdim and d not in dims[-2:]]
        if len(middle) > 1:
            raise InputError(f"The variable '{main}' has more dimensions than (time, depth, y, x): "
                             f"{dims}", where=where,
                             todo="Select a single value of the extra dimensions before coastmon")
        plan.zdim = middle[0] if middle else None
        if need_time and s.depth_m is not None and plan.zdim is None:
            raise InputError(
                f"A depth of {s.depth_m:g} m was asked for, but '{main}' has no depth "
                f"dimension (its dimensions are {dims}): the file holds a single level",
                where=f"{where}; --depth (ingest.depth_m)",
                todo="Leave --depth unset for single-level data, or give files that keep "
                     "their depth levels")
        zname = _vertical_std(ds, plan.zdim) if plan.zdim else None
        if zname is not None:
            terms = vertical.parse_formula_terms(str(ds[zname].attrs.get("formula_terms", "")))
            if plan.ssh is None and terms.get("eta") in ds.data_vars:
                plan.ssh = terms["eta"]
            if plan.bathymetry is None and terms.get("depth") in ds.data_vars:
                plan.bathymetry = terms["depth"]
    else:
        static = next(n for n in [*masks, plan.bathymetry] if n is not None)
        plan.ydim, plan.xdim = _horizontal(ds, static, plan)
        if _axes_swapped(ds, plan.ydim, plan.xdim):
            plan.ydim, plan.xdim = plan.xdim, plan.ydim
    centre = {plan.ydim, plan.xdim}
    if plan.ssh is not None and set(ds[plan.ssh].dims[-2:]) != {plan.ydim, plan.xdim}:
        raise InputError(
            f"The sea surface height '{plan.ssh}' has dimensions {ds[plan.ssh].dims}, not the "
            f"cell-centre grid ({plan.ydim}, {plan.xdim}) of the velocity", where=where,
            todo="Name the matching variable with ingest.ssh_var, or give SSH on the same grid")
    for name in masks:
        hdims = set(ds[name].dims) - ({plan.tdim} if plan.tdim else set())
        if hdims == centre and plan.mask is None:
            plan.mask = name
        elif plan.staggered and plan.u and hdims == set(ds[plan.u].dims[-2:]):
            plan.face_masks["u"] = name
        elif plan.staggered and plan.v and hdims == set(ds[plan.v].dims[-2:]):
            plan.face_masks["v"] = name
    if s.mask_var and plan.mask is None:
        raise InputError(f"The mask '{s.mask_var}' is not on the grid of the data "
                         f"({plan.ydim}, {plan.xdim})", where=where,
                         todo="Name a mask on the cell centres in ingest.mask_var")
    if plan.bathymetry and set(ds[plan.bathymetry].dims) != centre:
        plan.bathymetry = None
    if plan.grid_relative or s.angle_var or (plan.staggered and (plan.u is not None)):
        if s.angle_var:
            plan.angle = _lookup(ds, s.angle_var, "angle_var", where)
        else:
            plan.angle = _by_std(ds, (_ANGLE_STD,)) or _by_name(ds, ("angle",))
        if plan.angle is not None and set(ds[plan.angle].dims) == centre:
            plan.grid_relative = True
        elif plan.grid_relative:
            raise InputError(
                "The velocity is relative to the grid axes (sea_water_x/y_velocity) but no "
                "rotation angle on the cell centres was found", where=where,
                todo="Name the angle variable (grid x-axis anticlockwise from east) with "
                     "ingest.angle_var, or give it standard_name angle_of_rotation_from_east_to_x")
    plan.lat, plan.lon = _find_latlon(ds, plan.ydim, plan.xdim, where)
    topo = sgrid.find_topology(ds)
    if topo is not None and len(topo.face_coordinates) == 2:
        named = [n for n in topo.face_coordinates
                 if n in ds.variables and set(ds[n].dims) <= centre]
        lats = [n for n in named if _is_lat(ds[n], n)]
        lons = [n for n in named if _is_lon(ds[n], n)]
        if lats and lons:
            plan.lat, plan.lon = lats[0], lons[0]
    return plan


# --------------------------------------------------------------------------- combine files


def _auto_chunk(ds: xr.Dataset, plan: _Plan, s: IngestSettings) -> int:
    if s.time_chunk is not None:
        return s.time_chunk
    var = ds[plan.u or plan.ssh]
    per_step = var.dtype.itemsize * math.prod(var.shape[1:])
    return max(1, CHUNK_BUDGET_BYTES // max(per_step, 1))


def _aligned_chunk(tc: int, var: xr.DataArray, tdim: str, s: IngestSettings) -> int:
    """The time chunk ``tc`` rounded down to a whole number of the file's own time chunks
    (so that no file chunk is decompressed twice), unless the user set the chunk or the
    file's chunks are longer than ``tc``."""
    if s.time_chunk is not None:
        return tc
    sizes = var.encoding.get("chunksizes") or var.encoding.get("preferred_chunks", {})
    if isinstance(sizes, dict):
        own = sizes.get(tdim)
    else:
        own = dict(zip(var.dims, sizes, strict=False)).get(tdim)
    if not own or own > tc:
        return tc
    return int(tc // own * own)


def _combine(files: list[Path], kinds: list[str], first: xr.Dataset, plan: _Plan,
             s: IngestSettings, need_time: bool) -> xr.Dataset:
    if plan.tdim is None or not need_time:
        return _open(files[0], kinds[0], {d: -1 for d in first.dims})
    tc = _auto_chunk(first, plan, s)
    main = plan.u or plan.ssh
    opened = []
    for path, kind in zip(files, kinds, strict=True):
        ds = _open(path, kind, None)
        for name in (plan.u, plan.v, plan.ssh):
            if name is not None and name not in ds.variables:
                raise InputError(f"The variable '{name}' found in {files[0].name} is missing "
                                 "from this file", where=str(path),
                                 todo="Give files of one series with the same variables")
        _probe_last(ds, main, plan.tdim, path)
        if path != files[0]:
            _check_same_grid(ds, first, plan, path, files[0])
        start = ds[plan.tdim].values[:1] if plan.tdim in ds.variables else np.array([])
        step = _aligned_chunk(tc, ds[main], plan.tdim, s)
        ds.close()
        chunked = _open(path, kind, {d: (step if d == plan.tdim else -1) for d in first.dims})
        opened.append((start, path, chunked))
    if len(opened) > 1 and all(item[0].size for item in opened):
        opened.sort(key=lambda item: item[0][0])
    timed = [name for name, v in first.variables.items() if plan.tdim in v.dims]
    if len(opened) == 1:
        combined = opened[0][2]
    else:
        parts = [ds[timed] for _, _, ds in opened]
        combined = xr.concat(parts, dim=plan.tdim, data_vars="all", coords="minimal",
                             compat="override", join="override")
        static = opened[0][2].drop_vars(timed)
        combined = xr.merge([combined, static], compat="override", join="override")
    combined.attrs["_compressed"] = int(_compressed(first[main]))
    combined.attrs["_direct_read"] = int(bool(first[main].encoding.get(chunk_reader.ENCODING_KEY)))
    combined.attrs["_files"] = json.dumps([str(p.resolve()) for _, p, _ in opened])
    combined.attrs["_lengths"] = json.dumps([int(ds.sizes[plan.tdim]) for _, _, ds in opened])
    return combined


def _grid_of(ds: xr.Dataset, plan: _Plan) -> tuple[np.ndarray, np.ndarray]:
    """The file's own latitudes and longitudes as (y, x) arrays (1-D ones broadcast)."""
    lat = ds[plan.lat].transpose(*[d for d in (plan.ydim, plan.xdim) if d in ds[plan.lat].dims])
    lon = ds[plan.lon].transpose(*[d for d in (plan.ydim, plan.xdim) if d in ds[plan.lon].dims])
    lat_v, lon_v = np.asarray(lat.values, np.float64), np.asarray(lon.values, np.float64)
    if lat_v.ndim == 1 and lon_v.ndim == 1:
        lon_v, lat_v = np.meshgrid(lon_v, lat_v)
    return lon_v, lat_v


def _check_same_grid(ds: xr.Dataset, first: xr.Dataset, plan: _Plan, path: Path,
                     first_path: Path) -> None:
    """Refuse to join files on different grids, with other level counts or calendars."""
    problems = []
    if plan.tdim in ds.variables and plan.tdim in first.variables:
        cal, cal_first = calendar_of(ds[plan.tdim].values), calendar_of(first[plan.tdim].values)
        if cal != cal_first:
            problems.append(f"the '{cal}' calendar instead of '{cal_first}'")
    try:
        problems += grid_differences(*_grid_of(ds, plan), *_grid_of(first, plan))
    except (KeyError, ValueError):
        problems.append(f"no coordinates '{plan.lat}'/'{plan.lon}' on the dimensions "
                        f"({plan.ydim}, {plan.xdim})")
    main = plan.u or plan.ssh
    if not problems and main is not None:
        sizes = {d: n for d, n in zip(ds[main].dims, ds[main].shape, strict=True)
                 if d != plan.tdim}
        sizes_first = {d: n for d, n in zip(first[main].dims, first[main].shape, strict=True)
                       if d != plan.tdim}
        if sizes != sizes_first:
            problems.append(f"'{main}' of sizes {sizes} instead of {sizes_first}")
    if problems:
        raise InputError(
            f"The input files cannot be joined into one record: {path.name} has "
            + "; ".join(problems) + f" compared with {first_path.name}",
            where=f"{first_path}, {path}",
            todo="Give files of one model run or product on one grid (regrid or convert them "
                 "first), or analyse them separately")


_FILTER_KEYS = ("zlib", "szip", "zstd", "bzip2", "blosc", "compression", "compressor",
                "compressors")


def _compressed(var: xr.DataArray) -> bool:
    """Whether the variable is stored compressed (NetCDF-4/HDF5 filters, Zarr compressors),
    from the encoding the backend reports."""
    enc = var.encoding
    return any(enc.get(key) not in (None, False, 0, "", "none", (), []) for key in _FILTER_KEYS)


def _probe_last(ds: xr.Dataset, name: str | None, tdim: str, path: Path) -> None:
    """Read one value of the last time step: catches files cut short after the header."""
    if name is None or tdim not in ds[name].dims or ds.sizes[tdim] == 0:
        return
    index = {d: (-1 if d == tdim else 0) for d in ds[name].dims}
    try:
        ds[name].isel(index).load()
    except Exception as exc:  # the netCDF and HDF5 libraries raise assorted errors here
        raise InputError(f"The file cannot be read to the end ({type(exc).__name__}: {exc}); "
                         "it is probably truncated", where=str(path),
                         todo="Copy or download the file again") from None


# --------------------------------------------------------------------------- transforms


def _in_units(ds: xr.Dataset, name: str, target: str, where: str, default: str | None = None):
    var = ds[name]
    factor = scale_factor(var.attrs.get("units"), target, f"{where}, variable '{name}'",
                          default=default)
    out = var.astype(np.float64) if factor != 1.0 else var
    return out * factor if factor != 1.0 else out


def _level_depths(ds: xr.Dataset, zdim: str, where: str) -> np.ndarray:
    if zdim not in ds.variables:
        raise InputError(f"The depth dimension '{zdim}' has no coordinate values", where=where,
                         todo="Add a coordinate variable with the level depths (m)")
    var = ds[zdim]
    values = np.asarray(var.values, dtype=np.float64)
    values = values * scale_factor(var.attrs.get("units"), "m", f"{where}, '{zdim}'", default="m")
    positive = str(var.attrs.get("positive", "")).lower()
    if positive == "up" or (not positive and (_std(var) in ("height", "altitude")
                                              or (values.max() <= 0 and values.min() < 0))):
        return -values
    return values


def _vertical_std(ds: xr.Dataset, zdim: str) -> str | None:
    for name, var in ds.variables.items():
        if var.dims == (zdim,) and _std(var) in vertical.PARAMETRIC:
            return str(name)
    return None


def _to_centres(da: xr.DataArray, which: str, plan: _Plan) -> xr.DataArray:
    lay = plan.layouts
    dim, other = lay[f"{which}_dim"], lay[f"{which}_other"]
    centre = plan.xdim if which == "u" else plan.ydim
    keep = plan.ydim if which == "u" else plan.xdim
    if other != keep:
        da = da.drop_vars([c for c in da.coords if other in da[c].dims]).rename({other: keep})
    return sgrid.to_centres(da, dim, centre, lay[which])


def _face_fill(ds: xr.Dataset, da: xr.DataArray, which: str, plan: _Plan) -> xr.DataArray:
    """Faces on land are walls: no flow through them (0), so the sea cell beside keeps a value."""
    name = plan.face_masks.get(which)
    if name is not None:
        mask = ds[name]
        if plan.tdim in mask.dims:
            mask = mask.isel({plan.tdim: 0})
        da = da.where(mask.drop_vars(list(mask.coords)) != 0, 0.0)
    return da.fillna(0.0)


def _points(ds: xr.Dataset, lon: str, lat: str, ydim: str,
            xdim: str) -> tuple[np.ndarray, np.ndarray]:
    """Longitude and latitude (1-D or 2-D in the file) as (ydim, xdim) arrays, file order."""
    lon_b, lat_b = xr.broadcast(ds[lon], ds[lat])
    return (np.asarray(lon_b.transpose(ydim, xdim).values, dtype=np.float64),
            np.asarray(lat_b.transpose(ydim, xdim).values, dtype=np.float64))


def _face_walls(ds: xr.Dataset, which: str, plan: _Plan, sea: np.ndarray, cut: dict,
                dims: tuple[str, str]) -> np.ndarray:
    """Land faces (True) between consecutive centres: a land centre on either side, or the
    face mask (when the file has one) says land."""
    sea = np.asarray(sea, dtype=bool)
    wall = ~(sea[:, :-1] & sea[:, 1:]) if which == "u" else ~(sea[:-1] & sea[1:])
    name = plan.face_masks.get(which)
    if name is not None:
        mask = ds[name]
        if plan.tdim in mask.dims:
            mask = mask.isel({plan.tdim: 0})
        values = np.asarray(mask.transpose(*dims).isel(cut).values)
        wall = wall | ~(np.isfinite(values) & (values != 0))
    return wall


def _zeta_block(u: np.ndarray, v: np.ndarray, cells: sgrid.CornerCells, wall_u: np.ndarray,
                wall_v: np.ndarray) -> np.ndarray:
    """Dask kernel: (t, y, x) float32 vorticity of a time chunk of C-grid face velocities.

    Land faces are NaN, so corners touching land are left out of the centre averages.
    """
    u = np.where(wall_u, np.nan, np.asarray(u, dtype=np.float64))
    v = np.where(wall_v, np.nan, np.asarray(v, dtype=np.float64))
    return sgrid.native_vorticity(u, v, cells).astype(np.float32)


MASK_PROBE_STEPS = 3
"""Time steps read before the pass to tell land from sea when no mask variable is given:
the first, the middle and the last of the record. Land is where every one of them is
missing, so a time step that is itself missing (a lost chunk, a file of fill values)
cannot draw a coast."""


def probe_steps(n_time: int) -> list[int]:
    """Indices of the time steps read to find the land/sea mask (first, middle, last)."""
    return sorted({int(k) for k in np.linspace(0, max(n_time - 1, 0), MASK_PROBE_STEPS)
                   .round()})


def _steps_of(da: xr.DataArray, tdim: str, where: str) -> np.ndarray:
    """The values as (steps, y, x) float64 (one step when there is no time dimension)."""
    try:
        values = np.asarray(da.values, dtype=np.float64)
    except Exception as exc:
        if not decode_failure(exc):
            raise
        raise InputError(f"A stored chunk of the input cannot be decoded ({type(exc).__name__}: "
                         f"{exc}); the file is damaged or truncated",
                         where=f"{where}, the time steps read for the land/sea mask "
                               "(first, middle and last)",
                         todo="Check the file with a NetCDF or Zarr tool, or copy it again") from None
    return values if tdim in da.dims else values[None]


def _mask_from_variable(ds: xr.Dataset, name: str, plan: _Plan) -> np.ndarray:
    var = ds[name]
    if plan.tdim and plan.tdim in var.dims:
        var = var.isel({plan.tdim: 0})
    var = var.transpose(plan.ydim, plan.xdim)
    values = np.asarray(var.values, dtype=np.float64)
    std = _std(var)
    meanings = str(var.attrs.get("flag_meanings", "")).lower().split()
    flag_values = np.atleast_1d(var.attrs.get("flag_values", []))
    lowered = name.lower()
    land_first = std in ("land_binary_mask", "land_area_fraction") or (
        not std and "land" in lowered or lowered == "lsm")
    if meanings and len(flag_values) == len(meanings):
        sea_values = [float(fv) for fv, m in zip(flag_values, meanings, strict=True)
                      if m in ("sea", "ocean", "water", "wet")]
        if sea_values:
            return np.isin(values, sea_values).astype(np.int8)
    fractional = np.any((values > 0) & (values < 1))
    if land_first:
        land = values > 0.5 if fractional else values == 1
        return np.where(np.isfinite(values), ~land, False).astype(np.int8)
    sea = values >= 0.5 if fractional else values == 1
    return (np.isfinite(values) & sea).astype(np.int8)


def _check_values(values: np.ndarray, limit: float, what: str, where: str,
                  when: str) -> None:
    bad = np.isinf(values) | (np.abs(np.nan_to_num(values)) > limit)
    if bad.any():
        j, i = np.unravel_index(int(np.argmax(bad.reshape(-1, *bad.shape[-2:]).any(axis=0))),
                                bad.shape[-2:])
        raise InputError(
            f"{int(bad.sum())} values of {what} {when} are infinite or beyond {limit:g} in "
            f"magnitude (first at grid index y={j}, x={i}); these are not ocean values",
            where=where,
            todo="Check the units and the _FillValue/missing_value attributes of the variable, "
                 "or mask the bad points")


TYPICAL_SPEED_LIMIT_M_S = 3.0
"""Ocean currents above about 2.5 m s-1 are rare (the fastest western boundary currents and
straits); when the 90th percentile of the speed at sea exceeds this, the velocity is most
likely in cm s-1 labelled (or left) as m s-1."""


def _check_speed_scale(u0: np.ndarray, v0: np.ndarray, sea: np.ndarray, u_name: str,
                       v_name: str, raw: xr.Dataset, where: str) -> None:
    """Warn (DataWarning) when typical speeds at the first step look like cm/s read as m/s."""
    speed = np.hypot(u0, v0)[sea]
    speed = speed[np.isfinite(speed)]
    if speed.size < 10:
        return
    p90 = float(np.percentile(speed, 90))
    if p90 > TYPICAL_SPEED_LIMIT_M_S:
        units = [f"'{n}' in '{raw[n].attrs.get('units', '(none)')}'" for n in (u_name, v_name)]
        warnings.warn(DataWarning(
            f"The speeds look like centimetres per second read as metres per second: at the "
            f"first time step the 90th percentile of the speed at sea is {p90:.3g} m/s, above "
            f"the {TYPICAL_SPEED_LIMIT_M_S:g} m/s that ocean currents rarely exceed (units "
            f"attributes {' and '.join(units)}; {where}). If the data are in cm/s, set their "
            "units attribute to 'cm s-1' (every result scales with the speed squared)"),
            stacklevel=2)


@compiled()
def _mask_beyond(block, sea, limit, out):  # pragma: no cover - compiled
    """``out = block`` on the sea, NaN on land; True if a sea value is infinite or beyond
    ``limit`` in magnitude. One sweep, no temporaries."""
    bad = False
    for t in range(block.shape[0]):
        for j in range(block.shape[1]):
            for i in range(block.shape[2]):
                x = block[t, j, i]
                keep = sea[j, i]
                out[t, j, i] = x if keep else np.nan
                bad |= keep and abs(x) > limit
    return bad


def _guard_block(block: np.ndarray, sea: np.ndarray, limit: float, what: str,
                 files: list[str], lengths: list[int], block_info=None) -> np.ndarray:
    """Dask kernel: NaN on land (``sea`` False), and InputError on corrupt sea values met
    during the streaming pass."""
    block = np.asarray(block)
    out = np.empty(block.shape, dtype=block.dtype)
    if not _mask_beyond(block, sea, float(limit), out):
        return out
    if block_info is not None and block_info.get(0):
        start = block_info[0]["array-location"][0][0]
        edges = np.cumsum(lengths)
        k = int(np.searchsorted(edges, start, side="right"))
        where = f"{files[min(k, len(files) - 1)]}, time steps from {start}"
    else:
        where = ", ".join(files)
    _check_values(out, limit, what, where, "in this time chunk")
    return out


def _guarded(da: xr.DataArray, sea: np.ndarray, limit: float, what: str, files: list[str],
             lengths: list[int]) -> xr.DataArray:
    """Land set to NaN and corrupt values refused, chunk by chunk as the pass reads them."""
    data = da.data.map_blocks(_guard_block, sea=np.ascontiguousarray(sea, dtype=np.bool_),
                              limit=limit, what=what, files=files, lengths=lengths,
                              dtype=da.dtype)
    return da.copy(data=data)


def smooth_ssh(ssh: np.ndarray, sigma_cells: tuple[float, float]) -> np.ndarray:
    """Gaussian smoothing of (..., y, x) SSH over the sea only (normalised convolution).

    Land (NaN) neither contributes nor receives values: the smoothed field is
    ``G * (h m) / G * m`` with ``m`` the sea indicator, so the coast does not pull the
    height toward zero. Used before differentiating gridded SSH whose grid-scale noise
    would otherwise be amplified twice (velocity, then vorticity).
    """
    from scipy.ndimage import gaussian_filter

    h = np.asarray(ssh, dtype=np.float64)
    sea = np.isfinite(h)
    sig = (0.0,) * (h.ndim - 2) + tuple(sigma_cells)
    num = gaussian_filter(np.where(sea, h, 0.0), sig, mode="nearest")
    den = gaussian_filter(sea.astype(np.float64), sig, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(sea, num / den, np.nan)


def _geostrophic_block(ssh: np.ndarray, metrics: GridMetrics, band: float,
                       sigma_cells: tuple[float, float] | None = None) -> np.ndarray:
    """Dask kernel: (2, t, y, x) float32 geostrophic velocity of an SSH time chunk."""
    h = np.asarray(ssh, dtype=np.float64)
    if sigma_cells is not None:
        h = smooth_ssh(h, sigma_cells)
    with np.errstate(invalid="ignore", divide="ignore"):  # f = 0 inside the equator band
        ug, vg = geostrophic_velocity(h, metrics, equator_band_deg=band)
    return np.stack([ug, vg]).astype(np.float32)


# --------------------------------------------------------------------------- lon/lat


def _wrap(lon: np.ndarray) -> np.ndarray:
    return (np.asarray(lon, dtype=np.float64) + 180.0) % 360.0 - 180.0


def _lon_order_1d(lon: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """West→east order and values of a 1-D longitude (continuous across the antimeridian)."""
    wrapped = _wrap(lon)
    order = np.argsort(wrapped, kind="stable")
    values = wrapped[order]
    if values.size > 1:
        gaps = np.diff(values)
        wrap_gap = values[0] + 360.0 - values[-1]
        k = int(np.argmax(gaps))
        if gaps[k] > wrap_gap:
            order = np.concatenate([order[k + 1:], order[:k + 1]])
            values = np.concatenate([values[k + 1:], values[:k + 1] + 360.0])
    return order, values


def _lon_2d(lon: np.ndarray) -> np.ndarray:
    wrapped = _wrap(lon)
    jumps = max(np.nanmax(np.abs(np.diff(wrapped, axis=a)), initial=0.0) for a in (0, 1))
    if jumps > 180.0:
        wrapped = np.where(wrapped < 0, wrapped + 360.0, wrapped)
    return wrapped


# --------------------------------------------------------------------------- main


def open_dataset(paths: list[str | Path], settings: IngestSettings,
                 need_time: bool = True, min_time_steps: int = 2) -> xr.Dataset:
    """Open one or many NetCDF files, or a Zarr store, as the canonical dataset.

    Parameters
    ----------
    paths : list of str or Path
        NetCDF files (one time series, in any order; they are sorted by their first time)
        or one Zarr store (a folder).
    settings : IngestSettings
        Variable names overriding discovery, depth selection, time chunk size, equator band.
    need_time : bool
        True for the analysis (velocity or SSH over at least two time steps is required).
        False for geometry only: a file with just a land/sea mask (or bathymetry) is
        enough, and the result holds only ``lon``, ``lat``, ``mask`` and ``bathymetry``.
    min_time_steps : int
        Fewest time steps accepted when ``need_time`` (2 for statistics; 1 for appending new
        data to an existing record).

    Returns
    -------
    xarray.Dataset
        The canonical dataset (see ``docs/canonical-dataset.md``), lazy along time.

    Raises
    ------
    InputError
        A file is missing, empty, truncated or not NetCDF/Zarr; no velocity/SSH, no
        latitude/longitude; mismatched shapes; unknown units; impossible values.
    RecordError
        Fewer than ``min_time_steps`` time steps, or times that repeat or go backwards.
    """
    if not paths:
        raise InputError("No input files were given", where="command line",
                         todo="Give one or more NetCDF files or a Zarr store")
    files = [Path(p) for p in paths]
    kinds = [_check_path(p) for p in files]
    where = files[0].name if len(files) == 1 else f"{files[0].name} (and {len(files) - 1} more)"
    first = _open(files[0], kinds[0], None)
    plan = _plan(first, settings, str(files[0]), need_time)
    raw = _combine(files, kinds, first, plan, settings, need_time)
    file_list = json.loads(raw.attrs.get("_files", json.dumps([str(files[0].resolve())])))
    lengths = json.loads(raw.attrs.get("_lengths", "[]"))
    if need_time:
        _check_time(raw, plan, file_list, lengths, where, min_time_steps)
    builder = _Builder(raw, plan, settings, where, need_time)
    out = builder.build()
    out.attrs["source_files"] = json.dumps(file_list)
    out.attrs["source_steps"] = json.dumps(lengths)
    out.attrs["compressed_input"] = int(raw.attrs.get("_compressed", 0))
    out.attrs["direct_read"] = int(raw.attrs.get("_direct_read", 0))
    if "u" in out:
        sea = out["mask"].values == 1
        out["u"] = _guarded(out["u"], sea, MAX_SPEED_M_S, "u (m s-1)", file_list, lengths)
        out["v"] = _guarded(out["v"], sea, MAX_SPEED_M_S, "v (m s-1)", file_list, lengths)
    return out


def open_mask(paths: list[str | Path], settings: IngestSettings) -> xr.Dataset:
    """The static part of the canonical dataset (``lon``, ``lat``, ``mask``, ``bathymetry``).

    Same as ``open_dataset(paths, settings, need_time=False)``: a file that holds only a
    land/sea mask (or only bathymetry) is enough.
    """
    return open_dataset(paths, settings, need_time=False)


def _check_time(raw: xr.Dataset, plan: _Plan, files: list[str], lengths: list[int],
                where: str, min_steps: int) -> None:
    if plan.tdim is None or plan.tdim not in raw.variables:
        raise RecordError("The data have no time coordinate; statistics need a time record",
                          where=where,
                          todo="Give files whose velocity or SSH has a CF time coordinate")
    n = raw.sizes[plan.tdim]
    if n < min_steps:
        raise RecordError(f"The record has {n} time step(s); eddy statistics need at least "
                          f"{min_steps}",
                          where=where, todo="Give several time steps (files of one series)")
    t = raw[plan.tdim].values
    steps = np.array([b > a for a, b in zip(t[:-1], t[1:], strict=True)])
    if not steps.all():
        k = int(np.argmin(steps))
        edges = np.cumsum(lengths) if lengths else np.array([n])
        f = files[min(int(np.searchsorted(edges, k + 1, side="right")), len(files) - 1)]
        raise RecordError(f"The time repeats or goes backwards between steps {k} and {k + 1} "
                          f"({t[k]} then {t[k + 1]})", where=f,
                          todo="Remove duplicated or overlapping files, or sort the record")


class _Builder:
    """Turns the raw combined dataset into the canonical one, following a _Plan."""

    def __init__(self, raw: xr.Dataset, plan: _Plan, s: IngestSettings, where: str,
                 need_time: bool) -> None:
        self.raw, self.plan, self.s, self.where, self.need_time = raw, plan, s, where, need_time
        self.depth_used = 0.0

    # -- velocity and ssh ----------------------------------------------------------

    def _select_level(self, da: xr.DataArray) -> xr.DataArray:
        p = self.plan
        if p.zdim is None or p.zdim not in da.dims:
            return da
        if _vertical_std(self.raw, p.zdim):
            return da
        depths = _level_depths(self.raw, p.zdim, self.where)
        self.depth_used = (float(depths.min()) if self.s.depth_m is None
                           else float(self.s.depth_m))
        return vertical.select_levels(da, p.zdim, depths, self.s.depth_m, self.s.depth_method,
                                      self.where)

    def _parametric(self, raw: xr.Dataset, da: xr.DataArray,
                    eta: xr.DataArray | None) -> xr.DataArray:
        p = self.plan
        zname = _vertical_std(raw, p.zdim) if p.zdim else None
        if zname is None or p.zdim not in da.dims:
            return da
        std = _std(raw[zname])
        terms_attr = str(raw[zname].attrs.get("formula_terms", ""))
        names = vertical.parse_formula_terms(terms_attr)
        missing = [t for t in vertical.required_terms(std) if names.get(t) not in raw.variables]
        if missing:
            raise InputError(f"The vertical coordinate '{zname}' ({std}) lacks the formula "
                             f"terms {missing} (formula_terms = '{terms_attr}')",
                             where=self.where,
                             todo="Keep the variables named in formula_terms in the file")
        terms: dict[str, xr.DataArray] = {}
        for key, name in names.items():
            if key in ("eta", "depth", "depth_c"):
                terms[key] = _in_units(raw, name, "m", self.where, default="m")
            else:
                terms[key] = raw[name]
        if eta is not None:
            terms["eta"] = eta
        elif p.tdim and p.tdim in terms["eta"].dims:
            terms["eta"] = terms["eta"].rename({p.tdim: "time"})
        if self.s.depth_m is None:
            level_var = terms["sigma" if std == "ocean_sigma_coordinate" else "s"]
            self.depth_used = 0.0
            return da.isel({p.zdim: int(np.argmax(level_var.values))}, drop=True)
        self.depth_used = float(self.s.depth_m)
        heights = vertical.parametric_height(std, terms)
        return vertical.select_parametric(da, heights, -terms["depth"], p.zdim,
                                          self.s.depth_m, self.s.depth_method)

    def _velocity(self, raw: xr.Dataset) -> tuple[xr.DataArray, xr.DataArray]:
        p = self.plan
        assert p.u is not None and p.v is not None
        u = self._select_level(_in_units(raw, p.u, "m s-1", self.where))
        v = self._select_level(_in_units(raw, p.v, "m s-1", self.where))
        if p.staggered:
            u = _to_centres(_face_fill(raw, u, "u", p), "u", p)
            v = _to_centres(_face_fill(raw, v, "v", p), "v", p)
        return u, v

    def _native_zeta(self, raw: xr.Dataset, sea_file: np.ndarray) -> xr.DataArray | None:
        """Lazy relative vorticity on the centres, by circulation at the C-grid corners.

        None when the grid is not staggered or its levels are terrain-following (the face
        velocities would need level heights at the faces; the centre path is used then).
        ``sea_file`` is the centre mask in the file's index order.
        """
        p = self.plan
        if not p.staggered or p.u is None or p.v is None:
            return None
        if p.zdim is not None and _vertical_std(raw, p.zdim):
            return None
        lay = p.layouts
        rename = {p.tdim: "time"} if p.tdim and p.tdim in raw.dims else {}
        faces = {}
        for which, name in (("u", p.u), ("v", p.v)):
            dim, other = lay[f"{which}_dim"], lay[f"{which}_other"]
            da = self._select_level(_in_units(raw, name, "m s-1", self.where)).rename(rename)
            order = ("time", other, dim) if which == "u" else ("time", dim, other)
            cut = {dim: sgrid.face_slice(lay[which], raw.sizes[dim])}
            da = da.transpose(*order).isel(cut)
            wall = _face_walls(raw, which, p, sea_file, cut, order[1:])
            data = da.data if isinstance(da.data, dsa.Array) else dsa.from_array(np.asarray(da))
            faces[which] = (data.rechunk({1: -1, 2: -1}), wall)
        u, wall_u = faces["u"]
        v, wall_v = faces["v"]
        v = v.rechunk({0: u.chunks[0]})
        cells = self._corner_cells(raw, sea_file.shape)
        ny, nx = sea_file.shape
        zeta = dsa.map_blocks(_zeta_block, u, v, cells=cells, wall_u=wall_u, wall_v=wall_v,
                              chunks=(u.chunks[0], (ny,), (nx,)), dtype=np.float32,
                              meta=np.empty((0, 0, 0), dtype=np.float32))
        return xr.DataArray(zeta, dims=("time", "y", "x"))

    def _corner_cells(self, raw: xr.Dataset, shape: tuple[int, int]) -> sgrid.CornerCells:
        """Corner-cell geometry from the centre and (when the file has them) face coordinates."""
        p, lay = self.plan, self.plan.layouts
        lon_c, lat_c = _points(raw, p.lon, p.lat, p.ydim, p.xdim)
        found = {}
        for which in ("u", "v"):
            dim, other = lay[f"{which}_dim"], lay[f"{which}_other"]
            dims = (other, dim) if which == "u" else (dim, other)
            try:
                lat_name, lon_name = _find_latlon(raw, *dims, self.where)
            except InputError:
                continue
            lon, lat = _points(raw, lon_name, lat_name, *dims)
            cut = sgrid.face_slice(lay[which], raw.sizes[dim])
            lon, lat = (lon[:, cut], lat[:, cut]) if which == "u" else (lon[cut], lat[cut])
            want = (shape[0], shape[1] - 1) if which == "u" else (shape[0] - 1, shape[1])
            if lon.shape == want and np.isfinite(lon).all() and np.isfinite(lat).all():
                found[which] = (lon, lat)
        lon_u, lat_u = found.get("u", (None, None))
        lon_v, lat_v = found.get("v", (None, None))
        return sgrid.CornerCells.from_coords(lon_c, lat_c, lon_u, lat_u, lon_v, lat_v,
                                             grid_relative=p.grid_relative)

    def _rotate(self, u: xr.DataArray, v: xr.DataArray) -> tuple[xr.DataArray, xr.DataArray]:
        p = self.plan
        if not p.grid_relative or p.angle is None:
            return u, v
        var = self.raw[p.angle]
        factor = scale_factor(var.attrs.get("units"), "radian",
                              f"{self.where}, variable '{p.angle}'", default="radian")
        angle = np.asarray(var.transpose(p.ydim, p.xdim).values, dtype=np.float64) * factor
        cos = xr.DataArray(np.cos(angle), dims=(p.ydim, p.xdim))
        sin = xr.DataArray(np.sin(angle), dims=(p.ydim, p.xdim))
        return u * cos - v * sin, u * sin + v * cos

    def _canonical(self, da: xr.DataArray) -> xr.DataArray:
        p = self.plan
        drop = [c for c in da.coords]
        da = da.drop_vars(drop)
        names = {p.ydim: "y", p.xdim: "x"}
        if p.tdim and p.tdim in da.dims:
            names[p.tdim] = "time"
        da = da.rename(names)
        order = [d for d in ("time", "y", "x") if d in da.dims]
        return da.transpose(*order)

    # -- coordinates -----------------------------------------------------------------

    def _coords(self) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray | None]:
        p, raw = self.plan, self.raw
        lat = raw[p.lat]
        lon = raw[p.lon]
        lat_v = np.asarray(lat.values, dtype=np.float64)
        lon_v = np.asarray(lon.values, dtype=np.float64)
        for name, values in ((p.lat, lat_v), (p.lon, lon_v)):
            if not np.isfinite(values).all():
                raise InputError(f"The coordinate '{name}' has missing values", where=self.where,
                                 todo="Fill the coordinates on land too (they are needed "
                                      "everywhere on the grid)")
        bad = np.abs(lat_v) > 90.0
        if bad.any():
            raise InputError(f"{int(bad.sum())} latitudes in '{p.lat}' are beyond +/-90 degrees "
                             f"(largest {np.abs(lat_v).max():g})", where=self.where,
                             todo="Check which variable holds latitude (and its units)")
        if lat.ndim == 1 and lon.ndim == 1:
            y_order = np.argsort(lat_v, kind="stable")
            x_order, lon_sorted = _lon_order_1d(lon_v)
            lon2, lat2 = np.meshgrid(lon_sorted, lat_v[y_order])
            return lon2, lat2, y_order, x_order
        lat2 = lat.transpose(p.ydim, p.xdim).values.astype(np.float64)
        lon2 = _lon_2d(lon.transpose(p.ydim, p.xdim).values)
        return lon2, lat2, None, None

    # -- mask ------------------------------------------------------------------------

    def _mask(self, u0: np.ndarray | None, v0: np.ndarray | None,
              ssh0: np.ndarray | None) -> np.ndarray:
        """Sea where the data are present at one or more of the probed steps (the fields
        are (steps, y, x)); all present: the first step's exact zeros of u and v, if any."""
        fields = [f for f in (u0, v0) if f is not None] or [f for f in (ssh0,) if f is not None]
        if not fields:
            bathy = self._bathymetry()
            if bathy is None:
                raise InputError("No land/sea mask, velocity or bathymetry to tell land from sea",
                                 where=self.where, todo="Name a mask variable in ingest.mask_var")
            return (np.isfinite(bathy) & (bathy > 0)).astype(np.int8)
        finite = np.all([np.isfinite(f) for f in fields], axis=0).any(axis=0)
        if not finite.any():
            raise InputError("Every value of the data is missing in the time steps read to "
                             "find the land/sea mask (the first, middle and last)",
                             where=self.where,
                             todo="Check the file (and its _FillValue attribute) or the variable "
                                  "names in the settings")
        if not finite.all():
            return finite.astype(np.int8)
        if u0 is not None and v0 is not None:
            zero = (u0[0] == 0) & (v0[0] == 0)
            if zero.any() and not zero.all():
                warnings.warn(f"{self.where}: no mask and no missing values; points where u and "
                              "v are exactly 0 at the first time step are taken as land",
                              stacklevel=4)
                return (~zero).astype(np.int8)
        return np.ones(finite.shape, dtype=np.int8)

    def _bathymetry(self) -> np.ndarray | None:
        p = self.plan
        if p.bathymetry is None:
            return None
        var = self.raw[p.bathymetry].transpose(p.ydim, p.xdim)
        values = np.asarray(var.values, dtype=np.float64) * scale_factor(
            var.attrs.get("units"), "m", f"{self.where}, variable '{p.bathymetry}'", default="m")
        if str(var.attrs.get("positive", "")).lower() == "up":
            values = -values
        return values

    # -- assemble --------------------------------------------------------------------

    def _fields(self, raw: xr.Dataset) -> list[xr.DataArray | None]:
        """Lazy canonical u, v, ssh (dims time, y, x in file order) from ``raw``."""
        p = self.plan
        u = v = ssh = None
        rename = {p.tdim: "time"} if p.tdim and p.tdim in raw.dims else {}
        if p.ssh is not None:
            ssh = self._select_level(_in_units(raw, p.ssh, "m", self.where)).rename(rename)
            ssh = ssh.drop_vars(list(ssh.coords))
        if p.u is not None:
            u, v = self._velocity(raw)
            u = self._parametric(raw, u.rename(rename), ssh)
            v = self._parametric(raw, v.rename(rename), ssh)
            u, v = self._rotate(u, v)
            u, v = self._canonical(u), self._canonical(v)
        if ssh is not None:
            ssh = self._canonical(ssh)
        return [u, v, ssh]

    def build(self) -> xr.Dataset:
        p, s = self.plan, self.s
        have_time = self.need_time and p.tdim is not None
        lon2, lat2, y_order, x_order = self._coords()

        def reorder(da):
            if da is None or y_order is None:
                return da
            return da.isel(y=y_order, x=x_order)

        # The probed time steps (first, middle, last) are taken before any other operation,
        # so only they are read.
        # Each is read as a slice of its own (a list of steps would read every chunk).
        heads = ([self.raw.isel({p.tdim: slice(k, k + 1)})
                  for k in probe_steps(self.raw.sizes[p.tdim])] if p.tdim else [self.raw])
        read = [[None if da is None else _steps_of(reorder(da), "time", self.where)
                 for da in self._fields(head)] for head in heads]
        probes = [None if read[0][i] is None else np.concatenate([r[i] for r in read])
                  for i in range(len(read[0]))]
        first = [None if a is None else a[0] for a in probes]
        u, v, ssh = (reorder(da) for da in self._fields(self.raw)) if have_time else (None,) * 3
        mask = self._mask(*probes) if p.mask is None else self._reorder_np(
            _mask_from_variable(self.raw, p.mask, p), y_order, x_order)
        bathy = self._reorder_np(self._bathymetry(), y_order, x_order)
        if (bathy is not None and s.depth_m is not None and p.zdim
                and _vertical_std(self.raw, p.zdim)):
            mask = (mask.astype(bool) & (bathy >= s.depth_m)).astype(np.int8)
        coords = {"lon": (("y", "x"), lon2, {"standard_name": "longitude",
                                             "units": "degrees_east"}),
                  "lat": (("y", "x"), lat2, {"standard_name": "latitude",
                                             "units": "degrees_north"})}
        data: dict[str, xr.DataArray] = {}
        sea = xr.DataArray(mask.astype(bool), dims=("y", "x"))
        if have_time:
            coords["time"] = self._time()
            velocity_kind = p.velocity_kind
            if u is None:
                assert ssh is not None
                _check_values(first[2], MAX_SSH_M, "ssh (m)", self.where, "at the first time step")
                u, v = self._geostrophic(ssh.where(sea), lon2, lat2)
                velocity_kind = "geostrophic"
            else:
                for arr, what in ((first[0], "u (m s-1)"), (first[1], "v (m s-1)")):
                    _check_values(np.where(mask == 1, arr, np.nan), MAX_SPEED_M_S, what,
                                  self.where, "at the first time step")
                _check_speed_scale(first[0], first[1], mask == 1, p.u, p.v, self.raw, self.where)
            # Land is set to NaN by the guard that open_dataset puts on u and v.
            data["u"] = self._finish(u, "eastward_sea_water_velocity", "m s-1")
            data["v"] = self._finish(v, "northward_sea_water_velocity", "m s-1")
            zeta = self._native_zeta(self.raw, self._file_order_np(mask, y_order, x_order))
            if zeta is not None:
                data["zeta"] = self._finish(reorder(zeta).where(sea), "ocean_relative_vorticity",
                                            "s-1")
                data["zeta"].attrs["vorticity_method"] = "C-grid circulation at cell corners"
            if ssh is not None:
                data["ssh"] = self._finish(ssh.where(sea), "sea_surface_height", "m")
        data["mask"] = xr.DataArray(mask.astype(np.int8), dims=("y", "x"), attrs={
            "standard_name": "sea_binary_mask", "flag_values": np.array([0, 1], np.int8),
            "flag_meanings": "land sea", "long_name": "land (0) or sea (1)"})
        if bathy is not None:
            data["bathymetry"] = xr.DataArray(bathy, dims=("y", "x"), attrs={
                "standard_name": "sea_floor_depth_below_geoid", "units": "m", "positive": "down"})
        out = xr.Dataset(data, coords=coords)
        out.attrs.update({"depth_m": float(self.depth_used) if have_time else 0.0,
                          "velocity_kind": (velocity_kind if have_time else "none"),
                          "Conventions": "CF-1.8"})
        return out

    @staticmethod
    def _file_order_np(values, y_order, x_order):
        """Undo :meth:`_reorder_np`: a canonical-order (y, x) array back in file order."""
        if y_order is None:
            return values
        return values[np.ix_(np.argsort(y_order), np.argsort(x_order))]

    @staticmethod
    def _reorder_np(values, y_order, x_order):
        if values is None or y_order is None:
            return values
        return values[np.ix_(y_order, x_order)]

    def _time(self) -> xr.DataArray:
        p = self.plan
        t = self.raw[p.tdim]
        return xr.DataArray(t.values, dims=("time",), attrs={
            k: t.attrs[k] for k in ("standard_name", "long_name", "axis") if k in t.attrs})

    def _time_chunk(self, da: xr.DataArray) -> int:
        if self.s.time_chunk is not None:
            return self.s.time_chunk
        per_step = 4 * math.prod(da.shape[1:])
        return max(1, CHUNK_BUDGET_BYTES // max(per_step, 1))

    def _finish(self, da: xr.DataArray, std: str, units: str) -> xr.DataArray:
        da = da.astype(np.float32)
        if not isinstance(da.data, dsa.Array):
            da = da.chunk({"time": self._time_chunk(da)})
        da = da.chunk({"y": -1, "x": -1})
        da.attrs = {"standard_name": std, "units": units}
        return da

    def _geostrophic(self, ssh: xr.DataArray, lon2: np.ndarray,
                     lat2: np.ndarray) -> tuple[xr.DataArray, xr.DataArray]:
        metrics = GridMetrics.from_lonlat(lon2, lat2)
        data = ssh.data
        if not isinstance(data, dsa.Array):
            data = dsa.from_array(np.asarray(data), chunks=(self._time_chunk(ssh), -1, -1))
        data = data.rechunk({1: -1, 2: -1})
        sigma_cells = None
        if self.s.ssh_smooth_km > 0:
            sigma_cells = (self.s.ssh_smooth_km * 1000.0 / float(np.nanmedian(metrics.dy_m)),
                           self.s.ssh_smooth_km * 1000.0 / float(np.nanmedian(metrics.dx_m)))
        both = data.map_blocks(_geostrophic_block, metrics=metrics,
                               band=self.s.equator_band_deg, sigma_cells=sigma_cells,
                               new_axis=0, chunks=((2,), *data.chunks), dtype=np.float32)
        ug = xr.DataArray(both[0], dims=ssh.dims)
        vg = xr.DataArray(both[1], dims=ssh.dims)
        return ug, vg
