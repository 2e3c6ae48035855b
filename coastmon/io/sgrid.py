"""Staggered (Arakawa C) grids: SGRID metadata and averaging to the cell centres.

On a C-grid the x-component of velocity lives on the faces of the cells across the x
index axis and the y-component on the faces across the y axis; the canonical dataset
wants both at the cell centres. The relation between a face (centre) dimension and the
staggered dimension is read from the SGRID ``grid_topology`` variable
(``face_dimensions = "xi_c: xi_n (padding: both) eta_c: eta_n (padding: both)"``, SGRID
conventions 0.3) or, without it, inferred from the sizes and, where sizes are equal,
from the coordinates of the staggered points.

Layouts (``n_c`` centres, ``n_s`` staggered points along one axis):

* ``"inner"``: ``n_s = n_c + 1``; centre ``i`` lies between staggered ``i`` and ``i+1``
  (SGRID padding ``none`` seen from the staggered side);
* ``"outer"``: ``n_s = n_c - 1``; centre ``i`` between staggered ``i-1`` and ``i``; the
  first and last centres have only one face and are NaN (SGRID padding ``both``);
* ``"low"``: equal sizes; centre ``i`` between staggered ``i-1`` and ``i``; the first
  centre is NaN (padding ``low``);
* ``"high"``: equal sizes; centre ``i`` between staggered ``i`` and ``i+1``; the last
  centre is NaN (padding ``high``).

The centre value is the mean of the two faces (second-order, the usual C-grid
interpolation; e.g. Cushman-Roisin & Beckers 2011, ch. 5 on staggered grids).

Relative vorticity is computed natively on the grid (:class:`CornerCells`,
:func:`corner_vorticity`, :func:`native_vorticity`): the circulation of the face
velocities around each cell corner over the corner cell's area, then averaged to the
centres. :func:`face_slice` picks, for any layout, the faces between consecutive centres.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import xarray as xr

from coastmon.grid.metrics import EARTH_RADIUS_M, _to_points, _wrap_deg

_PAIR = re.compile(r"(\w+)\s*:\s*(\w+)(?:\s*\(\s*padding\s*:\s*(\w+)\s*\))?")


@dataclass(frozen=True)
class SgridTopology:
    """What coastmon uses of an SGRID ``grid_topology`` variable.

    Attributes
    ----------
    name : str
        Name of the topology variable.
    face_pairs : tuple of (face_dim, node_dim, padding)
        From ``face_dimensions``; padding is None when not given.
    face_coordinates : tuple of str
        From ``face_coordinates`` (names of the centre lon/lat variables), may be empty.
    """

    name: str
    face_pairs: tuple[tuple[str, str, str | None], ...]
    face_coordinates: tuple[str, ...]

    @property
    def face_dims(self) -> tuple[str, ...]:
        return tuple(p[0] for p in self.face_pairs)

    def padding_for(self, face_dim: str) -> str | None:
        for face, _node, padding in self.face_pairs:
            if face == face_dim:
                return padding
        return None


def parse_dimension_pairs(text: str) -> tuple[tuple[str, str, str | None], ...]:
    """Parse an SGRID dimension attribute into ``(dim, other_dim, padding)`` triples.

    >>> parse_dimension_pairs("xi_c: xi_n (padding: both) eta_c: eta_n (padding: none)")
    (('xi_c', 'xi_n', 'both'), ('eta_c', 'eta_n', 'none'))
    """
    return tuple((a, b, p.lower() if p else None) for a, b, p in _PAIR.findall(text or ""))


def find_topology(ds: xr.Dataset) -> SgridTopology | None:
    """The SGRID topology of ``ds`` (a variable with ``cf_role = "grid_topology"``), if any."""
    for name, var in ds.variables.items():
        if str(var.attrs.get("cf_role", "")).strip() == "grid_topology":
            faces = parse_dimension_pairs(str(var.attrs.get("face_dimensions", "")))
            coords = tuple(str(var.attrs.get("face_coordinates", "")).split())
            return SgridTopology(str(name), faces, coords)
    return None


def layout_from_sizes(n_centre: int, n_staggered: int, padding: str | None) -> str | None:
    """The layout (see module notes) implied by the sizes; equal sizes need ``padding``.

    Returns None when the sizes are equal and the padding says nothing, or when the sizes
    cannot belong to one staggered axis.
    """
    if n_staggered == n_centre + 1:
        return "inner"
    if n_staggered == n_centre - 1:
        return "outer"
    if n_staggered == n_centre and padding in ("low", "high"):
        return padding
    return None


def to_centres(da: xr.DataArray, dim: str, centre_dim: str, layout: str) -> xr.DataArray:
    """Average a staggered field along ``dim`` to the centres (dimension ``centre_dim``).

    Lazy for dask-backed input. Centres with a single face get NaN.
    """
    da = da.drop_vars([c for c in da.coords if dim in da[c].dims])
    mean = 0.5 * (da.isel({dim: slice(None, -1)}) + da.isel({dim: slice(1, None)}).data)
    pads = {"inner": (0, 0), "outer": (1, 1), "low": (1, 0), "high": (0, 1)}[layout]
    if pads != (0, 0):
        mean = mean.pad({dim: pads}, mode="constant")
    return mean.rename({dim: centre_dim})


def face_slice(layout: str, n_staggered: int) -> slice:
    """Index range of the staggered points that lie between two consecutive centres.

    Whatever the layout, ``n_centre - 1`` faces separate the ``n_centre`` centres of an
    axis; face ``k`` of the returned range lies between centres ``k`` and ``k + 1``.

    >>> face_slice("inner", 11), face_slice("outer", 9)
    (slice(1, 10, None), slice(0, 9, None))
    """
    start = 1 if layout in ("inner", "high") else 0
    stop = n_staggered - 1 if layout in ("inner", "low") else n_staggered
    return slice(start, stop)


def _step(lon1: np.ndarray, lat1: np.ndarray, lon2: np.ndarray,
          lat2: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """East and north displacement (m) from point 1 to point 2, local frame at the midpoint.

    ``dE = a cos(phi_mid) d_lambda`` (longitude difference wrapped into [-180, 180)),
    ``dN = a d_phi``, as :class:`coastmon.grid.metrics.GridMetrics` measures its edges.
    """
    dlam = np.deg2rad(_wrap_deg(lon2 - lon1))
    mid = np.deg2rad(0.5 * (lat1 + lat2))
    return EARTH_RADIUS_M * np.cos(mid) * dlam, EARTH_RADIUS_M * np.deg2rad(lat2 - lat1)


def _midpoints(lon: np.ndarray, lat: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """Points half-way between consecutive centres along ``axis`` (longitude wrap-safe)."""
    lo = np.moveaxis(lon, axis, 0)
    la = np.moveaxis(lat, axis, 0)
    mid_lon = lo[:-1] + 0.5 * _wrap_deg(lo[1:] - lo[:-1])
    mid_lat = 0.5 * (la[:-1] + la[1:])
    return np.moveaxis(mid_lon, 0, axis), np.moveaxis(mid_lat, 0, axis)


@dataclass(frozen=True)
class CornerCells:
    r"""Geometry of the cells centred on the corners (psi-points) of a C-grid, built once.

    The cell around corner ``(j+1/2, i+1/2)`` has the four centres around it as vertices
    and the four faces between them on its edges: the x-faces ``(j, i+1/2)`` and
    ``(j+1, i+1/2)`` (weights ``w_u_low``, ``w_u_high``) and the y-faces ``(j+1/2, i)`` and
    ``(j+1/2, i+1)`` (``w_v_low``, ``w_v_high``). Relative vorticity at the corner is the
    circulation divided by the area (Stokes; Vallis 2017 §2.2):

    .. math:: \zeta = \frac{1}{A}\oint \mathbf{u}\cdot d\mathbf{l}
              = w^u_{lo} u_{j,i+1/2} + w^u_{hi} u_{j+1,i+1/2}
              + w^v_{lo} v_{j+1/2,i} + w^v_{hi} v_{j+1/2,i+1}

    Each weight is a signed edge length over the signed area. Every edge runs from a
    centre through its face to the next centre, and is measured as two half-edges in the
    local east/north frame at each half's midpoint (``dE = a cos(phi) d_lambda``,
    ``dN = a d_phi``); the area is the shoelace formula over the eight points (centres and
    faces) in the cylindrical equal-area coordinates ``(a lambda, a sin phi)``. On a regular
    longitude-latitude grid both are exact, so solid-body rotation gives exactly the cell
    mean of :math:`2\omega\sin\varphi`. Circulation and area follow the same vertex order,
    so the result does not depend on the handedness of the index axes.

    Attributes
    ----------
    w_u_low, w_u_high, w_v_low, w_v_high : (y-1, x-1) float64, m-1.
    area_m2 : (y-1, x-1) float64, unsigned area of each corner cell.
    """

    w_u_low: np.ndarray
    w_u_high: np.ndarray
    w_v_low: np.ndarray
    w_v_high: np.ndarray
    area_m2: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        """Shape of the corner array, (y-1, x-1) of the centres."""
        return self.area_m2.shape

    @classmethod
    def from_coords(cls, lon_c: np.ndarray, lat_c: np.ndarray,
                    lon_u: np.ndarray | None = None, lat_u: np.ndarray | None = None,
                    lon_v: np.ndarray | None = None, lat_v: np.ndarray | None = None,
                    grid_relative: bool = True) -> CornerCells:
        """Corner cells from centre and face longitude/latitude (degrees).

        Parameters
        ----------
        lon_c, lat_c : (y, x)
            Cell centres.
        lon_u, lat_u : (y, x-1), optional
            The x-faces between consecutive centres (see :func:`face_slice`); half-way
            between the centres when not given.
        lon_v, lat_v : (y-1, x), optional
            The y-faces between consecutive centres; half-way when not given.
        grid_relative : bool
            True when u and v are the components along the grid's x and y index
            directions (``sea_water_x/y_velocity``): each edge contributes component times
            edge length. False when they are eastward and northward components on a grid
            whose axes follow the parallels and meridians: an x-edge contributes
            ``u dE`` and a y-edge ``v dN``.
        """
        lon_c = np.asarray(lon_c, dtype=np.float64)
        lat_c = np.asarray(lat_c, dtype=np.float64)
        if lon_c.ndim != 2 or lon_c.shape != lat_c.shape or min(lon_c.shape) < 2:
            raise ValueError("lon_c and lat_c must be 2-D arrays of the same shape, "
                             "at least 2 x 2")
        if lon_u is None or lat_u is None:
            lon_u, lat_u = _midpoints(lon_c, lat_c, axis=1)
        if lon_v is None or lat_v is None:
            lon_v, lat_v = _midpoints(lon_c, lat_c, axis=0)
        lon_u, lat_u, lon_v, lat_v = (np.asarray(a, dtype=np.float64)
                                      for a in (lon_u, lat_u, lon_v, lat_v))
        ny, nx = lon_c.shape
        if lon_u.shape != (ny, nx - 1) or lon_v.shape != (ny - 1, nx):
            raise ValueError("face coordinates must be (y, x-1) for u and (y-1, x) for v")
        # The eight points of each corner cell, in order: centre (j, i), x-face (j, i+1/2),
        # centre (j, i+1), y-face (j+1/2, i+1), centre (j+1, i+1), x-face (j+1, i+1/2),
        # centre (j+1, i), y-face (j+1/2, i).
        lo, hi = slice(None, -1), slice(1, None)
        points = [
            (lon_c[lo, lo], lat_c[lo, lo]), (lon_u[lo], lat_u[lo]),
            (lon_c[lo, hi], lat_c[lo, hi]), (lon_v[:, hi], lat_v[:, hi]),
            (lon_c[hi, hi], lat_c[hi, hi]), (lon_u[hi], lat_u[hi]),
            (lon_c[hi, lo], lat_c[hi, lo]), (lon_v[:, lo], lat_v[:, lo]),
        ]
        steps = [_step(*points[k], *points[(k + 1) % 8]) for k in range(8)]
        # Edges in vertex order: x-face low, y-face high, x-face high, y-face low.
        if grid_relative:
            # lengths; the last two edges run against the grid's x and y directions
            size = [np.hypot(de, dn) for de, dn in steps]
            edge = [size[0] + size[1], size[2] + size[3],
                    -(size[4] + size[5]), -(size[6] + size[7])]
        else:
            # signed eastward (x-edges) or northward (y-edges) displacement
            edge = [steps[0][0] + steps[1][0], steps[2][1] + steps[3][1],
                    steps[4][0] + steps[5][0], steps[6][1] + steps[7][1]]
        rel = [np.deg2rad(_wrap_deg(lon - points[0][0])) for lon, _ in points]
        xs = [EARTH_RADIUS_M * r for r in rel]
        ys = [EARTH_RADIUS_M * np.sin(np.deg2rad(lat)) for _, lat in points]
        area = 0.5 * sum(xs[k] * ys[(k + 1) % 8] - xs[(k + 1) % 8] * ys[k] for k in range(8))
        with np.errstate(divide="ignore", invalid="ignore"):
            inv = np.where(area != 0, 1.0 / area, np.nan)
        return cls(w_u_low=edge[0] * inv, w_u_high=edge[2] * inv, w_v_low=edge[3] * inv,
                   w_v_high=edge[1] * inv, area_m2=np.abs(area))


def corner_vorticity(u_faces: np.ndarray, v_faces: np.ndarray, cells: CornerCells) -> np.ndarray:
    r"""Relative vorticity (s-1) at the C-grid corners, by circulation around each corner.

    :math:`\zeta = A^{-1}\oint \mathbf{u}\cdot d\mathbf{l}` over the corner cell (Stokes;
    Vallis 2017 §2.2; the usual C-grid vorticity at psi-points, e.g. Cushman-Roisin &
    Beckers 2011 ch. 5); weights from :class:`CornerCells`.

    Parameters
    ----------
    u_faces : (..., y, x-1)
        x-component on the x-faces between consecutive centres (m s-1), NaN on land.
    v_faces : (..., y-1, x)
        y-component on the y-faces between consecutive centres (m s-1), NaN on land.
    cells : CornerCells
        Geometry of the grid.

    Returns
    -------
    ndarray (..., y-1, x-1)
        NaN at corners with a missing face.
    """
    u = np.asarray(u_faces, dtype=np.float64)
    v = np.asarray(v_faces, dtype=np.float64)
    return (cells.w_u_low * u[..., :-1, :] + cells.w_u_high * u[..., 1:, :]
            + cells.w_v_low * v[..., :, :-1] + cells.w_v_high * v[..., :, 1:])


def native_vorticity(u_faces: np.ndarray, v_faces: np.ndarray, cells: CornerCells) -> np.ndarray:
    """Relative vorticity (s-1) at the cell centres from the C-grid face velocities.

    :func:`corner_vorticity` averaged to the centres: each centre takes the mean of the
    valid corners among its (up to) four, as
    :func:`coastmon.grid.operators.vorticity` does with its dual cells. Corners with a
    land face are left out, so a sea centre by the coast gets the mean of its sea-side
    corners and no value is imposed at the wall (neither the no-slip wall shear nor the
    free-slip zero); a centre with no valid corner is NaN.

    Returns
    -------
    ndarray (..., y, x)
    """
    return _to_points(corner_vorticity(u_faces, v_faces, cells))
