r"""Offshore eddy-energy feed of each source, with a moving-block bootstrap interval.

Method
------
A *gate* is the line through the points at ``gate_offset_km`` along the zonal rays of the
stations within ``gate_halfwidth_km`` (along shore) of the source. On each ray, a window of
ray points centred on the gate gives a (time, distance) field. Its 2-D wavenumber–frequency
spectrum splits the eddy kinetic energy into the part propagating offshore (away from the
coast along the ray: westward on an eastern-boundary coast) and the part propagating
toward the coast. The feed per metre of depth is

.. math:: F = \rho_0 \sum_{\mathrm{rays}} \left(E_w c_w - B\right) \Delta l

with :math:`E_w` the offshore-propagating share of the window-mean EKE
:math:`\tfrac12\langle u'^2 + v'^2\rangle`, :math:`c_w` the measured offshore propagation
speed at the gate (energy-weighted over its rays), :math:`\Delta l` the gate length each ray
represents, and :math:`B` the background: the median of :math:`E_w c` over the gates of
the coast that belong to no source (the lower quartile of all gates when fewer than three
such gates remain), i.e. the flux that is not localized at a source. Long Rossby waves and
mesoscale eddies carry energy at about their propagation speed (group ≈ phase velocity in
the long-wave limit; Gill 1982 §12.4), which is why :math:`E_w c_w` is an energy flux.

Where SSH is present the pressure-work flux across the gate is given as well:
:math:`\sum \langle u_n' p'\rangle \Delta l` with :math:`p' = \rho_0 g \eta'` and
:math:`u_n` the velocity component along the ray (offshore positive).

Uncertainty: moving-block bootstrap over time (Künsch 1989) with blocks at least twice the
decorrelation time of the gate velocity; the 2.5 and 97.5 percentiles give ``feed_lo``
and ``feed_hi``. The speed uncertainty enters by drawing the speed from a normal
distribution with the (robust) spread of the gate's speed estimates, truncated at zero
(energy carried toward the coast is not an offshore feed).
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from coastmon.config import Settings
from coastmon.grid.metrics import haversine_m
from coastmon.io.pages import release
from coastmon.signals import centroid_speed, propagation_speed, wavenumber_frequency

G = 9.80665
GATE_THREADS = 4
"""Most threads measuring the gates at once (one per core up to this)."""


@dataclass
class GateSet:
    """Per-station gate quantities for every station whose ray reaches the gate."""

    station: np.ndarray          # (g,) station indices
    gate_index: np.ndarray       # (g,) index along ray_km of the gate point
    window: np.ndarray           # (g, w) ray indices of the window around the gate
    eke_series: np.ndarray       # (time, g) window-mean EKE anomaly energy, m2 s-2
    offshore_fraction: np.ndarray  # (g,) share of energy propagating offshore
    speed: np.ndarray            # (g,) offshore propagation speed, m s-1 (+ = offshore)
    speed_sd: np.ndarray         # (g,) spread of the speed estimate, m s-1
    pressure_work: np.ndarray    # (g,) <u_n' p'> at the gate point, W m-2 (NaN without SSH)
    lon: np.ndarray              # (g,) gate point longitude
    lat: np.ndarray              # (g,) gate point latitude


def _window(ray_km: np.ndarray, centre_km: float, half_km: float) -> np.ndarray:
    return np.flatnonzero(np.abs(ray_km - centre_km) <= half_km + 1e-9)


def gate_stations(sources: pd.DataFrame, frame, settings: Settings) -> set[int]:
    """Stations whose rays form the gate of at least one source."""
    st = frame.stations
    out: set[int] = set()
    for _, row in sources.iterrows():
        same = st["segment_id"].values == row["segment_id"]
        near = np.abs(st["alongshore_km"].values - row["alongshore_km"])
        out.update(np.flatnonzero(same & (near <= settings.sources.gate_halfwidth_km)).tolist())
    return out


def gate_set(series: xr.Dataset, frame, settings: Settings, dt_days: float,
             precise: set[int] | None = None) -> GateSet:
    """Measure the gate quantities on every ray that reaches ``gate_offset_km``.

    The offshore propagation speed is the Radon-transform estimate
    (:func:`coastmon.signals.propagation_speed`) on the rays of ``precise`` stations (the
    source gates) and the cheaper spectral-centroid estimate elsewhere (used only for the
    coast-wide background).
    """
    src = settings.sources
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    if ray_km.size < 4:
        return _empty_gates(series)
    dd_km = float(np.median(np.diff(ray_km)))
    gate_i = int(np.argmin(np.abs(ray_km - src.gate_offset_km)))
    half = max(src.gate_offset_km * 0.5, 4 * dd_km)
    win = _window(ray_km, ray_km[gate_i], half)
    ru = series["ray_u"].values
    rv = series["ray_v"].values
    rz = series["ray_zeta"].values
    has_ssh = "ray_ssh" in series
    rh = series["ray_ssh"].values if has_ssh else None
    ray_lon, ray_lat = frame.ray_lon, frame.ray_lat
    direction = frame.stations["ray_dir"].values

    def one_gate(s: int):
        """The gate quantities of station ``s``, or None where its ray has no gate."""
        if direction[s] == 0 or not np.isfinite(ray_lon[s, win]).all():
            return None
        u = np.asarray(ru[:, s, win], dtype=np.float64)
        v = np.asarray(rv[:, s, win], dtype=np.float64)
        z = np.asarray(rz[:, s, win], dtype=np.float64)
        if not (np.isfinite(u).mean() > 0.9 and np.isfinite(v).mean() > 0.9):
            return None
        u = u - np.nanmean(u, axis=0)
        v = v - np.nanmean(v, axis=0)
        z = z - np.nanmean(z, axis=0)
        u, v, z = (np.nan_to_num(a) for a in (u, v, z))
        spec_u = wavenumber_frequency(u, dt_days, dd_km)
        spec_v = wavenumber_frequency(v, dt_days, dd_km)
        total = spec_u.positive_energy + spec_u.negative_energy
        total += spec_v.positive_energy + spec_v.negative_energy
        off = spec_u.positive_energy + spec_v.positive_energy
        fraction = float(off / total) if total > 0 else 0.0
        km_per_day = 1000.0 / 86400.0
        if precise is None or s in precise:
            est = propagation_speed(z, dt_days, dd_km, direction="positive")
            speed = float(est.speed) * km_per_day
            sd = float(abs(est.speed_hi - est.speed_lo)) / (2 * 1.96) * km_per_day
        else:
            speed = float(centroid_speed(spec_v, +1)) * km_per_day
            sd = 0.0
        pw = np.nan
        if has_ssh:
            h = np.asarray(rh[:, s, gate_i], dtype=np.float64)
            un = np.asarray(ru[:, s, gate_i], dtype=np.float64) * direction[s]
            ok = np.isfinite(h) & np.isfinite(un)
            if ok.sum() > 2:
                p = settings.sources.rho0 * G * (h[ok] - h[ok].mean())
                pw = float(np.mean((un[ok] - un[ok].mean()) * p))
        if not abs(speed) <= settings.sources.max_speed_cm_s / 100.0:
            # No coherent propagation on this ray (the Radon scan ran to near-vertical
            # lines): the speed is not measurable here.
            speed, sd = np.nan, np.nan
        sd = sd if np.isfinite(sd) or not np.isfinite(speed) else 0.0
        return (s, fraction, speed, sd, 0.5 * np.mean(u**2 + v**2, axis=1), pw,
                ray_lon[s, gate_i], ray_lat[s, gate_i])

    # Stations on all cores (the FFTs and the compiled Radon scan release the GIL), in
    # blocks whose series pages are released after each, so they do not pile up in memory.
    rows = []
    workers = max(1, min(os.cpu_count() or 1, GATE_THREADS))
    block = 8 * workers
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for b0 in range(0, ru.shape[1], block):
            rows += [r for r in pool.map(one_gate, range(b0, min(ru.shape[1], b0 + block)))
                     if r is not None]
            release(ru, rv, rz, rh)
    stations, fractions, speeds, sds, eke_ts, pws, glon, glat = (
        [r[k] for r in rows] for k in range(8))
    if not stations:
        return _empty_gates(series)
    return GateSet(
        station=np.asarray(stations),
        gate_index=np.full(len(stations), gate_i),
        window=np.tile(win, (len(stations), 1)),
        eke_series=np.stack(eke_ts, axis=1),
        offshore_fraction=np.asarray(fractions),
        speed=np.asarray(speeds),
        speed_sd=np.asarray(sds),
        pressure_work=np.asarray(pws),
        lon=np.asarray(glon),
        lat=np.asarray(glat),
    )


def _empty_gates(series: xr.Dataset) -> GateSet:
    n_t = series.sizes["time"]
    e = np.zeros(0)
    return GateSet(np.zeros(0, int), np.zeros(0, int), np.zeros((0, 0), int),
                   np.zeros((n_t, 0)), e, e, e, e, e, e)


def decorrelation_steps(x: np.ndarray) -> float:
    """e-folding lag (in samples) of the mean autocorrelation of the columns of ``x``.

    Used for the bootstrap block length; common practice (e.g. Bretherton et al. 1999 for
    effective sample size).
    """
    x = np.asarray(x, dtype=float)
    x = x - x.mean(axis=0)
    n = x.shape[0]
    var = (x**2).sum(axis=0)
    ok = var > 0
    if not ok.any():
        return 1.0
    x = x[:, ok] / np.sqrt(var[ok])
    spec = np.fft.rfft(x, n=2 * n, axis=0)
    acf = np.fft.irfft(np.abs(spec) ** 2, axis=0)[:n].mean(axis=1)
    below = np.flatnonzero(acf < np.exp(-1))
    return float(below[0]) if below.size else float(n)


def _gate_lengths_m(lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    """Length of gate represented by each point: half the distance to each neighbour."""
    if lon.size == 1:
        return np.array([np.nan])
    d = haversine_m(lon[:-1], lat[:-1], lon[1:], lat[1:])
    out = np.zeros(lon.size)
    out[:-1] += 0.5 * d
    out[1:] += 0.5 * d
    out[0] += 0.5 * d[0]
    out[-1] += 0.5 * d[-1]
    return out


@dataclass
class FeedResult:
    table: pd.DataFrame            # one row per source: feed, interval, speed, gate info
    gates: list[dict]              # gate geometry per source (lon, lat arrays)
    bootstrap_feeds: np.ndarray    # (n_boot, n_sources) for rank stability
    background_w_per_m2: float     # B * rho0 (W m-2 per m depth... per m of gate)


def offshore_feed(
    sources: pd.DataFrame, gates: GateSet, frame, settings: Settings
) -> FeedResult:
    """Feed, interval and speed for each source (see module docstring)."""
    src = settings.sources
    rho0 = src.rho0
    n_src = len(sources)
    n_t = gates.eke_series.shape[0]
    rng = np.random.default_rng(src.seed)
    st = frame.stations
    if gates.station.size == 0 or n_src == 0:
        table = pd.DataFrame({
            "feed_w_per_m": np.full(n_src, np.nan), "feed_lo": np.full(n_src, np.nan),
            "feed_hi": np.full(n_src, np.nan), "west_speed_cm_s": np.full(n_src, np.nan),
            "west_speed_sd_cm_s": np.full(n_src, np.nan),
            "pwork_w_per_m": np.full(n_src, np.nan), "gate_n_rays": np.zeros(n_src, int),
        })
        return FeedResult(table, [{} for _ in range(n_src)], np.zeros((0, n_src)), float("nan"))

    mean_eke = gates.eke_series.mean(axis=0)
    flux_density = mean_eke * gates.offshore_fraction  # m2 s-2, multiplied by c later

    members: list[np.ndarray] = []
    for _, row in sources.iterrows():
        same = st["segment_id"].values[gates.station] == row["segment_id"]
        near = np.abs(st["alongshore_km"].values[gates.station] - row["alongshore_km"])
        members.append(np.flatnonzero(same & (near <= src.gate_halfwidth_km)))

    # Background: median offshore flux density over the gates of the coast that belong to
    # no source (the flux not localized at a source); the lower quartile of all gates when
    # sources leave fewer than three such gates.
    in_any = np.zeros(gates.station.size, bool)
    for m in members:
        in_any[m] = True
    quiet = np.flatnonzero(~in_any)
    bg_q = 50.0 if quiet.size >= 3 else 25.0
    bg_set = quiet if quiet.size >= 3 else np.arange(gates.station.size)
    bg_speeds = gates.speed[bg_set]
    bg_speeds = bg_speeds[np.isfinite(bg_speeds)]
    c_bg = float(np.median(np.clip(bg_speeds, 0, None))) if bg_speeds.size else 0.0

    steps = decorrelation_steps(gates.eke_series)
    block = int(min(max(2 * np.ceil(steps), 10), max(n_t // 4, 1)))
    n_boot = src.n_bootstrap
    n_blocks = int(np.ceil(n_t / block))
    starts = rng.integers(0, max(n_t - block + 1, 1), size=(n_boot, n_blocks))
    boot_idx = (starts[:, :, None] + np.arange(block)[None, None, :]).reshape(n_boot, -1)[:, :n_t]
    boot_mean = np.stack([gates.eke_series[i].mean(axis=0) for i in boot_idx])  # (b, g)

    def gate_speed(m: np.ndarray, energy: np.ndarray) -> tuple[float, float]:
        """Energy-weighted speed over the gate's rays and a robust spread.

        Rays whose speed lies more than 3 scaled median absolute deviations from the
        gate's median are left out (a ray that caught little coherent propagation gives
        a wild estimate), as are rays with no measurable speed; the spread is the median of
        the remaining rays' own spreads. A gate with no measured speed takes the coast's
        background speed.
        """
        speeds = gates.speed[m]
        measured = np.isfinite(speeds)
        if not measured.any():
            return c_bg, 0.0
        med = np.median(speeds[measured])
        mad = 1.4826 * np.median(np.abs(speeds[measured] - med))
        keep = measured & (np.abs(np.where(measured, speeds, med) - med) <= 3.0 * mad
                           if mad > 0 else measured)
        w = np.clip(energy[m], 0, None) * keep
        w = w / w.sum() if w.sum() > 0 else keep / keep.sum()
        return (float(np.sum(w[keep] * speeds[keep])),
                float(np.median(gates.speed_sd[m][keep])))

    rows, gate_geoms = [], []
    boot_feeds = np.zeros((n_boot, n_src))
    bg_boot = np.percentile((boot_mean * gates.offshore_fraction)[:, bg_set], bg_q, axis=1) * c_bg
    bg = float(np.percentile(flux_density[bg_set], bg_q) * c_bg)
    for j, m in enumerate(members):
        if m.size == 0:
            rows.append({"feed_w_per_m": np.nan, "feed_lo": np.nan, "feed_hi": np.nan,
                         "west_speed_cm_s": np.nan, "west_speed_sd_cm_s": np.nan,
                         "pwork_w_per_m": np.nan, "gate_n_rays": 0})
            gate_geoms.append({})
            continue
        order = np.argsort(gates.lat[m])
        m = m[order]
        dl = _gate_lengths_m(gates.lon[m], gates.lat[m])
        if not np.isfinite(dl).all():
            dl = np.full(m.size, settings.coast.station_spacing_km * 1000.0)
        c_w, c_sd = gate_speed(m, flux_density)
        feed = rho0 * float(np.sum((flux_density[m] * c_w - bg) * dl))
        c_draw = np.clip(c_w + c_sd * rng.standard_normal(n_boot), 0.0, None)
        fb = rho0 * np.sum((boot_mean[:, m] * gates.offshore_fraction[m] * c_draw[:, None]
                            - bg_boot[:, None]) * dl[None, :], axis=1)
        boot_feeds[:, j] = fb
        lo, hi = np.percentile(fb, [2.5, 97.5])
        direction = st["ray_dir"].values[gates.station[m]]
        west = -np.sign(np.median(direction)) * c_w
        pw = gates.pressure_work[m]
        pwork = float(np.sum(pw * dl)) if np.isfinite(pw).all() else np.nan
        rows.append({"feed_w_per_m": feed, "feed_lo": float(lo), "feed_hi": float(hi),
                     "west_speed_cm_s": 100.0 * west, "west_speed_sd_cm_s": 100.0 * c_sd,
                     "pwork_w_per_m": pwork, "gate_n_rays": int(m.size)})
        gate_geoms.append({"lon": gates.lon[m], "lat": gates.lat[m]})
    return FeedResult(pd.DataFrame(rows), gate_geoms, boot_feeds, rho0 * bg)


def rank_sources(sources: pd.DataFrame, feed: FeedResult
                 ) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray]:
    """Join feeds to the sources, rank by feed (1 = largest), and measure rank stability.

    Rank stability of a source is the fraction of bootstrap resamples in which it keeps its
    rank (a short record gives unstable ranks). Returns the ranked table, the gates (in rank
    order) and the bootstrap feeds with columns in rank order, shape (n_boot, n_sources).
    """
    table = pd.concat([sources.reset_index(drop=True), feed.table.reset_index(drop=True)], axis=1)
    order = np.argsort(-np.nan_to_num(table["feed_w_per_m"].values, nan=-np.inf), kind="stable")
    rank = np.empty(len(table), int)
    rank[order] = np.arange(1, len(table) + 1)
    table.insert(0, "rank", rank)
    stability = np.full(len(table), np.nan)
    if feed.bootstrap_feeds.size and len(table) > 0:
        b = np.nan_to_num(feed.bootstrap_feeds, nan=-np.inf)
        ranks_b = np.argsort(np.argsort(-b, axis=1, kind="stable"), axis=1) + 1
        stability = (ranks_b == rank[None, :]).mean(axis=0)
    table["rank_stability"] = stability
    table = table.sort_values("rank").reset_index(drop=True)
    gate_order = [feed.gates[i] for i in np.argsort(rank)] if feed.gates else []
    gates_df = pd.DataFrame({"rank": table["rank"].values,
                             "lon": [g.get("lon") for g in gate_order],
                             "lat": [g.get("lat") for g in gate_order]}) if len(table) else \
        pd.DataFrame({"rank": pd.Series(dtype=int), "lon": [], "lat": []})
    boot = feed.bootstrap_feeds[:, np.argsort(rank)] if feed.bootstrap_feeds.size else \
        np.zeros((0, len(table)))
    return table, gates_df, boot
