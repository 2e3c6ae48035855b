"""Does one run reproduce another? Compare two ``analyze`` result folders.

The two folders may come from two runs of one model, two resolutions, a run with a
smoothed coastline, or a run and gridded observations. The comparison uses only the
files of the output contract (``sources.csv``, ``capes.csv``, ``results.nc``):

* **Sources are matched one to one** by position. When both runs share the same
  along-shore frame (same number of stations at the same places, within
  :data:`SAME_FRAME_KM`), the distance between two sources is the difference of their
  ``alongshore_km`` on the same coast segment; otherwise (another coastline or
  resolution) it is the great-circle distance between the source positions. Pairs are
  chosen to minimise the summed distance (the assignment problem, solved with
  :func:`scipy.optimize.linear_sum_assignment`) and kept only within the tolerance
  ``max(TOLERANCE_SCALES × median cape scale_km of both runs, MIN_TOLERANCE_KM)``: a cape
  of scale *L* blurs a source's position over about *L* on either side.
* **Rank agreement**: Spearman's rank correlation of the matched feeds
  (:func:`scipy.stats.spearmanr`); NaN, with a note, when fewer than three sources match.
* **Feed ratio** B/A per matched source with a combined 95 % interval. Each feed's
  bootstrap interval is read as log-normal, so its lower and upper half-widths on the log
  scale are ``ln F − ln F_lo`` and ``ln F_hi − ln F``; for independent runs the log-ratio
  half-widths add in quadrature: lower ``sqrt(dB_lo² + dA_hi²)``, upper
  ``sqrt(dB_hi² + dA_lo²)`` (first-order error propagation, e.g. Taylor 1997, *An
  Introduction to Error Analysis*, ch. 3). When a feed or a bound is not positive (a
  bootstrap interval that reaches zero or below), the log scale is undefined and the
  linear first-order rule is used instead: standard errors ``(F_hi − F_lo)/(2 × 1.96)``,
  relative errors added in quadrature, interval ``r ± 1.96 σ_r``. Zero feeds give NaN.
* **Along-shore EKE profile**: B's near-shore EKE profile is put onto A's stations
  (linear interpolation in ``alongshore_km`` within each segment on a shared frame;
  otherwise the nearest B station within :func:`profile_tolerance_km`), then the Pearson
  correlation and the RMS difference over the stations where both are finite.
* **Jet spacing** of the two runs, their difference and ratio.

Outputs, written atomically into the output folder: ``compare.json``,
``matched_sources.csv``, ``compare.html`` (self-contained page) and
``figures/compare_feeds.png``, ``figures/compare_eke_profiles.png``.
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

import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.lines import Line2D
from scipy.optimize import linear_sum_assignment
from scipy.stats import norm, spearmanr

from coastmon.errors import InputError, OutputError
from coastmon.grid.metrics import haversine_m
from coastmon.io.atomic import atomic_write_text, check_result_folder, staging_dir
from coastmon.io.results import CAUTIONS, read_results
from coastmon.report import figures as _fig
from coastmon.report.html import _css, _figures, _value

TOLERANCE_SCALES = 2.0
"""Matching tolerance in units of the median cape scale (``scale_km``)."""
MIN_TOLERANCE_KM = 50.0
"""Smallest matching tolerance (km)."""
SAME_FRAME_KM = 1.0
"""Two runs share an along-shore frame when every station lies within this distance (km)."""
Z95 = float(norm.ppf(0.975))
"""Standard normal quantile of a two-sided 95 % interval (1.95996...)."""


# --------------------------------------------------------------------------- reading
@dataclass
class RunFolder:
    """The parts of an ``analyze`` output folder that a comparison needs."""

    path: Path
    sources: pd.DataFrame
    capes: pd.DataFrame
    profiles: xr.Dataset
    attrs: dict[str, Any]


def _not_a_run(path: Path, what: str) -> InputError:
    return InputError(
        f"The folder is not a finished coastmon analysis: {what}",
        where=str(path),
        todo="Give two folders written by 'coastmon analyze' (or the outputs folder of a "
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
        table["cape_id"] = table["cape_id"].fillna("").astype(str)
    return table


def read_run_folder(path: str | os.PathLike[str]) -> RunFolder:
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
    capes = _read_table(path / "capes.csv", ("cape_id", "scale_km"))
    results = read_results(path / "results.nc")
    profiles = results.profiles
    if "eke_ns" not in profiles or "lon" not in profiles.coords:
        raise _not_a_run(path, "results.nc has no along-shore profile 'eke_ns' with positions")
    return RunFolder(path, sources.sort_values("rank").reset_index(drop=True), capes,
                     profiles, dict(results.attrs))


# --------------------------------------------------------------------------- matching
def matching_tolerance_km(capes_a: pd.DataFrame, capes_b: pd.DataFrame) -> float:
    """``max(TOLERANCE_SCALES × median cape scale of both runs, MIN_TOLERANCE_KM)`` in km."""
    scales = np.concatenate([np.asarray(capes_a["scale_km"], dtype=float),
                             np.asarray(capes_b["scale_km"], dtype=float)])
    scales = scales[np.isfinite(scales)]
    if scales.size == 0:
        return MIN_TOLERANCE_KM
    return float(max(TOLERANCE_SCALES * np.median(scales), MIN_TOLERANCE_KM))


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


def source_distances_km(a: pd.DataFrame, b: pd.DataFrame, by: str) -> np.ndarray:
    """(len(a), len(b)) distances between sources: along-shore or great-circle (km).

    With ``by='alongshore'`` sources on different segments are infinitely far apart.
    """
    if by == "alongshore":
        d = np.abs(np.asarray(a["alongshore_km"], float)[:, None]
                   - np.asarray(b["alongshore_km"], float)[None, :])
        same_seg = (np.asarray(a["segment_id"])[:, None] == np.asarray(b["segment_id"])[None, :])
        return np.where(same_seg, d, np.inf)
    return haversine_m(np.asarray(a["lon"], float)[:, None], np.asarray(a["lat"], float)[:, None],
                       np.asarray(b["lon"], float)[None, :],
                       np.asarray(b["lat"], float)[None, :]) / 1000.0


def match_sources(a: pd.DataFrame, b: pd.DataFrame, tolerance_km: float, by: str
                  ) -> list[tuple[int, int, float]]:
    """One-to-one pairs ``(row_a, row_b, distance_km)`` within ``tolerance_km``.

    The pairing minimises the summed distance over pairs inside the tolerance
    (linear sum assignment); pairs farther apart than the tolerance are never made.
    """
    if len(a) == 0 or len(b) == 0:
        return []
    d = source_distances_km(a, b, by)
    inside = np.isfinite(d) & (d <= tolerance_km)
    big = 1.0e6 * (tolerance_km + 1.0)
    cost = np.where(inside, d, big)
    rows, cols = linear_sum_assignment(cost)
    pairs = [(int(i), int(j), float(d[i, j])) for i, j in zip(rows, cols, strict=True)
             if inside[i, j]]
    return sorted(pairs, key=lambda p: p[0])


# --------------------------------------------------------------------------- numbers
def feed_ratio(feed_a: np.ndarray, lo_a: np.ndarray, hi_a: np.ndarray, feed_b: np.ndarray,
               lo_b: np.ndarray, hi_b: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Ratio B/A of two feeds with a combined 95 % interval.

    Where both feeds and all four bounds are positive (log scale):

    .. math::
        r = F_B / F_A,\quad
        r_{lo} = r\,e^{-\sqrt{\delta_{B,lo}^2 + \delta_{A,hi}^2}},\quad
        r_{hi} = r\,e^{+\sqrt{\delta_{B,hi}^2 + \delta_{A,lo}^2}}

    with :math:`\delta_{lo} = \ln F - \ln F_{lo}` and :math:`\delta_{hi} = \ln F_{hi} -
    \ln F`: both intervals read as 95 % intervals of log-normal estimates, independent
    errors added in quadrature on the log scale (Taylor 1997, ch. 3). Elsewhere (linear
    first-order rule, same source): :math:`\sigma = (F_{hi} - F_{lo}) / (2 z_{0.975})`,
    :math:`\sigma_r = |r| \sqrt{(\sigma_A/F_A)^2 + (\sigma_B/F_B)^2}`, interval
    :math:`r \pm z_{0.975}\,\sigma_r`. NaN where a feed is zero or not finite.
    """
    arrays = [np.atleast_1d(np.asarray(x, dtype=float)) for x in
              (feed_a, lo_a, hi_a, feed_b, lo_b, hi_b)]
    fa, la, ha, fb, lb, hb = arrays
    positive = np.all([np.isfinite(x) & (x > 0) for x in arrays], axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        usable = np.isfinite(fa) & np.isfinite(fb) & (fa != 0)
        ratio = np.where(usable, fb / fa, np.nan)
        lfa, lla, lha = np.log(np.abs(fa)), np.log(np.abs(la)), np.log(np.abs(ha))
        lfb, llb, lhb = np.log(np.abs(fb)), np.log(np.abs(lb)), np.log(np.abs(hb))
        down = np.sqrt((lfb - llb) ** 2 + (lha - lfa) ** 2)
        up = np.sqrt((lhb - lfb) ** 2 + (lfa - lla) ** 2)
        sa = (ha - la) / (2.0 * Z95)
        sb = (hb - lb) / (2.0 * Z95)
        sr = np.abs(ratio) * np.sqrt((sa / fa) ** 2 + (sb / fb) ** 2)
        lo = np.where(positive, ratio * np.exp(-down), ratio - Z95 * sr)
        hi = np.where(positive, ratio * np.exp(up), ratio + Z95 * sr)
    lo = np.where(usable & np.isfinite(lo), lo, np.nan)
    hi = np.where(usable & np.isfinite(hi), hi, np.nan)
    return ratio, lo, hi


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


# --------------------------------------------------------------------------- result
@dataclass
class CompareResult:
    """What :func:`compare_folders` found; ``data`` is the content of ``compare.json``."""

    out: Path
    data: dict[str, Any]
    matched: pd.DataFrame
    notes: list[str] = field(default_factory=list)

    @property
    def rank_correlation(self) -> float:
        value = self.data["rank_correlation"]
        return float("nan") if value is None else float(value)

    def summary_text(self) -> str:
        d = self.data

        def num(value: Any, spec: str) -> str:
            return "n/a" if value is None else format(value, spec)

        lines = [
            f"coastmon: compared {d['a_dir']} (A) with {d['b_dir']} (B); "
            f"sources matched by {d['matched_by']} within {d['tolerance_km']:.0f} km",
            f"  matched {len(d['matched_sources'])}; unmatched in A {len(d['unmatched_a'])}, "
            f"in B {len(d['unmatched_b'])}",
            f"  rank correlation of matched feeds (Spearman): {num(d['rank_correlation'], '.2f')}",
            f"  along-shore EKE profile: correlation {num(d['profile_correlation'], '.2f')}, "
            f"RMS difference {num(d['profile_rms_difference'], '.3g')} m2 s-2",
            f"  jet spacing: A {num(d['jet_spacing_km']['a'], '.0f')} km, "
            f"B {num(d['jet_spacing_km']['b'], '.0f')} km",
        ]
        for _, r in self.matched.iterrows():
            lines.append(
                f"  A rank {int(r['rank_a'])} <-> B rank {int(r['rank_b'])} "
                f"({r['separation_km']:.0f} km apart): feed ratio B/A {r['feed_ratio']:.3g} "
                f"[{r['ratio_lo']:.3g}, {r['ratio_hi']:.3g}]")
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


def _source_record(row: pd.Series) -> dict[str, Any]:
    keys = ("rank", "cape_id", "feed_w_per_m", "feed_lo", "feed_hi", "alongshore_km",
            "segment_id", "lon", "lat")
    return {k: row[k] for k in keys if k in row.index}


def _check_out(out: Path, a_dir: Path, b_dir: Path) -> Path:
    out = Path(out).resolve()
    for d in (a_dir, b_dir):
        rd = Path(d).resolve()
        if rd == out or out in rd.parents or rd in out.parents:
            raise OutputError(
                "The comparison output folder is, contains or lies inside a compared folder",
                where=f"--out {out}, compared folder {rd}",
                todo="Write the comparison to a separate folder so the result folders are "
                     "never touched",
            )
    return out


def compare_folders(a_dir: str | os.PathLike[str], b_dir: str | os.PathLike[str],
                    out: str | os.PathLike[str]) -> CompareResult:
    """Compare two analysis folders and write ``compare.json``, the page and figures.

    Parameters
    ----------
    a_dir, b_dir
        Folders written by ``coastmon analyze`` (A is the reference; ratios are B/A).
    out
        Output folder (created; files of the same name are replaced atomically).

    Returns
    -------
    CompareResult

    Raises
    ------
    coastmon.errors.InputError
        A folder is missing or is not an analysis folder.
    coastmon.errors.OutputError
        ``out`` is one of the compared folders, or cannot be written.
    """
    for folder in (a_dir, b_dir):
        check_result_folder(Path(folder))  # not one left half-published by a killed run
    a = read_run_folder(a_dir)
    b = read_run_folder(b_dir)
    out = _check_out(Path(out), a.path, b.path)
    notes: list[str] = []

    shared = same_frame(a.profiles, b.profiles)
    by = "alongshore" if shared else "distance"
    tol = matching_tolerance_km(a.capes, b.capes)
    pairs = match_sources(a.sources, b.sources, tol, by)
    ia = [p[0] for p in pairs]
    ib = [p[1] for p in pairs]
    sa = a.sources.iloc[ia].reset_index(drop=True)
    sb = b.sources.iloc[ib].reset_index(drop=True)
    ratio, rlo, rhi = feed_ratio(sa["feed_w_per_m"], sa["feed_lo"], sa["feed_hi"],
                                 sb["feed_w_per_m"], sb["feed_lo"], sb["feed_hi"])
    matched = pd.DataFrame({
        "rank_a": sa["rank"].astype(int), "rank_b": sb["rank"].astype(int),
        "cape_id_a": sa.get("cape_id", ""), "cape_id_b": sb.get("cape_id", ""),
        "separation_km": [p[2] for p in pairs],
        "feed_a": sa["feed_w_per_m"].astype(float), "feed_a_lo": sa["feed_lo"].astype(float),
        "feed_a_hi": sa["feed_hi"].astype(float),
        "feed_b": sb["feed_w_per_m"].astype(float), "feed_b_lo": sb["feed_lo"].astype(float),
        "feed_b_hi": sb["feed_hi"].astype(float),
        "feed_ratio": ratio, "ratio_lo": rlo, "ratio_hi": rhi,
        "lon_a": sa["lon"].astype(float), "lat_a": sa["lat"].astype(float),
        "lon_b": sb["lon"].astype(float), "lat_b": sb["lat"].astype(float),
    })
    if len(matched) >= 3:
        rho = float(spearmanr(matched["feed_a"], matched["feed_b"]).statistic)
    else:
        rho = float("nan")
        notes.append(f"Only {len(matched)} source(s) matched; a rank correlation needs at "
                     "least three.")
    if len(matched) and not np.isfinite(rlo).all():
        notes.append("Some feed ratios have no interval: a feed is zero or an interval bound "
                     "is missing.")
    unmatched_a = [_source_record(r) for i, r in a.sources.iterrows() if i not in set(ia)]
    unmatched_b = [_source_record(r) for i, r in b.sources.iterrows() if i not in set(ib)]

    eke_a = np.asarray(a.profiles["eke_ns"].values, dtype=float)
    eke_b_on_a = profile_on_a(a.profiles, b.profiles, "eke_ns", shared)
    p_corr, p_rms, p_n = profile_agreement(eke_a, eke_b_on_a)
    if p_n < 3:
        notes.append("Fewer than three stations of A have a B station close enough to compare "
                     "the along-shore EKE profiles.")
    jet_a = _float_attr(a.attrs, "jet_spacing_km")
    jet_b = _float_attr(b.attrs, "jet_spacing_km")
    data = {
        "a_dir": str(a.path.resolve()),
        "b_dir": str(b.path.resolve()),
        "matched_by": by,
        "tolerance_km": tol,
        "matched_sources": matched.drop(columns=["lon_a", "lat_a", "lon_b", "lat_b"])
        .to_dict(orient="records"),
        "rank_correlation": rho,
        "unmatched_a": unmatched_a,
        "unmatched_b": unmatched_b,
        "profile_correlation": p_corr,
        "profile_rms_difference": p_rms,
        "profile_rms_difference_units": "m2 s-2",
        "profile_stations_compared": p_n,
        "jet_spacing_km": {"a": jet_a, "b": jet_b, "b_minus_a": jet_b - jet_a,
                           "b_over_a": jet_b / jet_a if jet_a else float("nan")},
        "notes": notes,
        "cautions": CAUTIONS,
    }
    data = _clean(data)
    with staging_dir(out) as stage:
        (stage / "figures").mkdir()
        figs = [
            ("Westward eddy energy feed of the matched sources, run B against run A, with "
             "their 95 % bootstrap intervals; the line is B = A.",
             feeds_figure(stage / "figures" / "compare_feeds.png", matched)),
            ("Near-shore eddy kinetic energy along the coast: run A, and run B put on A's "
             "stations.",
             profiles_figure(stage / "figures" / "compare_eke_profiles.png",
                             _station_table(a.profiles), eke_a, eke_b_on_a)),
        ]
        atomic_write_text(stage / "compare.json", json.dumps(data, indent=2, allow_nan=False))
        matched.to_csv(stage / "matched_sources.csv", index=False)
        atomic_write_text(stage / "compare.html", render_page(data, matched, figs))
    return CompareResult(out, data, matched, notes)


def _float_attr(attrs: dict[str, Any], key: str) -> float:
    try:
        return float(attrs.get(key, float("nan")))
    except (TypeError, ValueError):
        return float("nan")


# --------------------------------------------------------------------------- figures
@_fig._styled
def feeds_figure(path: str | os.PathLike[str], matched: pd.DataFrame) -> Path:
    """Scatter of matched feeds (B against A) with 95 % intervals and the 1:1 line."""
    fig = _fig._figure(5.0, 4.6)
    ax = fig.add_subplot()
    ax.set_xlabel("feed in run A (W m⁻¹)")
    ax.set_ylabel("feed in run B (W m⁻¹)")
    if len(matched) == 0:
        ax.text(0.5, 0.5, "no matched sources", transform=ax.transAxes, ha="center",
                va="center", color="0.3")
        return _fig._save(fig, path)
    fa, fb = matched["feed_a"].to_numpy(float), matched["feed_b"].to_numpy(float)
    xerr = np.vstack([np.clip(fa - matched["feed_a_lo"].to_numpy(float), 0, None),
                      np.clip(matched["feed_a_hi"].to_numpy(float) - fa, 0, None)])
    yerr = np.vstack([np.clip(fb - matched["feed_b_lo"].to_numpy(float), 0, None),
                      np.clip(matched["feed_b_hi"].to_numpy(float) - fb, 0, None)])
    ax.errorbar(fa, fb, xerr=xerr, yerr=yerr, fmt="o", color=_fig.BLUE, ecolor="0.35",
                elinewidth=1.0, capsize=2.5, markersize=5, zorder=3)
    bounds = np.concatenate([fa - xerr[0], fa + xerr[1], fb - yerr[0], fb + yerr[1]])
    bounds = bounds[np.isfinite(bounds)]
    positive = bounds[bounds > 0]
    if positive.size == bounds.size and positive.size and positive.max() > 10 * positive.min():
        ax.set_xscale("log")
        ax.set_yscale("log")
        lo, hi = positive.min() / 1.3, positive.max() * 1.3
    else:
        span = bounds.max() - bounds.min() if bounds.size else 1.0
        lo, hi = bounds.min() - 0.08 * span, bounds.max() + 0.08 * span
    ax.plot([lo, hi], [lo, hi], color=_fig.VERMILION, linewidth=1.1, zorder=2)
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    for x, y, ra, rb in zip(fa, fb, matched["rank_a"], matched["rank_b"], strict=True):
        ax.annotate(f"A{ra}/B{rb}", (x, y), xytext=(4, 4), textcoords="offset points",
                    fontsize=7, path_effects=_fig._HALO)
    ax.grid(color="0.92", linewidth=0.6)
    ax.set_axisbelow(True)
    ax.legend(handles=[Line2D([], [], color=_fig.BLUE, marker="o", linestyle="none",
                              label="matched source"),
                       Line2D([], [], color=_fig.VERMILION, label="B = A")],
              loc="upper left", framealpha=0.9)
    return _fig._save(fig, path)


@_fig._styled
def profiles_figure(path: str | os.PathLike[str], stations: pd.DataFrame, eke_a: np.ndarray,
                    eke_b_on_a: np.ndarray, max_panels: int = 3) -> Path:
    """Near-shore EKE against along-shore distance, one panel per coast segment (largest first)."""
    counts = stations.groupby("segment_id").size().sort_values(ascending=False)
    segments = [int(s) for s, n in counts.items() if n >= 5][:max_panels] or \
        [int(s) for s in counts.index[:1]]
    fig = _fig._figure(6.4, 1.2 + 2.0 * max(len(segments), 1))
    axes = fig.subplots(max(len(segments), 1), 1, squeeze=False)[:, 0]
    for k, (ax, seg) in enumerate(zip(axes, segments, strict=False)):
        sel = stations["segment_id"].to_numpy() == seg
        x = stations["alongshore_km"].to_numpy(float)[sel]
        order = np.argsort(x)
        ax.plot(x[order], 1e4 * eke_a[sel][order], color=_fig.BLUE, linewidth=1.4, label="run A")
        ax.plot(x[order], 1e4 * eke_b_on_a[sel][order], color=_fig.ORANGE, linewidth=1.4,
                linestyle="--", label="run B")
        ax.set_ylabel("near-shore EKE (cm² s⁻²)")
        ax.text(0.99, 0.97, f"segment {seg}", transform=ax.transAxes, ha="right", va="top",
                fontsize=8, color="0.3")
        ax.grid(color="0.92", linewidth=0.6)
        if len(segments) > 1:
            _fig._panel_letter(ax, k)
        if k == 0:
            ax.legend(loc="upper left", framealpha=0.9)
    axes[-1].set_xlabel("along-shore distance (km)")
    return _fig._save(fig, path)


# --------------------------------------------------------------------------- page
def _fmt(value: Any, spec: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, str):
        return escape(value) or "–"
    return escape(format(value, spec))


def render_page(data: dict[str, Any], matched: pd.DataFrame,
                figures: list[tuple[str, Path]]) -> str:
    """The comparison as one self-contained HTML5 page (inline style, embedded figures)."""
    from coastmon import __version__

    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    head = ("<tr><th>A rank</th><th>B rank</th><th>A cape</th><th>B cape</th>"
            "<th>Apart (km)</th><th>Feed A (W m⁻¹)</th><th>Feed B (W m⁻¹)</th>"
            "<th>Ratio B/A</th><th>95 % interval</th></tr>")
    rows = "".join(
        f"<tr><td class=\"num\">{int(r['rank_a'])}</td><td class=\"num\">{int(r['rank_b'])}</td>"
        f"<td>{_fmt(r['cape_id_a'], '')}</td><td>{_fmt(r['cape_id_b'], '')}</td>"
        f"<td class=\"num\">{_fmt(r['separation_km'], '.0f')}</td>"
        f"<td class=\"num\">{_fmt(r['feed_a'], '.3g')}</td>"
        f"<td class=\"num\">{_fmt(r['feed_b'], '.3g')}</td>"
        f"<td class=\"num\">{_fmt(r['feed_ratio'], '.3g')}</td>"
        f"<td class=\"num\">{_fmt(r['ratio_lo'], '.3g')} – {_fmt(r['ratio_hi'], '.3g')}</td></tr>"
        for _, r in matched.iterrows())
    table = (f"<table><thead>{head}</thead><tbody>{rows}</tbody></table>" if len(matched)
             else '<p class="none">No source of one run lies within the tolerance of a source '
                  "of the other.</p>")

    def unmatched(items: list[dict[str, Any]], run: str) -> str:
        if not items:
            return f'<p class="none">Every source of run {run} has a partner.</p>'
        li = "".join(
            f"<li>rank {_fmt(s.get('rank'), 'd')}, cape {_fmt(s.get('cape_id', ''), '')}, "
            f"along-shore {_fmt(s.get('alongshore_km'), '.0f')} km, "
            f"feed {_fmt(s.get('feed_w_per_m'), '.3g')} W m⁻¹</li>" for s in items)
        return f"<ul>{li}</ul>"

    facts = {
        "run A": data["a_dir"], "run B": data["b_dir"],
        "sources matched by": ("along-shore distance on the shared frame"
                               if data["matched_by"] == "alongshore"
                               else "great-circle distance (the frames differ)"),
        "matching tolerance": f"{data['tolerance_km']:.0f} km",
        "rank correlation of matched feeds (Spearman)": _fmt(data["rank_correlation"], ".3f"),
        "EKE profile correlation": _fmt(data["profile_correlation"], ".3f"),
        "EKE profile RMS difference": f"{_fmt(data['profile_rms_difference'], '.3g')} m² s⁻²",
        "jet spacing A / B": f"{_fmt(data['jet_spacing_km']['a'], '.0f')} km / "
                             f"{_fmt(data['jet_spacing_km']['b'], '.0f')} km",
    }
    dl = "".join(f"<dt>{escape(k)}</dt><dd>{_value(v)}</dd>" for k, v in facts.items())
    notes = ("<ul class=\"warnings\">" + "".join(f"<li>{escape(n)}</li>" for n in data["notes"])
             + "</ul>") if data["notes"] else '<p class="none">No notes.</p>'
    body = [
        "<header><h1>Comparison of two runs</h1>",
        f'<p class="meta">Written by coastmon {escape(__version__)} on {escape(now)}</p></header>',
        '<section id="answer"><h2>Agreement</h2>',
        f'<dl class="facts">{dl}</dl>',
        "<h3>Matched sources</h3>", table,
        "<h3>Sources only in run A</h3>", unmatched(data["unmatched_a"], "A"),
        "<h3>Sources only in run B</h3>", unmatched(data["unmatched_b"], "B"),
        "</section>",
        f'<section id="figures"><h2>Figures</h2>{_figures(figures)}</section>',
        f'<section id="warnings"><h2>Notes</h2>{notes}</section>',
        f'<section id="cautions" class="cautions"><h2>Cautions</h2><p>{escape(CAUTIONS)}</p>'
        "</section>",
        f"<footer>coastmon {escape(__version__)}</footer>",
    ]
    return ('<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>Comparison of two runs</title>\n<style>\n{_css()}</style>\n</head>\n"
            f"<body>\n<main>\n{''.join(body)}\n</main>\n</body>\n</html>\n")


__all__ = ["CompareResult", "RunFolder", "compare_folders", "feed_ratio", "match_sources",
           "matching_tolerance_km", "profile_agreement", "profile_on_a", "read_run_folder",
           "same_frame"]
