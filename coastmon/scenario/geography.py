"""The invented coast of a scenario: coast line, land/sea mask, offshore distance, arclength.

The coast is a curve ``lon = lon_c(lat)``: a straight, slightly tilted line plus one
Gaussian bump per cape towards the sea,

.. math:: o(\\phi) = t\\,(\\phi - \\phi_r) + \\sum_k P_k \\exp\\left(-\\frac{(\\phi - \\phi_k)^2 L^2}{W_k^2}\\right),
          \\qquad \\lambda_c(\\phi) = \\lambda_0 - s\\,\\frac{o(\\phi)}{L\\cos\\phi},

with :math:`o` the seaward offset in km, :math:`t` the tilt (km per degree), :math:`P_k`
and :math:`W_k` the protrusion and e-folding half-width of cape k (km), :math:`L` the
length of one degree of latitude (km) and :math:`s = +1` for land to the east, -1 for land
to the west. Land is on the ``s`` side of the curve and inside each island circle.

Notes
-----
Distances across the shore are measured zonally (along the parallel); along the shore
they are arclengths of the curve on the sphere, measured northward from the southern edge
of the grid. Lengths use a spherical Earth of radius 6371 km.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from coastmon.scenario.params import IslandSpec, ScenarioParams

EARTH_RADIUS_M = 6371.0e3
"""Radius of the spherical Earth used throughout the scenario (m)."""
KM_PER_DEG = EARTH_RADIUS_M * np.pi / 180.0 / 1000.0
"""Length of one degree of latitude (km)."""


def grid_axes(params: ScenarioParams) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Cell-centre longitudes and latitudes of the regular grid, west→east and south→north."""
    nx = round((params.lon_max - params.lon_min) / params.resolution_deg)
    ny = round((params.lat_max - params.lat_min) / params.resolution_deg)
    lon = params.lon_min + params.resolution_deg * (np.arange(nx) + 0.5)
    lat = params.lat_min + params.resolution_deg * (np.arange(ny) + 0.5)
    return lon, lat


def coast_offset_km(lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Seaward offset o(lat) of the coast from the reference meridian (km)."""
    lat = np.asarray(lat, dtype=float)
    offset = params.coast_tilt_km_per_deg * (lat - params.coast_ref_lat)
    for cape in params.capes:
        offset = offset + cape.protrusion_km * np.exp(
            -(((lat - cape.lat) * KM_PER_DEG / cape.halfwidth_km) ** 2))
    return offset


def coast_offset_slope_km_per_deg(lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Derivative do/dlat of the seaward offset (km per degree of latitude)."""
    lat = np.asarray(lat, dtype=float)
    slope = np.full_like(lat, params.coast_tilt_km_per_deg)
    for cape in params.capes:
        z = (lat - cape.lat) * KM_PER_DEG / cape.halfwidth_km
        slope = slope - cape.protrusion_km * 2.0 * z * KM_PER_DEG / cape.halfwidth_km * np.exp(-z**2)
    return slope


def coast_lon(lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Longitude of the coast line at each latitude (degrees east)."""
    lat = np.asarray(lat, dtype=float)
    return params.coast_lon - params.side * coast_offset_km(lat, params) / (
        KM_PER_DEG * np.cos(np.radians(lat)))


def coast_lon_slope(lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Derivative dlon_c/dlat of the coast line (degrees per degree)."""
    lat = np.asarray(lat, dtype=float)
    cos = np.cos(np.radians(lat))
    sin = np.sin(np.radians(lat))
    offset = coast_offset_km(lat, params)
    slope = coast_offset_slope_km_per_deg(lat, params)
    return -params.side * (slope / (KM_PER_DEG * cos)
                           + offset * sin * np.radians(1.0) / (KM_PER_DEG * cos**2))


def offshore_distance_km(lon: ArrayLike, lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Zonal distance seaward of the coast line (km); negative on the land side.

    ``d = s (lon_c(lat) - lon) L cos(lat)`` with L the length of a degree (km).
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    return params.side * (coast_lon(lat, params) - lon) * KM_PER_DEG * np.cos(np.radians(lat))


def island_centre(island: IslandSpec, params: ScenarioParams) -> tuple[float, float]:
    """Longitude and latitude of an island's centre."""
    lon = coast_lon(island.lat, params) - params.side * island.offshore_km / (
        KM_PER_DEG * np.cos(np.radians(island.lat)))
    return float(lon), island.lat


def land_mask(lon: ArrayLike, lat: ArrayLike, params: ScenarioParams) -> NDArray[np.int8]:
    """Sea (1) / land (0) mask at the points (lon, lat) (broadcast together)."""
    lon, lat = np.broadcast_arrays(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    sea = offshore_distance_km(lon, lat, params) > 0.0
    for island in params.islands:
        ilon, ilat = island_centre(island, params)
        dx = (lon - ilon) * KM_PER_DEG * np.cos(np.radians(ilat))
        dy = (lat - ilat) * KM_PER_DEG
        sea &= np.hypot(dx, dy) > island.diameter_km / 2.0
    return sea.astype(np.int8)


def alongshore_km(lat: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Arclength of the coast curve from the grid's southern edge to each latitude (km).

    ``ds = L sqrt(1 + (cos(lat) dlon_c/dlat)^2) dlat``, integrated by the trapezoidal rule
    on a 0.001-degree table and interpolated.
    """
    table_lat = np.arange(params.lat_min, params.lat_max + 0.0005, 0.001)
    ds = KM_PER_DEG * np.hypot(1.0, np.cos(np.radians(table_lat)) * coast_lon_slope(table_lat, params))
    s = np.concatenate([[0.0], np.cumsum(0.5 * (ds[1:] + ds[:-1]) * np.diff(table_lat))])
    return np.interp(np.asarray(lat, dtype=float), table_lat, s)


def lat_at_alongshore_km(s_km: ArrayLike, params: ScenarioParams) -> NDArray[np.float64]:
    """Latitude of the coast point at arclength ``s_km`` (inverse of :func:`alongshore_km`)."""
    table_lat = np.arange(params.lat_min, params.lat_max + 0.0005, 0.001)
    return np.interp(np.asarray(s_km, dtype=float), alongshore_km(table_lat, params), table_lat)
