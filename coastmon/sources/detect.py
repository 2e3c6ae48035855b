"""Candidate vorticity sources along the coast: localized and persistent near-shore maxima.

Works on the small along-shore time series from the streaming pass (``series``), never on
the gridded record.

Method
------
1. *Near-shore signal.* At every station, the vorticity anomaly (about its own time mean)
   averaged over the cross-shore points within ``nearshore_km`` of the coast; its variance
   along the coast is the profile searched for sources.
2. *Localized.* Along each coast segment the profile (normalised by its median) is
   transformed with the Morlet wavelet along arclength (Torrence & Compo 1998). A station
   is localized where the scale-averaged power over along-shore scales of 2 station
   spacings to ``4 L_d`` exceeds the 95 % red-noise level of the profile.
3. *Persistent.* Each station's near-shore series is transformed in time; persistence is
   the fraction of time (inside the cone of influence) in which the eddy-band
   (``eddy_period_days``) scale-averaged power exceeds the 95 % level of a red-noise
   background whose variance and lag-1 autocorrelation are the *median over the coast*.
   A station whose shedding stands above the coast's background most of the time scores
   near 1; a stretch of coast that only sees passing eddies scores low.
4. *Sources* are local maxima of the profile that are localized and whose persistence is
   at least ``min_persistence``; maxima closer than ``2 L_d`` merge into the stronger one.
   Each is associated with the nearest cape on the same segment within
   ``max_cape_distance_km`` (``cape_id``; empty when unanchored).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import xarray as xr

from coastmon.config import Settings
from coastmon.io.pages import release
from coastmon.signals import (
    cwt_morlet,
    lag1_autocorrelation,
    scale_average,
    scale_average_significance,
    significant_fraction,
)

WAVELET_BUDGET_BYTES = 128 * 2**20
"""Memory for the wavelet coefficients of one group of stations (complex, all scales)."""


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
    near = np.asarray(offsets_km) <= nearshore_km
    if not near.any():
        near = np.zeros_like(near)
        near[0] = True
    sub = np.asarray(section[:, :, near], dtype=np.float64)
    release(section)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns stay NaN
        anomaly = sub - np.nanmean(sub, axis=0, keepdims=True)
        return np.nanmean(anomaly, axis=2)


def _fill_gaps(x: np.ndarray) -> np.ndarray:
    """Replace NaN in (station, time) series by 0 (the anomaly mean) for the transforms."""
    return np.where(np.isfinite(x), x, 0.0)


def alongshore_profiles(series: xr.Dataset, frame, settings: Settings, ld_km: float) -> xr.Dataset:
    """Per-station near-shore statistics used to find sources.

    Returns an ``xr.Dataset`` on dim ``station`` with ``zeta_var_ns`` (s-2), ``eke_ns``
    (m2 s-2), ``persistence`` (0–1), ``localization`` (ratio of the along-shore scale-averaged
    wavelet power to its 95 % red-noise level; > 1 is localized), ``localization_scale_km``
    (the along-shore scale of the largest power in that band), ``shedding_period_days``
    (period of the largest time-averaged eddy-band wavelet power).
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

    dt = time_step_days(series)
    persistence = np.full(n_station, np.nan)
    period = np.full(n_station, np.nan)
    if valid.sum() >= 1:
        x = _fill_gaps(zeta[:, valid].T)
        band = s.eddy_period_days
        alpha = lag1_autocorrelation(x, axis=-1)
        alpha_bg = float(np.clip(np.nanmedian(alpha), 0.0, 0.99))
        # The series' variance as cwt_morlet computes it, for the coast's background level.
        variance = np.mean((x - x.mean(axis=-1, keepdims=True)) ** 2, axis=-1)
        var_bg = float(np.nanmedian(variance))
        found_persistence = np.empty(x.shape[0])
        found_period = np.empty(x.shape[0])
        # Stations in groups, so the wavelet coefficients stay within a fixed budget
        # however long the record.
        per_station = 16 * x.shape[1] * (int(np.log2(max(x.shape[1], 2)) / s.dj) + 1)
        group = max(1, WAVELET_BUDGET_BYTES // per_station)
        for g0 in range(0, x.shape[0], group):
            g1 = min(x.shape[0], g0 + group)
            wt = cwt_morlet(x[g0:g1], dt, dj=s.dj, omega0=s.omega0, period_band=band)
            sig_own = scale_average_significance(wt, np.full(g1 - g0, alpha_bg), band,
                                                 level=s.significance)
            with np.errstate(invalid="ignore", divide="ignore"):
                sig_bg = sig_own * var_bg / wt.variance
            found_persistence[g0:g1] = significant_fraction(wt, sig_bg, band)
            in_band = (wt.periods >= band[0]) & (wt.periods <= band[1])
            mean_power = wt.power[:, in_band].mean(axis=-1)
            found_period[g0:g1] = wt.periods[in_band][np.argmax(mean_power, axis=-1)]
        persistence[valid] = found_persistence
        period[valid] = found_period

    localization = np.full(n_station, np.nan)
    scale_km = np.full(n_station, np.nan)
    stations = frame.stations
    spacing = float(np.median(np.diff(stations["alongshore_km"].values))) if n_station > 1 else 1.0
    spacing = spacing if spacing > 0 else 1.0
    band = (2.0 * spacing, max(4.0 * ld_km, 4.0 * spacing))
    for _, idx in stations.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        ok = idx[valid[idx]]
        # A segment shorter than twice the longest along-shore scale tested (a small
        # island, a short stretch between two domain edges) cannot show a feature that is
        # localized along it: it is left unassessed (no source there).
        if ok.size < 8 or ok.size * spacing < 2.0 * band[1]:
            continue
        prof = zeta_var[ok]
        prof = prof / np.median(prof) - 1.0
        wt = cwt_morlet(prof, spacing, dj=s.dj, omega0=s.omega0)
        alpha = float(np.clip(lag1_autocorrelation(prof), 0.0, 0.95))
        power = scale_average(wt, band)
        sig = scale_average_significance(wt, alpha, band, level=s.significance)
        # Background variance of the profile from its median absolute deviation, so that
        # one strong source does not hide a weaker one (robust scale; Huber 1981).
        mad = 1.4826 * np.median(np.abs(prof - np.median(prof)))
        if wt.variance > 0 and mad > 0:
            sig = sig * min(mad**2 / float(wt.variance), 1.0)
        localization[ok] = power / sig
        sel = (wt.periods >= band[0]) & (wt.periods <= band[1])
        if sel.any():
            scale_km[ok] = wt.periods[sel][np.argmax(wt.power[sel], axis=0)]

    return xr.Dataset(
        {
            "zeta_var_ns": ("station", zeta_var, {
                "long_name": "variance of near-shore relative vorticity", "units": "s-2"}),
            "eke_ns": ("station", eke, {
                "long_name": "near-shore eddy kinetic energy per unit mass", "units": "m2 s-2"}),
            "persistence": ("station", persistence, {
                "long_name": "fraction of time with significant eddy-band vorticity power "
                             "above the coast's red-noise background", "units": "1"}),
            "localization": ("station", localization, {
                "long_name": "along-shore scale-averaged wavelet power of near-shore vorticity "
                             "variance over its 95 % red-noise level", "units": "1"}),
            "localization_scale_km": ("station", scale_km, {
                "long_name": "along-shore scale (Fourier wavelength) of the largest wavelet "
                             "power of the near-shore vorticity-variance profile",
                "units": "km"}),
            "shedding_period_days": ("station", period, {
                "long_name": "period of largest time-averaged eddy-band wavelet power",
                "units": "days"}),
        },
        coords={"station": np.arange(n_station)},
    )


def _local_maxima(values: np.ndarray) -> np.ndarray:
    """Indices of strict-or-plateau local maxima of a 1-D profile (edges included)."""
    x = np.where(np.isfinite(values), values, -np.inf)
    left = np.concatenate([[-np.inf], x[:-1]])
    right = np.concatenate([x[1:], [-np.inf]])
    return np.flatnonzero((x >= left) & (x > right) & np.isfinite(values))


def find_sources(
    profiles: xr.Dataset, frame, capes: pd.DataFrame, settings: Settings, ld_km: float
) -> pd.DataFrame:
    """Localized, persistent near-shore maxima, each tied to its nearest cape.

    Returns a DataFrame (one row per source, strongest first by near-shore vorticity
    variance) with ``station``, ``segment_id``, ``alongshore_km``, ``lon``, ``lat``,
    ``persistence``, ``localization``, ``zeta_var_ns``, ``shedding_period_days``,
    ``cape_id``, ``dist_to_cape_km``.
    """
    src = settings.sources
    st = frame.stations
    zvar = profiles["zeta_var_ns"].values
    pers = profiles["persistence"].values
    loc = profiles["localization"].values
    rows = []
    for seg, idx in st.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        order = np.argsort(st["alongshore_km"].values[idx])
        idx = idx[order]
        peaks = idx[_local_maxima(zvar[idx])]
        keep = [p for p in peaks if loc[p] > 1.0 and pers[p] >= src.min_persistence]
        keep.sort(key=lambda p: -zvar[p])
        chosen: list[int] = []
        for p in keep:
            s_km = st["alongshore_km"].values[p]
            if all(abs(s_km - st["alongshore_km"].values[q]) >= 2.0 * ld_km for q in chosen):
                chosen.append(p)
        for p in chosen:
            rows.append({"station": int(p), "segment_id": int(seg)})
    columns = ["station", "segment_id", "alongshore_km", "lon", "lat", "persistence",
               "localization", "localization_scale_km", "zeta_var_ns",
               "shedding_period_days", "cape_id",
               "dist_to_cape_km"]
    if not rows:
        return pd.DataFrame({c: pd.Series(dtype=object if c == "cape_id" else float)
                             for c in columns})
    df = pd.DataFrame(rows)
    p = df["station"].values
    df["alongshore_km"] = st["alongshore_km"].values[p]
    df["lon"] = st["lon"].values[p]
    df["lat"] = st["lat"].values[p]
    df["persistence"] = pers[p]
    df["localization"] = loc[p]
    df["localization_scale_km"] = profiles["localization_scale_km"].values[p]
    df["zeta_var_ns"] = zvar[p]
    df["shedding_period_days"] = profiles["shedding_period_days"].values[p]
    cape_ids, dists = [], []
    for _, row in df.iterrows():
        cid, dist = nearest_cape(row, capes, src.max_cape_distance_km)
        cape_ids.append(cid)
        dists.append(dist)
    df["cape_id"] = cape_ids
    df["dist_to_cape_km"] = dists
    return df.sort_values("zeta_var_ns", ascending=False).reset_index(drop=True)[columns]


def nearest_cape(row, capes: pd.DataFrame, max_km: float) -> tuple[str, float]:
    """Nearest cape on the same segment by along-shore distance (km); '' if beyond max_km.

    The distance is returned even when the source is unanchored (NaN if the segment has no
    cape), so users can see how far the nearest cape was.
    """
    if capes is None or len(capes) == 0:
        return "", float("nan")
    same = capes[capes["segment_id"] == row["segment_id"]]
    if len(same) == 0:
        return "", float("nan")
    d = np.abs(same["alongshore_km"].values - row["alongshore_km"])
    k = int(np.argmin(d))
    dist = float(d[k])
    return (str(same["cape_id"].values[k]) if dist <= max_km else ""), dist
