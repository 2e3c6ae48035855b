"""Grid metrics on the sphere for any 2-D (regular or curvilinear) lon/lat grid.

The grid's geometry is computed once per run into a :class:`GridMetrics`; every operator
afterwards just uses it (see :mod:`coastmon.grid.operators`).

Conventions
-----------
* ``lon``, ``lat`` are 2-D arrays (y, x) of the points where velocity lives, in degrees.
* Derivatives are taken on the *dual cells*: the quadrilaterals whose four vertices are
  the grid points (j, i), (j, i+1), (j+1, i+1), (j+1, i). Green's theorem turns every
  first derivative into a line integral around that quadrilateral, so vorticity is the
  circulation divided by the area (Stokes), and the same weights give gradients,
  divergence and strain. Values on the dual cells are averaged back to the grid points.
* Edge displacements are measured in a local east/north frame at the edge midpoint:
  ``dE = a cos(phi_mid) d_lambda``, ``dN = a d_phi``. Areas come from the shoelace formula
  in the cylindrical equal-area coordinates ``(a lambda, a sin(phi))``. Both are exact on
  a regular lon/lat grid, so solid-body rotation about the polar axis returns exactly the
  cell mean of ``2 omega sin(phi)``.
* The sign of the area follows the vertex order, and the circulation uses the same order,
  so the result does not depend on whether the grid's index axes are right- or left-handed
  (e.g. latitude stored north to south).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

EARTH_RADIUS_M = 6_371_000.0
"""Mean Earth radius (m), IUGG."""
OMEGA = 7.2921e-5
"""Earth's rotation rate (rad s-1); Gill (1982), Appendix 2."""


def coriolis_parameter(lat_deg: np.ndarray | float) -> np.ndarray:
    r"""Coriolis parameter :math:`f = 2\Omega\sin\varphi` (s-1). Gill (1982) §7.2."""
    return 2.0 * OMEGA * np.sin(np.deg2rad(lat_deg))


def beta_parameter(lat_deg: np.ndarray | float) -> np.ndarray:
    r"""Meridional gradient of f, :math:`\beta = 2\Omega\cos\varphi / a` (m-1 s-1). Gill (1982) §12.1."""
    return 2.0 * OMEGA * np.cos(np.deg2rad(lat_deg)) / EARTH_RADIUS_M


def _wrap_deg(d: np.ndarray) -> np.ndarray:
    """Wrap longitude differences into [-180, 180)."""
    return (d + 180.0) % 360.0 - 180.0


def haversine_m(lon1, lat1, lon2, lat2) -> np.ndarray:
    """Great-circle distance (m) on a sphere of radius :data:`EARTH_RADIUS_M`."""
    p1, p2 = np.deg2rad(lat1), np.deg2rad(lat2)
    dl = np.deg2rad(_wrap_deg(np.asarray(lon2) - np.asarray(lon1)))
    h = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


@dataclass(frozen=True)
class GridMetrics:
    """Geometry of a 2-D grid on the sphere, computed once.

    Attributes
    ----------
    lon, lat : (y, x) degrees.
    dx_m, dy_m : (y, x) grid spacing along the x and y index axes (m), centred differences.
    area_m2 : (y, x) area represented by each point (m2).
    f, beta : (y, x) Coriolis parameter (s-1) and its meridional gradient (m-1 s-1).
    gx, gy : (4, y-1, x-1) Green's-theorem weights on the dual cells: for any field q on
        the points, ``dq/dx_east = sum_k gx[k] * q_k`` and ``dq/dy_north = sum_k gy[k] * q_k``,
        vertex k = 0..3 being (j, i), (j, i+1), (j+1, i+1), (j+1, i).
    dual_area_m2 : (y-1, x-1) unsigned area of each dual cell (m2).
    """

    lon: np.ndarray
    lat: np.ndarray
    dx_m: np.ndarray
    dy_m: np.ndarray
    area_m2: np.ndarray
    f: np.ndarray
    beta: np.ndarray
    gx: np.ndarray
    gy: np.ndarray
    dual_area_m2: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return self.lon.shape

    @classmethod
    def from_lonlat(cls, lon: np.ndarray, lat: np.ndarray) -> GridMetrics:
        """Build the metrics from 2-D (or 1-D, broadcast) longitude and latitude in degrees."""
        lon = np.asarray(lon, dtype=np.float64)
        lat = np.asarray(lat, dtype=np.float64)
        if lon.ndim == 1 and lat.ndim == 1:
            lon, lat = np.meshgrid(lon, lat)
        if lon.shape != lat.shape or lon.ndim != 2:
            raise ValueError("lon and lat must be 2-D arrays of the same shape")
        if min(lon.shape) < 2:
            raise ValueError("the grid needs at least 2 points along each axis")
        a = EARTH_RADIUS_M
        lam = np.deg2rad(lon)
        phi = np.deg2rad(lat)
        # Vertices of the dual cells, in order 0..3.
        sl = [
            (slice(None, -1), slice(None, -1)),
            (slice(None, -1), slice(1, None)),
            (slice(1, None), slice(1, None)),
            (slice(1, None), slice(None, -1)),
        ]
        vlam = np.stack([lam[s] for s in sl])
        vphi = np.stack([phi[s] for s in sl])
        # Longitudes relative to vertex 0, wrapped (antimeridian-safe).
        rel = np.deg2rad(_wrap_deg(np.rad2deg(vlam - vlam[0])))
        # Edge k runs from vertex k to vertex k+1.
        nxt = [1, 2, 3, 0]
        d_e = np.empty_like(vphi)
        d_n = np.empty_like(vphi)
        for k, m in enumerate(nxt):
            dlam = rel[m] - rel[k]
            d_e[k] = a * np.cos(0.5 * (vphi[k] + vphi[m])) * dlam
            d_n[k] = a * (vphi[m] - vphi[k])
        # Signed area by the shoelace formula in cylindrical equal-area coordinates.
        xs = a * rel
        ys = a * np.sin(vphi)
        area = 0.5 * sum(xs[k] * ys[m] - xs[m] * ys[k] for k, m in enumerate(nxt))
        with np.errstate(divide="ignore", invalid="ignore"):
            inv = np.where(area != 0, 1.0 / area, np.nan)
        prev = [3, 0, 1, 2]
        # Trapezoidal line integral: vertex k carries half of each edge touching it.
        # d(q)/dx = (1/A) oint q dN ; d(q)/dy = -(1/A) oint q dE  (Green's theorem).
        gx = np.stack([0.5 * (d_n[prev[k]] + d_n[k]) * inv for k in range(4)])
        gy = np.stack([-0.5 * (d_e[prev[k]] + d_e[k]) * inv for k in range(4)])

        dx = _centred_spacing(lon, lat, axis=1)
        dy = _centred_spacing(lon, lat, axis=0)
        cell_area = _to_points(np.abs(area))
        return cls(
            lon=lon,
            lat=lat,
            dx_m=dx,
            dy_m=dy,
            area_m2=cell_area,
            f=coriolis_parameter(lat),
            beta=beta_parameter(lat),
            gx=gx,
            gy=gy,
            dual_area_m2=np.abs(area),
        )


def _centred_spacing(lon: np.ndarray, lat: np.ndarray, axis: int) -> np.ndarray:
    """Distance between neighbours along one index axis, centred (one-sided at the ends)."""
    if axis == 1:
        d = haversine_m(lon[:, :-1], lat[:, :-1], lon[:, 1:], lat[:, 1:])
        out = np.empty_like(lon)
        out[:, 1:-1] = 0.5 * (d[:, :-1] + d[:, 1:])
        out[:, 0], out[:, -1] = d[:, 0], d[:, -1]
    else:
        d = haversine_m(lon[:-1], lat[:-1], lon[1:], lat[1:])
        out = np.empty_like(lon)
        out[1:-1] = 0.5 * (d[:-1] + d[1:])
        out[0], out[-1] = d[0], d[-1]
    return out


def _to_points(dual: np.ndarray) -> np.ndarray:
    """Average a dual-cell field (..., y-1, x-1) onto the points (..., y, x), ignoring NaN.

    Each point takes the mean of the (up to four) dual cells it is a vertex of.
    """
    shape = dual.shape[:-2] + (dual.shape[-2] + 1, dual.shape[-1] + 1)
    total = np.zeros(shape, dtype=np.float64)
    count = np.zeros(shape, dtype=np.float64)
    ok = np.isfinite(dual)
    val = np.where(ok, dual, 0.0)
    for sy, sx in (
        (slice(None, -1), slice(None, -1)),
        (slice(None, -1), slice(1, None)),
        (slice(1, None), slice(1, None)),
        (slice(1, None), slice(None, -1)),
    ):
        total[..., sy, sx] += val
        count[..., sy, sx] += ok
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)
