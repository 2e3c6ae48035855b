"""Assemble the figures and the HTML report of an ``analyze`` run from its products."""

from __future__ import annotations

import functools
from collections.abc import Callable
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from coastmon.config import Settings
from coastmon.report import figures as _figures
from coastmon.report.html import write_report
from coastmon.report.process import FigureProcess, drawn, take_back
from coastmon.signals import (
    cwt_morlet,
    lag1_autocorrelation,
    red_noise_significance,
)
from coastmon.sources.detect import nearshore_anomaly, time_step_days

Job = tuple[str, "Future | Path", Callable[[], Path]]
"""A figure: its caption, its path or the future of it, and how to draw it here."""


def _draw(process: FigureProcess | None, name: str, *args, **kwargs
          ) -> tuple[Future | Path, Callable[[], Path]]:
    """Draw figure ``name`` in the figure process when there is one, else here at once."""
    local = functools.partial(getattr(_figures, name), *args, **kwargs)
    if process is None:
        return local(), local
    return process.submit(name, *args, **kwargs), local


def _top_source_figures(figdir: Path, prep, products, settings: Settings, series,
                        process: FigureProcess | None = None) -> list[Job]:
    src = products.sources
    out: list[Job] = []
    if len(src) == 0:
        return out
    dt = time_step_days(series)
    t_days = np.asarray(series["time_days"].values, dtype=float)
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    zeta_ns = nearshore_anomaly(series["section_zeta"].values, series["offset_km"].values,
                                settings.sources.nearshore_km)
    all_ok = np.isfinite(zeta_ns).any(axis=0)
    bg_alpha = float(np.clip(np.nanmedian(lag1_autocorrelation(
        np.nan_to_num(zeta_ns[:, all_ok].T), axis=-1)), 0.0, 0.99))
    bg_var = float(np.nanmedian(np.nanvar(zeta_ns[:, all_ok], axis=0)))
    for _, row in src.head(2).iterrows():
        rank = int(row["rank"])
        s = int(row["station"])
        direction = float(prep.frame.stations["ray_dir"].values[s]) or -1.0
        hov = np.asarray(series["ray_zeta"].data[:, s, :], dtype=float)
        if np.isfinite(hov).any():
            speed = row["west_speed_cm_s"] / 100.0 * (-direction)
            rossby = products.rossby_speed_cm_s / 100.0 * (-direction)
            job = _draw(process, "hovmoller_figure", figdir / f"hovmoller_rank{rank}.png",
                        t_days, ray_km, hov * 1e5, "relative vorticity (10⁻⁵ s⁻¹)",
                        speed_m_s=float(speed) if np.isfinite(speed) else None,
                        rossby_speed_m_s=float(rossby))
            out.append((f"Hovmöller diagram of relative vorticity along the zonal ray from "
                        f"source {rank}; distance increases away from the coast along the "
                        f"parallel. Solid line: measured speed of the westward-travelling "
                        f"eddy-band energy at the gate (the feed's speed); dashed: long "
                        f"baroclinic Rossby-wave speed.", *job))
        x = np.nan_to_num(zeta_ns[:, s])
        wt = cwt_morlet(x, dt, dj=settings.signals.dj, omega0=settings.signals.omega0)
        sig = red_noise_significance(bg_var, bg_alpha, wt.periods, dt,
                                     level=settings.signals.significance)
        power = wt.power
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = power / sig[:, None]
            norm = power / (bg_var if bg_var > 0 else 1.0)
        job = _draw(process, "wavelet_figure", figdir / f"wavelet_rank{rank}.png", t_days,
                    wt.periods, norm, ratio, wt.coi, x * 1e5,
                    series_label="near-shore ζ′ (10⁻⁵ s⁻¹)",
                    power_label="wavelet power / coast background variance")
        out.append((f"Wavelet power of the near-shore vorticity at source {rank}, relative to "
                    "the coast's background; contours: 95 % red-noise significance; hatched: "
                    "cone of influence.", *job))
    return out


def start_figures(stage: Path, prep, products, settings: Settings, series=None,
                  process: FigureProcess | None = None) -> list[Job]:
    """The figures that need no GIS layers (along-shore profiles, Hovmöllers, wavelet
    spectra): handed to the figure ``process`` when there is one, so that it draws them
    while this process writes the other outputs, else drawn here at once."""
    figdir = stage / "figures"
    figdir.mkdir(exist_ok=True)
    prof = products.profiles
    capes = prep.capes
    capes_km = [(str(c), float(k)) for c, k in zip(capes["cape_id"], capes["alongshore_km"],
                                                    strict=True)] if len(capes) else []
    sources_km = [(int(r), float(k)) for r, k in zip(products.sources["rank"],
                                                     products.sources["alongshore_km"],
                                                     strict=True)] if len(products.sources) else []
    seg0 = prof["segment_id"].values == np.bincount(prof["segment_id"].values).argmax()
    seg_id = int(np.bincount(prof["segment_id"].values).argmax())
    capes_km = [c for c, s in zip(capes_km, capes["segment_id"] if len(capes) else [],
                                  strict=True) if int(s) == seg_id]
    sources_km = [c for c, s in zip(sources_km, products.sources["segment_id"]
                                    if len(products.sources) else [], strict=True)
                  if int(s) == seg_id]
    jobs: list[Job] = [(
        "Along-shore profiles on the main coast segment: (a) near-shore eddy "
        "kinetic energy, (b) near-shore relative-vorticity variance, (c) persistence: "
        "fraction of independent time windows in which the eddy-band variance is "
        "above the local background (the neighbouring coast on both sides), "
        "(d) localization: eddy-band variance over that local background (1 = "
        "background). Capes in grey, sources by rank.",
        *_draw(process, "alongshore_figure", figdir / "alongshore_profiles.png",
               prof["alongshore_km"].values[seg0],
               [("EKE (cm² s⁻²)", prof["eke_ns"].values[seg0] * 1e4),
                ("ζ′ variance (10⁻¹² s⁻²)", prof["zeta_var_ns"].values[seg0] * 1e12),
                ("persistence", prof["persistence"].values[seg0]),
                ("localization", prof["localization"].values[seg0])],
               capes_km=capes_km, sources_km=sources_km))]
    if series is not None:
        jobs.extend(_top_source_figures(figdir, prep, products, settings, series, process))
    return jobs


def write_figures_and_report(stage: Path, prep, products, layers: dict, settings: Settings,
                             provenance: dict[str, Any], series=None,
                             started: list[Job] | None = None) -> None:
    """Write ``figures/*.png`` and ``report.html`` into the staging folder.

    ``started``: the figures of :func:`start_figures` when it was called already (they
    may still be being drawn by the figure process); they are started here otherwise.
    """
    figdir = stage / "figures"
    figdir.mkdir(exist_ok=True)
    if started is None:
        started = start_figures(stage, prep, products, settings, series)
    stats = products.stats
    capes = prep.capes
    eke = np.asarray(stats["eke"].values) * 1e4
    p = _figures.map_figure(
        figdir / "map_eke.png", stats["lon"].values, stats["lat"].values, eke,
        "mean eddy kinetic energy (cm² s⁻²)", layers["coastline"], layers["capes"],
        layers["sources"], layers["gates"], layers["plume_axes"],
        mask2d=np.asarray(prep.ds["mask"].values))
    figures: list[tuple[str, Path]] = [
        ("Mean eddy kinetic energy with the coastline, capes (triangles), ranked "
         "sources (numbered), the offshore gates and the plume axes.", p)]
    later: list[tuple[str, Path]] = []
    if len(products.sources):
        p = _figures.ranking_figure(figdir / "ranking.png", products.sources)
        later.append(("Net westward eddy-band energy feed of each source across its "
                      "meridional gate, with its 95 % moving-block bootstrap interval and "
                      "(grey) its range over gate offsets ±50 km and window widths.", p))
    sp = products.spinup
    p = _figures.spinup_figure(figdir / "spinup.png", sp.length_days, sp.correlation,
                               sp.threshold, sp.length_needed_days if sp.settled else None)
    later.append(("Spin-up: pattern correlation of the running time mean with the "
                  "full-record mean against averaging length.", p))
    # The figures the process has not started yet are drawn here, from the last one back.
    here = take_back([(job, local) for _, job, local in started])
    figures.extend((caption, mine or drawn(job, local))
                   for (caption, job, local), mine in zip(started, here, strict=True))
    figures.extend(later)
    if not settings.output.report:
        return
    src = products.sources
    summary = {
        "sources found": str(len(src)),
        "capes found": str(len(capes)),
        "record": f"{provenance.get('n_time', '?')} time steps",
        "grid": " × ".join(str(n) for n in provenance.get("grid_shape", [])),
        "deformation radius used": f"{prep.ld_km:.0f} km",
        "long Rossby-wave speed": f"{products.rossby_speed_cm_s:.1f} cm/s westward",
        "jet spacing": (f"{products.jet_spacing_km:.0f} km"
                        if np.isfinite(products.jet_spacing_km) else "not resolved"),
        "time mean settled after": (f"{sp.length_needed_days:.0f} days" if sp.settled
                                    else "not within the record"),
    }
    table_cols = ["rank", "feed_w_per_m", "feed_lo", "feed_hi", "feed_struct_lo",
                  "feed_struct_hi", "gate_status", "persistence", "cape_id",
                  "dist_to_cape_km", "alongshore_km", "west_speed_cm_s", "rank_stability",
                  "lon", "lat"]
    write_report(stage / "report.html", title="Coastal vorticity sources and their westward feed",
                 summary=summary,
                 sources=src[[c for c in table_cols if c in src.columns]] if len(src) else src,
                 capes=pd.DataFrame(layers["capes"].drop(columns="geometry")),
                 figures=figures, provenance=provenance,
                 warnings=products.warnings)
