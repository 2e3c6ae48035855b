"""Vorticity sources along the coast: localized, recurrent near-shore eddy activity.

Works on the small along-shore time series from the streaming pass (``series``), never on
the gridded record.

Method
------
1. *Near-shore eddy activity.* At every station, the vorticity anomaly (about its own time
   mean) averaged over the cross-shore points within ``nearshore_km`` of the coast, and
   its eddy-band (``eddy_period_days``) scale-averaged Morlet wavelet power (Torrence &
   Compo 1998, eq. 24): its time mean is the station's eddy-band variance, its means over
   consecutive windows of one longest eddy period the band variance of each window.
2. *Local background.* A source stands out from the coast on *both* sides. The local
   background of a station is the larger of two medians: that of the stations between
   ``2 L_d`` and ``8 L_d`` along the coast on one side, and the same on the other side.
   A station needs at least a third of both rings on the coast to be assessed, so a
   station within about ``4 L_d`` of the end of a segment (an open domain edge) is never
   tested and coast ends do not make sources by themselves; neither does a step between a
   quiet and a noisier stretch (the noisier side's median is the background at the step).
3. *Recurrent excess (the test).* The record is cut into consecutive windows of one
   longest eddy period (``eddy_period_days[1]``). In each window the statistic is the log
   of the station's band variance over the window's local background. Under the null of
   a homogeneous coast the larger of two ring medians is at least the typical level, so
   the windows' mean log ratio is at most zero; a station where the coast sheds eddies
   again and again has a mean well above zero. The test is one-sided on that mean with
   standard error ``s / sqrt(n')``: ``s`` the larger of the station's own spread of the
   window values and the coast's median spread (stable where nothing happens; a burst
   keeps its own, larger spread), ``n' = n (1 - rho)/(1 + rho)`` the effective number
   of windows (von Storch & Zwiers 1999, §6.6) with ``rho`` the coast's median lag-1
   autocorrelation between windows, bias-corrected (Marriott & Pope 1954). The p-values
   of all stations are controlled with the false-discovery rate of Benjamini & Hochberg
   (1995) at ``q = 1 - significance``; on a coast with no source (every null true) this
   is the chance that any station is called localized. Positive along-shore correlation
   of the p-values keeps the procedure valid (Benjamini & Yekutieli 2001). A stretch that
   is only noisier everywhere is not above its local background; one burst makes one
   large window value and a large spread, not a recurrent excess.
4. *Persistence* is the fraction of windows in which the station is above its local
   background (at most 1/2 on average under the null); ``recurrence_p`` is the binomial
   upper tail of that count at 1/2, for reading.
5. *Sources* are the local maxima of the record's band-variance ratio among stations that
   pass the test (``localized``) and are at least ``min_persistence`` persistent; maxima
   closer than ``2 L_d`` merge into the stronger.
6. *Attribution along the current.* The direction of the mean along-shore flow comes from
   the record's own near-shore mean velocity around the maximum (taken only when it
   differs from zero by more than twice its standard error, with the effective sample
   size of a lag-1 autoregressive series, von Storch & Zwiers 1999 §6.6). A maximum is
   tied to the nearest cape that lies within ``max_cape_distance_km`` on either side or
   upstream within the reach ``R = clip(|V| P / 2, 2 L_d, 8 L_d)``: the distance the mean
   current ``V`` carries a growing eddy during half a shedding period ``P`` (one eddy
   forms per period and separates at its end), bounded below by the merging distance and
   above by the width of the background ring. The maxima one cape feeds are reported as
   one cape-level source (``members_km``); maxima with no cape within reach stay
   unanchored and ``attribution`` says why.
"""

from __future__ import annotations

import math
import os
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
import scipy.special
import xarray as xr

from coastmon.config import Settings
from coastmon.io.pages import SWEEP_BLOCK_BYTES, release
from coastmon.signals.wavelets import band_power, padded_length

WAVELET_BUDGET_BYTES = SWEEP_BLOCK_BYTES
"""Memory for the arrays of one group of stations transformed at once (one scale at a
time; each thread transforms its own group). Within the C library's largest heap block:
larger new arrays are fresh memory from the system every time: on the long record of
``docs/performance.md`` the near-shore test's transforms took 0.42–0.49 s with 64 MB
groups, 0.35–0.38 s with 16 MB groups."""
ANOMALY_BUDGET_BYTES = SWEEP_BLOCK_BYTES
"""Memory for the float64 copies of the near-shore section of a block of stations (held
small for the same reason: 64 MB blocks took 0.19–0.21 s for three fields on the long
record, 16 MB blocks 0.11)."""
WAVELET_THREADS = 4
"""Most threads transforming groups of stations at once (one per core up to this)."""

RING_GAP_LD = 2.0
"""Inner edge of the background rings, in deformation radii (the merging distance)."""
RING_OUTER_LD = 8.0
"""Outer edge of the background rings, in deformation radii."""
RING_MIN_COVER = 1.0 / 3.0
"""Smallest share of a ring that must lie on the coast for a station to be assessed."""
MIN_WINDOWS = 3
"""Fewest assessed windows for a station to be tested."""


def time_step_days(series: xr.Dataset) -> float:
    """Sampling interval of the series in days (from the ``time_days`` coordinate)."""
    t = np.asarray(series["time_days"].values, dtype=float)
    if t.size < 2:
        return 1.0
    return float(np.median(np.diff(t)))


def nearshore_anomaly(section: np.ndarray, offsets_km: np.ndarray, nearshore_km: float) -> np.ndarray:
    """Time anomaly of a section field averaged over the near-shore offsets.

    Parameters
    ----------
    section : (time, station, offset)
    offsets_km : (offset,)
    nearshore_km : float

    Returns
    -------
    (time, station) anomaly about each station's time mean; NaN where never valid.
    """
    near = _nearshore_offsets(offsets_km, nearshore_km)
    out = np.empty(section.shape[:2])
    for cols, sub in _station_blocks(section, near):
        out[:, cols] = _by_gaps(sub, _mean_anomaly, _nan_mean_anomaly)
    return out


def _mean_anomaly(sub: np.ndarray) -> np.ndarray:
    """Mean over the offsets of the anomaly about each point's time mean, of a (time,
    station, offset) block."""
    return (sub - sub.mean(axis=0, keepdims=True)).mean(axis=2)


def _nan_mean_anomaly(sub: np.ndarray) -> np.ndarray:
    """:func:`_mean_anomaly` leaving NaN out (NaN where a station is never valid)."""
    return np.nanmean(sub - np.nanmean(sub, axis=0, keepdims=True), axis=2)


def _offset_mean(sub: np.ndarray) -> np.ndarray:
    """Mean over the offsets of a (time, station, offset) block."""
    return sub.mean(axis=2)


def _nan_offset_mean(sub: np.ndarray) -> np.ndarray:
    """:func:`_offset_mean` leaving NaN out."""
    return np.nanmean(sub, axis=2)


def _by_gaps(sub: np.ndarray, plain, careful) -> np.ndarray:
    """``plain`` of the stations of a (time, station, offset) block that have no NaN,
    ``careful`` (its NaN-aware form) of the others, as one (time, station) array.

    Without NaN both give the same numbers (``numpy.nanmean`` divides the same sums by
    the same counts), and the plain means skip ``nanmean``'s copies and masks: seven
    times faster on the long benchmark record.
    """
    full = np.isfinite(sub).all(axis=(0, 2))
    if full.all():
        return plain(sub)
    out = np.empty(sub.shape[:2])
    out[:, full] = plain(sub[:, full])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns stay NaN
        out[:, ~full] = careful(sub[:, ~full])
    return out


def _nearshore_offsets(offsets_km, nearshore_km: float) -> np.ndarray:
    """Which section offsets are near shore (within ``nearshore_km``; the first if none)."""
    near = np.asarray(offsets_km) <= nearshore_km
    if not near.any():
        near = np.zeros_like(near)
        near[0] = True
    return near


def _station_blocks(section, near: np.ndarray):
    """The near-shore offsets of a (time, station, offset) series, float64, a block of
    stations at a time: yields ``(slice of stations, (time, block, near) array)``.

    The files are station-major, so a block maps only its stations' pages, released after
    each; the float64 copies stay within :data:`ANOMALY_BUDGET_BYTES` however long the
    record.
    """
    n_t, n_station = section.shape[:2]
    block = max(1, ANOMALY_BUDGET_BYTES // (16 * n_t * int(near.sum())))
    for s0 in range(0, n_station, block):
        sub = np.asarray(section[:, s0:s0 + block][:, :, near], dtype=np.float64)
        release(section)
        yield slice(s0, s0 + block), sub


def _fill_gaps(x: np.ndarray) -> np.ndarray:
    """Replace NaN in (station, time) series by 0 (the anomaly mean) for the transforms."""
    return np.where(np.isfinite(x), x, 0.0)


# --------------------------------------------------------------------------- statistics
def normal_sf(z: np.ndarray) -> np.ndarray:
    r"""Upper tail :math:`P(Z > z)` of the standard normal distribution
    (``scipy.special.ndtr(-z)``, the function ``scipy.stats.norm.sf`` uses)."""
    return scipy.special.ndtr(-np.asarray(z, dtype=float))


def benjamini_hochberg(p: np.ndarray, q: float) -> tuple[np.ndarray, np.ndarray]:
    r"""False-discovery-rate control over many tests (Benjamini & Hochberg 1995).

    With the m finite p-values sorted, :math:`p_{(1)} \le \dots \le p_{(m)}`, reject the
    k smallest where k is the largest i with :math:`p_{(i)} \le i q / m`. Returns the
    rejections (False for NaN) and the adjusted p-values
    :math:`\min_{j \ge i} \min(1, m p_{(j)} / j)` (NaN for NaN).
    """
    p = np.asarray(p, dtype=float)
    out_q = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p.ravel()))
    m = ok.size
    if m == 0:
        return np.zeros(p.shape, bool), out_q
    vals = p.ravel()[ok]
    order = np.argsort(vals, kind="stable")
    ranked = vals[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum(np.minimum.accumulate(ranked[::-1])[::-1], 1.0)
    flat_q = out_q.ravel()
    flat_q[ok[order]] = adjusted
    out_q = flat_q.reshape(p.shape)
    return np.where(np.isfinite(out_q), out_q <= q, False), out_q


def binomial_sf(k: np.ndarray, n: np.ndarray, p: float) -> np.ndarray:
    r"""Upper tail :math:`P(X \ge k)` of Binomial(n, p), summed term by term; NaN stays NaN."""
    k = np.asarray(k, dtype=float)
    n = np.broadcast_to(np.asarray(n, dtype=float), k.shape)
    out = np.full(k.shape, np.nan)
    for idx in np.ndindex(k.shape):
        if not (np.isfinite(k[idx]) and np.isfinite(n[idx])):
            continue
        ki, ni = int(k[idx]), int(n[idx])
        out[idx] = sum(math.comb(ni, j) * p**j * (1.0 - p) ** (ni - j)
                       for j in range(max(ki, 0), ni + 1))
    return out


def _nanquantile_last(a: np.ndarray, q: float) -> np.ndarray:
    """Quantile ``q`` over the last axis ignoring NaN, linear between order statistics
    (numpy's default), by one sort; NaN where no value is finite."""
    a = np.sort(a, axis=-1)  # NaN sort last
    n = np.isfinite(a).sum(axis=-1, keepdims=True)
    pos = q * np.clip(n - 1, 0, None)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, np.clip(n - 1, 0, None))
    frac = pos - lo
    a_lo = np.take_along_axis(a, lo, axis=-1)
    a_hi = np.take_along_axis(a, hi, axis=-1)
    return np.where(n > 0, a_lo + frac * (a_hi - a_lo), np.nan)[..., 0]


def local_background(values: np.ndarray, s_km: np.ndarray, segment_id: np.ndarray,
                     ld_km: float) -> np.ndarray:
    """Local background of an along-shore profile: the larger of the medians of the two
    rings of stations between ``RING_GAP_LD`` and ``RING_OUTER_LD`` deformation radii on
    either side along the same segment.

    Parameters
    ----------
    values : (..., station) profiles (e.g. band variance of each time window)
    s_km, segment_id : (station,) along-shore distance and coast segment
    ld_km : deformation radius (km)

    Returns
    -------
    (..., station) background; NaN where either ring has less than ``RING_MIN_COVER`` of
    its length on the coast (near the ends of a segment, on small islands).
    """
    values = np.asarray(values, dtype=float)
    out = np.full(values.shape, np.nan)
    gap, outer = RING_GAP_LD * ld_km, RING_OUTER_LD * ld_km
    for seg in np.unique(segment_id):
        idx = np.flatnonzero(segment_id == seg)
        idx = idx[np.argsort(s_km[idx], kind="stable")]
        s = s_km[idx]
        if idx.size < 3:
            continue
        spacing = float(np.median(np.diff(s)))
        if spacing <= 0:
            continue
        need = max(1, int(math.ceil(RING_MIN_COVER * (outer - gap) / spacing)))
        block = values[..., idx]
        for i in range(idx.size):
            left = block[..., (s >= s[i] - outer) & (s <= s[i] - gap)]
            right = block[..., (s >= s[i] + gap) & (s <= s[i] + outer)]
            if (left.shape[-1] < need or right.shape[-1] < need
                    or np.isfinite(left).sum(axis=-1).min() < need
                    or np.isfinite(right).sum(axis=-1).min() < need):
                continue
            out[..., idx[i]] = np.maximum(_nanquantile_last(left, 0.5),
                                          _nanquantile_last(right, 0.5))
    return out


def series_per_group(n_time: int, budget_bytes: int | None = None) -> int:
    """How many series of ``n_time`` steps :func:`coastmon.signals.band_power` transforms at
    once within ``budget_bytes`` (default ``WAVELET_BUDGET_BYTES``): it holds one scale's
    arrays at a time (the series' transform, one scale's product, coefficients and power),
    64 bytes per padded step and series."""
    if budget_bytes is None:
        budget_bytes = WAVELET_BUDGET_BYTES
    return max(1, budget_bytes // (64 * padded_length(n_time)))


def band_activity(x: np.ndarray, dt: float, settings: Settings
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Eddy-band variance of many series, over the whole record and per window.

    Parameters
    ----------
    x : (station, time) anomaly series without NaN
    dt : sampling interval (days)

    Returns
    -------
    full : (station,) time mean of the eddy-band scale-averaged wavelet power
        (Torrence & Compo 1998, eq. 24; the band's share of the variance, their eq. 14)
    windows : (window, station) its mean over consecutive windows of at least
        ``eddy_period_days[1]`` each
    period : (station,) period of the largest time-averaged power in the band (days)
    """
    s = settings.signals
    band = s.eddy_period_days
    n_station, n_time = x.shape
    n_win = max(1, int(n_time * dt // max(band[1], dt)))
    edges = np.linspace(0, n_time, n_win + 1).round().astype(int)
    full = np.empty(n_station)
    windows = np.empty((n_win, n_station))
    period = np.empty(n_station)
    # Stations in groups within a fixed budget however long the record
    # (:func:`series_per_group`), the groups on all cores (the transforms release the
    # GIL), one group per thread at a time.
    workers = max(1, min(os.cpu_count() or 1, WAVELET_THREADS))
    group = series_per_group(n_time)

    def one_group(g0: int) -> None:
        g1 = min(n_station, g0 + group)
        averaged, mean_power, periods = band_power(x[g0:g1], dt, band, dj=s.dj,
                                                   omega0=s.omega0)
        full[g0:g1] = averaged.mean(axis=-1)
        for w in range(n_win):
            windows[w, g0:g1] = averaged[..., edges[w]:edges[w + 1]].mean(axis=-1)
        period[g0:g1] = periods[np.argmax(mean_power, axis=-1)]

    with ThreadPoolExecutor(max_workers=workers) as pool:
        list(pool.map(one_group, range(0, n_station, group)))
    return full, windows, period


def window_autocorrelation(dev: np.ndarray, assessed: np.ndarray, stations: np.ndarray
                           ) -> float:
    r"""Lag-1 autocorrelation between consecutive windows, typical of the coast.

    ``dev`` (window, station) are the deviations of each station's window values from
    its own mean. Each station's :math:`r_1` is corrected for its bias with a short series
    of n windows, :math:`E[r_1] \approx \rho - (1+3\rho)/n` (Marriott & Pope 1954), so
    :math:`\rho = (n r_1 + 1)/(n - 3)`; the median over the ``stations`` (robust to the
    few where one burst spans two windows) is clipped to [0, 0.9]. Wavelet power at the
    longest periods of the band spreads over neighbouring windows; this is how much.
    """
    n = dev.shape[0]
    if n <= 3 or not stations.any():
        return 0.0
    both = assessed[1:] & assessed[:-1]
    num = np.where(both, dev[1:] * dev[:-1], 0.0).sum(axis=0)
    den = np.where(assessed, dev**2, 0.0).sum(axis=0)
    use = stations & (den > 0)
    if not use.any():
        return 0.0
    r1 = float(np.median(num[use] / den[use]))
    return float(np.clip((n * r1 + 1.0) / (n - 3.0), 0.0, 0.9))


def detection_tests(full: np.ndarray, windows: np.ndarray, s_km: np.ndarray,
                    segment_id: np.ndarray, ld_km: float, significance: float) -> dict:
    """Recurrent excess of eddy-band variance over the local background, station by station.

    Parameters
    ----------
    full : (station,) band variance over the record
    windows : (window, station) band variance per window
    s_km, segment_id : (station,)
    ld_km : deformation radius (km)
    significance : confidence level; ``1 - significance`` is the false-discovery rate

    Returns
    -------
    dict of (station,) arrays: ``ratio`` (record band variance over its local
    background), ``t`` and ``p`` (one-sided t-test of the windows' log ratios), ``q``
    (Benjamini–Hochberg adjusted), ``localized`` (q <= 1 - significance), ``persistence``
    (fraction of windows above the local background), ``n_windows``, ``recurrence_p``
    (binomial upper tail of that count at 1/2); NaN (False) where not assessed.
    """
    full = np.where(np.asarray(full, float) > 0, full, np.nan)
    windows = np.where(np.asarray(windows, float) > 0, windows, np.nan)
    stack = np.vstack([full[None, :], windows])
    bg = local_background(stack, s_km, segment_id, ld_km)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_ratio = np.log(stack / bg)
    lw = log_ratio[1:]
    assessed = np.isfinite(lw)
    n_win = assessed.sum(axis=0).astype(float)
    ok = np.isfinite(log_ratio[0]) & (n_win >= MIN_WINDOWS)
    x = np.where(assessed, lw, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x.sum(axis=0) / n_win
        dev = np.where(assessed, lw - mean, 0.0)
        sd = np.sqrt((dev**2).sum(axis=0) / (n_win - 1))
        rho = window_autocorrelation(dev, assessed, ok)
        n_eff = n_win * (1.0 - rho) / (1.0 + rho)
        # The spread of the windows is about the same at every station where nothing
        # happens; the coast's median spread is a stable estimate of it, and a station
        # whose own windows spread more (a burst) keeps its own, larger one.
        typical = float(np.median(sd[ok])) if ok.any() else np.nan
        spread = np.fmax(sd, typical)
        t_stat = np.where(ok, mean / (spread / np.sqrt(n_eff)), np.nan)
        above = np.where(assessed, lw > 0, False).sum(axis=0).astype(float)
        persistence = np.where(ok, above / n_win, np.nan)
    p = normal_sf(t_stat)
    localized, q = benjamini_hochberg(p, 1.0 - significance)
    recurrence = binomial_sf(np.where(ok, above, np.nan), n_win, 0.5)
    return {"ratio": np.exp(log_ratio[0]), "t": t_stat, "p": p, "q": q,
            "localized": localized & ok, "persistence": persistence,
            "n_windows": np.where(ok, n_win, np.nan), "recurrence_p": recurrence}


# --------------------------------------------------------------------------- profiles
def alongshore_current(series: xr.Dataset, frame, nearshore_km: float) -> np.ndarray:
    """Near-shore velocity along the coast, (time, station), positive towards increasing
    ``alongshore_km``; the tangent at a station is the bearing between its neighbours on
    the same segment."""
    near = _nearshore_offsets(series["offset_km"].values, nearshore_km)
    u, v = (np.empty(series["section_u"].shape[:2]) for _ in range(2))
    for name, out in (("section_u", u), ("section_v", v)):
        for cols, sub in _station_blocks(series[name].values, near):
            out[:, cols] = _by_gaps(sub, _offset_mean, _nan_offset_mean)
    st = frame.stations
    east = np.zeros(len(st))
    north = np.zeros(len(st))
    for _, idx in st.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        idx = idx[np.argsort(st["alongshore_km"].values[idx], kind="stable")]
        if idx.size < 2:
            continue
        lon = np.radians(st["lon"].values[idx])
        lat = np.radians(st["lat"].values[idx])
        de = np.gradient(lon) * np.cos(lat)
        dn = np.gradient(lat)
        norm = np.hypot(de, dn)
        norm[norm == 0] = np.nan
        east[idx], north[idx] = de / norm, dn / norm
    return u * east[None, :] + v * north[None, :]


def mean_with_error(x: np.ndarray) -> tuple[float, float]:
    r"""Mean of a series and its standard error with the effective sample size of a lag-1
    autoregressive process, :math:`n' = n (1-\rho_1)/(1+\rho_1)` (von Storch & Zwiers
    1999, §6.6); NaN are left out."""
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size < 3:
        return float("nan"), float("nan")
    a = x - x.mean()
    denom = float(np.sum(a * a))
    rho = float(np.sum(a[1:] * a[:-1]) / denom) if denom > 0 else 0.0
    rho = min(max(rho, 0.0), 0.99)
    n_eff = max(x.size * (1.0 - rho) / (1.0 + rho), 1.0)
    return float(x.mean()), float(x.std(ddof=1) / math.sqrt(n_eff))


def alongshore_profiles(series: xr.Dataset, frame, settings: Settings, ld_km: float) -> xr.Dataset:
    """Per-station near-shore statistics used to find sources.

    Returns an ``xr.Dataset`` on dim ``station`` with ``zeta_var_ns`` (s-2), ``eke_ns``
    (m2 s-2), ``band_var_ns`` (eddy-band vorticity variance, s-2), ``localization``
    (band variance over the local background), ``localization_q`` (false-discovery
    adjusted p-value), ``localized``, ``persistence`` (0–1), ``recurrence_p``,
    ``shedding_period_days`` and ``alongshore_current_m_s`` (time-mean near-shore flow
    along the coast, positive towards increasing along-shore distance).
    """
    s = settings.signals
    src = settings.sources
    offsets = np.asarray(series["offset_km"].values)
    zeta = nearshore_anomaly(series["section_zeta"].values, offsets, src.nearshore_km)
    u = nearshore_anomaly(series["section_u"].values, offsets, src.nearshore_km)
    v = nearshore_anomaly(series["section_v"].values, offsets, src.nearshore_km)
    n_station = zeta.shape[1]
    with np.errstate(invalid="ignore"):
        zeta_var = np.nanmean(zeta**2, axis=0)
        eke = 0.5 * np.nanmean(u**2 + v**2, axis=0)
    valid = np.isfinite(zeta_var) & (zeta_var > 0)
    st = frame.stations
    s_km = st["alongshore_km"].values.astype(float)
    seg = st["segment_id"].values

    dt = time_step_days(series)
    full = np.full(n_station, np.nan)
    period = np.full(n_station, np.nan)
    n_win = max(1, int(zeta.shape[0] * dt // max(s.eddy_period_days[1], dt)))
    windows = np.full((n_win, n_station), np.nan)
    if valid.any():
        f, w, per = band_activity(_fill_gaps(zeta[:, valid].T), dt, settings)
        full[valid], windows[:, valid], period[valid] = f, w, per
    tests = detection_tests(full, windows, s_km, seg, ld_km, s.significance)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # stations never valid stay NaN
        current = np.nanmean(alongshore_current(series, frame, src.nearshore_km), axis=0)

    return xr.Dataset(
        {
            "zeta_var_ns": ("station", zeta_var, {
                "long_name": "variance of near-shore relative vorticity", "units": "s-2"}),
            "eke_ns": ("station", eke, {
                "long_name": "near-shore eddy kinetic energy per unit mass", "units": "m2 s-2"}),
            "band_var_ns": ("station", full, {
                "long_name": "eddy-band variance of near-shore relative vorticity "
                             "(time-mean scale-averaged wavelet power)", "units": "s-2"}),
            "persistence": ("station", tests["persistence"], {
                "long_name": "fraction of time windows in which the eddy-band "
                             "vorticity variance is above the local background",
                "units": "1"}),
            "recurrence_p": ("station", tests["recurrence_p"], {
                "long_name": "chance of at least as many windows above the local "
                             "background under the null (binomial upper tail at 1/2)",
                "units": "1"}),
            "localization": ("station", tests["ratio"], {
                "long_name": "eddy-band near-shore vorticity variance over the local "
                             "background (larger of the two neighbouring-coast lower quartiles)",
                "units": "1"}),
            "localization_q": ("station", tests["q"], {
                "long_name": "false-discovery-rate adjusted p-value of the test of a "
                             "recurrent excess over the local background "
                             "(Benjamini-Hochberg over the stations)", "units": "1"}),
            "localized": ("station", tests["localized"].astype(np.int8), {
                "long_name": "recurrent excess over the local background significant at "
                             "the false-discovery rate 1 - significance", "units": "1"}),
            "shedding_period_days": ("station", period, {
                "long_name": "period of largest time-averaged eddy-band wavelet power",
                "units": "days"}),
            "alongshore_current_m_s": ("station", current, {
                "long_name": "time-mean near-shore velocity along the coast, positive "
                             "towards increasing along-shore distance", "units": "m s-1"}),
        },
        coords={"station": np.arange(n_station)},
    )


def coast_end_km(ld_km: float) -> float:
    """Distance from the end of a coast segment within which a station has no local
    background: the inner gap of a ring plus the share of the ring that must lie on the
    coast (``RING_GAP_LD + RING_MIN_COVER (RING_OUTER_LD - RING_GAP_LD)`` deformation
    radii, 4 L_d)."""
    return (RING_GAP_LD + RING_MIN_COVER * (RING_OUTER_LD - RING_GAP_LD)) * ld_km


def untested_capes(profiles: xr.Dataset, frame, capes: pd.DataFrame, reach_km: float
                   ) -> pd.DataFrame:
    """The capes where no station within ``reach_km`` along the same coast segment could
    be tested (no local background: the cape lies within about :func:`coast_end_km` of
    the end of its segment, e.g. an open domain edge, or on a small island). A source
    there can be neither found nor ruled out."""
    if capes is None or len(capes) == 0:
        return capes.iloc[0:0] if capes is not None else pd.DataFrame()
    st = frame.stations
    s_km = st["alongshore_km"].values.astype(float)
    seg = st["segment_id"].values
    tested = np.isfinite(np.asarray(profiles["localization_q"].values, dtype=float))
    keep = []
    for cape in capes.itertuples(index=False):
        near = (seg == cape.segment_id) & (np.abs(s_km - cape.alongshore_km) <= reach_km)
        keep.append(bool(near.any()) and not bool(tested[near].any()))
    return capes[np.asarray(keep, dtype=bool)]


# --------------------------------------------------------------------------- sources
def _local_maxima(values: np.ndarray) -> np.ndarray:
    """Indices of strict-or-plateau local maxima of a 1-D profile (edges included)."""
    x = np.where(np.isfinite(values), values, -np.inf)
    left = np.concatenate([[-np.inf], x[:-1]])
    right = np.concatenate([x[1:], [-np.inf]])
    return np.flatnonzero((x >= left) & (x > right) & np.isfinite(values))


def source_maxima(profiles: xr.Dataset, frame, settings: Settings, ld_km: float
                  ) -> list[int]:
    """Stations of the local maxima of the band-variance ratio among the stations that
    are localized and at least ``min_persistence`` persistent; maxima within ``2 L_d``
    merge into the stronger."""
    st = frame.stations
    ratio = profiles["localization"].values
    passed = ((profiles["localized"].values > 0)
              & (profiles["persistence"].values >= settings.sources.min_persistence))
    chosen: list[int] = []
    for _, idx in st.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        idx = idx[np.argsort(st["alongshore_km"].values[idx], kind="stable")]
        peaks = idx[_local_maxima(np.where(passed[idx], ratio[idx], np.nan))]
        kept: list[int] = []
        for p in sorted(peaks, key=lambda k: -ratio[k]):
            s_km = st["alongshore_km"].values[p]
            if all(abs(s_km - st["alongshore_km"].values[q]) >= RING_GAP_LD * ld_km
                   for q in kept):
                kept.append(int(p))
        chosen.extend(kept)
    return chosen


def attribution_reach_km(current_m_s: float, period_days: float, ld_km: float) -> float:
    r"""How far downstream of its cape a source may lie (km).

    .. math:: R = \operatorname{clip}\left(|V|\,P/2,\ 2L_d,\ 8L_d\right)

    the distance the mean along-shore current V carries an eddy while it grows during
    half a shedding period P (one eddy forms per period), no shorter than the merging
    distance and no longer than the background ring (beyond which a maximum would be
    compared with its own cape's shedding).
    """
    travel = abs(current_m_s) * period_days * 86400.0 / 2.0 / 1000.0
    if not np.isfinite(travel):
        travel = 0.0
    return float(min(max(travel, RING_GAP_LD * ld_km), RING_OUTER_LD * ld_km))


def attribute_to_cape(s_km: float, segment_id: int, capes: pd.DataFrame, current_m_s: float,
                      current_se_m_s: float, period_days: float, ld_km: float,
                      near_km: float) -> tuple[str, float, str]:
    """The cape that feeds a maximum at ``s_km``: the nearest cape on the same segment
    within ``near_km`` on either side or upstream within :func:`attribution_reach_km`.

    ``current_m_s`` is the mean along-shore current at the maximum (positive towards
    increasing along-shore distance) and ``current_se_m_s`` its standard error; the
    direction is used only where ``|V| > 2 SE``. Returns ``(cape_id, distance_km, why)``;
    ``cape_id`` is empty when unanchored, the distance is that of the nearest cape on the
    segment (NaN if none) and ``why`` is a short reason.
    """
    if capes is None or len(capes) == 0:
        return "", float("nan"), "no cape found on this coast"
    same = capes[capes["segment_id"] == segment_id]
    if len(same) == 0:
        return "", float("nan"), "no cape on this coast segment"
    d = s_km - same["alongshore_km"].values.astype(float)
    known = np.isfinite(current_m_s) and np.isfinite(current_se_m_s) and \
        abs(current_m_s) > 2.0 * current_se_m_s
    reach = attribution_reach_km(current_m_s, period_days, ld_km) if known else 0.0
    # Positive where the cape lies upstream: the current flows from the cape to the source.
    upstream = d * np.sign(current_m_s) if known else np.full(d.shape, -np.inf)
    ok = (np.abs(d) <= near_km) | ((upstream > 0) & (upstream <= reach))
    if ok.any():
        k = int(np.flatnonzero(ok)[np.argmin(np.abs(d[ok]))])
        how = (f"cape within {near_km:g} km" if abs(d[k]) <= near_km else
               f"cape {abs(d[k]):.0f} km upstream along the mean current "
               f"({100 * abs(current_m_s):.1f} cm/s; reach {reach:.0f} km)")
        return str(same["cape_id"].values[k]), float(abs(d[k])), how
    nearest = float(np.min(np.abs(d)))
    if not known:
        why = (f"no cape within {near_km:g} km, and the mean along-shore current "
               f"({100 * current_m_s:.1f} ± {100 * current_se_m_s:.1f} cm/s) does not "
               "give a direction to look upstream")
    else:
        why = (f"no cape within {near_km:g} km or {reach:.0f} km upstream along the mean "
               f"current ({100 * abs(current_m_s):.1f} cm/s)")
    return "", nearest, why


_COLUMNS = ["station", "segment_id", "alongshore_km", "lon", "lat", "persistence",
            "recurrence_p", "localization", "localization_q", "localization_scale_km",
            "zeta_var_ns", "band_var_ns", "shedding_period_days", "cape_id",
            "dist_to_cape_km", "attribution", "n_members", "members_km"]


def _empty_sources() -> pd.DataFrame:
    text = {"cape_id", "attribution", "members_km"}
    return pd.DataFrame({c: pd.Series(dtype=object if c in text else float)
                         for c in _COLUMNS})


def _run_extent_km(mask: np.ndarray, s_km: np.ndarray, i: int) -> float:
    """Along-shore length (km) of the run of True in ``mask`` (sorted stations) around i."""
    lo = i
    while lo > 0 and mask[lo - 1]:
        lo -= 1
    hi = i
    while hi < mask.size - 1 and mask[hi + 1]:
        hi += 1
    spacing = float(np.median(np.diff(s_km))) if s_km.size > 1 else 0.0
    return float(s_km[hi] - s_km[lo] + spacing)


def find_sources(
    profiles: xr.Dataset, frame, capes: pd.DataFrame, settings: Settings, ld_km: float,
    series: xr.Dataset | None = None,
) -> pd.DataFrame:
    """Cape-level sources: localized, recurrent near-shore maxima grouped by the cape
    upstream of them along the mean current.

    Returns a DataFrame, one row per source (strongest band-variance ratio first), with
    ``station`` (the strongest member), ``segment_id``, ``alongshore_km``, ``lon``, ``lat``,
    ``persistence``, ``recurrence_p``, ``localization``, ``localization_q``,
    ``localization_scale_km`` (along-shore length of the localized stretch around the
    strongest member), ``zeta_var_ns``, ``band_var_ns``, ``shedding_period_days``,
    ``cape_id`` (empty when unanchored), ``dist_to_cape_km``, ``attribution``,
    ``n_members`` and ``members_km`` (tuple of the along-shore km of every maximum the
    source combines, the strongest included). ``series`` gives the current's standard
    error; without it the direction is taken from the profile's mean current alone.
    """
    src = settings.sources
    st = frame.stations
    maxima = source_maxima(profiles, frame, settings, ld_km)
    if not maxima:
        return _empty_sources()
    s_all = st["alongshore_km"].values.astype(float)
    seg_all = st["segment_id"].values
    ratio = profiles["localization"].values
    localized = profiles["localized"].values > 0
    mean_cur = profiles["alongshore_current_m_s"].values
    along = alongshore_current(series, frame, src.nearshore_km) if series is not None else None
    detail = []
    for p in maxima:
        same = np.flatnonzero(seg_all == seg_all[p])
        around = same[np.abs(s_all[same] - s_all[p]) <= 0.5 * RING_OUTER_LD * ld_km]
        if along is not None:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # never-valid stations
                cur, se = mean_with_error(np.nanmean(along[:, around], axis=1))
        else:
            cur, se = float(np.nanmean(mean_cur[around])), 0.0
        cid, dist, why = attribute_to_cape(s_all[p], int(seg_all[p]), capes, cur, se,
                                           float(profiles["shedding_period_days"].values[p]),
                                           ld_km, src.max_cape_distance_km)
        order = same[np.argsort(s_all[same], kind="stable")]
        pos = int(np.flatnonzero(order == p)[0])
        detail.append({"station": int(p), "cape_id": cid, "dist_to_cape_km": dist,
                       "attribution": why, "ratio": float(ratio[p]),
                       "extent": _run_extent_km(localized[order], s_all[order], pos)})
    groups: dict[tuple, list[dict]] = {}
    for d in detail:
        key = (int(seg_all[d["station"]]), d["cape_id"]) if d["cape_id"] else ("alone", d["station"])
        groups.setdefault(key, []).append(d)
    rows = []
    for members in groups.values():
        head = max(members, key=lambda m: m["ratio"])
        p = head["station"]
        rows.append({
            "station": p, "segment_id": int(seg_all[p]), "alongshore_km": float(s_all[p]),
            "lon": float(st["lon"].values[p]), "lat": float(st["lat"].values[p]),
            "persistence": float(profiles["persistence"].values[p]),
            "recurrence_p": float(profiles["recurrence_p"].values[p]),
            "localization": float(ratio[p]),
            "localization_q": float(profiles["localization_q"].values[p]),
            "localization_scale_km": head["extent"],
            "zeta_var_ns": float(profiles["zeta_var_ns"].values[p]),
            "band_var_ns": float(profiles["band_var_ns"].values[p]),
            "shedding_period_days": float(profiles["shedding_period_days"].values[p]),
            "cape_id": head["cape_id"], "dist_to_cape_km": head["dist_to_cape_km"],
            "attribution": head["attribution"], "n_members": len(members),
            "members_km": tuple(sorted(float(s_all[m["station"]]) for m in members)),
        })
    df = pd.DataFrame(rows)
    return df.sort_values("localization", ascending=False).reset_index(drop=True)[_COLUMNS]

