"""Shedding events at each source, from the near-shore vorticity record.

An **event** at a source is a contiguous stretch of time in which the near-shore relative
vorticity anomaly ζ′ at the source's station (time anomaly averaged over the offsets up to
``sources.nearshore_km``, as in source detection) exceeds, in absolute value,
``monitor.event_threshold_sd`` standard deviations of that station's own record, for at
least ``monitor.event_min_days``. The threshold is relative to each source's climatology,
so a weak source and a strong one are judged alike. Because ζ′ crosses zero between a
cyclone and an anticyclone, a stretch above the threshold never changes sign.

For each event: the onset (first time step above the threshold), the time and value of
the peak |ζ′|, its Rossby number ζ′/f, the duration (steps above the threshold × time
step), and the sense of rotation: **cyclonic** where ζ′·f > 0, **anticyclonic** where
ζ′·f < 0 (Cushman-Roisin & Beckers 2011, ch. 1: cyclonic rotation has the sense of the
Earth's rotation).

**Offshore speed.** Eddies shed at the coast drift offshore, so the vorticity seen at the
station reappears later along the source's zonal ray. The lag τ(D) that maximises the
correlation between the station's ζ′(t) and ζ′(t + τ) at distance D along the ray is the
transit time to D (the lagged-correlation transit-time method; e.g. Emery & Thomson 2014,
*Data Analysis Methods in Physical Oceanography*, ch. 5). Eddies form some way offshore and
take time to grow, so τ(D) alone overstates the time spent travelling; the difference of
two transit times cancels both: the speed is (D₂ − D₁)/(τ(D₂) − τ(D₁)) with
D₂ = ``monitor.probe_km`` and D₁ = D₂/2. Each lag is accepted when the maximum lies
strictly inside the searched range (1 step to the time needed at 0.5 cm s-1, at most a
third of the record) and the correlation reaches ``monitor.min_lag_correlation``, and
τ(D₂) must exceed τ(D₁); otherwise the source's measured ``west_speed_cm_s`` is given. The
column ``speed_from`` says which: ``lag correlation``, ``source west speed`` or ``not
measured``; ``lag_correlation`` is the smaller of the two correlations.
"""

from __future__ import annotations

import datetime as _dt
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from coastmon.config import Settings
from coastmon.sources.detect import nearshore_anomaly

EVENT_COLUMNS = [
    "source_rank", "cape_id", "station", "onset", "peak_time", "end", "peak_zeta_per_s",
    "peak_rossby", "duration_days", "sign", "threshold_per_s", "offshore_speed_cm_s",
    "speed_from", "lag_correlation",
]
"""Columns of ``events.csv`` (see docs/monitoring.md for their units)."""

MIN_SPEED_CM_S = 0.5
"""Slowest offshore drift searched for by the lagged correlation (cm s-1)."""
_CM_S_PER_KM_DAY = 1.0e5 / 86400.0


def exceedance_runs(x: np.ndarray, threshold: float, min_steps: int) -> list[tuple[int, int]]:
    """Contiguous runs ``[start, stop)`` where ``|x| > threshold`` lasting ``min_steps`` or more.

    NaN counts as below the threshold (it ends a run).

    Examples
    --------
    >>> exceedance_runs(np.array([0, 3, 3, 0, 3, 3, 3, 0.0]), 2.0, 3)
    [(4, 7)]
    """
    x = np.asarray(x, dtype=float)
    above = np.zeros(x.size + 2, dtype=np.int8)
    with np.errstate(invalid="ignore"):
        above[1:-1] = np.abs(x) > threshold
    edges = np.diff(above)
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)
    return [(int(a), int(b)) for a, b in zip(starts, stops, strict=True)
            if b - a >= max(min_steps, 1)]


def lagged_correlation(a: np.ndarray, b: np.ndarray, max_lag: int) -> np.ndarray:
    r"""Pearson correlation of ``a(t)`` with ``b(t + k)`` for ``k = 0..max_lag``.

    .. math:: r_k = \frac{\sum_t a'_t\, b'_{t+k}}{\sqrt{\sum_t a'^2_t \sum_t b'^2_{t+k}}}

    over the pairs where both are finite, primes being deviations from the means of those
    pairs. NaN for a lag with fewer than ten pairs or a constant series.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    out = np.full(max_lag + 1, np.nan)
    for k in range(min(max_lag, a.size - 1) + 1):
        x, y = a[: a.size - k], b[k:]
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.sum() < 10:
            continue
        x = x[ok] - x[ok].mean()
        y = y[ok] - y[ok].mean()
        den = np.sqrt((x * x).sum() * (y * y).sum())
        if den > 0:
            out[k] = (x * y).sum() / den
    return out


def offshore_lag(near: np.ndarray, probe: np.ndarray, max_lag: int, min_correlation: float
                 ) -> tuple[int | None, float]:
    """Lag (steps) of the maximum correlation of ``probe`` after ``near``, and that correlation.

    ``None`` when the maximum is at lag 0 or at ``max_lag`` (not inside the searched range),
    is below ``min_correlation``, or nothing could be correlated.
    """
    r = lagged_correlation(near, probe, max_lag)
    if not np.isfinite(r).any():
        return None, float("nan")
    k = int(np.nanargmax(r))
    best = float(r[k])
    if k == 0 or k >= max_lag or best < min_correlation:
        return None, best
    return k, best


def _iso(value: Any) -> str:
    """ISO 8601 text of a time value: the date, plus the time of day when not midnight."""
    if isinstance(value, np.datetime64):
        value = pd.Timestamp(value).to_pydatetime()
    if isinstance(value, _dt.datetime) or hasattr(value, "strftime"):
        if (value.hour, value.minute, value.second) == (0, 0, 0):
            return value.strftime("%Y-%m-%d")
        return value.strftime("%Y-%m-%dT%H:%M")
    return str(value)


def _ray_station(stations: pd.DataFrame, s: int) -> int | None:
    """The station whose zonal ray stands for station ``s``: itself, else the nearest one
    along the same coast segment that has a ray."""
    if "ray_dir" not in stations.columns:
        return s
    ray_dir = stations["ray_dir"].to_numpy()
    if ray_dir[s] != 0:
        return s
    seg = stations["segment_id"].to_numpy()
    along = stations["alongshore_km"].to_numpy(float)
    cand = np.flatnonzero((ray_dir != 0) & (seg == seg[s]))
    if cand.size == 0:
        return None
    return int(cand[np.argmin(np.abs(along[cand] - along[s]))])


def _time_step_days(series: xr.Dataset) -> float:
    if "time_days" in series.coords:
        t = np.asarray(series["time_days"].values, dtype=float)
    else:
        idx = series["time"].to_index()
        t = np.asarray(pd.to_timedelta(idx - idx[0]).total_seconds(), dtype=float) / 86400.0
    return float(np.median(np.diff(t))) if t.size > 1 else 1.0


def shedding_events(series: xr.Dataset, sources: pd.DataFrame, frame: Any,
                    f_per_s: np.ndarray, settings: Settings) -> pd.DataFrame:
    """Shedding events at every source (see the module notes for the definitions).

    Parameters
    ----------
    series
        Sampled series of the streaming pass: ``section_zeta`` (time, station, offset) with
        coordinate ``offset_km``, ``ray_zeta`` (time, station, ray) with ``ray_km``, and
        ``time``. Missing steps are NaN.
    sources
        Ranked sources with ``rank``, ``station``, ``cape_id`` and ``west_speed_cm_s``.
    frame
        The along-shore frame; its ``stations`` table gives ``ray_dir``, ``segment_id``
        and ``alongshore_km``.
    f_per_s
        Coriolis parameter at each station (s-1), shape (station,).
    settings
        Uses ``sources.nearshore_km`` and the ``monitor`` section.

    Returns
    -------
    pandas.DataFrame
        One row per event with :data:`EVENT_COLUMNS`, ordered by source rank then onset.
    """
    m = settings.monitor
    if len(sources) == 0 or series.sizes.get("time", 0) < 2:
        return pd.DataFrame({c: [] for c in EVENT_COLUMNS})
    dt = _time_step_days(series)
    times = series["time"].values
    zeta = nearshore_anomaly(series["section_zeta"].values, series["offset_km"].values,
                             settings.sources.nearshore_km)
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    probes = [int(np.argmin(np.abs(ray_km - d))) for d in (0.5 * m.probe_km, m.probe_km)]
    max_lag = int(min(np.ceil(ray_km[probes[1]] / (MIN_SPEED_CM_S / _CM_S_PER_KM_DAY) / dt),
                      zeta.shape[0] // 3))
    min_steps = int(np.ceil(m.event_min_days / dt - 1e-9))
    rows = []
    for _, src in sources.sort_values("rank").iterrows():
        s = int(src["station"])
        x = zeta[:, s]
        if not np.isfinite(x).any():
            continue
        sd = float(np.nanstd(x))
        threshold = m.event_threshold_sd * sd
        runs = exceedance_runs(x, threshold, min_steps)
        if not runs:
            continue
        speed, speed_from, corr = _offshore_speed(series, x, s, frame, probes, ray_km,
                                                  max_lag, dt, m.min_lag_correlation,
                                                  src.get("west_speed_cm_s", np.nan))
        f = float(f_per_s[s])
        cape = src.get("cape_id", "")
        cape = "" if not isinstance(cape, str) else cape
        for a, b in runs:
            k = a + int(np.nanargmax(np.abs(x[a:b])))
            peak = float(x[k])
            rows.append({
                "source_rank": int(src["rank"]), "cape_id": cape, "station": s,
                "onset": _iso(times[a]), "peak_time": _iso(times[k]), "end": _iso(times[b - 1]),
                "peak_zeta_per_s": peak, "peak_rossby": peak / f if f else np.nan,
                "duration_days": (b - a) * dt,
                "sign": "cyclonic" if peak * f > 0 else "anticyclonic",
                "threshold_per_s": threshold, "offshore_speed_cm_s": speed,
                "speed_from": speed_from, "lag_correlation": corr,
            })
    return pd.DataFrame(rows, columns=EVENT_COLUMNS)


def _offshore_speed(series: xr.Dataset, near: np.ndarray, s: int, frame: Any,
                    probes: list[int], ray_km: np.ndarray, max_lag: int, dt: float,
                    min_corr: float, fallback: float) -> tuple[float, str, float]:
    """Offshore speed (cm s-1) of the source at station ``s``, how it was found, and r."""
    corr = float("nan")
    r_station = _ray_station(frame.stations, s)
    lags, corrs = [], []
    if r_station is not None and max_lag >= 2 and "ray_zeta" in series \
            and probes[1] > probes[0]:
        for k in probes:
            probe = np.asarray(series["ray_zeta"].data[:, r_station, k], dtype=float)
            if np.isfinite(probe).sum() < 10:
                break
            lag, r = offshore_lag(near, probe - np.nanmean(probe), max_lag, min_corr)
            lags.append(lag)
            corrs.append(r)
        if corrs:
            corr = float(np.nanmin(corrs)) if np.isfinite(corrs).any() else float("nan")
        if len(lags) == 2 and None not in lags and lags[1] > lags[0]:
            distance = float(ray_km[probes[1]] - ray_km[probes[0]])
            speed = distance / ((lags[1] - lags[0]) * dt) * _CM_S_PER_KM_DAY
            return speed, "lag correlation", corr
    fallback = float(fallback) if fallback is not None else float("nan")
    if np.isfinite(fallback):
        return fallback, "source west speed", corr
    return float("nan"), "not measured", corr


__all__ = ["EVENT_COLUMNS", "exceedance_runs", "lagged_correlation", "offshore_lag",
           "shedding_events"]
