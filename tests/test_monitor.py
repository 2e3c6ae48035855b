"""coastmon update: pieces equal the whole, crash safety, duplicates, order, gaps, events."""

from __future__ import annotations

import dataclasses
import json
import math
import shutil
import tempfile
import types
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coastmon import pipeline
from coastmon.config import Settings
from coastmon.errors import InputError, RecordError, SettingsError
from coastmon.io.results import read_results
from coastmon.monitor import state as monitor_state
from coastmon.monitor.events import exceedance_runs, shedding_events
from coastmon.monitor.state import load_geometry, update
from coastmon.scenario import default_params, make_scenario
from coastmon.stream import load_state, run_pass, stats_from_state

SETTINGS = (Settings().replace("stream", progress=False)
            .replace("signals", eddy_period_days=(10.0, 60.0))
            .replace("sources", n_bootstrap=20)
            .replace("coast", ray_length_km=300.0, station_spacing_km=15.0)
            .replace("output", figures=False, report=False))
N_DAYS = 240
PIECES = [(0, 120), (120, 180), (180, 240)]
STAT_NAMES = ("eke", "uu", "uv", "vv", "zeta_var", "u_zeta", "mean_u", "mean_zeta",
              "bt_conversion", "eke_flux_x", "ow_core_fraction", "n_valid")


@pytest.fixture(scope="module")
def record(tmp_path_factory):
    """A short invented scenario, split in three files, and analyze run on the whole."""
    base = default_params()
    params = dataclasses.replace(base, n_days=N_DAYS, resolution_deg=0.16, lat_min=33.0,
                                 lat_max=37.5, lon_min=-41.0, capes=base.capes[1:3],
                                 sources=base.sources[:2], islands=())
    root = tmp_path_factory.mktemp("monitor")
    nc, _ = make_scenario(params, root / "data")
    pieces = []
    with xr.open_dataset(nc) as whole:
        for i, (a, b) in enumerate(PIECES):
            path = root / f"piece{i}.nc"
            whole.isel(time=slice(a, b)).to_netcdf(path)
            pieces.append(path)
    pipeline.analyze([nc], root / "whole", SETTINGS)
    state_dir = root / "state"
    results = [update(state_dir, [p], SETTINGS) for p in pieces]
    return types.SimpleNamespace(root=root, nc=nc, pieces=pieces, whole=root / "whole",
                                 state=state_dir, results=results)


def _current(state_dir: Path) -> Path:
    return state_dir / (state_dir / "current").read_text().strip()


def _assert_stats_equal_whole(state_dir: Path, nc: Path) -> None:
    """Float64 statistics of the stored accumulators against one pass over the whole record."""
    prep = pipeline.prepare([nc], SETTINGS)
    with tempfile.TemporaryDirectory() as work:
        whole = run_pass(prep.ds, prep.metrics, prep.frame, SETTINGS.stream, Path(work)).stats
    merged = stats_from_state(load_state(_current(state_dir) / "moments.npz"), prep.metrics)
    for name in STAT_NAMES:
        a, b = whole[name].values, merged[name].values
        assert np.array_equal(np.isnan(a), np.isnan(b)), name
        ok = np.isfinite(a)
        scale = np.max(np.abs(a[ok]))
        # check: Chan, Golub & LeVeque 1983 (pairwise merge is exact up to rounding)
        assert np.max(np.abs(a[ok] - b[ok])) <= 1e-9 * scale, name


def test_pieces_give_the_statistics_and_ranking_of_the_whole(record):
    first, second, third = record.results
    assert first.created and first.n_new == 120
    assert second.n_new == 60 and third.n_new == 60
    assert third.n_time == N_DAYS  # check: planted record length
    _assert_stats_equal_whole(record.state, record.nc)
    a = read_results(record.whole / "results.nc").stats
    b = read_results(record.state / "outputs" / "results.nc").stats
    for name in ("eke", "zeta_var", "bt_conversion"):
        # stored as float32 in results.nc: one float32 rounding step apart at most
        np.testing.assert_allclose(b[name].values, a[name].values, rtol=2e-7, atol=0)  # check: IEEE 754 single precision
    ranked_whole = pd.read_csv(record.whole / "sources.csv")
    ranked_state = pd.read_csv(record.state / "outputs" / "sources.csv")
    assert len(ranked_whole) >= 1
    assert list(ranked_state["rank"]) == list(ranked_whole["rank"])
    np.testing.assert_allclose(ranked_state["alongshore_km"], ranked_whole["alongshore_km"],
                               rtol=1e-12)  # check: same frame, same series
    np.testing.assert_allclose(ranked_state["feed_w_per_m"], ranked_whole["feed_w_per_m"],
                               rtol=1e-9)  # check: common practice, no source
    for name in ("map.gpkg", "capes.csv", "run.json", "events.csv"):
        assert (record.state / "outputs" / name).is_file()
    run = json.loads((record.state / "outputs" / "run.json").read_text())
    assert run["command"] == "update" and run["n_time"] == N_DAYS


def test_stored_series_are_stacked_on_disk(record, tmp_path):
    manifest = json.loads((_current(record.state) / "manifest.json").read_text())
    parts = manifest["series_parts"]
    assert len(parts) == len(PIECES)
    series = monitor_state._load_series(record.state, parts, tmp_path)
    pieces = [xr.load_dataset(record.state / monitor_state.STORE / name) for name in parts]
    whole = xr.concat(pieces, dim="time", data_vars="minimal", coords="minimal",
                      compat="override")
    assert series.sizes["time"] == N_DAYS  # check: planted record length
    # check: xarray.concat of the parts (the series in memory), value for value
    xr.testing.assert_identical(series, whole)
    for name in ("section_zeta", "ray_u"):
        base = series[name].values
        while base is not None and not isinstance(base, np.memmap):
            base = base.base
        assert isinstance(base, np.memmap), name  # disk-backed, not held in memory


def test_geometry_is_stored_not_recomputed(record):
    prep = pipeline.prepare([record.nc], SETTINGS)
    grid, coastline, capes, frame = load_geometry(record.state / "store")
    # check: common practice, no source (exact round trip of the saved arrays)
    assert (frame.sampler != prep.frame.sampler).nnz == 0
    np.testing.assert_array_equal(frame.valid, prep.frame.valid)
    np.testing.assert_array_equal(frame.ray_lon, prep.frame.ray_lon)
    pd.testing.assert_frame_equal(frame.stations, prep.frame.stations, check_dtype=False)
    assert list(capes["cape_id"]) == list(prep.capes["cape_id"])
    assert len(coastline.segments) == len(prep.coastline.segments)
    np.testing.assert_array_equal(grid["mask"], prep.ds["mask"].values)


def test_same_file_twice_changes_nothing(record):
    before = {p.name: p.read_bytes() for p in _current(record.state).iterdir()}
    again = update(record.state, [record.pieces[1]], SETTINGS)
    assert again.n_new == 0 and again.n_duplicate == 60  # check: planted piece length
    assert again.version == 3
    after = {p.name: p.read_bytes() for p in _current(record.state).iterdir()}
    assert after == before
    assert "nothing changed" in again.summary_text()


def test_out_of_order_and_gaps_are_refused(record, tmp_path):
    with xr.open_dataset(record.nc) as whole:
        inside = whole.isel(time=slice(40, 50))
        inside = inside.assign_coords(time=inside["time"] + np.timedelta64(12, "h"))
        inside.to_netcdf(tmp_path / "inside.nc")
        late = whole.isel(time=slice(N_DAYS - 10, N_DAYS))
        late = late.assign_coords(time=late["time"] + np.timedelta64(20, "D"))
        late.to_netcdf(tmp_path / "late.nc")
    with pytest.raises(RecordError, match="out of order"):
        update(record.state, [tmp_path / "inside.nc"], SETTINGS)
    with pytest.raises(RecordError, match="gap"):
        update(record.state, [tmp_path / "late.nc"], SETTINGS)
    assert _current(record.state).name == "v000003"
    copy = tmp_path / "state"
    shutil.copytree(record.state, copy)
    done = update(copy, [tmp_path / "late.nc"], SETTINGS, allow_gaps=True)
    # last step day 239, new steps from day 250: days 240..249 are missing (10 steps)
    assert done.n_new == 10 and done.n_filled == 10  # check: planted 20-day shift
    assert done.n_time == N_DAYS + 10
    series_days = xr.open_dataset(read_part(copy)).sizes["time"]
    assert series_days == 20  # check: 10 filled + 10 new steps in the last series file


def read_part(state_dir: Path) -> Path:
    manifest = json.loads((_current(state_dir) / "manifest.json").read_text())
    return state_dir / "store" / manifest["series_parts"][-1]


def test_settings_and_versions_are_checked(record, tmp_path):
    other = SETTINGS.replace("sources", nearshore_km=20.0)
    with pytest.raises(SettingsError, match="nearshore_km"):
        update(record.state, [record.pieces[2]], other)
    # output choices do not change the statistics: accepted (nothing new to add here)
    same = update(record.state, [record.pieces[2]], SETTINGS.replace("output", gis=("gpkg",)))
    assert same.n_new == 0 and same.version == 3
    copy = tmp_path / "state"
    shutil.copytree(record.state, copy)
    manifest_path = _current(copy) / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    manifest["format_version"] = 99
    manifest_path.write_text(json.dumps(manifest))
    with pytest.raises(InputError, match="newer"):
        update(copy, [record.pieces[2]], SETTINGS)


@pytest.mark.slow
def test_crash_mid_update_leaves_a_usable_state(record, tmp_path, monkeypatch):
    state_dir = tmp_path / "state"
    update(state_dir, record.pieces[:2], SETTINGS)
    assert _current(state_dir).name == "v000001"

    def crash(*args, **kwargs):
        raise RuntimeError("simulated crash after the new statistics were computed")

    with monkeypatch.context() as m:
        m.setattr(pipeline, "analyse_series", crash)  # runs right after the merged statistics
        with pytest.raises(RuntimeError, match="simulated crash"):
            update(state_dir, [record.pieces[2]], SETTINGS)
    assert _current(state_dir).name == "v000001"
    with monkeypatch.context() as m:
        m.setattr(monitor_state, "_switch_pointer", crash)
        with pytest.raises(RuntimeError, match="simulated crash"):
            update(state_dir, [record.pieces[2]], SETTINGS)
    assert _current(state_dir).name == "v000001"
    assert (state_dir / "v000002").is_dir()  # written, never made current
    done = update(state_dir, [record.pieces[2]], SETTINGS)
    assert done.n_new == 60 and done.n_time == N_DAYS  # check: planted record length
    assert sorted(p.name for p in state_dir.iterdir() if p.name.startswith("v")) == ["v000002"]
    manifest = json.loads((_current(state_dir) / "manifest.json").read_text())
    assert sorted(p.name for p in (state_dir / "store").iterdir()) == sorted(
        manifest["store_files"] + manifest["series_parts"])
    _assert_stats_equal_whole(state_dir, record.nc)


# --------------------------------------------------------------------------- events
def _planted_series(onsets, signs, duration, n_days=400, seed=3):
    """Near-shore vorticity with box-shaped bursts at known onsets and white noise; the same
    signal arrives 12 days later at 50 km and 22 days later at 100 km along the zonal ray
    (eddies form offshore of the station, then drift 50 km in 10 days)."""
    rng = np.random.default_rng(seed)
    amplitude = 3e-5
    signal = np.zeros(n_days)
    for day, sign in zip(onsets, signs, strict=True):
        signal[day:day + duration] = sign * amplitude
    signal[180:182] = amplitude  # a 2-day blip: shorter than the 3-day minimum
    near = signal + rng.normal(0.0, 2e-6, n_days)
    ray_km = np.arange(0.0, 210.0, 10.0)
    ray = rng.normal(0.0, 2e-6, (n_days, ray_km.size))
    for distance, lag in ((50.0, 12), (100.0, 22)):
        k = int(np.argmin(np.abs(ray_km - distance)))
        ray[lag:, k] += signal[: n_days - lag]
    offsets = np.array([0.0, 10.0, 20.0, 40.0])
    section = np.repeat(near[:, None], offsets.size, axis=1)
    # station 1: one anticyclonic 10-day burst at day 90, no ray
    other = np.zeros(n_days)
    other[90:100] = -amplitude
    other += rng.normal(0.0, 2e-6, n_days)
    section_zeta = np.stack([section, np.repeat(other[:, None], offsets.size, axis=1)], axis=1)
    ray_zeta = np.stack([ray, np.full_like(ray, np.nan)], axis=1)
    time = pd.date_range("2003-01-01", periods=n_days, freq="D")
    series = xr.Dataset(
        {"section_zeta": (("time", "station", "offset"), section_zeta),
         "ray_zeta": (("time", "station", "ray"), ray_zeta)},
        coords={"time": time, "offset_km": ("offset", offsets), "ray_km": ("ray", ray_km)})
    return series


def test_planted_bursts_are_recovered():
    onsets, signs, duration = [50, 130, 220, 310], [1, -1, 1, -1], 8
    series = _planted_series(onsets, signs, duration)
    lat = 35.0
    f = 2 * 7.2921e-5 * math.sin(math.radians(lat))  # check: Gill 1982 (f = 2 Omega sin phi)
    stations = pd.DataFrame({"station_id": [0, 1], "segment_id": [1, 2],
                             "alongshore_km": [0.0, 0.0], "ray_dir": [-1, 0]})
    frame = types.SimpleNamespace(stations=stations)
    sources = pd.DataFrame({"rank": [1, 2], "station": [0, 1], "cape_id": ["C01", ""],
                            "west_speed_cm_s": [4.0, 2.5]})
    events = shedding_events(series, sources, frame, np.array([f, f]), Settings())
    first = events[events["source_rank"] == 1].reset_index(drop=True)
    assert len(first) == len(onsets)  # the 2-day blip is not an event
    for row, day, sign in zip(first.itertuples(), onsets, signs, strict=True):
        planted_onset = pd.Timestamp("2003-01-01") + pd.Timedelta(days=day)
        assert abs((pd.Timestamp(row.onset) - planted_onset).days) <= 1  # check: planted onset
        assert row.duration_days == pytest.approx(duration, abs=1.0)  # check: planted duration
        assert row.sign == ("cyclonic" if sign > 0 else "anticyclonic")  # check: Cushman-Roisin & Beckers 2011 (cyclonic: zeta f > 0)
        assert row.peak_rossby == pytest.approx(sign * 3e-5 / f, rel=0.3)  # check: planted amplitude / f
        # planted drift: 50 km (from 50 to 100 km) in 10 days = 5.787 cm/s
        assert row.speed_from == "lag correlation"
        assert row.offshore_speed_cm_s == pytest.approx(5e6 / (10 * 86400.0), rel=1e-9)  # check: analytic distance / time
    second = events[events["source_rank"] == 2]
    assert len(second) == 1
    assert abs((pd.Timestamp(second["onset"].iloc[0]) - pd.Timestamp("2003-04-01")).days) <= 1  # check: planted onset (day 90)
    assert second["sign"].iloc[0] == "anticyclonic"
    assert second["speed_from"].iloc[0] == "source west speed"
    assert second["offshore_speed_cm_s"].iloc[0] == pytest.approx(2.5)  # check: planted fallback


def test_exceedance_runs_by_hand():
    x = np.array([0.0, 3.0, -3.0, 0.0, 3.0, 3.0, 3.0, np.nan, 3.0, 3.0, 3.0, 3.0])
    # by hand: |x| > 2 on [1, 3) (2 steps), [4, 7) and [8, 12)
    assert exceedance_runs(x, 2.0, 3) == [(4, 7), (8, 12)]  # check: counted by hand
    assert exceedance_runs(x, 2.0, 1) == [(1, 3), (4, 7), (8, 12)]  # check: counted by hand


def test_update_from_the_command_line_writes_the_full_report(record, tmp_path, capsys):
    from coastmon.cli import main

    toml = tmp_path / "run.toml"
    toml.write_text("[signals]\neddy_period_days = [10.0, 60.0]\n"
                    "[sources]\nn_bootstrap = 20\n"
                    "[coast]\nray_length_km = 300.0\nstation_spacing_km = 15.0\n")
    state = tmp_path / "state"
    for piece in record.pieces[:2]:
        assert main(["update", str(state), str(piece), "--settings", str(toml),
                     "--no-progress"]) == 0
    out = state / "outputs"
    # check: design.md output contract (update refreshes every output of analyze)
    for name in ("report.html", "map.gpkg", "sources.csv", "results.nc", "run.json",
                 "events.csv"):
        assert (out / name).is_file(), name
    assert list((out / "figures").glob("*.png"))
    assert "monitoring state updated" in capsys.readouterr().out
