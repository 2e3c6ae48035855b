"""The along-shore frame: stations, offshore sections, zonal rays and one sampling operator.

The frame is built once from the coastline and the grid. Its sparse ``sampler`` maps a
flattened (y, x) field to the values at every section and ray point, so each time chunk of
the streaming pass is sampled as ``sampler @ field.reshape(-1)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyproj
from scipy import sparse
from scipy.spatial import cKDTree

from coastmon.config import CoastSettings
from coastmon.errors import GeometryError
from coastmon.geometry.capes import smoothed_derivatives
from coastmon.geometry.coastline import Coastline, local_projection, wrap_longitude

__all__ = ["Frame", "GridLocator", "bilinear_sampler", "build_frame"]

class GridLocator:
    """Find the fractional (row, column) index of points on a regular or curvilinear grid.

    Regular grids (longitude varying only along x, latitude only along y) are inverted axis
    by axis, so bilinear weights are bilinear in longitude and latitude. Curvilinear grids
    are inverted in the km coordinates of ``forward``: a KD-tree on cell centres proposes the
    nearest cells and Newton's method solves the inverse bilinear map in each.

    Parameters
    ----------
    lon, lat : numpy.ndarray
        2-D (y, x) grid coordinates in degrees.
    forward : pyproj.Transformer
        lon/lat -> x/y km, used only for curvilinear grids.
    lon_ref : float
        Longitudes are compared after wrapping to within 180 degrees of this value.
    """

    def __init__(
        self, lon: np.ndarray, lat: np.ndarray, forward: pyproj.Transformer, lon_ref: float
    ) -> None:
        self.lon_ref = float(lon_ref)
        lon_u = wrap_longitude(np.asarray(lon, float), self.lon_ref)
        lat = np.asarray(lat, float)
        self.shape = lon_u.shape
        self.forward = forward
        lon1, lat1 = lon_u[0, :], lat[:, 0]
        self.regular = bool(
            np.allclose(lon_u, lon1[None, :], rtol=0, atol=1e-9)
            and np.allclose(lat, lat1[:, None], rtol=0, atol=1e-9)
            and _strictly_monotonic(lon1)
            and _strictly_monotonic(lat1)
        )
        if self.regular:
            self.lon1, self.lat1 = lon1, lat1
            return
        x, y = forward.transform(lon_u, lat)
        self.x_km = np.asarray(x, float)
        self.y_km = np.asarray(y, float)
        cx = 0.25 * (self.x_km[:-1, :-1] + self.x_km[:-1, 1:] + self.x_km[1:, :-1]
                     + self.x_km[1:, 1:])
        cy = 0.25 * (self.y_km[:-1, :-1] + self.y_km[:-1, 1:] + self.y_km[1:, :-1]
                     + self.y_km[1:, 1:])
        self.tree = cKDTree(np.column_stack([cx.ravel(), cy.ravel()]))

    def spacing_km(self) -> float:
        """Median distance between neighbouring grid points (km)."""
        ny, nx = self.shape
        iy = np.linspace(0, ny - 2, min(ny - 1, 40)).astype(int)
        ix = np.linspace(0, nx - 2, min(nx - 1, 40)).astype(int)
        ii, jj = np.meshgrid(iy, ix, indexing="ij")
        if self.regular:
            lon = self.lon1[jj]
            lat = self.lat1[ii]
            geod = pyproj.Geod(ellps="WGS84")
            _, _, dxm = geod.inv(lon, lat, self.lon1[jj + 1], lat)
            _, _, dym = geod.inv(lon, lat, lon, self.lat1[ii + 1])
            return float(np.median(np.concatenate([dxm.ravel(), dym.ravel()])) / 1000.0)
        dx = np.hypot(self.x_km[ii, jj + 1] - self.x_km[ii, jj],
                      self.y_km[ii, jj + 1] - self.y_km[ii, jj])
        dy = np.hypot(self.x_km[ii + 1, jj] - self.x_km[ii, jj],
                      self.y_km[ii + 1, jj] - self.y_km[ii, jj])
        return float(np.median(np.concatenate([dx.ravel(), dy.ravel()])))

    def locate(self, lon: np.ndarray, lat: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Fractional (row, column) indices of the points; NaN outside the grid."""
        lon = wrap_longitude(np.asarray(lon, float).ravel(), self.lon_ref)
        lat = np.asarray(lat, float).ravel()
        if self.regular:
            return _axis_index(lat, self.lat1), _axis_index(lon, self.lon1)
        return self._locate_curvilinear(lon, lat)

    def _locate_curvilinear(self, lon: np.ndarray, lat: np.ndarray):
        fi = np.full(lon.size, np.nan)
        fj = np.full(lon.size, np.nan)
        ok = np.isfinite(lon) & np.isfinite(lat)
        if not np.any(ok):
            return fi, fj
        px, py = self.forward.transform(lon[ok], lat[ok])
        px, py = np.asarray(px, float), np.asarray(py, float)
        k = min(6, self.tree.n)
        _, cells = self.tree.query(np.column_stack([px, py]), k=k)
        cells = cells.reshape(px.size, k)
        nxc = self.shape[1] - 1
        found_i = np.full(px.size, np.nan)
        found_j = np.full(px.size, np.nan)
        for c in range(k):
            todo = np.isnan(found_i)
            if not np.any(todo):
                break
            i0, j0 = np.divmod(cells[todo, c], nxc)
            a, b, inside = _inverse_bilinear(self.x_km, self.y_km, i0, j0, px[todo], py[todo])
            hit = np.flatnonzero(todo)[inside]
            found_i[hit] = i0[inside] + b[inside]
            found_j[hit] = j0[inside] + a[inside]
        fi[ok], fj[ok] = found_i, found_j
        return fi, fj


def _strictly_monotonic(v: np.ndarray) -> bool:
    d = np.diff(v)
    return bool(v.size >= 2 and (np.all(d > 0) or np.all(d < 0)))


def _axis_index(values: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Fractional index of values on a monotonic 1-D axis; NaN outside it."""
    n = axis.size
    idx = np.arange(n, dtype=float)
    if axis[0] > axis[-1]:
        axis, idx = axis[::-1], idx[::-1]
    tol = 1e-9 * max(1.0, abs(float(axis[-1] - axis[0])))
    out = np.interp(values, axis, idx)
    out[(values < axis[0] - tol) | (values > axis[-1] + tol) | ~np.isfinite(values)] = np.nan
    return out


def _inverse_bilinear(x, y, i0, j0, px, py, iterations: int = 12):
    """Solve P(a, b) = p in the cells (i0, j0)-(i0+1, j0+1); a along columns, b along rows."""
    x00, x01, x10, x11 = x[i0, j0], x[i0, j0 + 1], x[i0 + 1, j0], x[i0 + 1, j0 + 1]
    y00, y01, y10, y11 = y[i0, j0], y[i0, j0 + 1], y[i0 + 1, j0], y[i0 + 1, j0 + 1]
    ex, ey = x11 - x01 - x10 + x00, y11 - y01 - y10 + y00
    a = np.full(px.size, 0.5)
    b = np.full(px.size, 0.5)
    for _ in range(iterations):
        fx = x00 + a * (x01 - x00) + b * (x10 - x00) + a * b * ex - px
        fy = y00 + a * (y01 - y00) + b * (y10 - y00) + a * b * ey - py
        jaa, jab = (x01 - x00) + b * ex, (x10 - x00) + a * ex
        jba, jbb = (y01 - y00) + b * ey, (y10 - y00) + a * ey
        det = jaa * jbb - jab * jba
        det = np.where(np.abs(det) < 1e-12, 1e-12, det)
        a = np.clip(a - (jbb * fx - jab * fy) / det, -2.0, 3.0)
        b = np.clip(b - (-jba * fx + jaa * fy) / det, -2.0, 3.0)
    eps = 1e-7
    inside = (a >= -eps) & (a <= 1 + eps) & (b >= -eps) & (b <= 1 + eps)
    return np.clip(a, 0.0, 1.0), np.clip(b, 0.0, 1.0), inside


def _corner_weights(fi: np.ndarray, fj: np.ndarray, shape: tuple[int, int]):
    """Flat indices (n, 4) and bilinear weights (n, 4) of the cell corners; NaN -> weight 0."""
    ny, nx = shape
    ok = np.isfinite(fi) & np.isfinite(fj)
    i0 = np.clip(np.floor(np.where(ok, fi, 0.0)), 0, ny - 2).astype(np.int64)
    j0 = np.clip(np.floor(np.where(ok, fj, 0.0)), 0, nx - 2).astype(np.int64)
    b = np.where(ok, fi, 0.0) - i0
    a = np.where(ok, fj, 0.0) - j0
    cols = np.column_stack([i0 * nx + j0, i0 * nx + j0 + 1, (i0 + 1) * nx + j0,
                            (i0 + 1) * nx + j0 + 1])
    w = np.column_stack([(1 - a) * (1 - b), a * (1 - b), (1 - a) * b, a * b])
    w[~ok] = 0.0
    return cols, w, ok


def _sea_fraction(locator: GridLocator, sea: np.ndarray, lon, lat) -> np.ndarray:
    """Bilinear interpolation of the sea mask at the points; NaN outside the grid."""
    fi, fj = locator.locate(lon, lat)
    cols, w, ok = _corner_weights(fi, fj, locator.shape)
    frac = np.sum(w * sea[cols], axis=1)
    return np.where(ok, frac, np.nan)


def _sampler_from_locator(
    locator: GridLocator, sea: np.ndarray, lon: np.ndarray, lat: np.ndarray
) -> tuple[sparse.csr_matrix, np.ndarray]:
    n = np.asarray(lon).size
    fi, fj = locator.locate(lon, lat)
    cols, w, _ = _corner_weights(fi, fj, locator.shape)
    w = w * sea[cols]
    total = w.sum(axis=1)
    valid = total > 1e-12
    w = np.where(valid[:, None], w / np.where(valid, total, 1.0)[:, None], 0.0)
    rows = np.repeat(np.arange(n), 4)
    keep = w.ravel() > 0
    matrix = sparse.csr_matrix(
        (w.ravel()[keep], (rows[keep], cols.ravel()[keep])),
        shape=(n, sea.size),
    )
    return matrix, valid


def bilinear_sampler(
    lon: np.ndarray,
    lat: np.ndarray,
    mask: np.ndarray,
    point_lon: np.ndarray,
    point_lat: np.ndarray,
    forward: pyproj.Transformer | None = None,
) -> tuple[sparse.csr_matrix, np.ndarray]:
    """Sparse bilinear interpolation operator from a (y, x) grid to scattered points.

    Parameters
    ----------
    lon, lat : numpy.ndarray
        2-D (y, x) grid coordinates (degrees).
    mask : numpy.ndarray
        2-D (y, x), 1 = sea, 0 = land; only sea points receive weight.
    point_lon, point_lat : numpy.ndarray
        1-D point coordinates (degrees); NaN points are invalid.
    forward : pyproj.Transformer, optional
        lon/lat -> km projection used to invert curvilinear grids; by default an azimuthal
        equidistant projection centred on the grid.

    Returns
    -------
    sampler : scipy.sparse.csr_matrix
        Shape (n_points, ny * nx); ``sampler @ field.reshape(-1)`` interpolates ``field``.
    valid : numpy.ndarray
        (n_points,) bool: inside the grid with at least one sea corner.

    Notes
    -----
    Weights are the bilinear weights of the four corners of the containing cell (in
    longitude/latitude on regular grids; by inverse bilinear mapping in km on curvilinear
    grids), set to zero on land corners and renormalised to sum to one over the sea
    corners. Invalid points have an empty row.
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    ny, nx = lon.shape
    lon_u = wrap_longitude(lon, float(lon[ny // 2, nx // 2]))
    lon_ref = float(0.5 * (lon_u.min() + lon_u.max()))
    if forward is None:
        _, forward, _ = local_projection(lon_ref, float(0.5 * (lat.min() + lat.max())))
    locator = GridLocator(lon, lat, forward, lon_ref)
    sea = (np.asarray(mask).reshape(-1) == 1).astype(float)
    return _sampler_from_locator(locator, sea, np.ravel(point_lon), np.ravel(point_lat))


@dataclass(frozen=True)
class Frame:
    """Stations along the coast with offshore sections, zonal rays and their sampler.

    Attributes
    ----------
    stations : pandas.DataFrame
        One row per station: ``station_id`` (0..S-1, the row of the section and ray
        arrays), ``segment_id``, ``alongshore_km``, ``lon``, ``lat``, ``normal_az_deg``
        (offshore normal, degrees clockwise from north), ``ray_dir`` (-1 west, +1 east,
        0 no ray; the feed uses only westward rays), ``ring_length_km`` (length of the
        station's segment when it is a closed ring, an island; NaN on open segments, so
        along-shore distances wrap on rings).
    offsets_km : numpy.ndarray
        (O,) offshore distances of the section points.
    ray_km : numpy.ndarray
        (R,) distances of the ray points from the station along the latitude circle.
    section_lon, section_lat : numpy.ndarray
        (S, O) degrees; NaN where invalid.
    ray_lon, ray_lat : numpy.ndarray
        (S, R) degrees; NaN where invalid.
    sampler : scipy.sparse.csr_matrix
        (S*O + S*R, ny*nx); rows are section points station-major, then ray points
        station-major. Invalid points have empty rows.
    valid : numpy.ndarray
        (S*O + S*R,) bool.
    """

    stations: pd.DataFrame
    offsets_km: np.ndarray
    ray_km: np.ndarray
    section_lon: np.ndarray
    section_lat: np.ndarray
    ray_lon: np.ndarray
    ray_lat: np.ndarray
    sampler: sparse.csr_matrix
    valid: np.ndarray

    @property
    def n_stations(self) -> int:
        """Number of stations S."""
        return len(self.stations)

    @property
    def n_points(self) -> int:
        """Number of sample points S*O + S*R."""
        return self.sampler.shape[0]

    def split(self, samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Split sampled values (..., n_points) into (..., S, O) sections and (..., S, R) rays."""
        samples = np.asarray(samples)
        if samples.shape[-1] != self.n_points:
            raise ValueError(
                f"last axis has {samples.shape[-1]} values, the frame has {self.n_points} points"
            )
        s, o, r = self.n_stations, self.offsets_km.size, self.ray_km.size
        lead = samples.shape[:-1]
        section = samples[..., : s * o].reshape(*lead, s, o)
        rays = samples[..., s * o:].reshape(*lead, s, r)
        return section, rays


def _station_positions(length: float, spacing: float, closed: bool) -> np.ndarray:
    if closed:
        n = max(int(np.floor(length / spacing)), 1)
        return np.arange(n) * spacing
    n = int(np.floor(length / spacing)) + 1
    margin = 0.5 * (length - (n - 1) * spacing)
    return margin + np.arange(n) * spacing


def _along_interp(seg, s_new: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Values given at the vertices of a segment, interpolated at arclengths ``s_new``."""
    if seg.closed:
        s_ext = np.append(seg.alongshore_km, seg.length_km)
        return np.interp(s_new, s_ext, np.append(values, values[0]))
    return np.interp(s_new, seg.alongshore_km, values)


def _first_stop(sea_frac: np.ndarray, distances: np.ndarray, start_km: float) -> np.ndarray:
    """Distance of the first land (< 0.5) or out-of-grid sample beyond ``start_km``; inf if none.

    ``sea_frac`` is (S, K) along each path at the (K,) ``distances``.
    """
    bad = ~(sea_frac >= 0.5) & (distances[None, :] >= start_km)
    first = np.argmax(bad, axis=1)
    return np.where(bad.any(axis=1), distances[first], np.inf)


def _crossing_limits(px, py, nx_, ny_, reach) -> np.ndarray:
    """Truncate sections so that no two of them cross.

    Sections are p_i + a n_i (0 <= a < reach_i). For every pair of stations closer than
    twice the longest reach (found with a KD-tree), where the two sections meet at distances
    a_i, a_j, both within reach, each is cut just before the meeting point.
    """
    limit = reach.copy()
    finite = np.isfinite(reach)
    radius = 2.0 * float(np.max(reach[finite])) if np.any(finite) else 0.0
    pairs = cKDTree(np.column_stack([px, py])).query_pairs(r=radius, output_type="ndarray")
    if pairs.size == 0:
        return limit
    i_sel, j_sel = pairs[:, 0], pairs[:, 1]
    det = nx_[i_sel] * (-ny_[j_sel]) - ny_[i_sel] * (-nx_[j_sel])
    dx = px[j_sel] - px[i_sel]
    dy = py[j_sel] - py[i_sel]
    safe = np.abs(det) > 1e-9
    det_s = np.where(safe, det, 1.0)
    a_i = (dx * (-ny_[j_sel]) - dy * (-nx_[j_sel])) / det_s
    a_j = (nx_[i_sel] * dy - ny_[i_sel] * dx) / det_s
    meet = safe & (a_i > 0) & (a_j > 0) & (a_i < reach[i_sel]) & (a_j < reach[j_sel])
    np.minimum.at(limit, i_sel[meet], a_i[meet])
    np.minimum.at(limit, j_sel[meet], a_j[meet])
    return limit


def build_frame(
    coastline: Coastline,
    lon: np.ndarray,
    lat: np.ndarray,
    mask: np.ndarray,
    settings: CoastSettings,
) -> Frame:
    """Stations, offshore sections, zonal rays and the sparse sampler, built once.

    Parameters
    ----------
    coastline : Coastline
        From ``extract_coastline`` on the same grid.
    lon, lat : numpy.ndarray
        2-D (y, x) grid coordinates (degrees).
    mask : numpy.ndarray
        2-D (y, x), 1 = sea, 0 = land.
    settings : CoastSettings
        ``station_spacing_km``, ``offsets_km``, ``ray_length_km``, ``ray_spacing_km``,
        ``ray_every``, ``min_scale_km`` (smoothing of the normals).

    Returns
    -------
    Frame

    Notes
    -----
    *Stations* are spaced ``station_spacing_km`` along each segment (centred on open
    segments, from the first vertex on rings). *Normals* point offshore (to the right of
    the coast, see ``extract_coastline``) and are taken from the coast smoothed at
    ``min_scale_km``, so they follow the cape-scale shape and not the grid steps. A section
    is cut at the first land (bilinear sea fraction < 0.5, checked every half grid cell
    beyond the first cell) or the domain edge, and just before it would cross the section
    of any other station (at concave bends, or where sections converge across a bay).
    *Rays* run along the latitude circle, at the distance
    d / (N(phi) cos phi) in longitude on the WGS84 ellipsoid, N the prime-vertical radius,
    westward (-1) when the offshore normal points west of north-south, eastward (+1) when
    it points east; they stop at the first land or the domain edge. A station gets no ray
    (``ray_dir = 0``) if it is not a multiple of ``ray_every``, if its normal is exactly
    meridional, or if the first ray point is not at sea. Points beyond a cut, outside the
    grid, or without a sea grid point among their four neighbours are invalid: NaN
    coordinates, no sampler weights.
    """
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    mask = np.asarray(mask)
    if lon.shape != mask.shape or lat.shape != mask.shape:
        raise GeometryError(
            "The grid coordinates and the mask passed to the frame differ in shape",
            where="along-shore frame",
            todo="Pass the same lon, lat and mask that the coastline was extracted from",
        )
    locator = GridLocator(lon, lat, coastline.forward, coastline.lon_ref)
    sea = (mask.reshape(-1) == 1).astype(float)
    offsets = np.asarray(settings.offsets_km, float)
    n_ray = int(np.floor(settings.ray_length_km / settings.ray_spacing_km + 1e-9))
    ray_km = settings.ray_spacing_km * np.arange(1, n_ray + 1)

    px, py, tx, ty, seg_of, along, ring = [], [], [], [], [], [], []
    for seg in coastline.segments:
        s_st = _station_positions(seg.length_km, settings.station_spacing_km, seg.closed)
        _, _, dx, dy, _, _ = smoothed_derivatives(seg.x_km, seg.y_km, settings.min_scale_km,
                                                  seg.closed)
        px.append(_along_interp(seg, s_st, seg.x_km))
        py.append(_along_interp(seg, s_st, seg.y_km))
        tx.append(_along_interp(seg, s_st, dx))
        ty.append(_along_interp(seg, s_st, dy))
        seg_of.append(np.full(s_st.size, seg.segment_id))
        along.append(s_st)
        ring.append(np.full(s_st.size, seg.length_km if seg.closed else np.nan))
    px, py = np.concatenate(px), np.concatenate(py)
    tx, ty = np.concatenate(tx), np.concatenate(ty)
    seg_of = np.concatenate(seg_of)
    along = np.concatenate(along)
    norm = np.hypot(tx, ty)
    nx_, ny_ = ty / norm, -tx / norm
    n_st = px.size

    cell_km = locator.spacing_km()
    step = 0.5 * cell_km
    start = 0.75 * cell_km

    # Sections: land and domain-edge cut, then no crossing of other sections.
    reach_max = offsets[-1] + step
    # Every half cell, and at the sample offsets themselves, so no sample point is on land.
    d_fine = np.union1d(np.arange(0.0, reach_max + step, step), offsets)
    fx = px[:, None] + d_fine[None, :] * nx_[:, None]
    fy = py[:, None] + d_fine[None, :] * ny_[:, None]
    flon, flat = coastline.to_lonlat(fx.ravel(), fy.ravel())
    frac = _sea_fraction(locator, sea, flon, flat).reshape(fx.shape)
    reach = _first_stop(frac, d_fine, start)
    reach = _crossing_limits(px, py, nx_, ny_, np.minimum(reach, reach_max))
    sec_ok = offsets[None, :] < reach[:, None]
    sx = px[:, None] + offsets[None, :] * nx_[:, None]
    sy = py[:, None] + offsets[None, :] * ny_[:, None]
    sec_lon, sec_lat = coastline.to_lonlat(sx.ravel(), sy.ravel())
    sec_lon, sec_lat = sec_lon.reshape(sx.shape), sec_lat.reshape(sx.shape)

    st_lon, st_lat = sec_lon[:, 0].copy(), sec_lat[:, 0].copy()
    geod = pyproj.Geod(ellps="WGS84")
    n_lon, n_lat = coastline.to_lonlat(px + nx_, py + ny_)
    az, _, _ = geod.inv(st_lon, st_lat, n_lon, n_lat)
    az = np.mod(az, 360.0)

    # Rays along the latitude circle.
    east = np.sin(np.radians(az))
    ray_dir = np.sign(east).astype(int)
    ray_dir[np.arange(n_st) % settings.ray_every != 0] = 0
    a_km = geod.a / 1000.0
    phi = np.radians(st_lat)
    parallel_radius = a_km * np.cos(phi) / np.sqrt(1.0 - geod.es * np.sin(phi) ** 2)
    r_fine = np.union1d(np.arange(0.0, ray_km[-1] + step, step), ray_km)
    rlon_f = st_lon[:, None] + ray_dir[:, None] * np.degrees(r_fine[None, :]
                                                              / parallel_radius[:, None])
    rlat_f = np.broadcast_to(st_lat[:, None], rlon_f.shape)
    has_ray = ray_dir != 0
    ray_stop = np.zeros(n_st)
    if np.any(has_ray):
        frac_r = _sea_fraction(locator, sea, rlon_f[has_ray].ravel(),
                               rlat_f[has_ray].ravel()).reshape(int(has_ray.sum()), -1)
        ray_stop[has_ray] = _first_stop(frac_r, r_fine, start)
    ray_ok = has_ray[:, None] & (ray_km[None, :] < ray_stop[:, None])
    ray_lon = st_lon[:, None] + ray_dir[:, None] * np.degrees(ray_km[None, :]
                                                              / parallel_radius[:, None])
    ray_lat = np.broadcast_to(st_lat[:, None], ray_lon.shape).copy()

    all_lon = np.concatenate([sec_lon.ravel(), ray_lon.ravel()])
    all_lat = np.concatenate([sec_lat.ravel(), ray_lat.ravel()])
    geometric_ok = np.concatenate([sec_ok.ravel(), ray_ok.ravel()])
    all_lon = np.where(geometric_ok, all_lon, np.nan)
    all_lat = np.where(geometric_ok, all_lat, np.nan)
    sampler, valid = _sampler_from_locator(locator, sea, all_lon, all_lat)
    all_lon = np.where(valid, all_lon, np.nan)
    all_lat = np.where(valid, all_lat, np.nan)
    n_sec = sec_lon.size

    no_first_point = has_ray & ~valid[n_sec:].reshape(n_st, -1)[:, 0]
    ray_dir[no_first_point] = 0

    stations = pd.DataFrame(
        {
            "station_id": np.arange(n_st),
            "segment_id": seg_of.astype(int),
            "alongshore_km": along,
            "lon": st_lon,
            "lat": st_lat,
            "normal_az_deg": az,
            "ray_dir": ray_dir,
            "ring_length_km": np.concatenate(ring),
        }
    )
    return Frame(
        stations=stations,
        offsets_km=offsets,
        ray_km=ray_km,
        section_lon=all_lon[:n_sec].reshape(n_st, -1),
        section_lat=all_lat[:n_sec].reshape(n_st, -1),
        ray_lon=all_lon[n_sec:].reshape(n_st, -1),
        ray_lat=all_lat[n_sec:].reshape(n_st, -1),
        sampler=sampler,
        valid=valid,
    )
