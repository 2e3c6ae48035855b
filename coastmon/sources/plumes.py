"""Beta-plume axes and zonal-jet spacing from the time-mean flow on the zonal rays.

A localized, persistent vorticity source on a beta plane drives a time-mean zonal flow
that extends westward from it (the beta plume: Stommel 1982; Davey & Killworth 1989) and,
with several sources, a pattern of alternating zonal jets ("striations").

Method
------
* The time-mean zonal velocity on the rays, ``ubar(station, ray_km)``, is turned into an
  anomaly by removing its along-shore (meridional) running mean over ``4 x spacing_km``
  stations' worth of latitude, so broad currents do not count as jets.
* The plume axis of a source follows the largest |anomaly| within a band of stations
  around the source's own ray, stepping offshore point by point and moving at most one
  station per step. Beyond the near-shore band (``nearshore_km``, where the source and the
  coastal current are), it ends at the first point where the plume has ended by either of
  two tests: |anomaly| is no longer significant — below 1.96 standard errors of the time
  mean, the standard error taken with the effective sample size of a lag-1
  autoregressive series, n' = n (1 - r1)/(1 + r1) (von Storch & Zwiers 1999, §6.6) — or
  it has decayed below e^-1 of the largest |anomaly| met so far on the axis (the e-folding
  length of a plume decaying away from its source: a steady beta plume damped at rate
  r decays westward as exp(-x r / c) for long Rossby speed c; Davey & Killworth 1989).
  Its length is the plume's zonal extent.
* Jet spacing: at every ray distance beyond the gate, the meridional profile of the
  anomaly (against station latitude, converted to km) is Fourier-analysed; the dominant
  wavelength, averaged over distances, is the spacing between jets of the same sign.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr
from scipy.ndimage import gaussian_filter1d

from coastmon.compiled import compiled
from coastmon.grid.metrics import haversine_m
from coastmon.io.pages import station_sweep


@compiled()
def _lagged_sums(values, sums):  # pragma: no cover - compiled
    """The sums of :func:`time_mean_error` of (time, station, k), into ``sums[:, station * k]``.

    Station by station, time in order at each point (the series files are stored station
    by station, so this reads them in file order); NaN steps are left out, and so are
    the lagged products that touch them.
    """
    n_t, n_s, n_k = values.shape
    prev = np.empty(n_k)
    for s in range(n_s):
        prev[:] = np.nan
        for t in range(n_t):
            for k in range(n_k):
                p = s * n_k + k
                a = prev[k]
                b = np.float64(values[t, s, k])
                if np.isfinite(b):
                    sums[0, p] += 1.0
                    sums[1, p] += b
                    sums[2, p] += b * b
                    if np.isfinite(a):
                        sums[3, p] += a * b
                        sums[4, p] += 1.0
                        sums[5, p] += a
                        sums[6, p] += b
                prev[k] = b


def time_mean_error(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    r"""Time mean and its standard error over the first axis, a group of stations (the
    second axis) at a time.

    .. math:: \mathrm{SE} = \frac{s}{\sqrt{n'}},\qquad n' = n\,\frac{1-r_1}{1+r_1}

    with s the standard deviation and r_1 the lag-1 autocorrelation (clipped to [0, 0.99])
    of each point's series: the effective sample size of a lag-1 autoregressive process
    (von Storch & Zwiers 1999, §6.6). Steps with NaN are left out of the sums (and the
    lagged products that touch them). NaN where fewer than three steps are finite.
    """
    shape = values.shape[1:]
    sums = np.zeros((7, int(np.prod(shape))))   # n, s1, s2, lag, n_lag, s_lag_a, s_lag_b
    for cols, block in station_sweep(values):
        _lagged_sums(block, sums[:, cols])
    n, s1, s2, lag, n_lag, s_lag_a, s_lag_b = (x.reshape(shape) for x in sums)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        var = np.maximum(s2 / n - mean**2, 0.0)
        cov = lag / n_lag - (s_lag_a / n_lag) * (s_lag_b / n_lag)
        r1 = np.clip(np.where(var > 0, cov / var, 0.0), 0.0, 0.99)
        n_eff = np.maximum(n * (1.0 - r1) / (1.0 + r1), 1.0)
        se = np.sqrt(var * n / np.maximum(n - 1, 1) / n_eff)
    few = n < 3
    return np.where(few, np.nan, mean), np.where(few, np.nan, se)


def along_shore_anomaly(ubar: np.ndarray, frame, smooth_stations: float = 4.0) -> np.ndarray:
    """A (station, ray) field minus its along-shore Gaussian running mean, per segment."""
    out = np.full_like(ubar, np.nan)
    for _, idx in frame.stations.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        block = ubar[idx]
        ok = np.isfinite(block)
        filled = np.where(ok, block, 0.0)
        num = gaussian_filter1d(filled, smooth_stations, axis=0, mode="nearest")
        den = gaussian_filter1d(ok.astype(float), smooth_stations, axis=0, mode="nearest")
        with np.errstate(invalid="ignore", divide="ignore"):
            trend = num / den
        out[idx] = np.where(ok, block - trend, np.nan)
    return out


PLUME_Z = 1.96
"""Standard errors of the time mean below which the plume's anomaly is not significant
(two-sided 95 %)."""
PLUME_DECAY = float(np.exp(-1.0))
"""Fraction of the axis's largest anomaly below which the plume has decayed."""


def trace_plume(anomaly: np.ndarray, frame, station: int, ray_km: np.ndarray,
                error: np.ndarray | float, band: int = 3, start_km: float = 0.0) -> dict:
    """Follow the strongest mean zonal-velocity anomaly offshore from one station's ray.

    ``error`` is the standard error of the anomaly, (station, ray) or one number. Points
    closer to the coast than ``start_km`` (the near-shore band where the source and the
    coastal current are) are kept as they are; beyond, the axis ends before the first
    point where |anomaly| < ``PLUME_Z`` x error or < ``PLUME_DECAY`` x the largest
    |anomaly| met so far beyond ``start_km``.
    """
    seg = frame.stations["segment_id"].values
    same = np.flatnonzero(seg == seg[station])
    pos = int(np.flatnonzero(same == station)[0]) if station in same else 0
    err = np.broadcast_to(np.asarray(error, dtype=float), anomaly.shape)
    lons, lats, amps = [], [], []
    peak = 0.0
    for r in range(ray_km.size):
        lo, hi = max(pos - band if r == 0 else pos - 1, 0), min(pos + (band if r == 0 else 1) + 1, same.size)
        cand = same[lo:hi]
        vals = np.abs(anomaly[cand, r])
        if not np.isfinite(vals).any():
            break
        k = int(np.nanargmax(vals))
        s = same[lo + k]
        if ray_km[r] >= start_km:
            if not vals[k] >= PLUME_Z * err[s, r] or vals[k] < PLUME_DECAY * peak:
                break
            peak = max(peak, float(vals[k]))
        pos = lo + k
        lons.append(frame.ray_lon[s, r])
        lats.append(frame.ray_lat[s, r])
        amps.append(float(anomaly[s, r]))
    extent = float(ray_km[len(lons) - 1] - ray_km[0]) if len(lons) > 1 else 0.0
    return {"lon": np.asarray(lons), "lat": np.asarray(lats), "extent_km": extent,
            "mean_anomaly_cm_s": 100.0 * float(np.mean(np.abs(amps))) if amps else float("nan")}


def jet_spacing_km(anomaly: np.ndarray, frame, ray_km: np.ndarray, min_km: float) -> float:
    """Dominant meridional wavelength (km) of the mean zonal-velocity anomaly offshore."""
    st = frame.stations
    spacing = []
    for _, idx in st.groupby("segment_id").indices.items():
        idx = np.asarray(idx)
        if idx.size < 8:
            continue
        lat = st["lat"].values[idx]
        order = np.argsort(lat)
        idx, lat = idx[order], lat[order]
        y_km = np.concatenate([[0.0], np.cumsum(haversine_m(0 * lat[:-1], lat[:-1],
                                                           0 * lat[1:], lat[1:]) / 1000.0)])
        if y_km[-1] <= 0:
            continue
        grid = np.linspace(0, y_km[-1], idx.size)
        dy = grid[1] - grid[0]
        spectra = []
        for r in np.flatnonzero(ray_km >= min_km):
            prof = anomaly[idx, r]
            if np.isfinite(prof).mean() < 0.8:
                continue
            ok = np.isfinite(prof)
            p = np.interp(grid, y_km[ok], prof[ok])
            p = (p - p.mean()) * np.hanning(p.size)
            spectra.append(np.abs(np.fft.rfft(p)) ** 2)
        if not spectra:
            continue
        mean_spec = np.mean(spectra, axis=0)
        freqs = np.fft.rfftfreq(grid.size, d=dy)
        mean_spec[0] = 0.0
        if mean_spec.size > 1:
            mean_spec[1] = 0.0  # a single wave across the whole coast is not a jet pattern
        k = int(np.argmax(mean_spec))
        if freqs[k] > 0:
            spacing.append(1.0 / freqs[k])
    return float(np.median(spacing)) if spacing else float("nan")


def plume_axes(series: xr.Dataset, frame, sources: pd.DataFrame, gate_offset_km: float,
               start_km: float = 0.0, mean_error: tuple[np.ndarray, np.ndarray] | None = None
               ) -> tuple[list[dict], float]:
    """Plume axis for every source (in rank order) and the coast-wide jet spacing (km);
    the axes' end tests apply from ``start_km`` offshore (see :func:`trace_plume`).
    ``mean_error``: :func:`time_mean_error` of ``ray_u`` when already computed."""
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    ubar, error = mean_error or time_mean_error(series["ray_u"].data)
    anomaly = along_shore_anomaly(ubar, frame)
    axes = [trace_plume(anomaly, frame, int(row["station"]), ray_km, error, start_km=start_km)
            for _, row in sources.iterrows()]
    return axes, jet_spacing_km(anomaly, frame, ray_km, gate_offset_km)
