"""coastmon compare: matching, rank agreement, feed ratios, profiles, files, errors.

Two kinds of folders are compared: hand-made result folders with planted sources (the
pairs, feeds and profiles are planted here, so the expected answers are known without the
code under test), and the folder of a real ``analyze`` run on a small invented scenario.
"""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy.stats import spearmanr

from coastmon import pipeline
from coastmon.assess.compare import compare_folders, feed_ratio
from coastmon.config import Settings
from coastmon.errors import InputError, OutputError
from coastmon.io.results import CAUTIONS, write_results
from coastmon.scenario import default_params, make_scenario
from coastmon.signals.propagation import OMEGA_EARTH

KM_PER_DEG = 111.195  # great-circle km per degree on a sphere of radius 6371 km


# --------------------------------------------------------------------------- planted folders
def _write_folder(folder: Path, sources: list[dict], station_lat: np.ndarray,
                  station_lon: np.ndarray, alongshore_km: np.ndarray, eke_ns: np.ndarray,
                  jet_spacing_km: float, cape_scales_km: tuple[float, ...] = (20.0, 30.0)) -> Path:
    """A result folder with the files of the output contract, filled with planted values."""
    folder.mkdir(parents=True)
    table = pd.DataFrame(sources)
    table["rank"] = table["feed_w_per_m"].rank(ascending=False, method="first").astype(int)
    table["segment_id"] = 1
    table["cape_id"] = table.get("cape_id", "")
    table.sort_values("rank").to_csv(folder / "sources.csv", index=False)
    pd.DataFrame({"cape_id": [f"C{i + 1:02d}" for i in range(len(cape_scales_km))],
                  "lon": station_lon[:len(cape_scales_km)], "lat": station_lat[:len(cape_scales_km)],
                  "curvature_per_km": 0.01, "scale_km": list(cape_scales_km),
                  "protrusion_km": 20.0, "segment_id": 1, "alongshore_km": 0.0}
                 ).to_csv(folder / "capes.csv", index=False)
    lon2, lat2 = np.meshgrid(np.linspace(-20.0, -17.0, 4), np.linspace(30.0, 33.0, 5))
    stats = xr.Dataset({"eke": (("y", "x"), np.full(lon2.shape, 0.01))},
                       coords={"lon": (("y", "x"), lon2), "lat": (("y", "x"), lat2)})
    n = station_lat.size
    profiles = xr.Dataset(
        {"eke_ns": ("station", eke_ns, {"long_name": "near-shore eddy kinetic energy",
                                        "units": "m2 s-2"}),
         "segment_id": ("station", np.ones(n, dtype=np.int32),
                        {"long_name": "coast segment", "units": "1"})},
        coords={"station": np.arange(n), "lon": ("station", station_lon),
                "lat": ("station", station_lat), "alongshore_km": ("station", alongshore_km)})
    write_results(folder / "results.nc", stats, profiles, None,
                  attrs={"jet_spacing_km": jet_spacing_km})
    return folder


def _coast(n: int, spacing_km: float, lon: float, lat0: float = 30.0):
    """A straight north-south coast: stations every ``spacing_km`` from ``lat0``."""
    along = spacing_km * np.arange(n)
    lat = lat0 + along / KM_PER_DEG
    return lat, np.full(n, lon), along


def _eke_profile(lat: np.ndarray) -> np.ndarray:
    """A planted along-shore EKE profile (m2 s-2): two bumps on a background."""
    return 0.004 + 0.02 * np.exp(-((lat - 31.0) / 0.3) ** 2) + 0.01 * np.exp(
        -((lat - 33.0) / 0.4) ** 2)


def _source(along_km: float, feed: float, lat0: float = 30.0, lon: float = -15.0,
            cape: str = "") -> dict:
    return {"feed_w_per_m": feed, "feed_lo": 0.7 * feed, "feed_hi": 1.3 * feed,
            "alongshore_km": along_km, "lon": lon, "lat": lat0 + along_km / KM_PER_DEG,
            "persistence": 0.9, "cape_id": cape, "west_speed_cm_s": 3.0}


A_SOURCES = [(100.0, 4000.0), (200.0, 3000.0), (300.0, 2000.0), (450.0, 1000.0)]
# B: the same four sources moved by at most 10 km, feeds reordered, and one extra source
B_SOURCES = [(110.0, 2500.0), (195.0, 3500.0), (310.0, 1500.0), (440.0, 900.0), (560.0, 800.0)]


@pytest.fixture()
def planted(tmp_path: Path) -> tuple[Path, Path]:
    lat, lon, along = _coast(60, 10.0, -15.0)
    a = _write_folder(tmp_path / "a", [_source(s, f) for s, f in A_SOURCES], lat, lon, along,
                      _eke_profile(lat), 240.0)
    b = _write_folder(tmp_path / "b", [_source(s, f) for s, f in B_SOURCES], lat, lon, along,
                      _eke_profile(lat) * 1.5, 300.0)
    return a, b


def _strict_json(path: Path) -> dict:
    def refuse(name: str) -> None:
        raise ValueError(f"non-standard JSON constant {name}")

    return json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)


# --------------------------------------------------------------------------- planted tests
def test_planted_pairs_rank_correlation_and_unmatched(planted, tmp_path):
    a, b = planted
    result = compare_folders(a, b, tmp_path / "cmp")
    data = _strict_json(tmp_path / "cmp" / "compare.json")
    pair = data["pairs"][0]
    assert pair["same_frame"]
    # the folders record no deformation radius: c1 / |f| with c1 = 2.5 m/s at the median
    # station latitude; the 1-degree grid makes 2 x grid spacing larger, so the unanchored
    # sources are matched within min(max(2 dx, Ld), 2 Ld) = 2 Ld
    lat_mid = 30.0 + 295.0 / KM_PER_DEG
    ld_km = 2.5 / (2 * OMEGA_EARTH * math.sin(math.radians(lat_mid))) / 1000.0
    assert data["tolerances"]["source_km"] == pytest.approx(2 * ld_km, rel=1e-6)  # check: Gill 1982 sec. 7.5 (Ld = c / f)
    pairs = sorted((m["feed_a"], m["feed_run"]) for m in pair["matched_sources"])
    planted_pairs = sorted((fa, fb) for (_, fa), (_, fb) in zip(A_SOURCES, B_SOURCES[:4],
                                                                 strict=False))
    assert pairs == planted_pairs
    fa = [p[0] for p in planted_pairs]
    fb = [p[1] for p in planted_pairs]
    expected = spearmanr(fa, fb).statistic
    assert pair["rank_correlation"] == pytest.approx(expected, abs=1e-12)  # check: scipy.stats.spearmanr
    # ranks A (4, 3, 2, 1) vs B (3, 4, 2, 1): rho = 1 - 6 * 2 / (4 * 15) = 0.8
    assert result.rank_correlation == pytest.approx(0.8, abs=1e-12)  # check: Spearman 1904 rank formula
    assert [u["alongshore_km"] for u in pair["unmatched_run"]] == [560.0]
    assert pair["unmatched_a"] == []
    assert list(result.changes["verdict"]).count("appeared") == 1  # check: planted extra source
    assert pair["jet_spacing_km"]["a"] == pytest.approx(240.0)  # check: planted value
    assert pair["jet_spacing_km"]["run"] == pytest.approx(300.0)  # check: planted value
    # B's profile is 1.5 x A's: Pearson r = 1, RMS = 0.5 * RMS(A)
    eke = _eke_profile(_coast(60, 10.0, -15.0)[0])
    assert pair["profile_correlation"] == pytest.approx(1.0, abs=1e-12)  # check: Pearson r is scale invariant (textbook)
    assert pair["profile_rms_difference"] == pytest.approx(
        0.5 * math.sqrt(float(np.mean(eke**2))), rel=1e-9)  # check: definition of RMS difference


def test_removed_source_is_unmatched(planted, tmp_path):
    a, _ = planted
    copy = tmp_path / "a_minus_one"
    shutil.copytree(a, copy)
    table = pd.read_csv(copy / "sources.csv")
    removed = table[table["alongshore_km"] == 200.0]
    table.drop(removed.index).to_csv(copy / "sources.csv", index=False)
    data = compare_folders(a, copy, tmp_path / "cmp").data["pairs"][0]
    assert [u["alongshore_km"] for u in data["unmatched_a"]] == [200.0]  # check: planted removal
    assert data["unmatched_run"] == []
    assert len(data["matched_sources"]) == 3
    assert all(m["feed_ratio"] == pytest.approx(1.0) for m in data["matched_sources"])  # check: identical rows
    assert data["rank_correlation"] == pytest.approx(1.0)  # check: scipy.stats.spearmanr of identical data


def test_other_coastline_matches_by_great_circle(tmp_path):
    """B's frame has another station spacing and lies 20 km further west: match by position."""
    lat, lon, along = _coast(60, 10.0, -15.0)
    a = _write_folder(tmp_path / "a", [_source(s, f) for s, f in A_SOURCES], lat, lon, along,
                      _eke_profile(lat), 240.0)
    shift_deg = 20.0 / (KM_PER_DEG * math.cos(math.radians(32.0)))
    lat_b, lon_b, along_b = _coast(48, 12.5, -15.0 - shift_deg)
    b_sources = [_source(s, f, lon=-15.0 - shift_deg) for s, f in A_SOURCES]
    b = _write_folder(tmp_path / "b", b_sources, lat_b, lon_b, along_b + 35.0,
                      _eke_profile(lat_b), 240.0)
    data = compare_folders(a, b, tmp_path / "cmp").data["pairs"][0]
    assert not data["same_frame"]
    assert len(data["matched_sources"]) == 4
    for m in data["matched_sources"]:
        # about 20 km apart (zonal shift at 30-34 N, haversine)
        assert 19.0 < m["separation_km"] < 21.0  # check: from memory (great-circle distance)
        assert m["feed_ratio"] == pytest.approx(1.0)  # check: planted equal feeds
    # nearest stations are at most 6.25 km apart along-shore: the profiles agree closely
    assert data["profile_correlation"] > 0.97  # check: common practice, no source


def test_feed_ratio_interval_log_scale_quadrature():
    # equal feeds whose intervals are a factor 2 either way: the ratio's interval is
    # exp(+-sqrt(2) ln 2) = 2**(+-sqrt 2)
    r, lo, hi = feed_ratio([1000.0], [500.0], [2000.0], [1000.0], [500.0], [2000.0])
    assert r[0] == pytest.approx(1.0)
    assert lo[0] == pytest.approx(2.0 ** -math.sqrt(2.0), rel=1e-12)  # check: Taylor 1997 ch. 3 (quadrature of independent errors)
    assert hi[0] == pytest.approx(2.0 ** math.sqrt(2.0), rel=1e-12)  # check: Taylor 1997 ch. 3
    # A's interval reaches below zero: on the log scale its lower half-width is infinite,
    # so the ratio has no upper bound; the lower bound stays finite and positive
    r, lo, hi = feed_ratio([100.0], [-20.0], [220.0], [200.0], [160.0], [240.0])
    down = math.sqrt(math.log(200.0 / 160.0) ** 2 + math.log(220.0 / 100.0) ** 2)
    assert lo[0] == pytest.approx(2.0 * math.exp(-down), rel=1e-12)  # check: Taylor 1997 ch. 3 (quadrature on the log scale)
    assert math.isinf(hi[0])  # check: a log-normal interval cannot reach zero (definition)


def test_errors_are_one_paragraph(planted, tmp_path):
    a, b = planted
    with pytest.raises(InputError, match="does not exist"):
        compare_folders(tmp_path / "nowhere", b, tmp_path / "cmp")
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(InputError, match="not a finished coastmon analysis"):
        compare_folders(a, empty, tmp_path / "cmp")
    with pytest.raises(OutputError):
        compare_folders(a, b, a / "inside")
    assert not (tmp_path / "cmp").exists()


# --------------------------------------------------------------------------- a real run
@pytest.fixture(scope="module")
def real_run(tmp_path_factory) -> Path:
    """``analyze`` on a short, coarse invented scenario (two planted sources)."""
    base = default_params()
    params = dataclasses.replace(base, n_days=240, resolution_deg=0.16, lat_min=33.0,
                                 lat_max=37.5, lon_min=-41.0, capes=base.capes[1:3],
                                 sources=base.sources[:2], islands=())
    root = tmp_path_factory.mktemp("real")
    nc, _ = make_scenario(params, root / "data")
    settings = (Settings().replace("stream", progress=False)
                .replace("signals", eddy_period_days=(10.0, 60.0))
                .replace("sources", n_bootstrap=20)
                .replace("coast", ray_length_km=300.0, station_spacing_km=15.0)
                .replace("output", figures=False, report=False))
    pipeline.analyze([nc], root / "run", settings)
    return root / "run"


@pytest.mark.slow
def test_run_compared_with_itself_is_perfect(real_run, tmp_path):
    result = compare_folders(real_run, real_run, tmp_path / "cmp")
    data = _strict_json(tmp_path / "cmp" / "compare.json")["pairs"][0]
    n_sources = len(pd.read_csv(real_run / "sources.csv"))
    assert n_sources >= 1
    assert len(data["matched_sources"]) == n_sources  # check: identity
    assert data["unmatched_a"] == [] and data["unmatched_run"] == []
    for m in data["matched_sources"]:
        assert m["rank_a"] == m["rank_run"]
        assert m["separation_km"] == 0.0  # check: identity
        assert m["feed_ratio"] == pytest.approx(1.0, abs=1e-12)  # check: identity
    if n_sources >= 3:
        assert data["rank_correlation"] == pytest.approx(1.0)  # check: scipy.stats.spearmanr of identical data
    else:
        assert data["rank_correlation"] is None
        assert "at least three" in data["rank_correlation_note"]
    assert data["profile_correlation"] == pytest.approx(1.0, abs=1e-12)  # check: identity
    assert data["profile_rms_difference"] == 0.0  # check: identity
    assert data["jet_spacing_km"]["run_minus_a"] in (0.0, None)
    page = (tmp_path / "cmp" / "compare.html").read_text(encoding="utf-8")
    assert CAUTIONS in page
    for name in ("compare_feeds.png", "compare_eke_profiles.png"):
        assert (tmp_path / "cmp" / "figures" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "rank correlation" in result.summary_text()
