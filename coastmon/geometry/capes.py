"""Multi-scale coast curvature and cape detection by curvature scale space.

Curvature scale space (Mokhtarian & Mackworth 1992, IEEE Trans. PAMI 14:789-805): the coast
is smoothed along arclength by Gaussians of increasing width sigma and its signed curvature
followed across scales. Capes are curvature maxima, convex toward the sea, that survive the
smoothing up to a minimum scale.
"""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
from scipy import ndimage
from shapely.geometry import LineString, Point

from coastmon.config import CoastSettings
from coastmon.errors import InputError
from coastmon.geometry.coastline import Coastline, Segment

__all__ = ["CAPE_COLUMNS", "CAPE_ID_STEP_DEG", "apply_catalogue", "cape_tolerance_km",
           "capes_layer", "curvature", "find_capes", "grid_spacing_km", "match_points", "position_code",
           "read_cape_catalogue", "smoothed_derivatives", "stable_ids"]

CAPE_COLUMNS = [
    "cape_id",
    "lon",
    "lat",
    "segment_id",
    "alongshore_km",
    "curvature_per_km",
    "scale_km",
    "protrusion_km",
    "normal_az_deg",
]

_TRUNCATE = 5.0


def _arclength(x: np.ndarray, y: np.ndarray, closed: bool) -> np.ndarray:
    xx = np.append(x, x[0]) if closed else x
    yy = np.append(y, y[0]) if closed else y
    return np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(xx), np.diff(yy)))])


def _gaussian_kernels(sigma: float, radius: int) -> tuple[np.ndarray, ...]:
    """Sampled Gaussian and its first two derivatives (correlation kernels, per sample).

    The derivative kernels are corrected so that their moments are exact for polynomials
    (sum k w1 = 1; sum w2 = 0, sum k^2 w2 / 2 = 1), which a truncated, sampled
    derivative-of-Gaussian does not achieve by itself.
    """
    k = np.arange(-radius, radius + 1, dtype=float)
    g = np.exp(-0.5 * (k / sigma) ** 2)
    g /= g.sum()
    w1 = k / sigma**2 * g
    w1 /= np.sum(k * w1)
    w2 = (k**2 / sigma**2 - 1.0) / sigma**2 * g
    w2 -= g * w2.sum()
    w2 /= 0.5 * np.sum(k**2 * w2)
    return g, w1, w2


def smoothed_derivatives(
    x_km: np.ndarray, y_km: np.ndarray, sigma_km: float, closed: bool
) -> tuple[np.ndarray, ...]:
    """Gaussian-smoothed position and its first two derivatives along a uniform polyline.

    Parameters
    ----------
    x_km, y_km : numpy.ndarray
        Vertices at uniform arclength spacing (km); a closed ring does not repeat its first
        vertex.
    sigma_km : float
        Standard deviation of the Gaussian along arclength (km).
    closed : bool
        Periodic extension for rings; for open lines the ends are extended by point
        reflection (x(-s) = 2 x(0) - x(s)), which continues a straight end straight and adds
        no curvature there.

    Returns
    -------
    xs, ys, dx, dy, ddx, ddy : numpy.ndarray
        Smoothed position (km) and derivatives per vertex step (km per step, km per step^2),
        computed by convolution with the Gaussian and its derivatives.
    """
    x = np.asarray(x_km, float)
    y = np.asarray(y_km, float)
    n = x.size
    s = _arclength(x, y, closed)
    step = s[-1] / (n if closed else n - 1)
    sigma = max(sigma_km / step, 1e-6)
    pad = int(_TRUNCATE * sigma) + 2
    if closed:
        xp = np.pad(x, pad, mode="wrap")
        yp = np.pad(y, pad, mode="wrap")
    else:
        xp = np.pad(x, pad, mode="reflect", reflect_type="odd")
        yp = np.pad(y, pad, mode="reflect", reflect_type="odd")
    kernels = _gaussian_kernels(sigma, pad - 1)
    out = []
    for arr in (xp, yp):
        for kernel in kernels:
            filt = ndimage.correlate1d(arr, kernel, mode="nearest")
            out.append(filt[pad:pad + n])
    xs, dx, ddx, ys, dy, ddy = out
    return xs, ys, dx, dy, ddx, ddy


def curvature(x_km: np.ndarray, y_km: np.ndarray, sigma_km: float, closed: bool) -> np.ndarray:
    r"""Signed curvature (1/km) of a polyline smoothed along arclength by a Gaussian.

    .. math:: \kappa = \frac{x' y'' - y' x''}{(x'^2 + y'^2)^{3/2}}

    with derivatives of the Gaussian-smoothed coordinates (derivative-of-Gaussian filters),
    as in curvature scale space (Mokhtarian & Mackworth 1992). The formula is independent
    of the parametrisation (do Carmo 1976, Differential Geometry of Curves and Surfaces,
    sec. 1-5).

    Parameters
    ----------
    x_km, y_km : numpy.ndarray
        Polyline vertices (km). Non-uniform spacing is resampled to uniform arclength
        internally and the result interpolated back to the given vertices.
    sigma_km : float
        Gaussian standard deviation along arclength (km).
    closed : bool
        Whether the polyline is a ring (first vertex not repeated).

    Returns
    -------
    numpy.ndarray
        Curvature at each vertex (1/km): positive where the curve turns left. For a coast
        oriented with the sea on the right (see ``extract_coastline``) that is convex toward
        the sea, i.e. a cape.

    Notes
    -----
    Smoothing shrinks curves: a circle of radius R smoothed with sigma becomes a circle of
    radius R exp(-sigma^2 / (2 R^2)) (Mokhtarian & Mackworth 1992), so kappa slightly
    exceeds 1/R unless sigma << R.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
    >>> k = curvature(100 * np.cos(t), 100 * np.sin(t), 5.0, closed=True)
    >>> round(float(k.mean()), 4)
    0.01
    """
    x = np.asarray(x_km, float)
    y = np.asarray(y_km, float)
    if x.shape != y.shape or x.ndim != 1 or x.size < 3:
        raise ValueError("x_km and y_km must be 1-D arrays of equal length >= 3")
    s = _arclength(x, y, closed)
    n = x.size
    gaps = np.diff(s)
    uniform = np.ptp(gaps) <= 1e-3 * gaps.mean()
    if uniform:
        xs, ys, dx, dy, ddx, ddy = smoothed_derivatives(x, y, sigma_km, closed)
        return (dx * ddy - dy * ddx) / np.power(dx * dx + dy * dy, 1.5)
    length = s[-1]
    m = max(n, 8)
    su = np.arange(m) * (length / m) if closed else np.linspace(0.0, length, m)
    xx = np.append(x, x[0]) if closed else x
    yy = np.append(y, y[0]) if closed else y
    xu, yu = np.interp(su, s, xx), np.interp(su, s, yy)
    ku = curvature(xu, yu, sigma_km, closed)
    if closed:
        return np.interp(s[:n], np.append(su, length), np.append(ku, ku[0]))
    return np.interp(s, su, ku)


def _local_maxima(kappa: np.ndarray, closed: bool) -> np.ndarray:
    """Indices of strict local maxima of positive curvature (plateaus give their first index)."""
    if closed:
        left = np.roll(kappa, 1)
        right = np.roll(kappa, -1)
        idx = np.flatnonzero((kappa > left) & (kappa >= right) & (kappa > 0))
    else:
        inner = kappa[1:-1]
        idx = 1 + np.flatnonzero((inner > kappa[:-2]) & (inner >= kappa[2:]) & (inner > 0))
    return idx


def _distance_along(a: np.ndarray, b: np.ndarray, length: float, closed: bool) -> np.ndarray:
    d = np.abs(a - b)
    return np.minimum(d, length - d) if closed else d


def _track_segment(seg: Segment, settings: CoastSettings) -> list[dict]:
    """Curvature-scale-space chains of one segment that pass the persistence test."""
    scales = [float(s) for s in settings.scales_km]
    x, y, closed = seg.x_km, seg.y_km, seg.closed
    s = seg.alongshore_km
    length = seg.length_km
    kappas = []
    for sigma in scales:
        _, _, dx, dy, ddx, ddy = smoothed_derivatives(x, y, sigma, closed)
        kappas.append((dx * ddy - dy * ddx) / np.power(dx * dx + dy * dy, 1.5))

    # Finest scale: maxima that stand out from their surroundings. A bump of height h seen
    # at scale sigma has a curvature of order h / sigma^2; texture of the traced grid steps
    # stays well below a tenth of min_protrusion / sigma^2. A relative prominence of at least
    # half the peak curvature rejects the slow ripples of a uniformly convex shore (a round
    # island) while a cape between bays (negative curvature) easily passes.
    kappa0 = kappas[0]
    peaks = _local_maxima(kappa0, closed)
    if peaks.size:
        from scipy.signal import peak_prominences  # a second to import; only capes need it

        prom = peak_prominences(
            np.concatenate([kappa0, kappa0, kappa0]) if closed else kappa0,
            peaks + (kappa0.size if closed else 0),
        )[0]
        floor = 0.1 * settings.min_protrusion_km / scales[0] ** 2
        keep = (prom >= floor) & (prom >= 0.5 * kappa0[peaks])
        if closed:
            # On a ring the mean curvature is 2 pi / L; a cape must be at least twice as
            # sharp, or it is only the roundness of the island.
            keep &= kappa0[peaks] >= 2.0 * (2.0 * np.pi / length)
        peaks = peaks[keep]
    if not closed:
        edge = scales[0]
        peaks = peaks[(s[peaks] >= edge) & (s[peaks] <= length - edge)]

    chains = [{"start": int(p), "pos": int(p), "last": 0} for p in peaks]
    active = list(range(len(chains)))
    for k in range(1, len(scales)):
        cand = _local_maxima(kappas[k], closed)
        claims: dict[int, list[int]] = {}
        for c in active:
            if cand.size == 0:
                continue
            d = _distance_along(s[cand], s[chains[c]["pos"]], length, closed)
            best = int(np.argmin(d))
            if d[best] <= scales[k]:
                claims.setdefault(int(cand[best]), []).append(c)
        next_active = []
        for target, owners in claims.items():
            winner = max(owners, key=lambda c: kappas[k - 1][chains[c]["pos"]])
            chains[winner]["pos"] = target
            chains[winner]["last"] = k
            next_active.append(winner)
        active = next_active
    return [
        {"index": ch["start"], "scale_km": scales[ch["last"]], "kappa": float(kappa0[ch["start"]])}
        for ch in chains
        if scales[ch["last"]] >= settings.min_scale_km
    ]


def _protrusion(seg: Segment, index: int, baseline: tuple[np.ndarray, np.ndarray]) -> float:
    """Signed distance (km) from a coast vertex to the baseline polyline, + on the sea side."""
    bx, by = baseline
    if seg.closed:
        bx, by = np.append(bx, bx[0]), np.append(by, by[0])
    line = LineString(np.column_stack([bx, by]))
    p = Point(seg.x_km[index], seg.y_km[index])
    dist = line.distance(p)
    along = line.project(p)
    eps = min(0.5, 0.25 * line.length)
    a = line.interpolate(max(along - eps, 0.0))
    b = line.interpolate(min(along + eps, line.length))
    tx, ty = b.x - a.x, b.y - a.y
    foot = line.interpolate(along)
    side = (p.x - foot.x) * ty - (p.y - foot.y) * tx
    return float(dist if side >= 0 else -dist)


def find_capes(coastline: Coastline, settings: CoastSettings) -> pd.DataFrame:
    """Capes of a coastline by curvature scale space (Mokhtarian & Mackworth 1992).

    Parameters
    ----------
    coastline : Coastline
        From ``extract_coastline`` (sea on the right of every segment).
    settings : CoastSettings
        ``scales_km`` (increasing Gaussian sigmas), ``min_scale_km``, ``min_protrusion_km``.

    Returns
    -------
    pandas.DataFrame
        One row per cape, columns ``cape_id`` (position code of the tip, e.g.
        ``C34.4N036.9W``, see :func:`stable_ids`), ``lon``, ``lat`` (degrees),
        ``segment_id``, ``alongshore_km``, ``curvature_per_km`` (at the finest scale),
        ``scale_km`` (largest scale at which the cape persists), ``protrusion_km`` (seaward
        distance from the baseline), ``normal_az_deg`` (offshore normal, degrees clockwise
        from north), ordered by segment and along-shore position.

    Notes
    -----
    1. Curvature kappa(s; sigma) at every sigma in ``scales_km`` (see ``curvature``).
    2. At the finest scale, candidates are local maxima with kappa > 0 (convex toward the
       sea) whose peak prominence (``scipy.signal.peak_prominences``) is at least
       0.1 * min_protrusion_km / sigma_1^2 and at least half the peak curvature; on a
       ring of length L the peak curvature must be at least twice the mean 2 pi / L (the
       broad back of an island is not a cape, its tips are); on open
       segments maxima within sigma_1 of an end (the domain edge) are ignored.
    3. Each candidate is followed to the next scale by moving to the nearest curvature
       maximum within sigma_k along the coast; when several candidates reach the same
       maximum the one with the larger curvature at the previous scale continues. The
       cape's scale is the largest sigma reached; it must be >= ``min_scale_km``.
    4. Baseline = the coast smoothed at the largest scale; protrusion = the distance from
       the cape vertex (on the unsmoothed, resampled coast) to the baseline, positive on
       the sea side; it must be >= ``min_protrusion_km``.
    The position is the finest-scale maximum.
    """
    geod = pyproj.Geod(ellps="WGS84")
    rows = []
    for seg in coastline.segments:
        if seg.x_km.size < 5:
            continue
        found = _track_segment(seg, settings)
        if not found:
            continue
        bx, by, *_ = smoothed_derivatives(seg.x_km, seg.y_km, settings.scales_km[-1], seg.closed)
        _, _, dx, dy, _, _ = smoothed_derivatives(
            seg.x_km, seg.y_km, settings.scales_km[0], seg.closed
        )
        for item in found:
            i = item["index"]
            protrusion = _protrusion(seg, i, (bx, by))
            if protrusion < settings.min_protrusion_km:
                continue
            norm = np.hypot(dx[i], dy[i])
            nx_, ny_ = dy[i] / norm, -dx[i] / norm
            lon_n, lat_n = coastline.to_lonlat(seg.x_km[i] + nx_, seg.y_km[i] + ny_)
            az, _, _ = geod.inv(seg.lon[i], seg.lat[i], float(lon_n), float(lat_n))
            rows.append(
                {
                    "lon": float(seg.lon[i]),
                    "lat": float(seg.lat[i]),
                    "segment_id": seg.segment_id,
                    "alongshore_km": float(seg.alongshore_km[i]),
                    "curvature_per_km": item["kappa"],
                    "scale_km": item["scale_km"],
                    "protrusion_km": protrusion,
                    "normal_az_deg": float(np.mod(az, 360.0)),
                }
            )
    table = pd.DataFrame(rows, columns=CAPE_COLUMNS[1:])
    table = table.sort_values(["segment_id", "alongshore_km"]).reset_index(drop=True)
    table.insert(0, "cape_id", stable_ids(table["lon"].to_numpy(float),
                                          table["lat"].to_numpy(float)))
    return table


def capes_layer(capes: pd.DataFrame) -> gpd.GeoDataFrame:
    """The ``capes`` GIS layer: one Point per cape (EPSG:4326), all columns of ``capes``."""
    geometry = gpd.points_from_xy(capes["lon"], capes["lat"])
    return gpd.GeoDataFrame(capes.copy(), geometry=geometry, crs="EPSG:4326")


# --------------------------------------------------------------------------- cape identity
CAPE_ID_STEP_DEG = 0.1
"""Rounding step (degrees of latitude and longitude) of the position code of a cape."""
CAPE_SCALE_FRACTION = 0.5
"""Cape matching tolerance: this fraction of the cape's ``scale_km`` ..."""
GRID_CELLS = 2.0
"""... or this many grid spacings, whichever is larger, ..."""
MAX_DEFORMATION_RADII = 2.0
"""... but never more than this many first baroclinic deformation radii."""


def position_code(lon: float, lat: float, prefix: str = "C",
                  step_deg: float = CAPE_ID_STEP_DEG) -> str:
    """Label of a point from its position rounded to ``step_deg``: ``C34.4N036.9W``.

    Latitude and longitude (the latter first brought to [-180, 180)) are each rounded to
    the nearest multiple of ``step_deg``, halves away from zero, and written with one
    decimal, hemisphere letters after the number (``N``/``S``, ``E``/``W``; zero is ``N`` or
    ``E``), latitude with two and longitude with three integer digits.

    Examples
    --------
    >>> position_code(-36.96, 34.43)
    'C34.4N037.0W'
    >>> position_code(18.47, -34.36)
    'C34.4S018.5E'
    """
    lon = (float(lon) + 180.0) % 360.0 - 180.0

    def steps(value: float) -> int:
        k = abs(value) / step_deg
        return int(np.floor(round(k, 6) + 0.5)) * (1 if value >= 0 else -1)

    klat, klon = steps(float(lat)), steps(lon)
    if klon * step_deg >= 180.0 - 1e-9:
        klon = -klon
    ns, ew = ("N" if klat >= 0 else "S"), ("E" if klon >= 0 else "W")
    return (f"{prefix}{abs(klat) * step_deg:04.1f}{ns}"
            f"{abs(klon) * step_deg:05.1f}{ew}")


def stable_ids(lon: np.ndarray, lat: np.ndarray, prefix: str = "C") -> list[str]:
    """Position codes (:func:`position_code`) of points, made unique in the given order.

    Two points with the same code (closer than about ``CAPE_ID_STEP_DEG``) keep it for the
    first and get ``-2``, ``-3``, ... for the following ones.
    """
    ids: list[str] = []
    seen: dict[str, int] = {}
    for x, y in zip(np.asarray(lon, float), np.asarray(lat, float), strict=True):
        code = position_code(x, y, prefix)
        seen[code] = seen.get(code, 0) + 1
        ids.append(code if seen[code] == 1 else f"{code}-{seen[code]}")
    return ids


def cape_tolerance_km(scale_km: np.ndarray | float, grid_km: float, ld_km: float
                      ) -> np.ndarray:
    r"""Farthest apart (km) two cape tips may be and still be the same headland.

    .. math:: d_{max} = \min\left(\max(0.5\,L_{cape},\ 2\,\Delta),\ 2\,L_d\right)

    with :math:`L_{cape}` the cape's curvature-scale-space scale (``scale_km``: the tip of
    a broad headland is poorly defined over about half its scale), :math:`\Delta` the grid
    spacing (the traced coast, and so the tip, moves by up to a grid cell between
    resolutions) and :math:`L_d` the first baroclinic deformation radius (two eddy sources
    are at least :math:`2 L_d` apart, so a wider tolerance could join different ones).
    Common practice, no source; the numbers are stated in docs/comparing-runs.md.
    """
    scale = np.asarray(scale_km, dtype=float)
    scale = np.where(np.isfinite(scale), scale, 0.0)
    wide = np.maximum(CAPE_SCALE_FRACTION * scale, GRID_CELLS * float(grid_km))
    return np.minimum(wide, MAX_DEFORMATION_RADII * float(ld_km))


def match_points(lon_a: np.ndarray, lat_a: np.ndarray, lon_b: np.ndarray, lat_b: np.ndarray,
                 tolerance_km: np.ndarray | float) -> list[tuple[int, int, float]]:
    """One-to-one pairs ``(i_a, i_b, distance_km)`` of points within a tolerance.

    ``tolerance_km`` is a scalar or an ``(len(a), len(b))`` array. Among all pairings the
    one with the smallest summed great-circle distance over pairs inside the tolerance is
    chosen (linear sum assignment, :func:`scipy.optimize.linear_sum_assignment`); pairs
    beyond the tolerance are never made.
    """
    from scipy.optimize import linear_sum_assignment

    from coastmon.grid.metrics import haversine_m

    lon_a, lat_a = np.asarray(lon_a, float), np.asarray(lat_a, float)
    lon_b, lat_b = np.asarray(lon_b, float), np.asarray(lat_b, float)
    if lon_a.size == 0 or lon_b.size == 0:
        return []
    d = haversine_m(lon_a[:, None], lat_a[:, None], lon_b[None, :], lat_b[None, :]) / 1000.0
    tol = np.broadcast_to(np.asarray(tolerance_km, float), d.shape)
    inside = np.isfinite(d) & (d <= tol)
    cost = np.where(inside, d, 1.0e6 * (float(np.nanmax(np.where(inside, d, 0.0))) + 1.0))
    rows, cols = linear_sum_assignment(cost)
    pairs = [(int(i), int(j), float(d[i, j])) for i, j in zip(rows, cols, strict=True)
             if inside[i, j]]
    return sorted(pairs)


def grid_spacing_km(lon: np.ndarray, lat: np.ndarray) -> float:
    """Median grid spacing (km) of a 2-D ``(y, x)`` grid: sqrt(dx dy), great-circle steps."""
    from coastmon.grid.metrics import haversine_m

    lon, lat = np.asarray(lon, float), np.asarray(lat, float)
    if lon.ndim != 2 or min(lon.shape) < 2:
        return float("nan")
    dx = haversine_m(lon[:, :-1], lat[:, :-1], lon[:, 1:], lat[:, 1:])[:-1, :]
    dy = haversine_m(lon[:-1, :], lat[:-1, :], lon[1:, :], lat[1:, :])[:, :-1]
    return float(np.nanmedian(np.sqrt(dx * dy))) / 1000.0


def read_cape_catalogue(path: str | Path) -> pd.DataFrame:
    """Read a cape catalogue: a CSV with columns ``id`` (or ``cape_id``), ``lon``, ``lat``.

    A ``capes.csv`` written by ``coastmon analyze`` or ``coastmon coast`` is a valid
    catalogue, so the capes of a reference run can name the capes of every other run.

    Raises
    ------
    coastmon.errors.InputError
        The file cannot be read, lacks a column, has repeated or empty ids or positions
        that are not numbers in range.
    """
    path = Path(path)
    todo = ("Give a CSV file with one row per cape and the columns id, lon, lat "
            "(degrees east, degrees north); a capes.csv of an earlier run works")
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"The cape catalogue cannot be read ({exc})", where=str(path),
                         todo=todo) from None
    id_col = "id" if "id" in table.columns else "cape_id" if "cape_id" in table.columns else None
    missing = [c for c in ("lon", "lat") if c not in table.columns]
    if id_col is None or missing:
        raise InputError("The cape catalogue lacks the column(s) "
                         + ", ".join(([] if id_col else ["id"]) + missing),
                         where=str(path), todo=todo)
    ids = table[id_col].str.strip()
    lon = pd.to_numeric(table["lon"], errors="coerce").to_numpy(float)
    lat = pd.to_numeric(table["lat"], errors="coerce").to_numpy(float)
    bad = [i + 2 for i in range(len(table))
           if not ids.iloc[i] or not np.isfinite(lon[i]) or not np.isfinite(lat[i])
           or abs(lat[i]) > 90.0 or abs(lon[i]) > 360.0]
    if bad:
        raise InputError(f"The cape catalogue has an empty id or a position that is not a "
                         f"number in range on line(s) {', '.join(map(str, bad[:5]))}",
                         where=str(path), todo=todo)
    repeated = sorted(set(ids[ids.duplicated()]))
    if repeated:
        raise InputError(f"The cape catalogue repeats the id(s) {', '.join(repeated[:5])}",
                         where=str(path), todo="Give every cape its own id")
    return pd.DataFrame({"cape_id": ids.to_numpy(), "lon": lon, "lat": lat})


def apply_catalogue(capes: pd.DataFrame, catalogue: pd.DataFrame, grid_km: float,
                    ld_km: float) -> pd.DataFrame:
    """Capes renamed after the nearest catalogue cape within :func:`cape_tolerance_km`.

    Matching is one to one (:func:`match_points`) with each cape's own tolerance. A cape
    with no catalogue cape close enough keeps its position code; if that code is already
    a catalogue id of a matched cape, a ``-2`` (``-3``, ...) is added.
    """
    out = capes.copy()
    if len(out) == 0 or len(catalogue) == 0:
        return out
    tol = cape_tolerance_km(out["scale_km"].to_numpy(float), grid_km, ld_km)
    pairs = match_points(out["lon"], out["lat"], catalogue["lon"], catalogue["lat"],
                         tol[:, None])
    ids = list(out["cape_id"].astype(str))
    taken = set()
    for i, j, _ in pairs:
        ids[i] = str(catalogue["cape_id"].iloc[j])
        taken.add(ids[i])
    named = {i for i, _, _ in pairs}
    for i in range(len(ids)):
        if i in named:
            continue
        code, k = ids[i], 2
        while ids[i] in taken:
            ids[i] = f"{code}-{k}"
            k += 1
        taken.add(ids[i])
    out["cape_id"] = ids
    return out
