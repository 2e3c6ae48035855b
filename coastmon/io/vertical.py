"""Vertical coordinates: fixed depth levels and CF parametric ocean coordinates.

Heights ``z`` are positive up with 0 at the datum of the file (the geoid or mean sea
level, as the file says), so a depth ``d`` (positive down) is the height ``z = -d``.

The parametric coordinates follow the CF conventions document (version 1.8, Appendix D,
"Parametric Vertical Coordinates"):

* ``ocean_sigma_coordinate``: :math:`z = \\eta + \\sigma(k)\\,(H + \\eta)`;
* ``ocean_s_coordinate_g1``: :math:`z = S + \\eta\\,(1 + S/H)`, with
  :math:`S = h_c\\,s(k) + (H - h_c)\\,C(k)`;
* ``ocean_s_coordinate_g2``: :math:`z = \\eta + (\\eta + H)\\,S`, with
  :math:`S = (h_c\\,s(k) + H\\,C(k)) / (h_c + H)`,

where :math:`\\eta` is the free surface, :math:`H` the positive-down sea-floor depth and
:math:`h_c` the critical depth (``depth_c``). The variables are found through the
``formula_terms`` attribute of the vertical coordinate (``"s: s_rho C: Cs_r eta: zeta
depth: h depth_c: hc"``). Because :math:`\\eta` changes with time, the heights are
evaluated per time chunk, lazily, in the same pass that reads the velocity.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from coastmon.errors import InputError

PARAMETRIC = ("ocean_sigma_coordinate", "ocean_s_coordinate_g1", "ocean_s_coordinate_g2")
"""CF standard names of the parametric ocean coordinates coastmon evaluates."""

_TERMS = {
    "ocean_sigma_coordinate": ("sigma", "eta", "depth"),
    "ocean_s_coordinate_g1": ("s", "C", "eta", "depth", "depth_c"),
    "ocean_s_coordinate_g2": ("s", "C", "eta", "depth", "depth_c"),
}


def parse_formula_terms(text: str) -> dict[str, str]:
    """Split a CF ``formula_terms`` attribute into ``{term: variable name}``.

    >>> parse_formula_terms("s: s_rho C: Cs_r eta: zeta depth: h depth_c: hc")
    {'s': 's_rho', 'C': 'Cs_r', 'eta': 'zeta', 'depth': 'h', 'depth_c': 'hc'}
    """
    tokens = text.replace(":", ": ").split()
    out: dict[str, str] = {}
    for key, value in zip(tokens[::2], tokens[1::2], strict=False):
        out[key.rstrip(":")] = value
    return out


def ocean_sigma_z(sigma, eta, depth):
    r"""Height of ``ocean_sigma_coordinate`` levels (m, positive up).

    :math:`z = \eta + \sigma\,(H + \eta)` (CF conventions 1.8, Appendix D). Works on numpy
    arrays, xarray objects or dask arrays (broadcast by the caller).
    """
    return eta + sigma * (depth + eta)


def ocean_s_coordinate_g1_z(s, c, eta, depth, depth_c):
    r"""Height of ``ocean_s_coordinate_g1`` levels (m, positive up).

    :math:`S = h_c s + (H - h_c) C`, :math:`z = S + \eta (1 + S/H)` (CF conventions 1.8,
    Appendix D).
    """
    stretch = depth_c * s + (depth - depth_c) * c
    return stretch + eta * (1.0 + stretch / depth)


def ocean_s_coordinate_g2_z(s, c, eta, depth, depth_c):
    r"""Height of ``ocean_s_coordinate_g2`` levels (m, positive up).

    :math:`S = (h_c s + H C)/(h_c + H)`, :math:`z = \eta + (\eta + H) S` (CF conventions
    1.8, Appendix D).
    """
    stretch = (depth_c * s + depth * c) / (depth_c + depth)
    return eta + (eta + depth) * stretch


def parametric_height(standard_name: str, terms: dict[str, xr.DataArray]) -> xr.DataArray:
    """Level heights (m, positive up) of a CF parametric ocean coordinate, lazily.

    Parameters
    ----------
    standard_name : str
        One of :data:`PARAMETRIC`.
    terms : dict
        The ``formula_terms`` variables, already on the cell centres and in metres.
    """
    if standard_name == "ocean_sigma_coordinate":
        return ocean_sigma_z(terms["sigma"], terms["eta"], terms["depth"])
    if standard_name == "ocean_s_coordinate_g1":
        return ocean_s_coordinate_g1_z(terms["s"], terms["C"], terms["eta"], terms["depth"],
                                       terms["depth_c"])
    return ocean_s_coordinate_g2_z(terms["s"], terms["C"], terms["eta"], terms["depth"],
                                   terms["depth_c"])


def required_terms(standard_name: str) -> tuple[str, ...]:
    """The ``formula_terms`` keys a parametric coordinate needs."""
    return _TERMS[standard_name]


def interp_columns(values: np.ndarray, z: np.ndarray, z_floor: np.ndarray, target_z: float,
                   method: str) -> np.ndarray:
    """Value at height ``target_z`` in each column (numpy kernel; level axis last).

    Parameters
    ----------
    values, z : (..., K)
        Values and level heights (m, positive up), monotonic along the last axis.
    z_floor : (...)
        Height of the sea floor (``-H``); below it the result is NaN.
    target_z : float
        Height wanted (``-depth_m``).
    method : {"nearest", "linear"}
        Nearest level, or linear interpolation in height between the two levels around
        ``target_z``. Above the top level the top value is used; between the deepest
        level and the floor the deepest value is used.
    """
    values = np.asarray(values, dtype=np.float64)
    z = np.broadcast_to(np.asarray(z, dtype=np.float64), values.shape)
    if z.shape[-1] > 1 and np.nanmean(z[..., 0] - z[..., -1]) > 0:
        values, z = values[..., ::-1], z[..., ::-1]
    n_levels = z.shape[-1]
    if method == "nearest":
        dist = np.where(np.isfinite(z), np.abs(z - target_z), np.inf)
        k = np.argmin(dist, axis=-1)[..., None]
        out = np.take_along_axis(values, k, axis=-1)[..., 0]
    else:
        below = np.sum(z < target_z, axis=-1)
        k1 = np.minimum(np.maximum(below, 1), n_levels - 1)[..., None]
        k0 = np.maximum(k1 - 1, 0)
        z0 = np.take_along_axis(z, k0, axis=-1)[..., 0]
        z1 = np.take_along_axis(z, k1, axis=-1)[..., 0]
        v0 = np.take_along_axis(values, k0, axis=-1)[..., 0]
        v1 = np.take_along_axis(values, k1, axis=-1)[..., 0]
        with np.errstate(invalid="ignore", divide="ignore"):
            w = np.where(z1 != z0, (target_z - z0) / (z1 - z0), 0.0)
        out = v0 + np.clip(w, 0.0, 1.0) * (v1 - v0)
    out = np.where(target_z < np.asarray(z_floor, dtype=np.float64), np.nan, out)
    return out


def select_parametric(da: xr.DataArray, z: xr.DataArray, z_floor: xr.DataArray, zdim: str,
                      depth_m: float, method: str) -> xr.DataArray:
    """Lazily interpolate ``da`` (with level dim ``zdim``) to ``depth_m`` using heights ``z``."""
    da = da.chunk({zdim: -1})
    z = z.chunk({zdim: -1}) if z.chunks is not None else z
    return xr.apply_ufunc(
        interp_columns, da, z, z_floor,
        input_core_dims=[[zdim], [zdim], []],
        kwargs={"target_z": -float(depth_m), "method": method},
        dask="parallelized",
        output_dtypes=[np.float64],
    )


def select_levels(da: xr.DataArray, zdim: str, depths_m: np.ndarray, depth_m: float | None,
                  method: str, where: str) -> xr.DataArray:
    """Pick or interpolate fixed depth levels (``depths_m`` positive down) lazily.

    ``depth_m`` None takes the shallowest level. ``nearest`` takes the closest level;
    ``linear`` weights the two levels around ``depth_m`` as :func:`numpy.interp` does.
    A depth shallower than the top level takes the top level; a depth deeper than the
    deepest level is an :class:`~coastmon.errors.InputError`.
    """
    depths_m = np.asarray(depths_m, dtype=np.float64)
    if depth_m is None:
        return da.isel({zdim: int(np.nanargmin(depths_m))}, drop=True)
    spacing = float(np.max(np.abs(np.diff(depths_m)))) if depths_m.size > 1 else 0.0
    deepest = float(np.nanmax(depths_m))
    if depth_m > deepest + 0.5 * spacing:
        raise InputError(
            f"The depth asked for ({depth_m:g} m) is below the deepest level of the file "
            f"({deepest:g} m)",
            where=where,
            todo="Set ingest.depth_m to a depth within the levels of the file",
        )
    if method == "nearest" or depths_m.size == 1:
        return da.isel({zdim: int(np.argmin(np.abs(depths_m - depth_m)))}, drop=True)
    order = np.argsort(depths_m)
    sorted_d = depths_m[order]
    if depth_m <= sorted_d[0]:
        return da.isel({zdim: int(order[0])}, drop=True)
    if depth_m >= sorted_d[-1]:
        return da.isel({zdim: int(order[-1])}, drop=True)
    j = int(np.searchsorted(sorted_d, depth_m))
    d0, d1 = sorted_d[j - 1], sorted_d[j]
    w = (depth_m - d0) / (d1 - d0)
    lower = da.isel({zdim: int(order[j - 1])}, drop=True)
    upper = da.isel({zdim: int(order[j])}, drop=True)
    return (1.0 - w) * lower + w * upper
