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
  station per step; it stops where |anomaly| falls below the coast-wide median of
  |anomaly| (the background). Its length is the plume's zonal extent.
* Jet spacing: at every ray distance beyond the gate, the meridional profile of the
  anomaly (against station latitude, converted to km) is Fourier-analysed; the dominant
  wavelength, averaged over distances, is the spacing between jets of the same sign.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr
from scipy.ndimage import gaussian_filter1d

from coastmon.grid.metrics import haversine_m
from coastmon.io.pages import release


def time_nanmean(values: np.ndarray, block: int = 256) -> np.ndarray:
    """Mean over the first (time) axis ignoring NaN, in float64, a block of steps at a time
    (memory does not grow with the record); NaN where no step is finite."""
    total = np.zeros(values.shape[1:])
    count = np.zeros(values.shape[1:])
    for start in range(0, values.shape[0], block):
        part = np.asarray(values[start:start + block], dtype=np.float64)
        ok = np.isfinite(part)
        total += np.where(ok, part, 0.0).sum(axis=0)
        count += ok.sum(axis=0)
        release(values)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def mean_zonal_anomaly(series: xr.Dataset, frame, smooth_stations: float = 4.0) -> np.ndarray:
    """Time-mean zonal velocity on the rays minus its along-shore running mean (m s-1)."""
    ubar = time_nanmean(series["ray_u"].values)
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


def trace_plume(anomaly: np.ndarray, frame, station: int, ray_km: np.ndarray,
                background: float, band: int = 3) -> dict:
    """Follow the strongest mean zonal-velocity anomaly offshore from one station's ray."""
    seg = frame.stations["segment_id"].values
    same = np.flatnonzero(seg == seg[station])
    pos = int(np.flatnonzero(same == station)[0]) if station in same else 0
    lons, lats, amps = [], [], []
    for r in range(ray_km.size):
        lo, hi = max(pos - band if r == 0 else pos - 1, 0), min(pos + (band if r == 0 else 1) + 1, same.size)
        cand = same[lo:hi]
        vals = np.abs(anomaly[cand, r])
        if not np.isfinite(vals).any():
            break
        k = int(np.nanargmax(vals))
        if vals[k] < background:
            break
        pos = lo + k
        s = same[pos]
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


def plume_axes(series: xr.Dataset, frame, sources: pd.DataFrame, gate_offset_km: float
               ) -> tuple[list[dict], float]:
    """Plume axis for every source (in rank order) and the coast-wide jet spacing (km)."""
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    anomaly = mean_zonal_anomaly(series, frame)
    background = float(np.nanmedian(np.abs(anomaly))) if np.isfinite(anomaly).any() else np.inf
    axes = [trace_plume(anomaly, frame, int(row["station"]), ray_km, background)
            for _, row in sources.iterrows()]
    return axes, jet_spacing_km(anomaly, frame, ray_km, gate_offset_km)
