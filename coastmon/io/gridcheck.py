"""Do two pieces of data share one grid and one calendar?

One check for every place where data from different files or runs meet: the input files
of one ``analyze`` (before they are joined along time) and new data against a monitoring
state (``update``). Each returns plain-language differences; the caller names the files.
"""

from __future__ import annotations

import numpy as np

COORD_TOLERANCE_DEG = 1.0e-6
"""Coordinates closer than this (degrees, about 0.1 m) count as the same: files written in
single precision by one model agree far closer; a regridded or shifted file differs by a
grid spacing."""


def calendar_of(values: np.ndarray) -> str:
    """The CF calendar of decoded time values (datetime64 → proleptic_gregorian)."""
    values = np.asarray(values)
    if np.issubdtype(values.dtype, np.datetime64) or values.size == 0:
        return "proleptic_gregorian"
    return str(getattr(values.flat[0], "calendar", "standard") or "standard")


def grid_differences(lon: np.ndarray, lat: np.ndarray, lon_ref: np.ndarray,
                     lat_ref: np.ndarray, mask: np.ndarray | None = None,
                     mask_ref: np.ndarray | None = None) -> list[str]:
    """What differs between a grid and a reference grid (empty list: the same grid).

    Longitudes are compared modulo 360 degrees; the masks only when both are given.
    """
    lon, lat = np.asarray(lon, np.float64), np.asarray(lat, np.float64)
    lon_ref, lat_ref = np.asarray(lon_ref, np.float64), np.asarray(lat_ref, np.float64)
    if lon.shape != lon_ref.shape or lat.shape != lat_ref.shape:
        return [f"grid shape {_shape(lon, lat)} instead of {_shape(lon_ref, lat_ref)}"]
    out = []
    dlat = np.abs(lat - lat_ref)
    dlon = np.abs((lon - lon_ref + 180.0) % 360.0 - 180.0)
    for name, diff in (("latitudes", dlat), ("longitudes", dlon)):
        worst = float(np.max(diff)) if diff.size else 0.0
        if worst > COORD_TOLERANCE_DEG:
            out.append(f"other {name} (by up to {worst:.4g} degrees)")
    if not out and mask is not None and mask_ref is not None \
            and not np.array_equal(np.asarray(mask), np.asarray(mask_ref)):
        n = int(np.sum(np.asarray(mask) != np.asarray(mask_ref)))
        out.append(f"another land/sea mask ({n} points differ)")
    return out


def _shape(lon: np.ndarray, lat: np.ndarray) -> tuple[int, ...]:
    if lon.ndim == 1 and lat.ndim == 1:
        return (lat.size, lon.size)
    return tuple(lon.shape)


__all__ = ["COORD_TOLERANCE_DEG", "calendar_of", "grid_differences"]
