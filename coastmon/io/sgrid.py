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
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import xarray as xr

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
