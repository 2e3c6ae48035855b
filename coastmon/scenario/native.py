"""The planted flow of a scenario, written in the layouts that real inputs come in.

A scenario file from :func:`coastmon.scenario.make_scenario` holds surface ``u``, ``v``,
``ssh`` on a regular longitude-latitude grid. The writers here take that file (and the
truth file beside it) and write the *same* planted flow as

* :func:`write_rotated_cgrid` — a rotated, curvilinear Arakawa C-grid with SGRID metadata,
  as a regional ocean model writes it: grid-relative velocity on the cell faces, 2-D
  longitude/latitude at centres and faces, a rotation angle and one mask per staggered
  position. The analytic flow (coastal current, background Rossby waves, the planted
  Gaussian eddies) is evaluated afresh at the face positions; only the white noise is a
  new realisation with the planted standard deviation;
* :func:`write_ssh_only` — gridded sea surface height alone, as gridded altimetry comes:
  packed integers in cm, latitude north to south, longitude 0-360, land as ``_FillValue``;
* :func:`write_z_levels` — velocity on fixed depth levels, the planted flow decaying with
  depth as :math:`e^{-d/D}`;
* :func:`write_s_levels` — the same decaying flow on a terrain-following
  ``ocean_s_coordinate_g2`` coordinate with its ``formula_terms``.

Everything written is invented data. The vertical structure :math:`e^{-d/D}` is planted
truth for depth selection: eddy kinetic energy at depth ``d`` is :math:`e^{-2d/D}` times
its surface value.
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import netCDF4
import numpy as np
import pyproj
from numpy.typing import NDArray

from coastmon.errors import InputError, SettingsError
from coastmon.io.atomic import atomic_path
from coastmon.scenario import generate
from coastmon.scenario.flow import (
    amplitude_factor,
    boundary_current,
    coriolis_parameter,
    eddy_track,
    gaussian_eddy,
    rossby_waves,
)
from coastmon.scenario.geography import (
    EARTH_RADIUS_M,
    KM_PER_DEG,
    grid_axes,
    land_mask,
    offshore_distance_km,
)
from coastmon.scenario.params import ScenarioParams

SECONDS_PER_DAY = 86400.0
_WINDOW_RADII = 4.0
_BLOCK_DAYS = 10


# --------------------------------------------------------------------------- scenario


def scenario_truth(scenario_nc: str | Path) -> tuple[ScenarioParams, dict]:
    """Parameters and planted truth of a scenario file (from ``<name>_truth.json`` beside it).

    Raises
    ------
    InputError
        When the truth file is missing or does not hold the scenario parameters.
    """
    path = Path(scenario_nc)
    truth_path = path.with_name(f"{path.stem}_truth.json")
    try:
        truth = json.loads(truth_path.read_text(encoding="utf-8"))
        params = ScenarioParams.from_dict(tomllib.loads(truth["parameters"]),
                                          where=str(truth_path))
    except (OSError, ValueError, KeyError, SettingsError) as exc:
        raise InputError(f"The planted-truth file of the scenario cannot be used ({exc})",
                         where=str(truth_path),
                         todo="Keep the _truth.json written by make_scenario next to its .nc "
                              "file") from None
    return params, truth


def background_waves(params: ScenarioParams) -> NDArray[np.float64]:
    """Rows (A, k, l, omega, theta) of the scenario's background Rossby waves.

    Drawn exactly as :func:`~coastmon.scenario.make_scenario` draws them: the second of the
    three random streams spawned from ``params.seed``.
    """
    waves_rng = np.random.default_rng(np.random.SeedSequence(params.seed).spawn(3)[1])
    return generate._background_waves(params, waves_rng)


def planted_flow(params: ScenarioParams, births: list[dict], waves: NDArray[np.float64],
                 lon: NDArray[np.float64], lat: NDArray[np.float64], day: int,
                 ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Noise-free streamfunction and eastward, northward velocity of the scenario at any points.

    The sum of :func:`~coastmon.scenario.flow.boundary_current`, the background
    :func:`~coastmon.scenario.flow.rossby_waves` (referenced to the centre of the scenario's
    own grid, as the generator does) and every planted eddy alive on ``day``
    (:func:`~coastmon.scenario.flow.gaussian_eddy` on its track, amplitude
    :func:`~coastmon.scenario.flow.amplitude_factor` of its age), each eddy cut at four
    radii as in the generator.

    Parameters
    ----------
    params : ScenarioParams
        The scenario.
    births : list of dict
        ``truth["births"]`` of the scenario's truth file.
    waves : ndarray (n, 5)
        Background wave rows (A, k, l, omega, theta).
    lon, lat : ndarray
        Points (degrees), same shape.
    day : int
        Time step (days since the scenario's start).

    Returns
    -------
    psi, u, v : ndarray
        Streamfunction (m2 s-1) and velocity (m s-1) at the points.
    """
    lon_axis, lat_axis = grid_axes(params)
    lon_ref = 0.5 * (lon_axis[0] + lon_axis[-1])
    lat_ref = 0.5 * (lat_axis[0] + lat_axis[-1])
    psi, u, v = boundary_current(lon, lat, params)
    pw, uw, vw = rossby_waves(lon, lat, day * SECONDS_PER_DAY, waves, lon_ref, lat_ref)
    psi, u, v = psi + pw, u + uw, v + vw
    growth_s = params.growth_days * SECONDS_PER_DAY
    decay_s = params.decay_days * SECONDS_PER_DAY
    for b in births:
        if not (b["time_days"] <= day < np.ceil(b["end_days"])):
            continue
        age_s = (day - b["time_days"]) * SECONDS_PER_DAY
        north = generate._north_drift(b["cyclone"], b["lat"], params)
        clon, clat = eddy_track(b["lon"], b["lat"], age_s, params.offshore_speed_m_s, north,
                                params.side)
        clon, clat = float(clon), float(clat)
        amp = b["psi0_m2_s"] * float(amplitude_factor(age_s, growth_s, decay_s))
        radius_m = b["radius_km"] * 1000.0
        reach = _WINDOW_RADII * b["radius_km"] / KM_PER_DEG
        near = (np.abs(lat - clat) <= reach) & (
            np.abs(lon - clon) <= reach / np.cos(np.radians(clat)))
        if not near.any():
            continue
        pe, ue, ve = gaussian_eddy(lon[near], lat[near], clon, clat, amp, radius_m)
        psi[near] += pe
        u[near] += ue
        v[near] += ve
    return psi, u, v


# --------------------------------------------------------------------------- C-grid


def _axis_angle(transformer: pyproj.Transformer, x: NDArray[np.float64], y: NDArray[np.float64],
                dx: float, dy: float) -> NDArray[np.float64]:
    """Direction (radians anticlockwise from east) of the plane direction (dx, dy) at (x, y)."""
    eps = 1.0
    lon0, lat0 = transformer.transform(x - eps * dx, y - eps * dy)
    lon1, lat1 = transformer.transform(x + eps * dx, y + eps * dy)
    east = np.radians(lon1 - lon0) * np.cos(np.radians(0.5 * (lat0 + lat1)))
    north = np.radians(lat1 - lat0)
    return np.arctan2(north, east)


def _put(nc: netCDF4.Dataset, name: str, dtype: str, dims: tuple[str, ...], values,
         attrs: dict, fill=None) -> netCDF4.Variable:
    var = nc.createVariable(name, dtype, dims, fill_value=fill)
    var.setncatts(attrs)
    if values is not None:
        var[:] = values
    return var


def _copy_time(nc: netCDF4.Dataset, src: netCDF4.Dataset, n: int | None = None) -> None:
    t = src["time"]
    n = t.size if n is None else n
    nc.createDimension("time", n)
    out = nc.createVariable("time", "f8", ("time",))
    out.setncatts({k: t.getncattr(k) for k in t.ncattrs()})
    out[:] = t[:n]


def _global_attrs(nc: netCDF4.Dataset, params: ScenarioParams, what: str) -> None:
    nc.setncatts({
        "title": f"Synthetic coastal eddy scenario {params.coast_name} (invented geography): "
                 f"{what}",
        "Conventions": "CF-1.8",
        "source": "coastmon.scenario.native, from the planted-truth scenario "
                  f"{params.name} (seed {params.seed})",
        "comment": "Synthetic data: the coast, its names and the flow are invented.",
    })


def write_rotated_cgrid(scenario_nc: str | Path, out_nc: str | Path, rotation_deg: float = 25.0,
                        spacing_km: float = 10.0, noise_seed: int = 1) -> Path:
    """Write the scenario's flow on a rotated curvilinear Arakawa C-grid with SGRID metadata.

    The grid is a square mesh of spacing ``spacing_km`` on the azimuthal equidistant plane
    centred on the scenario's domain (spherical Earth, radius 6371 km), its x-axis turned
    ``rotation_deg`` anticlockwise from east, and large enough to hold the scenario domain's
    projected width and height. On the sphere it is curvilinear: longitude, latitude and the
    axis angle vary across it. Layout (SGRID conventions 0.3, padding ``none``):

    * cell centres on ``(yc, xc)``: ``lon_c``, ``lat_c``, ``angle`` (x-axis anticlockwise
      from east, radians), ``mask_c`` and ``zeta`` (sea surface height, m);
    * x-faces on ``(yc, xf)`` with ``xf = xc + 1``: ``lon_u``, ``lat_u``, ``mask_u`` and
      ``u_x``, the velocity along the local grid x-axis;
    * y-faces on ``(yf, xc)``: ``lon_v``, ``lat_v``, ``mask_v``, ``v_y`` along the y-axis.

    Faces are sea when every cell they touch is sea; velocity on land faces is missing.
    Grid-relative components use the axis directions at the face itself:
    :math:`u_x = u\\cos a_x + v\\sin a_x`, :math:`v_y = u\\cos a_y + v\\sin a_y`.

    Parameters
    ----------
    scenario_nc : str or Path
        A file written by :func:`~coastmon.scenario.make_scenario` (its truth file beside it).
    out_nc : str or Path
        The file to write (written to a temporary name, then moved into place).
    rotation_deg : float
        Grid x-axis anticlockwise from east at the domain centre (degrees).
    spacing_km : float
        Grid spacing (km).
    noise_seed : int
        Seed of the new white-noise realisation (the scenario's noise levels).

    Returns
    -------
    Path
        ``out_nc``.
    """
    params, truth = scenario_truth(scenario_nc)
    births, waves = truth["births"], background_waves(params)
    lon_mid = 0.5 * (params.lon_min + params.lon_max)
    lat_mid = 0.5 * (params.lat_min + params.lat_max)
    inverse = pyproj.Transformer.from_crs(
        pyproj.CRS.from_proj4(f"+proj=aeqd +lat_0={lat_mid} +lon_0={lon_mid} "
                              f"+R={EARTH_RADIUS_M} +units=m +no_defs"),
        pyproj.CRS.from_proj4(f"+proj=longlat +R={EARTH_RADIUS_M} +no_defs"),
        always_xy=True)
    width_km = (params.lon_max - params.lon_min) * KM_PER_DEG * np.cos(np.radians(lat_mid))
    height_km = (params.lat_max - params.lat_min) * KM_PER_DEG
    nx, ny = round(width_km / spacing_km), round(height_km / spacing_km)
    theta = np.radians(rotation_deg)
    step = spacing_km * 1000.0
    ex = np.array([np.cos(theta), np.sin(theta)])
    ey = np.array([-np.sin(theta), np.cos(theta)])

    def plane(i: NDArray, j: NDArray) -> tuple[NDArray, NDArray]:
        return (step * (i * ex[0] + j * ey[0]), step * (i * ex[1] + j * ey[1]))

    ic = np.arange(nx) - (nx - 1) / 2.0
    jc = np.arange(ny) - (ny - 1) / 2.0
    faces_x = np.arange(nx + 1) - nx / 2.0
    faces_y = np.arange(ny + 1) - ny / 2.0
    pos = {"c": np.meshgrid(ic, jc), "u": np.meshgrid(faces_x, jc), "v": np.meshgrid(ic, faces_y)}
    xy = {k: plane(i, j) for k, (i, j) in pos.items()}
    lonlat = {k: inverse.transform(*xy[k]) for k in xy}
    angle_c = _axis_angle(inverse, *xy["c"], *ex)
    angle_u = _axis_angle(inverse, *xy["u"], *ex)
    angle_v = _axis_angle(inverse, *xy["v"], *ey)
    mask_c = land_mask(*lonlat["c"], params)
    sea = np.pad(mask_c.astype(bool), 1, constant_values=True)
    mask_u = (sea[1:-1, :-1] & sea[1:-1, 1:]).astype(np.int8)
    mask_v = (sea[:-1, 1:-1] & sea[1:, 1:-1]).astype(np.int8)
    f_over_g = coriolis_parameter(lonlat["c"][1]) / params.gravity_m_s2
    rng = np.random.default_rng([params.seed, noise_seed])
    out_nc = Path(out_nc)
    with netCDF4.Dataset(scenario_nc) as src, atomic_path(out_nc) as tmp, \
            netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
        _copy_time(nc, src)
        n_days = len(src.dimensions["time"])
        for name, size in (("yc", ny), ("xc", nx), ("yf", ny + 1), ("xf", nx + 1)):
            nc.createDimension(name, size)
        _put(nc, "grid", "i4", (), 0, {
            "cf_role": "grid_topology", "topology_dimension": 2,
            "node_dimensions": "xf yf",
            "face_dimensions": "xc: xf (padding: none) yc: yf (padding: none)",
            "edge1_dimensions": "xf yc: yf (padding: none)",
            "edge2_dimensions": "xc: xf (padding: none) yf",
            "face_coordinates": "lon_c lat_c", "edge1_coordinates": "lon_u lat_u",
            "edge2_coordinates": "lon_v lat_v",
            "long_name": "staggered grid topology (SGRID 0.3)"})
        dims = {"c": ("yc", "xc"), "u": ("yc", "xf"), "v": ("yf", "xc")}
        where = {"c": "cell centres", "u": "x-faces", "v": "y-faces"}
        for k in ("c", "u", "v"):
            _put(nc, f"lon_{k}", "f8", dims[k], lonlat[k][0],
                 {"standard_name": "longitude", "units": "degrees_east",
                  "long_name": f"longitude of the {where[k]}"})
            _put(nc, f"lat_{k}", "f8", dims[k], lonlat[k][1],
                 {"standard_name": "latitude", "units": "degrees_north",
                  "long_name": f"latitude of the {where[k]}"})
        for k, values in (("c", mask_c), ("u", mask_u), ("v", mask_v)):
            _put(nc, f"mask_{k}", "i1", dims[k], values,
                 {"long_name": f"sea (1) or land (0) at the {where[k]}",
                  "flag_values": np.array([0, 1], np.int8), "flag_meanings": "land sea",
                  "coordinates": f"lon_{k} lat_{k}"})
        _put(nc, "angle", "f8", ("yc", "xc"), angle_c,
             {"standard_name": "angle_of_rotation_from_east_to_x", "units": "radians",
              "long_name": "grid x-axis anticlockwise from east", "coordinates": "lon_c lat_c"})
        nan = np.float32(np.nan)
        out = {
            "u_x": _put(nc, "u_x", "f4", ("time", "yc", "xf"), None,
                        {"standard_name": "sea_water_x_velocity", "units": "m s-1",
                         "grid": "grid", "location": "edge1", "coordinates": "lon_u lat_u"},
                        fill=nan),
            "v_y": _put(nc, "v_y", "f4", ("time", "yf", "xc"), None,
                        {"standard_name": "sea_water_y_velocity", "units": "m s-1",
                         "grid": "grid", "location": "edge2", "coordinates": "lon_v lat_v"},
                        fill=nan),
            "zeta": _put(nc, "zeta", "f4", ("time", "yc", "xc"), None,
                         {"standard_name": "sea_surface_height_above_geoid", "units": "m",
                          "grid": "grid", "location": "face", "coordinates": "lon_c lat_c"},
                         fill=nan),
        }
        _global_attrs(nc, params, f"rotated curvilinear C-grid, {rotation_deg:g} degrees")
        for start in range(0, n_days, _BLOCK_DAYS):
            days = range(start, min(start + _BLOCK_DAYS, n_days))
            block = {k: [] for k in out}
            for day in days:
                _, uu, vu = planted_flow(params, births, waves, *lonlat["u"], day)
                _, uv, vv = planted_flow(params, births, waves, *lonlat["v"], day)
                psi, _, _ = planted_flow(params, births, waves, *lonlat["c"], day)
                sigma, sigma_ssh = params.noise_velocity_m_s, params.noise_ssh_m
                uu = uu + rng.normal(0.0, sigma, uu.shape)
                vu = vu + rng.normal(0.0, sigma, vu.shape)
                uv = uv + rng.normal(0.0, sigma, uv.shape)
                vv = vv + rng.normal(0.0, sigma, vv.shape)
                ssh = f_over_g * psi + rng.normal(0.0, sigma_ssh, psi.shape)
                block["u_x"].append(np.where(mask_u == 1,
                                             uu * np.cos(angle_u) + vu * np.sin(angle_u), np.nan))
                block["v_y"].append(np.where(mask_v == 1,
                                             uv * np.cos(angle_v) + vv * np.sin(angle_v), np.nan))
                block["zeta"].append(np.where(mask_c == 1, ssh, np.nan))
            for k, values in block.items():
                out[k][days.start:days.stop] = np.asarray(values, dtype=np.float32)
    return out_nc


# --------------------------------------------------------------------------- SSH only


def write_ssh_only(scenario_nc: str | Path, out_nc: str | Path,
                   var_name: str = "surface_height") -> Path:
    """Write the scenario's sea surface height alone, laid out like gridded altimetry.

    ``var_name`` (standard_name ``sea_surface_height_above_geoid``) holds 16-bit integers
    in units of 0.01 cm (``scale_factor`` 0.01, ``units`` cm) with land as ``_FillValue``;
    1-D ``latitude`` runs north to south and ``longitude`` is given in 0-360 degrees east;
    time counts hours. No velocity and no mask are written.

    Parameters
    ----------
    scenario_nc : str or Path
        A file written by :func:`~coastmon.scenario.make_scenario`.
    out_nc : str or Path
        The file to write (temporary name, then moved into place).
    var_name : str
        Name of the height variable (not one coastmon finds by name, so the reader must be
        told it, or find it by standard name).
    """
    out_nc = Path(out_nc)
    fill = np.int16(-32767)
    with netCDF4.Dataset(scenario_nc) as src, atomic_path(out_nc) as tmp, \
            netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
        src.set_auto_mask(True)
        t = src["time"]
        nc.createDimension("time", t.size)
        units = str(t.getncattr("units")).replace("days since", "hours since")
        _put(nc, "time", "f8", ("time",), np.asarray(t[:], dtype=np.float64) * 24.0,
             {"standard_name": "time", "units": units, "calendar": t.getncattr("calendar"),
              "axis": "T"})
        lat = np.asarray(src["lat"][:], dtype=np.float64)[::-1]
        lon = np.asarray(src["lon"][:], dtype=np.float64) % 360.0
        nc.createDimension("latitude", lat.size)
        nc.createDimension("longitude", lon.size)
        _put(nc, "latitude", "f8", ("latitude",), lat,
             {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"})
        _put(nc, "longitude", "f8", ("longitude",), lon,
             {"standard_name": "longitude", "units": "degrees_east", "axis": "X"})
        var = nc.createVariable(var_name, "i2", ("time", "latitude", "longitude"),
                                fill_value=fill, zlib=True, complevel=1)
        var.setncatts({"standard_name": "sea_surface_height_above_geoid", "units": "cm",
                       "scale_factor": np.float32(0.01), "add_offset": np.float32(0.0),
                       "long_name": "sea surface height above the geoid"})
        var.set_auto_maskandscale(True)
        params, _ = scenario_truth(scenario_nc)
        _global_attrs(nc, params, "gridded sea surface height only")
        for start in range(0, t.size, _BLOCK_DAYS):
            stop = min(start + _BLOCK_DAYS, t.size)
            ssh_cm = np.ma.filled(src["ssh"][start:stop].astype(np.float64), np.nan) * 100.0
            land = ~np.isfinite(ssh_cm)
            var[start:stop] = np.ma.array(np.where(land, 0.0, ssh_cm), mask=land)[:, ::-1, :]
    return out_nc


# --------------------------------------------------------------------------- levels


def _n_days(src: netCDF4.Dataset, max_days: int | None) -> int:
    n = len(src.dimensions["time"])
    return n if max_days is None else max(2, min(n, int(max_days)))


def _surface_blocks(src: netCDF4.Dataset, n: int):
    for start in range(0, n, _BLOCK_DAYS):
        stop = min(start + _BLOCK_DAYS, n)
        yield start, stop, *(np.ma.filled(src[k][start:stop].astype(np.float64), np.nan)
                             for k in ("u", "v", "ssh"))


def _copy_grid(nc: netCDF4.Dataset, src: netCDF4.Dataset) -> None:
    for name in ("lat", "lon"):
        nc.createDimension(name, len(src.dimensions[name]))
        var = src[name]
        _put(nc, name, "f8", (name,), var[:], {k: var.getncattr(k) for k in var.ncattrs()})
    mask = src["mask"]
    _put(nc, "mask", "i1", ("lat", "lon"), mask[:],
         {k: mask.getncattr(k) for k in mask.ncattrs()})


def _velocity_vars(nc: netCDF4.Dataset, zdim: str) -> dict[str, netCDF4.Variable]:
    nan = np.float32(np.nan)
    return {
        "u": _put(nc, "u", "f4", ("time", zdim, "lat", "lon"), None,
                  {"standard_name": "eastward_sea_water_velocity", "units": "m s-1"}, fill=nan),
        "v": _put(nc, "v", "f4", ("time", zdim, "lat", "lon"), None,
                  {"standard_name": "northward_sea_water_velocity", "units": "m s-1"}, fill=nan),
    }


def write_z_levels(scenario_nc: str | Path, out_nc: str | Path,
                   depths_m: tuple[float, ...] = (0.0, 50.0, 100.0, 300.0, 500.0),
                   decay_m: float = 500.0, max_days: int | None = None) -> Path:
    """Write the scenario's velocity on fixed depth levels, decaying as :math:`e^{-d/D}`.

    :math:`u(d) = u_s\\,e^{-d/D}`, :math:`v(d) = v_s\\,e^{-d/D}` with the surface velocity
    :math:`u_s, v_s` of the scenario file and :math:`D` = ``decay_m``; the level coordinate
    ``depth`` is positive down in metres. The mask is copied; no sea surface height.
    ``max_days`` keeps only the first time steps (at least two; None keeps all).
    """
    out_nc = Path(out_nc)
    depths = np.asarray(depths_m, dtype=np.float64)
    scale = np.exp(-depths / decay_m)[None, :, None, None]
    params, _ = scenario_truth(scenario_nc)
    with netCDF4.Dataset(scenario_nc) as src, atomic_path(out_nc) as tmp, \
            netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
        n_days = _n_days(src, max_days)
        _copy_time(nc, src, n_days)
        nc.createDimension("depth", depths.size)
        _put(nc, "depth", "f8", ("depth",), depths,
             {"standard_name": "depth", "units": "m", "positive": "down", "axis": "Z"})
        _copy_grid(nc, src)
        out = _velocity_vars(nc, "depth")
        _global_attrs(nc, params, f"velocity on depth levels, decaying as exp(-depth/{decay_m:g} m)")
        for start, stop, u, v, _ in _surface_blocks(src, n_days):
            out["u"][start:stop] = (u[:, None] * scale).astype(np.float32)
            out["v"][start:stop] = (v[:, None] * scale).astype(np.float32)
    return out_nc


def s_coordinate_g2_height(s: NDArray, c: NDArray, eta: NDArray, depth: NDArray,
                           depth_c: float) -> NDArray:
    """Height (m, positive up) of ``ocean_s_coordinate_g2`` levels.

    :math:`z = \\eta + (\\eta + H)\\,(h_c s + H C)/(h_c + H)` (CF conventions 1.8,
    Appendix D), broadcast over ``s``, ``c`` (level axis) and ``eta``, ``depth`` (columns).
    """
    return eta + (eta + depth) * (depth_c * s + depth * c) / (depth_c + depth)


def stretching_sinh(s: NDArray, theta_s: float) -> NDArray:
    """Surface-intensified stretching :math:`C(s) = \\sinh(\\theta_s s)/\\sinh\\theta_s`.

    The first term of the stretching function of Song & Haidvogel (1994), J. Comput.
    Phys. 115, 228-244: levels crowd towards the surface as :math:`\\theta_s` grows.
    """
    return np.sinh(theta_s * s) / np.sinh(theta_s)


def shelf_depth_m(offshore_km: NDArray, coast_m: float = 500.0, deep_m: float = 3000.0,
                  width_km: float = 80.0) -> NDArray:
    """Invented bathymetry: :math:`H = H_\\infty - (H_\\infty - H_0)\\,e^{-d/W}` (m, down)."""
    d = np.maximum(offshore_km, 0.0)
    return deep_m - (deep_m - coast_m) * np.exp(-d / width_km)


def write_s_levels(scenario_nc: str | Path, out_nc: str | Path, n_levels: int = 30,
                   decay_m: float = 500.0, depth_c_m: float = 250.0,
                   theta_s: float = 3.0, max_days: int | None = None) -> Path:
    """Write the scenario's velocity on an ``ocean_s_coordinate_g2`` terrain-following grid.

    Level heights follow :func:`s_coordinate_g2_height` with ``s`` at the centres of
    ``n_levels`` equal layers in [-1, 0], :func:`stretching_sinh`, the free surface
    :math:`\\eta` = the scenario's ``ssh`` and the invented bathymetry
    :func:`shelf_depth_m` (500 m at the coast, 3000 m far offshore). The velocity of each
    level is the scenario's surface velocity times :math:`e^{z/D}`, :math:`z` the level's
    height at that time step, so at a depth :math:`d` below the geoid it is
    :math:`e^{-d/D}` times the surface value, as in :func:`write_z_levels`. ``max_days``
    keeps only the first time steps (at least two; None keeps all).
    """
    params, _ = scenario_truth(scenario_nc)
    out_nc = Path(out_nc)
    s = (np.arange(n_levels) + 0.5) / n_levels - 1.0
    c = stretching_sinh(s, theta_s)
    with netCDF4.Dataset(scenario_nc) as src, atomic_path(out_nc) as tmp, \
            netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
        n_days = _n_days(src, max_days)
        _copy_time(nc, src, n_days)
        nc.createDimension("level", n_levels)
        _put(nc, "level", "f8", ("level",), s, {
            "standard_name": "ocean_s_coordinate_g2", "long_name": "s-coordinate at level centres",
            "units": "1", "positive": "up", "axis": "Z",
            "formula_terms": "s: level C: stretch eta: ssh depth: h depth_c: hc"})
        _put(nc, "stretch", "f8", ("level",), c,
             {"long_name": "stretching function C(s) at level centres", "units": "1"})
        _put(nc, "hc", "f8", (), depth_c_m, {"long_name": "critical depth", "units": "m"})
        _copy_grid(nc, src)
        lon2, lat2 = np.meshgrid(src["lon"][:], src["lat"][:])
        depth = shelf_depth_m(offshore_distance_km(lon2, lat2, params))
        _put(nc, "h", "f8", ("lat", "lon"), depth,
             {"standard_name": "sea_floor_depth_below_geoid", "units": "m", "positive": "down"})
        ssh_var = _put(nc, "ssh", "f4", ("time", "lat", "lon"), None,
                       {"standard_name": "sea_surface_height_above_geoid", "units": "m"},
                       fill=np.float32(np.nan))
        out = _velocity_vars(nc, "level")
        _global_attrs(nc, params, "velocity on a terrain-following s-coordinate, decaying as "
                                  f"exp(z/{decay_m:g} m)")
        for start, stop, u, v, ssh in _surface_blocks(src, n_days):
            eta = np.nan_to_num(ssh)[:, None]
            z = s_coordinate_g2_height(s[None, :, None, None], c[None, :, None, None], eta,
                                       depth[None, None], depth_c_m)
            scale = np.exp(z / decay_m)
            ssh_var[start:stop] = ssh.astype(np.float32)
            out["u"][start:stop] = (u[:, None] * scale).astype(np.float32)
            out["v"][start:stop] = (v[:, None] * scale).astype(np.float32)
    return out_nc


__all__ = [
    "background_waves",
    "planted_flow",
    "s_coordinate_g2_height",
    "scenario_truth",
    "shelf_depth_m",
    "stretching_sinh",
    "write_rotated_cgrid",
    "write_s_levels",
    "write_ssh_only",
    "write_z_levels",
]
