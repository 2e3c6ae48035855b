"""Sensitivity experiments compared cape by cape: cape ids, matching, verdicts, many runs.

Planted truth comes from the scenario generator (cape positions in the truth file, which
source is switched off); the analysis under test never sees it.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest
import xarray as xr
from scipy.stats import spearmanr

from coastmon import pipeline
from coastmon.assess.compare import (
    VERDICT_COLOURS,
    bootstrap_ratio_interval,
    compare_folders,
    feed_ratio,
    rank_agreement,
    source_tolerance_km,
    verdict,
)
from coastmon.cli import main
from coastmon.config import Settings
from coastmon.errors import InputError
from coastmon.geometry.capes import (
    cape_tolerance_km,
    match_points,
    position_code,
    read_cape_catalogue,
    stable_ids,
)
from coastmon.scenario import default_params, make_scenario

Z95 = 1.959963984540054  # check: from memory (standard normal 97.5 % quantile)


# --------------------------------------------------------------------------- pure parts
def test_position_code_rounds_to_a_tenth_of_a_degree():
    # check: arithmetic (34.43 -> 34.4, 36.96 -> 37.0 at 0.1 degree steps, halves away from 0)
    assert position_code(-36.96, 34.43) == "C34.4N037.0W"
    assert position_code(18.47, -34.36) == "C34.4S018.5E"
    assert position_code(-36.95, 34.45) == "C34.5N037.0W"
    assert position_code(179.99, 0.01) == "C00.0N180.0W"  # the date line is one code
    assert position_code(323.04, 34.43) == "C34.4N037.0W"  # 0-360 longitudes: same code


def test_codes_differ_across_a_rounding_boundary_but_matching_is_by_distance():
    lon = np.array([-37.0, -37.0])
    lat = np.array([34.4499, 34.4501])
    codes = stable_ids(lon, lat)
    assert codes[0] != codes[1]  # the label alone cannot join them ...
    pairs = match_points(lon[:1], lat[:1], lon[1:], lat[1:], 5.0)
    # ... the distance does: 0.0002 degrees of latitude is 22 m
    # check: from memory (1 degree of latitude is 111.2 km)
    assert len(pairs) == 1 and pairs[0][2] == pytest.approx(0.0222, abs=1e-3)


def test_capes_in_one_cell_get_numbered_codes():
    codes = stable_ids(np.array([-37.01, -37.02, -36.0]), np.array([34.41, 34.42, 34.4]))
    assert codes == ["C34.4N037.0W", "C34.4N037.0W-2", "C34.4N036.0W"]  # check: arithmetic


def test_tolerances_follow_their_stated_formulas():
    # min(max(0.5 L, 2 dx), 2 Ld); check: common practice, no source (formula in the docs)
    assert cape_tolerance_km(80.0, 16.0, 30.0) == pytest.approx(40.0)
    assert cape_tolerance_km(20.0, 16.0, 30.0) == pytest.approx(32.0)
    assert cape_tolerance_km(80.0, 40.0, 30.0) == pytest.approx(60.0)
    # min(max(2 dx, Ld), 2 Ld)
    assert source_tolerance_km(8.0, 30.0) == pytest.approx(30.0)
    assert source_tolerance_km(40.0, 30.0) == pytest.approx(60.0)


def test_ratio_interval_matches_monte_carlo_of_log_normal_feeds():
    """Independent log-normal feeds: the percentiles of B/A are the stated interval."""
    rng = np.random.default_rng(7)
    sa, sb = 0.30, 0.45
    fa = 1000.0 * np.exp(sa * rng.standard_normal(400_000))
    fb = 1500.0 * np.exp(sb * rng.standard_normal(400_000))
    r, lo, hi = feed_ratio(1000.0, 1000.0 * math.exp(-Z95 * sa), 1000.0 * math.exp(Z95 * sa),
                           1500.0, 1500.0 * math.exp(-Z95 * sb), 1500.0 * math.exp(Z95 * sb))
    mc_lo, mc_hi = np.percentile(fb / fa, [2.5, 97.5])
    assert r[0] == pytest.approx(1.5)
    assert lo[0] == pytest.approx(mc_lo, rel=0.01)  # check: numpy Monte Carlo (independent route)
    assert hi[0] == pytest.approx(mc_hi, rel=0.01)  # check: numpy Monte Carlo (independent route)


def test_ratio_intervals_are_never_negative():
    rng = np.random.default_rng(3)
    fa, fb = rng.uniform(1, 100, 500), rng.uniform(1, 100, 500)
    la, lb = fa - rng.uniform(0, 150, 500), fb - rng.uniform(0, 150, 500)  # many below zero
    ha, hb = fa + rng.uniform(0, 50, 500), fb + rng.uniform(0, 50, 500)
    r, lo, hi = feed_ratio(fa, la, ha, fb, lb, hb)
    # check: a ratio of two positive feeds is positive (definition)
    assert np.all(lo >= 0) and np.all(lo <= r) and np.all(hi >= r)
    # a lower bound at or below zero leaves the ratio unbounded on that side
    assert np.all(lo[lb <= 0] == 0.0) and np.all(np.isinf(hi[la <= 0]))
    r, lo, hi = feed_ratio([0.0, -5.0], [1.0, 1.0], [2.0, 2.0], [3.0, 3.0], [2.0, 2.0],
                           [4.0, 4.0])
    assert np.isnan(r).all() and np.isnan(lo).all()  # check: a ratio to zero is undefined


def test_bootstrap_ratio_interval_matches_log_normal_quantiles():
    """Resamples from log-normal feeds: log(B/A) is normal with variance sa^2 + sb^2."""
    rng = np.random.default_rng(11)
    sa, sb = 0.25, 0.4
    a = 2000.0 * np.exp(sa * rng.standard_normal(1500))
    b = 1000.0 * np.exp(sb * rng.standard_normal(1500))
    lo, hi = bootstrap_ratio_interval(a, b)
    s = math.hypot(sa, sb)
    # check: textbook property of the log-normal (the log of a ratio of independent
    # log-normals is normal, variances add)
    assert lo == pytest.approx(0.5 * math.exp(-Z95 * s), rel=0.04)
    assert hi == pytest.approx(0.5 * math.exp(Z95 * s), rel=0.04)
    b[3] = -1.0
    assert bootstrap_ratio_interval(a, b) is None  # check: a ratio needs positive resamples


def test_verdict_words_follow_the_rule():
    # check: common practice, no source (rule stated in docs/comparing-runs.md)
    assert verdict(True, False, 5.0, math.nan, math.nan, math.nan, math.nan) == "vanished"
    assert verdict(True, False, -1.0, math.nan, math.nan, math.nan, math.nan) == \
        "no significant change"
    assert verdict(False, True, math.nan, 2.0, math.nan, math.nan, math.nan) == "appeared"
    assert verdict(True, True, 1.0, 1.0, 2.0, 1.2, 3.0) == "grew"
    assert verdict(True, True, 1.0, 1.0, 0.5, 0.3, 0.9) == "shrank"
    assert verdict(True, True, 1.0, 1.0, 1.4, 0.9, 2.0) == "no significant change"
    assert verdict(False, False, math.nan, math.nan, math.nan, math.nan, math.nan) == "no source"
    assert set(VERDICT_COLOURS) >= {"appeared", "vanished", "grew", "shrank",
                                    "no significant change"}


def test_rank_agreement_with_two_and_with_more_places():
    two = rank_agreement([10.0, 5.0], [8.0, 9.0])
    assert two["rank_correlation"] is None and "at least three" in two["note"]
    assert (two["concordant"], two["discordant"]) == (0, 1)  # check: Kendall 1938 pair count
    four = rank_agreement([4.0, 3.0, 2.0, 1.0], [3.0, 4.0, 2.0, 1.0])
    assert four["rank_correlation"] == pytest.approx(
        spearmanr([4, 3, 2, 1], [3, 4, 2, 1]).statistic)  # check: scipy.stats.spearmanr
    assert (four["concordant"], four["discordant"]) == (5, 1)  # check: Kendall 1938 pair count


def test_catalogue_errors_are_one_paragraph(tmp_path):
    bad = tmp_path / "cat.csv"
    bad.write_text("name,lon,lat\nX,1,2\n", encoding="utf-8")
    with pytest.raises(InputError, match="lacks the column"):
        read_cape_catalogue(bad)
    bad.write_text("id,lon,lat\nX,1,2\nX,3,4\n", encoding="utf-8")
    with pytest.raises(InputError, match="repeats the id"):
        read_cape_catalogue(bad)
    bad.write_text("id,lon,lat\nX,1,north\n", encoding="utf-8")
    with pytest.raises(InputError, match="line"):
        read_cape_catalogue(bad)


# --------------------------------------------------------------------------- planted runs
SETTINGS = (Settings().replace("stream", progress=False)
            .replace("signals", eddy_period_days=(10.0, 60.0))
            .replace("sources", n_bootstrap=40)
            .replace("coast", ray_length_km=300.0, station_spacing_km=15.0)
            .replace("output", figures=False, report=False))


def _params(**changes):
    base = default_params()
    values = {"n_days": 240, "resolution_deg": 0.16, "lat_min": 33.0, "lat_max": 37.5,
              "lon_min": -41.0, "capes": base.capes[1:3], "islands": (),
              "sources": base.sources[:2]}
    return dataclasses.replace(base, **{**values, **changes})


@pytest.fixture(scope="module")
def experiments(tmp_path_factory) -> dict[str, Path]:
    """A: Tasker Head and Cape Orrin both shed; B: Cape Orrin's shedding switched off;
    C: Cape Orrin smoothed away (no cape, no source)."""
    root = tmp_path_factory.mktemp("experiments")
    base = default_params()
    runs = {"a": _params(), "b": _params(sources=base.sources[:1]),
            "c": _params(capes=base.capes[1:2], sources=base.sources[:1])}
    out = {}
    for name, params in runs.items():
        nc, truth = make_scenario(params, root / f"data_{name}")
        pipeline.analyze([nc], root / name, SETTINGS)
        out[name] = root / name
        out[f"truth_{name}"] = truth
    return out


def _place_near(changes: pd.DataFrame, lon: float, lat: float) -> pd.DataFrame:
    d = np.hypot((changes["lon"] - lon) * math.cos(math.radians(lat)), changes["lat"] - lat)
    return changes[d == d.min()]


def _truth_capes(path: Path) -> dict[str, tuple[float, float]]:
    truth = json.loads(Path(path).read_text(encoding="utf-8"))
    return {c["name"]: (c["lon"], c["lat"]) for c in truth["capes"]}


def test_switched_off_cape_vanishes_and_the_other_does_not_change(experiments, tmp_path):
    result = compare_folders(experiments["a"], experiments["b"], out=tmp_path / "ab")
    ch = result.changes
    capes = _truth_capes(experiments["truth_a"])
    off = _place_near(ch, *capes["Cape Orrin"])
    on = _place_near(ch, *capes["Tasker Head"])
    # check: planted truth (the generator was given no Cape Orrin source in run B)
    assert list(off["verdict"]) == ["vanished"]
    assert list(off["present_in"]) == ["A only"]
    assert list(on["verdict"]) == ["no significant change"]  # check: planted truth (same source)
    assert list(on["ratio_method"]) == ["bootstrap"]  # the runs stored their resamples
    # the same headland on the same grid has the same id in both runs
    assert list(on["cape_id_a"]) == list(on["cape_id_run"]) and on["cape_id_a"].iloc[0]
    assert (ch["ratio_lo"].dropna() >= 0).all()
    data = json.loads((tmp_path / "ab" / "compare.json").read_text(encoding="utf-8"),
                      parse_constant=lambda c: (_ for _ in ()).throw(ValueError(c)))
    assert data["pairs"][0]["rank_correlation"] is None
    assert "at least three" in data["pairs"][0]["rank_correlation_note"]
    table = pd.read_csv(tmp_path / "ab" / "cape_changes.csv", keep_default_na=False)
    assert list(table["verdict"]) == list(ch["verdict"])
    layer = pyogrio.read_dataframe(tmp_path / "ab" / "map.gpkg", layer="cape_changes")
    # check: GDAL via pyogrio (GeoPackage round trip of the layer)
    assert len(layer) == len(ch) and set(layer["colour"]) <= set(VERDICT_COLOURS.values())
    assert (tmp_path / "ab" / "figures" / "compare_feed_by_cape.png").read_bytes()[:4] == \
        b"\x89PNG"


def test_self_compare_changes_nothing(experiments, tmp_path):
    ch = compare_folders(experiments["a"], experiments["a"], out=tmp_path / "aa").changes
    with_source = ch[ch["present_in"] != "neither"]
    assert len(with_source) == len(pd.read_csv(experiments["a"] / "sources.csv"))
    assert (with_source["present_in"] == "both").all()
    assert (with_source["feed_ratio"] == 1.0).all()  # check: identity, exactly
    assert (with_source["verdict"] == "no significant change").all()  # check: identity
    assert ((with_source["ratio_lo"] <= 1.0) & (with_source["ratio_hi"] >= 1.0)).all()
    with xr.open_dataset(experiments["a"] / "results.nc") as ds:
        # check: the settings asked for 40 resamples per source
        assert ds["feed_bootstrap"].sizes["bootstrap"] == 40
        assert ds["feed_bootstrap"].sizes["source"] == len(with_source)


def test_many_runs_with_a_cape_smoothed_away(experiments, tmp_path, capsys):
    code = main(["compare", str(experiments["a"]), str(experiments["b"]), str(experiments["c"]),
                 "--out", str(tmp_path / "abc")])
    assert code == 0
    ch = pd.read_csv(tmp_path / "abc" / "cape_changes.csv", keep_default_na=False)
    capes = _truth_capes(experiments["truth_a"])
    orrin = _place_near(ch, *capes["Cape Orrin"]).set_index("run")
    # check: planted truth (B: shedding off; C: cape and shedding gone)
    assert orrin.loc["B", "verdict"] == "vanished" and orrin.loc["C", "verdict"] == "vanished"
    assert str(orrin.loc["B", "cape_in_run"]) == "True"
    assert str(orrin.loc["C", "cape_in_run"]) == "False"
    tasker = _place_near(ch, *capes["Tasker Head"]).set_index("run")
    assert list(tasker["verdict"]) == ["no significant change"] * 2  # check: planted truth
    page = (tmp_path / "abc" / "compare.html").read_text(encoding="utf-8")
    assert "Run C against run A" in page and "vanished" in page
    assert main(["compare", str(experiments["a"]), "--out", str(tmp_path / "one")]) == 2
    assert "at least two result folders" in capsys.readouterr().err


def test_coarser_grid_keeps_cape_ids_with_a_catalogue(experiments, tmp_path):
    """Observations on a grid 1.5 times as coarse (0.24 degrees, about the spacing of
    gridded altimetry): capes still match and both sources are found; a catalogue keeps
    ids. (On this 240-day record, 4 windows of 60 days, the weaker source is not
    significant at 0.32 degrees: docs/comparing-runs.md.)"""
    nc, _ = make_scenario(_params(resolution_deg=0.24), tmp_path / "coarse_data")
    catalogue = experiments["a"] / "capes.csv"
    pipeline.analyze([nc], tmp_path / "coarse",
                     SETTINGS.replace("coast", cape_catalogue=str(catalogue)))
    fine = pd.read_csv(catalogue)
    coarse = pd.read_csv(tmp_path / "coarse" / "capes.csv")
    # check: planted truth (the same two headlands in both grids)
    assert sorted(coarse["cape_id"]) == sorted(fine["cape_id"])
    result = compare_folders(experiments["a"], tmp_path / "coarse", out=tmp_path / "ac")
    ch = result.changes
    assert len(ch) == 2 and (ch["cape_in_run"] & ch["cape_in_a"]).all()
    assert (ch["present_in"] == "both").all()  # check: planted truth (both shed in both)
    assert (ch["cape_id_a"] == ch["cape_id_run"]).all()


def test_coast_command_names_capes_after_a_catalogue(experiments, tmp_path, capsys):
    nc = Path(experiments["truth_a"]).parent / "vell_coast.nc"
    catalogue = tmp_path / "named.csv"
    capes = _truth_capes(experiments["truth_a"])
    pd.DataFrame({"id": ["Tasker", "Orrin"],
                  "lon": [capes["Tasker Head"][0], capes["Cape Orrin"][0]],
                  "lat": [capes["Tasker Head"][1], capes["Cape Orrin"][1]]}
                 ).to_csv(catalogue, index=False)
    assert main(["coast", str(nc), "--out", str(tmp_path / "coast"), "--capes",
                 str(catalogue)]) == 0
    found = pd.read_csv(tmp_path / "coast" / "capes.csv")
    # check: planted truth (the generator put these two capes at the catalogue positions)
    assert sorted(found["cape_id"]) == ["Orrin", "Tasker"]
    catalogue.write_text("id,lon\nX,1\n", encoding="utf-8")
    assert main(["coast", str(nc), "--out", str(tmp_path / "coast2"), "--capes",
                 str(catalogue)]) == 2
    assert "lacks the column(s) lat" in capsys.readouterr().err
    assert not (tmp_path / "coast2").exists()
