"""Sensitivity experiments: compare result folders of ``analyze`` cape by cape.

The folders may hold runs of one model with a cape smoothed away, another resolution or
forcing, an ensemble, or a run and gridded observations. The first folder (run A) is the
reference; every other run (B, C, ...) is compared with it. Only the files of the output
contract are read (``sources.csv``, ``capes.csv``, ``results.nc``).

* **Capes are matched first**, by the great-circle distance between their tips, one to one
  (linear sum assignment), each pair within its own tolerance
  :func:`coastmon.geometry.capes.cape_tolerance_km`:
  ``min(max(0.5 × scale_km, 2 × grid spacing), 2 × deformation radius)``. Grid spacing and
  deformation radius are the largest of all compared runs. Each matched headland becomes
  one *place*, named by the reference's cape id (the first run that has the cape).
* **Sources follow their capes** (``sources.cape_id``): a place's feed in a run is the feed
  of the run's source(s) at that cape (summed when a run has several).
* **Unanchored sources** (empty ``cape_id``) are matched by position to the places that
  have no source in that run yet, within ``min(max(2 × grid spacing, L_d), 2 × L_d)``
  (:func:`source_tolerance_km`); the others become places of their own, named by the
  position code ``S..`` of the source.
* **Change per place** (run X against A): the feed ratio X/A with a 95 % interval on the
  log scale (:func:`feed_ratio`, never negative) and a verdict word (:func:`verdict`):
  appeared, vanished, grew, shrank, no significant change; ``undetermined`` when a feed
  is not positive; ``no source`` for a cape without a source in either run.
* **Agreement of each pair**: Spearman's rank correlation of the feeds of the places with a
  source in both runs (needs three; with two, the pair's order agreement), the along-shore
  EKE profiles (correlation, RMS difference) and the jet spacing.

Outputs, staged and moved into the output folder together: ``compare.json``,
``cape_changes.csv``, ``matched_sources.csv``, ``map.gpkg`` and ``cape_changes.geojson``
(layer ``cape_changes``), ``compare.html`` and the figures ``figures/compare_*.png``.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
from dataclasses import dataclass, field
from html import escape
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter
from scipy.stats import spearmanr

from coastmon.errors import InputError, OutputError
from coastmon.geometry.capes import (
    apply_catalogue,
    cape_tolerance_km,
    grid_spacing_km,
    match_points,
    read_cape_catalogue,
    stable_ids,
)
from coastmon.grid.metrics import haversine_m
from coastmon.io.atomic import atomic_write_text, check_result_folder, staging_dir
from coastmon.io.gis import write_layers
from coastmon.io.results import CAUTIONS, read_results
from coastmon.report import figures as _fig
from coastmon.report.html import _css, _figures, _value
from coastmon.signals.propagation import default_deformation_radius_km

SAME_FRAME_KM = 1.0
"""Two runs share an along-shore frame when every station lies within this distance (km)."""
LABELS = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
"""Run labels in the order the folders are given; A is the reference."""
VERDICT_COLOURS = {
    "appeared": "#1a9e8f",
    "grew": "#2166ac",
    "no significant change": "#8c8c8c",
    "shrank": "#e08214",
    "vanished": "#b2182b",
    "undetermined": "#7b5ea7",
    "no source": "#d4d4d4",
}
"""Colour of each verdict in the figures, the page and the ``colour`` attribute of the GIS
layer (hex RGB)."""
VERDICT_RULE = (
    "Feed ratio R = F_X / F_A with a 95 % interval [R_lo, R_hi] from the two runs' bootstrap "
    "intervals read as log-normal. grew: R_lo > 1. shrank: R_hi < 1. no significant change: "
    "the interval contains 1, or a source found in one run only whose feed interval there "
    "reaches zero (too weak to be missed for certain). vanished: a source in A only whose "
    "feed interval in A lies above zero. appeared: the same for a source in X only. "
    "undetermined: a source in both runs but a feed that is not positive. no source: a cape "
    "with no source in either run."
)


# --------------------------------------------------------------------------- reading
@dataclass
class RunFolder:
    """The parts of an ``analyze`` output folder that a comparison needs."""

    path: Path
    sources: pd.DataFrame
    capes: pd.DataFrame
    profiles: xr.Dataset
    attrs: dict[str, Any]
    label: str = "A"
    grid_km: float = float("nan")
    """Median grid spacing of the run's grid (km), from ``results.nc``."""
    ld_km: float = float("nan")
    """Deformation radius the run used (km; ``results.nc`` attribute, or estimated)."""
    bootstrap: dict[int, np.ndarray] = field(default_factory=dict)
    """Source rank -> its bootstrap feeds (``feed_bootstrap`` of ``results.nc``, if stored)."""


def _not_a_run(path: Path, what: str) -> InputError:
    return InputError(
        f"The folder is not a finished coastmon analysis: {what}",
        where=str(path),
        todo="Give folders written by 'coastmon analyze' (or the outputs folder of a "
             "monitoring state), each holding sources.csv, capes.csv and results.nc",
    )


def _read_table(path: Path, required: tuple[str, ...]) -> pd.DataFrame:
    try:
        table = pd.read_csv(path, dtype={"cape_id": str}, keep_default_na=True)
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise _not_a_run(path.parent, f"{path.name} cannot be read ({exc})") from None
    missing = [c for c in required if c not in table.columns]
    if missing:
        raise _not_a_run(path.parent, f"{path.name} lacks the column(s) {', '.join(missing)}")
    if "cape_id" in table.columns:
        table["cape_id"] = table["cape_id"].fillna("").astype(str).str.strip()
    return table


def read_run_folder(path: str | os.PathLike[str], label: str = "A") -> RunFolder:
    """Read ``sources.csv``, ``capes.csv`` and ``results.nc`` of an analysis folder.

    Raises
    ------
    coastmon.errors.InputError
        The folder does not exist or lacks one of the files or columns.
    """
    path = Path(path)
    if not path.is_dir():
        raise InputError(
            "The result folder does not exist" if not path.exists()
            else "The path given as a result folder is a file",
            where=str(path),
            todo="Give the --out folder of a finished 'coastmon analyze' run",
        )
    for name in ("sources.csv", "capes.csv", "results.nc"):
        if not (path / name).is_file():
            raise _not_a_run(path, f"{name} is missing")
    sources = _read_table(path / "sources.csv",
                          ("rank", "feed_w_per_m", "feed_lo", "feed_hi", "alongshore_km",
                           "segment_id", "lon", "lat"))
    if "cape_id" not in sources.columns:
        sources["cape_id"] = ""
    capes = _read_table(path / "capes.csv", ("cape_id", "lon", "lat", "scale_km"))
    results = read_results(path / "results.nc")
    profiles = results.profiles
    if "eke_ns" not in profiles or "lon" not in profiles.coords:
        raise _not_a_run(path, "results.nc has no along-shore profile 'eke_ns' with positions")
    attrs = dict(results.attrs)
    grid_km = grid_spacing_km(results.stats["lon"].values, results.stats["lat"].values)
    ld_km = _float_attr(attrs, "deformation_radius_km")
    if not (np.isfinite(ld_km) and ld_km > 0):
        ld_km = float(default_deformation_radius_km(
            float(np.nanmedian(np.asarray(profiles["lat"].values, float)))))
    boot: dict[int, np.ndarray] = {}
    spectra = results.spectra
    if "feed_bootstrap" in spectra and "source" in spectra.coords:
        values = np.asarray(spectra["feed_bootstrap"].transpose("source", ...).values, float)
        boot = {int(r): values[k] for k, r in enumerate(spectra["source"].values)}
    return RunFolder(path, sources.sort_values("rank").reset_index(drop=True), capes,
                     profiles, attrs, label, grid_km, ld_km, boot)


def _float_attr(attrs: dict[str, Any], key: str) -> float:
    try:
        return float(attrs.get(key, float("nan")))
    except (TypeError, ValueError):
        return float("nan")


def rename_by_catalogue(run: RunFolder, catalogue: pd.DataFrame, grid_km: float,
                        ld_km: float) -> RunFolder:
    """The run with its capes (and the ``cape_id`` of its sources) named by a catalogue."""
    capes = apply_catalogue(run.capes, catalogue, grid_km, ld_km)
    new = dict(zip(run.capes["cape_id"].astype(str), capes["cape_id"].astype(str),
                   strict=True))
    sources = run.sources.copy()
    sources["cape_id"] = [new.get(c, "") if c else "" for c in sources["cape_id"].astype(str)]
    return RunFolder(path=run.path, sources=sources, capes=capes, profiles=run.profiles,
                     attrs=run.attrs, label=run.label, grid_km=run.grid_km, ld_km=run.ld_km,
                     bootstrap=run.bootstrap)


# --------------------------------------------------------------------------- frames
def _station_table(profiles: xr.Dataset) -> pd.DataFrame:
    seg = profiles["segment_id"].values if "segment_id" in profiles else \
        np.ones(profiles.sizes["station"], dtype=int)
    along = profiles["alongshore_km"].values if "alongshore_km" in profiles.coords else \
        np.full(profiles.sizes["station"], np.nan)
    return pd.DataFrame({"lon": np.asarray(profiles["lon"].values, dtype=float),
                         "lat": np.asarray(profiles["lat"].values, dtype=float),
                         "alongshore_km": np.asarray(along, dtype=float),
                         "segment_id": np.asarray(seg, dtype=int)})


def same_frame(profiles_a: xr.Dataset, profiles_b: xr.Dataset) -> bool:
    """True when both runs have the same stations (count and positions within SAME_FRAME_KM)."""
    a, b = _station_table(profiles_a), _station_table(profiles_b)
    if len(a) != len(b) or len(a) == 0:
        return False
    if not (np.isfinite(a["alongshore_km"]).all() and np.isfinite(b["alongshore_km"]).all()):
        return False
    d = haversine_m(a["lon"].values, a["lat"].values, b["lon"].values, b["lat"].values) / 1000.0
    return bool(np.nanmax(d) <= SAME_FRAME_KM) and bool(
        (a["segment_id"].values == b["segment_id"].values).all())


# --------------------------------------------------------------------------- numbers
def source_tolerance_km(grid_km: float, ld_km: float) -> float:
    r"""Farthest apart (km) two unanchored sources may be and still be the same source.

    .. math:: d_{max} = \min(\max(2\,\Delta,\ L_d),\ 2\,L_d)

    Sources of one run are at least :math:`2 L_d` apart (detection), so within
    :math:`L_d` a source can have only one partner; :math:`2\Delta` allows for the grid.
    Common practice, no source.
    """
    return float(min(max(2.0 * grid_km, ld_km), 2.0 * ld_km))


def feed_ratio(feed_a: np.ndarray, lo_a: np.ndarray, hi_a: np.ndarray, feed_b: np.ndarray,
               lo_b: np.ndarray, hi_b: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Ratio B/A of two positive feeds with a combined 95 % interval (never negative).

    .. math::
        r = F_B / F_A,\quad
        r_{lo} = r\,e^{-\sqrt{\delta_{B,lo}^2 + \delta_{A,hi}^2}},\quad
        r_{hi} = r\,e^{+\sqrt{\delta_{B,hi}^2 + \delta_{A,lo}^2}}

    with :math:`\delta_{lo} = \ln F - \ln F_{lo}` and :math:`\delta_{hi} = \ln F_{hi} -
    \ln F`: each bootstrap interval read as the 95 % interval of a log-normal estimate,
    independent errors of the two runs added in quadrature on the log scale (Taylor 1997,
    *An Introduction to Error Analysis*, ch. 3). A lower bound at or below zero is an
    infinite :math:`\delta_{lo}`: the ratio's interval then reaches 0 (B's) or infinity
    (A's). The ratio is NaN unless both feeds are positive and finite.
    """
    fa, la, ha, fb, lb, hb = (np.atleast_1d(np.asarray(x, dtype=float)) for x in
                              (feed_a, lo_a, hi_a, feed_b, lo_b, hi_b))
    usable = np.isfinite(fa) & np.isfinite(fb) & (fa > 0) & (fb > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(usable, fb / fa, np.nan)

        def half(lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
            d = np.log(upper) - np.log(lower)
            return np.where(np.isfinite(upper) & np.isfinite(lower) & (lower > 0), np.maximum(d, 0.0),
                            np.inf)

        dla, dha = half(la, fa), half(fa, ha)
        dlb, dhb = half(lb, fb), half(fb, hb)
        lo = ratio * np.exp(-np.sqrt(dlb**2 + dha**2))
        hi = ratio * np.exp(np.sqrt(dhb**2 + dla**2))
    return ratio, np.where(usable, lo, np.nan), np.where(usable, hi, np.nan)


def bootstrap_ratio_interval(boot_a: np.ndarray, boot_b: np.ndarray
                             ) -> tuple[float, float] | None:
    r"""95 % percentile interval of B/A from the two runs' bootstrap feeds.

    The runs are independent, so every resample of B is paired with every resample of A
    (the two-sample bootstrap): the interval is the 2.5 and 97.5 percentiles of
    :math:`F^*_{B,i} / F^*_{A,j}` over all pairs (Efron & Tibshirani 1993, *An Introduction
    to the Bootstrap*, ch. 13). None when a sample is missing or not positive (the ratio's
    distribution is then not defined); :func:`feed_ratio` is used instead.
    """
    a = np.asarray(boot_a, float).ravel()
    b = np.asarray(boot_b, float).ravel()
    if a.size < 20 or b.size < 20 or not (np.isfinite(a).all() and np.isfinite(b).all()):
        return None
    if a.min() <= 0 or b.min() <= 0:
        return None
    ratios = (b[:, None] / a[None, :]).ravel()
    lo, hi = np.percentile(ratios, [2.5, 97.5])
    return float(lo), float(hi)


def verdict(in_a: bool, in_b: bool, lo_a: float, lo_b: float, ratio: float, ratio_lo: float,
            ratio_hi: float) -> str:
    """The verdict word of one place, by the rule of :data:`VERDICT_RULE`."""
    if not in_a and not in_b:
        return "no source"
    if in_a and not in_b:
        return "vanished" if lo_a > 0 else "no significant change"
    if in_b and not in_a:
        return "appeared" if lo_b > 0 else "no significant change"
    if not np.isfinite(ratio):
        return "undetermined"
    if ratio_lo > 1.0:
        return "grew"
    if ratio_hi < 1.0:
        return "shrank"
    return "no significant change"


def combined_feed(feeds: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[float, float, float]:
    r"""Summed feed of several sources at one cape, with its interval.

    :math:`F = \sum F_i`, :math:`F_{lo} = F - \sqrt{\sum (F_i - F_{lo,i})^2}`,
    :math:`F_{hi} = F + \sqrt{\sum (F_{hi,i} - F_i)^2}` (independent errors in quadrature,
    Taylor 1997 ch. 3). One source is returned as it is.
    """
    f, lo, hi = (np.asarray(x, float) for x in (feeds, lo, hi))
    if f.size == 0:
        return float("nan"), float("nan"), float("nan")
    if f.size == 1:
        return float(f[0]), float(lo[0]), float(hi[0])
    total = float(f.sum())
    return (total, total - float(np.sqrt(((f - lo) ** 2).sum())),
            total + float(np.sqrt(((hi - f) ** 2).sum())))


def rank_agreement(feed_a: np.ndarray, feed_b: np.ndarray) -> dict[str, Any]:
    """Spearman's rank correlation (three or more pairs) and the order agreement of pairs.

    ``concordant``/``discordant`` count the pairs of places whose feeds are in the same /
    the opposite order in both runs (Kendall 1938); with two places this is the one
    measure that exists. ``rank_correlation`` is None with a ``note`` saying why when it
    cannot be computed.
    """
    fa, fb = np.asarray(feed_a, float), np.asarray(feed_b, float)
    ok = np.isfinite(fa) & np.isfinite(fb)
    fa, fb = fa[ok], fb[ok]
    n = int(fa.size)
    conc = disc = 0
    for i in range(n):
        for j in range(i + 1, n):
            s = np.sign(fa[i] - fa[j]) * np.sign(fb[i] - fb[j])
            conc += int(s > 0)
            disc += int(s < 0)
    out: dict[str, Any] = {"n": n, "concordant": conc, "discordant": disc,
                           "rank_correlation": None, "note": ""}
    if n >= 3:
        out["rank_correlation"] = float(spearmanr(fa, fb).statistic)
        if not np.isfinite(out["rank_correlation"]):
            out["rank_correlation"] = None
            out["note"] = "not computable: the feeds of one run are all equal"
    else:
        out["note"] = (f"not computable: only {n} place(s) have a source in both runs and a "
                       "rank correlation needs at least three"
                       + ("; the order of the two is compared instead" if n == 2 else ""))
    return out


def profile_tolerance_km(stations: pd.DataFrame) -> float:
    """Farthest a B station may lie from an A station to stand for it: max(3 × spacing, 30 km)."""
    spacing = []
    for _, grp in stations.groupby("segment_id"):
        s = np.sort(grp["alongshore_km"].to_numpy(float))
        if s.size > 1 and np.isfinite(s).all():
            spacing.append(np.diff(s))
    step = float(np.median(np.concatenate(spacing))) if spacing else 10.0
    return max(3.0 * step, 30.0)


def profile_on_a(profiles_a: xr.Dataset, profiles_b: xr.Dataset, name: str, shared: bool
                 ) -> np.ndarray:
    """B's profile ``name`` on A's stations (NaN where B has no station close enough).

    On a shared frame: linear interpolation in ``alongshore_km`` within each segment.
    Otherwise: the nearest B station by great-circle distance, within
    :func:`profile_tolerance_km` of A's stations.
    """
    a, b = _station_table(profiles_a), _station_table(profiles_b)
    vb = np.asarray(profiles_b[name].values, dtype=float)
    out = np.full(len(a), np.nan)
    if shared:
        for seg, grp in a.groupby("segment_id"):
            sel = (b["segment_id"].values == seg) & np.isfinite(vb)
            if sel.sum() < 2:
                continue
            order = np.argsort(b["alongshore_km"].values[sel])
            xb = b["alongshore_km"].values[sel][order]
            yb = vb[sel][order]
            xa = grp["alongshore_km"].values
            inside = (xa >= xb[0]) & (xa <= xb[-1])
            out[grp.index.values[inside]] = np.interp(xa[inside], xb, yb)
        return out
    if len(b) == 0:
        return out
    d = haversine_m(a["lon"].values[:, None], a["lat"].values[:, None],
                    b["lon"].values[None, :], b["lat"].values[None, :]) / 1000.0
    near = np.argmin(d, axis=1)
    close = d[np.arange(len(a)), near] <= profile_tolerance_km(a)
    out[close] = vb[near[close]]
    return out


def profile_agreement(a: np.ndarray, b: np.ndarray) -> tuple[float, float, int]:
    r"""Pearson correlation and RMS difference of two profiles over common finite stations.

    :math:`r = \sum a'b' / \sqrt{\sum a'^2 \sum b'^2}` (primes: deviations from the mean over
    the common stations) and :math:`\mathrm{RMS} = \sqrt{\overline{(b - a)^2}}`. The
    correlation is NaN with fewer than three common stations or a constant profile.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    ok = np.isfinite(a) & np.isfinite(b)
    n = int(ok.sum())
    if n == 0:
        return float("nan"), float("nan"), 0
    rms = float(np.sqrt(np.mean((b[ok] - a[ok]) ** 2)))
    if n < 3:
        return float("nan"), rms, n
    x = a[ok] - a[ok].mean()
    y = b[ok] - b[ok].mean()
    den = math.sqrt(float((x * x).sum()) * float((y * y).sum()))
    return (float((x * y).sum() / den) if den > 0 else float("nan")), rms, n


# --------------------------------------------------------------------------- places
@dataclass
class Place:
    """One headland (or one unanchored source) followed through all runs."""

    place_id: str
    kind: str
    """``cape`` (a matched cape) or ``source`` (an unanchored source)."""
    lon: float
    lat: float
    scale_km: float
    cape_row: dict[int, int] = field(default_factory=dict)
    """Run index -> row of the run's ``capes`` table."""
    source_rows: dict[int, list[int]] = field(default_factory=dict)
    """Run index -> rows of the run's ``sources`` table."""
    separation_km: dict[int, float] = field(default_factory=dict)
    """Run index -> distance of the run's cape (or source) from the place (km)."""
    src_lon: float = float("nan")
    src_lat: float = float("nan")


def _unique_id(code: str, taken: set[str]) -> str:
    name, k = code, 2
    while name in taken:
        name = f"{code}-{k}"
        k += 1
    taken.add(name)
    return name


def build_places(runs: list[RunFolder], grid_km: float, ld_km: float) -> list[Place]:
    """Follow every cape and source through the runs (see the module notes)."""
    places: list[Place] = []
    taken: set[str] = set()
    src_tol = source_tolerance_km(grid_km, ld_km)
    for r, run in enumerate(runs):
        capes = run.capes.reset_index(drop=True)
        open_ = [k for k, p in enumerate(places) if p.kind == "cape" and r not in p.cape_row]
        scales_p = np.array([places[k].scale_km for k in open_], float)
        scales_c = capes["scale_km"].to_numpy(float)
        tol = cape_tolerance_km(np.fmax(scales_p[:, None], scales_c[None, :]), grid_km, ld_km) \
            if open_ and len(capes) else np.zeros((len(open_), len(capes)))
        pairs = match_points([places[k].lon for k in open_], [places[k].lat for k in open_],
                             capes["lon"], capes["lat"], tol)
        matched = {j: (open_[i], d) for i, j, d in pairs}
        cape_place: dict[str, int] = {}
        for j in range(len(capes)):
            if j in matched:
                k, d = matched[j]
            else:
                places.append(Place(_unique_id(str(capes["cape_id"].iloc[j]), taken), "cape",
                                    float(capes["lon"].iloc[j]), float(capes["lat"].iloc[j]),
                                    float(capes["scale_km"].iloc[j])))
                k, d = len(places) - 1, 0.0
            places[k].cape_row[r] = j
            places[k].separation_km[r] = d
            cape_place[str(capes["cape_id"].iloc[j])] = k
        loose = []
        for i, cid in enumerate(run.sources["cape_id"].astype(str)):
            if cid and cid in cape_place:
                places[cape_place[cid]].source_rows.setdefault(r, []).append(i)
            else:
                loose.append(i)
        for p in places:
            rows = p.source_rows.get(r)
            if rows and not np.isfinite(p.src_lon):
                p.src_lon = float(run.sources["lon"].iloc[rows[0]])
                p.src_lat = float(run.sources["lat"].iloc[rows[0]])
        if not loose:
            continue
        free = [k for k, p in enumerate(places) if r not in p.source_rows]
        plon = [places[k].src_lon if np.isfinite(places[k].src_lon) else places[k].lon
                for k in free]
        plat = [places[k].src_lat if np.isfinite(places[k].src_lat) else places[k].lat
                for k in free]
        srcs = run.sources.iloc[loose]
        pairs = match_points(plon, plat, srcs["lon"], srcs["lat"], src_tol)
        got = {j: (free[i], d) for i, j, d in pairs}
        for j, i in enumerate(loose):
            lon, lat = float(srcs["lon"].iloc[j]), float(srcs["lat"].iloc[j])
            if j in got:
                k, d = got[j]
                if places[k].kind == "source" or r not in places[k].cape_row:
                    places[k].separation_km.setdefault(r, d)
            else:
                code = stable_ids([lon], [lat], prefix="S")[0]
                places.append(Place(_unique_id(code, taken), "source", lon, lat, float("nan"),
                                    src_lon=lon, src_lat=lat))
                k = len(places) - 1
                places[k].separation_km[r] = 0.0
            places[k].source_rows.setdefault(r, []).append(i)
    return places


def _order_along(places: list[Place], reference: RunFolder) -> list[Place]:
    """Places in the order of the reference's nearest station (segment, along-shore km)."""
    st = _station_table(reference.profiles)
    if len(st) == 0 or not places:
        return places
    lon = np.array([p.lon for p in places])
    lat = np.array([p.lat for p in places])
    d = haversine_m(lon[:, None], lat[:, None], st["lon"].values[None, :],
                    st["lat"].values[None, :])
    near = np.argmin(d, axis=1)
    key = list(zip(st["segment_id"].values[near], np.nan_to_num(st["alongshore_km"].values[near]),
                   range(len(places)), strict=True))
    return [places[k] for _, _, k in sorted(key)]


def _state(place: Place, r: int, run: RunFolder) -> dict[str, Any]:
    """What run ``r`` has at a place: cape, sources and their (summed) feed."""
    j = place.cape_row.get(r)
    rows = place.source_rows.get(r, [])
    src = run.sources.iloc[rows]
    feed, lo, hi = combined_feed(src["feed_w_per_m"], src["feed_lo"], src["feed_hi"])
    samples = [run.bootstrap.get(int(k)) for k in src["rank"]]
    boot = (np.sum(samples, axis=0) if samples and all(
        s is not None and s.shape == samples[0].shape for s in samples) else None)
    return {"bootstrap": boot,
        "cape_id": str(run.capes["cape_id"].iloc[j]) if j is not None else "",
        "cape_present": j is not None,
        "separation_km": place.separation_km.get(r, float("nan")),
        "n_sources": len(rows),
        "ranks": [int(x) for x in src["rank"]],
        "feed_w_per_m": feed, "feed_lo": lo, "feed_hi": hi,
        "lon": float(src["lon"].iloc[0]) if len(rows) else float("nan"),
        "lat": float(src["lat"].iloc[0]) if len(rows) else float("nan"),
    }


def change_table(places: list[Place], runs: list[RunFolder]) -> pd.DataFrame:
    """One row per place and compared run (B, C, ...): presence, feeds, ratio, verdict."""
    rows = []
    for r in range(1, len(runs)):
        for p in places:
            a, x = _state(p, 0, runs[0]), _state(p, r, runs[r])
            in_a, in_x = a["n_sources"] > 0, x["n_sources"] > 0
            ratio, lo, hi = (v[0] for v in feed_ratio(a["feed_w_per_m"], a["feed_lo"],
                                                      a["feed_hi"], x["feed_w_per_m"],
                                                      x["feed_lo"], x["feed_hi"]))
            method = "log-normal"
            if not (in_a and in_x):
                ratio = lo = hi = float("nan")
                method = ""
            elif np.isfinite(ratio) and a["bootstrap"] is not None \
                    and x["bootstrap"] is not None:
                interval = bootstrap_ratio_interval(a["bootstrap"], x["bootstrap"])
                if interval is not None:
                    lo, hi = interval
                    method = "bootstrap"
            word = verdict(in_a, in_x, a["feed_lo"], x["feed_lo"], ratio, lo, hi)
            rows.append({
                "place_id": p.place_id, "kind": p.kind, "run": runs[r].label,
                "lon": p.lon, "lat": p.lat,
                "cape_id_a": a["cape_id"], "cape_id_run": x["cape_id"],
                "cape_in_a": a["cape_present"], "cape_in_run": x["cape_present"],
                "separation_km": x["separation_km"],
                "present_in": ("both" if in_a and in_x else "A only" if in_a
                               else f"{runs[r].label} only" if in_x else "neither"),
                "ranks_a": ";".join(map(str, a["ranks"])),
                "ranks_run": ";".join(map(str, x["ranks"])),
                "feed_a": a["feed_w_per_m"], "feed_a_lo": a["feed_lo"],
                "feed_a_hi": a["feed_hi"],
                "feed_run": x["feed_w_per_m"], "feed_run_lo": x["feed_lo"],
                "feed_run_hi": x["feed_hi"],
                "feed_ratio": ratio, "ratio_lo": lo, "ratio_hi": hi, "ratio_method": method,
                "verdict": word, "colour": VERDICT_COLOURS[word],
            })
    columns = ["place_id", "kind", "run", "lon", "lat", "cape_id_a", "cape_id_run", "cape_in_a",
               "cape_in_run", "separation_km", "present_in", "ranks_a", "ranks_run", "feed_a",
               "feed_a_lo", "feed_a_hi", "feed_run", "feed_run_lo", "feed_run_hi",
               "feed_ratio", "ratio_lo", "ratio_hi", "ratio_method", "verdict", "colour"]
    return pd.DataFrame(rows, columns=columns)


def _source_record(row: pd.Series) -> dict[str, Any]:
    keys = ("rank", "cape_id", "feed_w_per_m", "feed_lo", "feed_hi", "alongshore_km",
            "segment_id", "lon", "lat")
    return {k: row[k] for k in keys if k in row.index}


def pair_summary(places: list[Place], runs: list[RunFolder], r: int,
                 changes: pd.DataFrame) -> tuple[dict[str, Any], pd.DataFrame]:
    """Agreement of run ``r`` with the reference, and its matched sources as a table."""
    a, x = runs[0], runs[r]
    rows = changes[(changes["run"] == x.label) & (changes["present_in"] == "both")]
    matched = pd.DataFrame({
        "run": x.label, "place_id": rows["place_id"],
        "rank_a": [int(s.split(";")[0]) for s in rows["ranks_a"]],
        "rank_run": [int(s.split(";")[0]) for s in rows["ranks_run"]],
        "cape_id_a": rows["cape_id_a"], "cape_id_run": rows["cape_id_run"],
        "separation_km": rows["separation_km"],
        "feed_a": rows["feed_a"], "feed_a_lo": rows["feed_a_lo"], "feed_a_hi": rows["feed_a_hi"],
        "feed_run": rows["feed_run"], "feed_run_lo": rows["feed_run_lo"],
        "feed_run_hi": rows["feed_run_hi"],
        "feed_ratio": rows["feed_ratio"], "ratio_lo": rows["ratio_lo"],
        "ratio_hi": rows["ratio_hi"], "verdict": rows["verdict"],
    }).reset_index(drop=True)
    agreement = rank_agreement(matched["feed_a"], matched["feed_run"])
    used_a = {i for p in places for i in p.source_rows.get(0, []) if r in p.source_rows}
    used_x = {i for p in places for i in p.source_rows.get(r, []) if 0 in p.source_rows}
    shared = same_frame(a.profiles, x.profiles)
    eke_on_a = profile_on_a(a.profiles, x.profiles, "eke_ns", shared)
    p_corr, p_rms, p_n = profile_agreement(np.asarray(a.profiles["eke_ns"].values, float),
                                           eke_on_a)
    jet_a, jet_x = _float_attr(a.attrs, "jet_spacing_km"), _float_attr(x.attrs, "jet_spacing_km")
    data = {
        "run": x.label, "dir": str(x.path.resolve()),
        "same_frame": shared,
        "places_with_source_in_both": len(matched),
        "rank_correlation": agreement["rank_correlation"],
        "rank_correlation_note": agreement["note"],
        "pairs_in_same_order": agreement["concordant"],
        "pairs_in_opposite_order": agreement["discordant"],
        "verdicts": {w: int((changes[changes["run"] == x.label]["verdict"] == w).sum())
                     for w in VERDICT_COLOURS},
        "unmatched_a": [_source_record(s) for i, s in a.sources.iterrows() if i not in used_a],
        "unmatched_run": [_source_record(s) for i, s in x.sources.iterrows() if i not in used_x],
        "profile_correlation": p_corr,
        "profile_rms_difference": p_rms,
        "profile_rms_difference_units": "m2 s-2",
        "profile_stations_compared": p_n,
        "jet_spacing_km": {"a": jet_a, "run": jet_x, "run_minus_a": jet_x - jet_a,
                           "run_over_a": jet_x / jet_a if jet_a else float("nan")},
        "matched_sources": matched.drop(columns=["run"]).to_dict(orient="records"),
    }
    return data, matched


# --------------------------------------------------------------------------- result
@dataclass
class CompareResult:
    """What :func:`compare_folders` found; ``data`` is the content of ``compare.json``."""

    out: Path
    data: dict[str, Any]
    changes: pd.DataFrame
    """The change table (``cape_changes.csv``): one row per place and compared run."""
    matched: pd.DataFrame
    """Places with a source in A and in a compared run (``matched_sources.csv``)."""
    notes: list[str] = field(default_factory=list)

    @property
    def rank_correlation(self) -> float:
        """Rank correlation of A with B (NaN when it cannot be computed)."""
        value = self.data["pairs"][0]["rank_correlation"]
        return float("nan") if value is None else float(value)

    def summary_text(self) -> str:
        d = self.data

        def num(value: Any, spec: str) -> str:
            return "n/a" if value is None else format(value, spec)

        runs = ", ".join(f"{r['label']} = {r['dir']}" for r in d["runs"])
        lines = [f"coastmon: compared {len(d['runs'])} runs ({runs}); A is the reference",
                 f"  {len(d['places'])} place(s): capes matched within "
                 f"min(max(0.5 x cape scale, 2 x {d['tolerances']['grid_km']:.0f} km), "
                 f"2 x {d['tolerances']['deformation_radius_km']:.0f} km), unanchored sources "
                 f"within {d['tolerances']['source_km']:.0f} km"]
        for pair in d["pairs"]:
            counts = ", ".join(f"{w} {n}" for w, n in pair["verdicts"].items() if n)
            rho = pair["rank_correlation"]
            lines.append(f"  {pair['run']} vs A: {counts or 'no places'}; rank correlation "
                         + (num(rho, ".2f") if rho is not None
                            else f"n/a ({pair['rank_correlation_note']})"))
        for _, c in self.changes.iterrows():
            if c["present_in"] == "neither":
                continue
            ratio = ("" if not np.isfinite(c["feed_ratio"]) else
                     f", ratio {c['feed_ratio']:.3g} [{c['ratio_lo']:.3g}, {c['ratio_hi']:.3g}]")
            lines.append(f"  {c['place_id']:<16} {c['run']}: {c['verdict']} "
                         f"(source in {c['present_in']}{ratio})")
        lines += [f"  note: {n}" for n in self.notes]
        lines.append(f"  page: {self.out / 'compare.html'}")
        return "\n".join(lines)


def _clean(value: Any) -> Any:
    """JSON-safe copy: NaN and infinities become null, numpy scalars plain numbers."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _check_out(out: Path, dirs: list[Path]) -> Path:
    out = Path(out).resolve()
    for d in dirs:
        rd = Path(d).resolve()
        if rd == out or out in rd.parents or rd in out.parents:
            raise OutputError(
                "The comparison output folder is, contains or lies inside a compared folder",
                where=f"--out {out}, compared folder {rd}",
                todo="Write the comparison to a separate folder so the result folders are "
                     "never touched",
            )
    return out


def compare_folders(*args: str | os.PathLike[str], out: str | os.PathLike[str] | None = None,
                    catalogue: str | os.PathLike[str] | None = None) -> CompareResult:
    """Compare two or more analysis folders cape by cape and write the comparison.

    Call as ``compare_folders(a, b, out)`` or ``compare_folders(a, b, c, ..., out=out)``.

    Parameters
    ----------
    *args
        Folders written by ``coastmon analyze``; the first (A) is the reference and every
        other one is compared with it (ratios X/A). Without ``out=``, the last argument is
        the output folder.
    out
        Output folder (created; files of the same name are replaced atomically).
    catalogue
        Optional cape catalogue CSV (``id``, ``lon``, ``lat``): the capes of every run are
        first renamed after the nearest catalogue cape within the cape tolerance.

    Raises
    ------
    coastmon.errors.InputError
        Fewer than two folders, a folder that is not an analysis folder, or a bad catalogue.
    coastmon.errors.OutputError
        ``out`` is, contains or lies inside a compared folder, or cannot be written.
    """
    dirs = [Path(a) for a in args]
    if out is None:
        if not dirs:
            raise TypeError("compare_folders needs the result folders and an output folder")
        out = dirs.pop()
    if len(dirs) < 2:
        raise InputError("A comparison needs at least two result folders",
                         where=", ".join(map(str, dirs)) or "(none given)",
                         todo="Give the reference folder first, then one or more others")
    if len(dirs) > len(LABELS):
        raise InputError(f"At most {len(LABELS)} result folders can be compared at once",
                         where=f"{len(dirs)} folders given",
                         todo="Compare the runs in groups, each with the same reference first")
    for folder in dirs:
        check_result_folder(folder)  # not one left half-published by a killed run
    runs = [read_run_folder(d, LABELS[k]) for k, d in enumerate(dirs)]
    out = _check_out(Path(out), [r.path for r in runs])
    notes: list[str] = []
    grids = [r.grid_km for r in runs if np.isfinite(r.grid_km)]
    grid_km = max(grids) if grids else 0.0
    ld_km = max(r.ld_km for r in runs)
    if catalogue is not None:
        cat = read_cape_catalogue(catalogue)
        runs = [rename_by_catalogue(r, cat, grid_km, ld_km) for r in runs]
    for r in runs:
        if "deformation_radius_km" not in r.attrs:
            notes.append(f"Run {r.label} does not record its deformation radius; "
                         f"{r.ld_km:.0f} km was estimated from its latitude.")
        bad = sorted({c for c in r.sources["cape_id"] if c}
                     - set(r.capes["cape_id"].astype(str)))
        if bad:
            notes.append(f"Run {r.label}: sources name cape(s) {', '.join(bad)} that capes.csv "
                         "does not list; they were matched by position as unanchored sources.")
    places = _order_along(build_places(runs, grid_km, ld_km), runs[0])
    changes = change_table(places, runs)
    pairs, matched = [], []
    for r in range(1, len(runs)):
        data_r, matched_r = pair_summary(places, runs, r, changes)
        pairs.append(data_r)
        matched.append(matched_r)
        if data_r["profile_stations_compared"] < 3:
            notes.append(f"Fewer than three stations of A have a station of {runs[r].label} "
                         "close enough to compare the along-shore EKE profiles.")
    matched_all = pd.concat(matched, ignore_index=True)
    unbounded = changes[(changes["present_in"] == "both")
                        & ~np.isfinite(changes["ratio_hi"].astype(float))
                        & np.isfinite(changes["feed_ratio"].astype(float))]
    if len(unbounded):
        notes.append("Some feed ratios have no upper bound (written as null or inf): the "
                     "reference's feed interval reaches zero at "
                     + ", ".join(sorted(set(unbounded["place_id"]))) + ".")
    data = {
        "runs": [{"label": r.label, "dir": str(r.path.resolve()), "grid_km": r.grid_km,
                  "deformation_radius_km": r.ld_km, "capes": len(r.capes),
                  "sources": len(r.sources)} for r in runs],
        "reference": "A",
        "catalogue": str(Path(catalogue).resolve()) if catalogue is not None else None,
        "tolerances": {
            "grid_km": grid_km, "deformation_radius_km": ld_km,
            "cape_km": "min(max(0.5 x scale_km, 2 x grid_km), 2 x deformation_radius_km)",
            "source_km": source_tolerance_km(grid_km, ld_km),
        },
        "verdict_rule": VERDICT_RULE,
        "places": [{"place_id": p.place_id, "kind": p.kind, "lon": p.lon, "lat": p.lat,
                    "runs": {runs[r].label: {k: v for k, v in _state(p, r, runs[r]).items()
                                             if k != "bootstrap"} for r in range(len(runs))}}
                   for p in places],
        "cape_changes": changes.drop(columns=["colour"]).to_dict(orient="records"),
        "pairs": pairs,
        "notes": notes,
        "cautions": CAUTIONS,
    }
    data = _clean(data)
    with staging_dir(out) as stage:
        (stage / "figures").mkdir()
        figs = [
            ("Westward eddy energy feed at each place (cape or unanchored source, along the "
             "coast of run A from top to bottom) in every run, with 95 % bootstrap intervals; "
             "an open marker in the left column means the run has no source there. The "
             "verdict of each compared run against A is written at the right.",
             feed_by_place_figure(stage / "figures" / "compare_feed_by_cape.png", places,
                                  runs, changes)),
            ("Feed of the places with a source in both runs, each compared run against run A, "
             "with their 95 % bootstrap intervals; the line is equal feed.",
             feeds_figure(stage / "figures" / "compare_feeds.png", matched_all)),
            ("Verdict at each place, one panel per compared run; grey line: the stations of "
             "run A along the coast.",
             verdict_map_figure(stage / "figures" / "compare_map.png", changes, runs[0])),
            ("Near-shore eddy kinetic energy along the coast: run A, and every other run put on "
             "A's stations.",
             profiles_figure(stage / "figures" / "compare_eke_profiles.png", runs)),
        ]
        atomic_write_text(stage / "compare.json", json.dumps(data, indent=2, allow_nan=False))
        changes.to_csv(stage / "cape_changes.csv", index=False)
        matched_all.to_csv(stage / "matched_sources.csv", index=False)
        write_layers({"cape_changes": changes_layer(changes)}, stage, ("gpkg", "geojson"))
        atomic_write_text(stage / "compare.html", render_page(data, changes, figs))
    return CompareResult(out, data, changes, matched_all, notes)


def changes_layer(changes: pd.DataFrame) -> gpd.GeoDataFrame:
    """The ``cape_changes`` GIS layer: one Point per place and compared run (EPSG:4326)."""
    table = changes.copy()
    for col in ("cape_in_a", "cape_in_run"):
        table[col] = table[col].astype(bool)
    return gpd.GeoDataFrame(table.drop(columns=["lon", "lat"]),
                            geometry=gpd.points_from_xy(table["lon"], table["lat"]),
                            crs="EPSG:4326")


# --------------------------------------------------------------------------- figures
_RUN_STYLE = [(_fig.BLUE, "o"), (_fig.ORANGE, "s"), (_fig.GREEN, "D"), (_fig.PURPLE, "^"),
              (_fig.SKY, "v"), (_fig.VERMILION, "P"), ("0.25", "X"), ("0.55", "h")]


def _run_style(r: int) -> tuple[str, str]:
    return _RUN_STYLE[r % len(_RUN_STYLE)]


@_fig._styled
def feed_by_place_figure(path: str | os.PathLike[str], places: list[Place],
                         runs: list[RunFolder], changes: pd.DataFrame) -> Path:
    """Feed at each place (rows) in each run (markers), log axis, verdicts at the right."""
    shown = [p for p in places if p.source_rows]
    n = max(len(shown), 1)
    fig = _fig._figure(7.6, 1.3 + (0.3 + 0.16 * len(runs)) * n)
    ax = fig.add_subplot()
    ax.set_xlabel("westward eddy energy feed (W m⁻¹), log scale")
    if not shown:
        ax.text(0.5, 0.5, "no sources in any run", transform=ax.transAxes, ha="center",
                va="center", color="0.3")
        ax.set_yticks([])
        return _fig._save(fig, path)
    states = [[_state(p, r, runs[r]) for r in range(len(runs))] for p in shown]
    vals = np.array([s["feed_w_per_m"] for row in states for s in row], float)
    los = np.array([s["feed_lo"] for row in states for s in row], float)
    his = np.array([s["feed_hi"] for row in states for s in row], float)
    pos = np.concatenate([vals, los, his])
    pos = pos[np.isfinite(pos) & (pos > 0)]
    missing = any(s["n_sources"] == 0 or not (s["feed_w_per_m"] > 0)
                  for row in states for s in row)
    lo_lim = (pos.min() / (3.0 if missing else 1.6)) if pos.size else 1.0
    hi_lim = pos.max() * 1.6 if pos.size else 10.0
    none_x = lo_lim * 1.25
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ax.xaxis.set_minor_formatter(NullFormatter())
    if missing:
        ax.axvspan(lo_lim, lo_lim * 1.6, color="0.95", zorder=0)
    offsets = (np.arange(len(runs)) - (len(runs) - 1) / 2.0) * min(0.7 / len(runs), 0.2)
    for y, row in enumerate(states):
        for r, s in enumerate(row):
            colour, marker = _run_style(r)
            yy = y + offsets[r]
            f = s["feed_w_per_m"]
            if s["n_sources"] == 0:
                ax.plot(none_x, yy, marker=marker, mfc="white", mec=colour, linestyle="none",
                        markersize=5.5, zorder=3)
                continue
            if not (np.isfinite(f) and f > 0):
                ax.plot(none_x, yy, marker="x", color=colour, linestyle="none", zorder=3)
                continue
            lo = s["feed_lo"] if np.isfinite(s["feed_lo"]) and s["feed_lo"] > 0 else lo_lim
            hi = s["feed_hi"] if np.isfinite(s["feed_hi"]) else f
            ax.plot([lo, hi], [yy, yy], color=colour, linewidth=1.2, alpha=0.8, zorder=2)
            ax.plot(f, yy, marker=marker, color=colour, linestyle="none", markersize=5.5,
                    zorder=3)
    labels = []
    for p, row in zip(shown, states, strict=True):
        ids = sorted({s["cape_id"] for s in row if s["cape_id"] and s["cape_id"] != p.place_id})
        labels.append(p.place_id + ("\n(also " + ", ".join(ids) + ")" if ids else ""))
    ax.set_yticks(range(len(shown)), labels, fontsize=7.5)
    ax.set_ylim(len(shown) - 0.5, -0.5)
    ax.set_xlim(lo_lim, hi_lim)
    if missing:
        ax.text(none_x, -0.5, "none", ha="center", va="bottom", fontsize=7, color="0.35")
    for y, p in enumerate(shown):
        for r in range(1, len(runs)):
            w = changes[(changes["place_id"] == p.place_id) & (changes["run"] == runs[r].label)]
            if len(w):
                word = str(w["verdict"].iloc[0])
                ax.annotate(f"{runs[r].label}: {word}", (1.02, y + offsets[r]),
                            xycoords=("axes fraction", "data"), va="center", fontsize=7,
                            color=VERDICT_COLOURS[word] if word != "no significant change"
                            else "0.35", annotation_clip=False)
    ax.grid(axis="x", color="0.92", linewidth=0.6, which="both")
    ax.set_axisbelow(True)
    handles = [Line2D([], [], color=_run_style(r)[0], marker=_run_style(r)[1], linestyle="none",
                      label=f"run {run.label}" + (" (reference)" if r == 0 else ""))
               for r, run in enumerate(runs)]
    ax.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, 1.0),
              ncol=min(len(runs), 4), frameon=False)
    return _fig._save(fig, path)


@_fig._styled
def feeds_figure(path: str | os.PathLike[str], matched: pd.DataFrame) -> Path:
    """Scatter of matched feeds (each run against A) with 95 % intervals and the 1:1 line."""
    fig = _fig._figure(5.0, 4.6)
    ax = fig.add_subplot()
    ax.set_xlabel("feed in run A (W m⁻¹)")
    ax.set_ylabel("feed in the compared run (W m⁻¹)")
    if len(matched) == 0:
        ax.text(0.5, 0.5, "no place has a source in both runs", transform=ax.transAxes,
                ha="center", va="center", color="0.3")
        return _fig._save(fig, path)
    fa, fb = matched["feed_a"].to_numpy(float), matched["feed_run"].to_numpy(float)
    xerr = np.vstack([np.clip(fa - matched["feed_a_lo"].to_numpy(float), 0, None),
                      np.clip(matched["feed_a_hi"].to_numpy(float) - fa, 0, None)])
    yerr = np.vstack([np.clip(fb - matched["feed_run_lo"].to_numpy(float), 0, None),
                      np.clip(matched["feed_run_hi"].to_numpy(float) - fb, 0, None)])
    xerr, yerr = np.nan_to_num(xerr), np.nan_to_num(yerr)
    handles = []
    for k, run in enumerate(dict.fromkeys(matched["run"])):
        sel = (matched["run"] == run).to_numpy()
        colour, marker = _run_style(k + 1)
        ax.errorbar(fa[sel], fb[sel], xerr=xerr[:, sel], yerr=yerr[:, sel], fmt=marker,
                    color=colour, ecolor=colour, elinewidth=0.9, capsize=2.5, markersize=5,
                    zorder=3, alpha=0.9)
        handles.append(Line2D([], [], color=colour, marker=marker, linestyle="none",
                              label=f"run {run}"))
    bounds = np.concatenate([fa - xerr[0], fa + xerr[1], fb - yerr[0], fb + yerr[1]])
    bounds = bounds[np.isfinite(bounds)]
    positive = bounds[bounds > 0]
    if positive.size == bounds.size and positive.size and positive.max() > 10 * positive.min():
        ax.set_xscale("log")
        ax.set_yscale("log")
        for axis in (ax.xaxis, ax.yaxis):
            axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
            axis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
            axis.set_minor_formatter(NullFormatter())
        lo, hi = positive.min() / 1.3, positive.max() * 1.3
    else:
        span = bounds.max() - bounds.min() if bounds.size and bounds.max() > bounds.min() \
            else max(abs(float(bounds.max())) if bounds.size else 1.0, 1.0)
        lo, hi = bounds.min() - 0.08 * span, bounds.max() + 0.08 * span
    ax.plot([lo, hi], [lo, hi], color="0.3", linewidth=1.0, linestyle="--", zorder=2)
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    named: set[str] = set()
    for x, y, name in zip(fa, fb, matched["place_id"], strict=True):
        if name not in named:
            named.add(name)
            ax.annotate(name, (x, y), xytext=(4, 4), textcoords="offset points", fontsize=7,
                        path_effects=_fig._HALO)
    ax.grid(color="0.92", linewidth=0.6)
    ax.set_axisbelow(True)
    handles.append(Line2D([], [], color="0.3", linestyle="--", label="equal feed"))
    ax.legend(handles=handles, loc="upper left", framealpha=0.9)
    return _fig._save(fig, path)


@_fig._styled
def verdict_map_figure(path: str | os.PathLike[str], changes: pd.DataFrame,
                       reference: RunFolder, max_panels: int = 4) -> Path:
    """Places coloured by verdict on longitude/latitude, one panel per compared run."""
    runs = list(dict.fromkeys(changes["run"]))[:max_panels] or ["B"]
    st = _station_table(reference.profiles)
    lon = np.concatenate([st["lon"].to_numpy(float), changes["lon"].to_numpy(float)])
    lat = np.concatenate([st["lat"].to_numpy(float), changes["lat"].to_numpy(float)])
    ok = np.isfinite(lon) & np.isfinite(lat)
    lon, lat = lon[ok], lat[ok]
    pad = 0.3
    x0, x1 = (lon.min() - pad, lon.max() + pad) if lon.size else (-1.0, 1.0)
    y0, y1 = (lat.min() - pad, lat.max() + pad) if lat.size else (-1.0, 1.0)
    aspect = 1.0 / max(math.cos(math.radians(0.5 * (y0 + y1))), 0.2)
    need = 0.75 * (y1 - y0) * aspect - (x1 - x0)
    if need > 0:
        x0, x1 = x0 - 0.5 * need, x1 + 0.5 * need
    height = 5.0
    width = min(height * (x1 - x0) / ((y1 - y0) * aspect), 6.0)
    fig = _fig._figure(0.9 + (width + 0.4) * len(runs) + 1.9, height + 0.8)
    axes = fig.subplots(1, len(runs), squeeze=False)[0]
    for k, (ax, run) in enumerate(zip(axes, runs, strict=True)):
        for _, grp in st.groupby("segment_id"):
            g = grp.sort_values("alongshore_km")
            ax.plot(g["lon"], g["lat"], color="0.6", linewidth=1.0, zorder=1)
        sel = changes[changes["run"] == run]
        for _, c in sel.iterrows():
            ax.plot(c["lon"], c["lat"], marker="o" if c["kind"] == "cape" else "s",
                    color=c["colour"], mec="0.15", mew=0.6, markersize=8, linestyle="none",
                    zorder=3)
            ax.annotate(c["place_id"], (c["lon"], c["lat"]), xytext=(-6, 0),
                        textcoords="offset points", ha="right", va="center", fontsize=6.5,
                        path_effects=_fig._HALO, zorder=4)
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
        ax.set_aspect(aspect)
        ax.xaxis.set_major_formatter(FuncFormatter(_fig._lon_text))
        ax.yaxis.set_major_formatter(FuncFormatter(_fig._lat_text))
        ax.tick_params(axis="x", labelrotation=30)
        ax.set_title(f"run {run} against A", fontsize=9)
        ax.grid(color="0.93", linewidth=0.5)
        if len(runs) > 1:
            _fig._panel_letter(ax, k)
    used = [w for w in VERDICT_COLOURS if (changes["verdict"] == w).any()]
    handles = [Line2D([], [], marker="o", color=VERDICT_COLOURS[w], mec="0.15",
                      linestyle="none", markersize=7, label=w) for w in used]
    if (changes["kind"] == "source").any():
        handles.append(Line2D([], [], marker="s", color="white", mec="0.15", linestyle="none",
                              markersize=6, label="square: unanchored source"))
    fig.legend(handles=handles, loc="outside right center", frameon=False, fontsize=7.5)
    return _fig._save(fig, path)


@_fig._styled
def profiles_figure(path: str | os.PathLike[str], runs: list[RunFolder],
                    max_panels: int = 3) -> Path:
    """Near-shore EKE against along-shore distance of A, every run on A's stations."""
    stations = _station_table(runs[0].profiles)
    counts = stations.groupby("segment_id").size().sort_values(ascending=False)
    segments = [int(s) for s, n in counts.items() if n >= 5][:max_panels] or \
        [int(s) for s in counts.index[:1]]
    curves = [np.asarray(runs[0].profiles["eke_ns"].values, float)]
    curves += [profile_on_a(runs[0].profiles, r.profiles, "eke_ns",
                            same_frame(runs[0].profiles, r.profiles)) for r in runs[1:]]
    fig = _fig._figure(6.4, 1.2 + 2.0 * max(len(segments), 1))
    axes = fig.subplots(max(len(segments), 1), 1, squeeze=False)[:, 0]
    for k, (ax, seg) in enumerate(zip(axes, segments, strict=False)):
        sel = stations["segment_id"].to_numpy() == seg
        x = stations["alongshore_km"].to_numpy(float)[sel]
        order = np.argsort(x)
        for r, (run, eke) in enumerate(zip(runs, curves, strict=True)):
            ax.plot(x[order], 1e4 * eke[sel][order], color=_run_style(r)[0], linewidth=1.3,
                    linestyle="-" if r == 0 else "--", label=f"run {run.label}")
        ax.set_ylabel("near-shore EKE (cm² s⁻²)")
        ax.text(0.99, 0.97, f"segment {seg}", transform=ax.transAxes, ha="right", va="top",
                fontsize=8, color="0.3")
        ax.grid(color="0.92", linewidth=0.6)
        if len(segments) > 1:
            _fig._panel_letter(ax, k)
        if k == 0:
            ax.legend(loc="upper center", framealpha=0.9, ncol=min(len(runs), 4))
    axes[-1].set_xlabel("along-shore distance in run A (km)")
    return _fig._save(fig, path)


# --------------------------------------------------------------------------- page
def _fmt(value: Any, spec: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, str):
        return escape(value) or "–"
    return escape(format(value, spec))


def _interval(lo: Any, hi: Any) -> str:
    if lo is None or (isinstance(lo, float) and not math.isfinite(lo)):
        return "–"
    top = "∞" if hi is None or not math.isfinite(float(hi)) else _fmt(hi, ".3g")
    return f"{_fmt(lo, '.3g')} – {top}"


def render_page(data: dict[str, Any], changes: pd.DataFrame,
                figures: list[tuple[str, Path]]) -> str:
    """The comparison as one self-contained HTML5 page (inline style, embedded figures)."""
    from coastmon import __version__

    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    runs = "".join(
        f"<tr><td>{escape(r['label'])}</td><td><code>{escape(r['dir'])}</code></td>"
        f"<td class=\"num\">{_fmt(r['grid_km'], '.1f')}</td>"
        f"<td class=\"num\">{_fmt(r['deformation_radius_km'], '.0f')}</td>"
        f"<td class=\"num\">{r['capes']}</td><td class=\"num\">{r['sources']}</td></tr>"
        for r in data["runs"])
    runs_table = ("<table><thead><tr><th>Run</th><th>Folder</th><th class=\"num\">Grid (km)</th>"
                  "<th class=\"num\">L<sub>d</sub> (km)</th><th class=\"num\">Capes</th>"
                  f"<th class=\"num\">Sources</th></tr></thead><tbody>{runs}</tbody></table>")
    head = ("<tr><th>Place</th><th>Run</th><th>Cape in A</th><th>Cape in run</th>"
            "<th class=\"num\">Apart (km)</th><th>Source in</th>"
            "<th class=\"num\">Feed A (W m⁻¹)</th><th class=\"num\">Feed run (W m⁻¹)</th>"
            "<th class=\"num\">Ratio run/A</th><th class=\"num\">95 % interval</th>"
            "<th>Verdict</th></tr>")
    rows = "".join(
        f"<tr><td>{_fmt(c['place_id'], '')}</td><td>{_fmt(c['run'], '')}</td>"
        f"<td>{_fmt(c['cape_id_a'], '')}</td><td>{_fmt(c['cape_id_run'], '')}</td>"
        f"<td class=\"num\">{_fmt(c['separation_km'], '.0f')}</td>"
        f"<td>{_fmt(c['present_in'], '')}</td>"
        f"<td class=\"num\">{_fmt(c['feed_a'], '.3g')}</td>"
        f"<td class=\"num\">{_fmt(c['feed_run'], '.3g')}</td>"
        f"<td class=\"num\">{_fmt(c['feed_ratio'], '.3g')}</td>"
        f"<td class=\"num\">{_interval(c['ratio_lo'], c['ratio_hi'])}</td>"
        f"<td><span style=\"display:inline-block;width:0.8em;height:0.8em;border-radius:50%;"
        f"background:{VERDICT_COLOURS[c['verdict']]};margin-right:6px\"></span>"
        f"{escape(c['verdict'])}</td></tr>"
        for _, c in changes.iterrows())
    table = (f'<div class="table-wrap"><table><thead>{head}</thead><tbody>{rows}</tbody>'
             "</table></div>" if len(changes)
             else '<p class="none">Neither run has a cape or a source.</p>')
    pairs = []
    for p in data["pairs"]:
        rho = p["rank_correlation"]
        facts = {
            "places with a source in both runs": p["places_with_source_in_both"],
            "rank correlation of their feeds (Spearman)":
                _fmt(rho, ".3f") if rho is not None else p["rank_correlation_note"],
            "pairs of places in the same / opposite order":
                f"{p['pairs_in_same_order']} / {p['pairs_in_opposite_order']}",
            "sources only in A / only in the run":
                f"{len(p['unmatched_a'])} / {len(p['unmatched_run'])}",
            "EKE profile correlation": _fmt(p["profile_correlation"], ".3f"),
            "EKE profile RMS difference": f"{_fmt(p['profile_rms_difference'], '.3g')} m² s⁻²",
            "jet spacing A / run": f"{_fmt(p['jet_spacing_km']['a'], '.0f')} km / "
                                   f"{_fmt(p['jet_spacing_km']['run'], '.0f')} km",
        }
        dl = "".join(f"<dt>{escape(k)}</dt><dd>{_value(v)}</dd>" for k, v in facts.items())
        pairs.append(f"<h3>Run {escape(p['run'])} against run A</h3>"
                     f'<dl class="facts">{dl}</dl>')
    tol = data["tolerances"]
    rules = (f"<p>Capes are matched by the distance between their tips, within "
             f"min(max(0.5 × cape scale, 2 × {tol['grid_km']:.1f} km), "
             f"2 × {tol['deformation_radius_km']:.0f} km); sources follow their capes; "
             f"unanchored sources are matched within {tol['source_km']:.0f} km. "
             f"{escape(data['verdict_rule'])}</p>")
    notes = ("<ul class=\"warnings\">" + "".join(f"<li>{escape(n)}</li>" for n in data["notes"])
             + "</ul>") if data["notes"] else '<p class="none">No notes.</p>'
    title = f"Comparison of {len(data['runs'])} runs"
    body = [
        f"<header><h1>{title}</h1>",
        f'<p class="meta">Written by coastmon {escape(__version__)} on {escape(now)}; '
        "run A is the reference.</p></header>",
        f'<section id="runs"><h2>Runs</h2>{runs_table}</section>',
        f'<section id="changes"><h2>Change at each cape</h2>{rules}{table}</section>',
        f'<section id="agreement"><h2>Agreement</h2>{"".join(pairs)}</section>',
        f'<section id="figures"><h2>Figures</h2>{_figures(figures)}</section>',
        f'<section id="warnings"><h2>Notes</h2>{notes}</section>',
        f'<section id="cautions" class="cautions"><h2>Cautions</h2><p>{escape(CAUTIONS)}</p>'
        "</section>",
        f"<footer>coastmon {escape(__version__)}</footer>",
    ]
    return ('<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{title}</title>\n<style>\n{_css()}</style>\n</head>\n"
            f"<body>\n<main>\n{''.join(body)}\n</main>\n</body>\n</html>\n")


__all__ = ["VERDICT_COLOURS", "CompareResult", "Place", "RunFolder", "bootstrap_ratio_interval",
           "build_places",
           "change_table", "combined_feed", "compare_folders", "feed_ratio", "profile_agreement",
           "profile_on_a", "rank_agreement", "read_run_folder", "same_frame",
           "source_tolerance_km", "verdict"]
