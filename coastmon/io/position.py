"""Latitudes and longitudes as text: hemisphere letters, never a minus sign.

One place for every printed position (terminal summaries, report tables, figure axes), so
that a west longitude reads ``17.65W`` and a southern latitude ``34.50S`` everywhere.
"""

from __future__ import annotations

import math


def wrap_lon(lon: float) -> float:
    """Longitude in [-180, 180) degrees."""
    return (float(lon) + 180.0) % 360.0 - 180.0


def lat_text(lat: float, spec: str = ".2f", degree: str = "") -> str:
    """``34.50S`` / ``12.00N`` (``spec`` formats the magnitude; ``degree`` goes before the
    letter, e.g. "°"); the equator has no letter; NaN gives "–"."""
    lat = float(lat)
    if not math.isfinite(lat):
        return "–"
    value = format(abs(lat), spec)
    if float(value) == 0.0:
        return f"{value}{degree}"
    return f"{value}{degree}{'S' if lat < 0 else 'N'}"


def lon_text(lon: float, spec: str = ".2f", degree: str = "") -> str:
    """``17.65W`` / ``3.10E`` after wrapping into [-180, 180); 0 and 180 have no letter;
    NaN gives "–"."""
    lon = float(lon)
    if not math.isfinite(lon):
        return "–"
    lon = wrap_lon(lon)
    value = format(abs(lon), spec)
    if float(value) in (0.0, 180.0):
        return f"{value}{degree}"
    return f"{value}{degree}{'W' if lon < 0 else 'E'}"


def position_text(lon: float, lat: float, spec: str = ".2f", degree: str = "") -> str:
    """Latitude then longitude, e.g. ``34.50S 17.65W``."""
    return f"{lat_text(lat, spec, degree)} {lon_text(lon, spec, degree)}"


__all__ = ["lat_text", "lon_text", "position_text", "wrap_lon"]
