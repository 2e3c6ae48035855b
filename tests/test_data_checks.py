"""Mismatched, missing and implausible data, and nonsense settings (issue: data checks).

Each case runs the real command line in-process (``coastmon.cli.main``) on a small edit of
the bad-input corpus record (``tests/bad_inputs.py``: 40 x 40 points, 360 daily steps, an
invented meridional coast with one cape) and checks the user-error contract (exit 2, one
paragraph naming the file/option, no traceback, inputs unchanged), or, for data that can
still be analysed, the note that names the files and dates. Runtime: about 2 minutes on
2 cores (seven whole runs; the rest stop before the streaming pass).
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import warnings
from pathlib import Path

import bad_inputs as bi
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coastmon.assess.coverage import MIN_PRESENT_FRACTION, check_coverage
from coastmon.cli import main
from coastmon.config import IngestSettings, Settings
from coastmon.errors import RecordError
from coastmon.io.gridcheck import grid_differences
from coastmon.io.ingest import open_dataset, open_mask
from coastmon.io.position import lat_text, lon_text, position_text
from coastmon.pipeline import AnalyzeResult, Products, prepare

QUIET = ["--no-progress"]
LEAN = "[output]\nfigures = false\nreport = false\n"
HALF = bi.NT // 2


def _run(argv: list[str], capsys) -> tuple[int, str, str]:
    capsys.readouterr()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rc = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    runtime = [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)]
    assert runtime == [], f"numpy RuntimeWarnings reached the user: {runtime}"
    return rc, out, err


def _refused(rc: int, err: str, names: list[str], out: Path | None = None) -> None:
    # check: common practice, no source (exit status 2 = usage error, as argparse does)
    assert rc == 2, err
    assert "Traceback" not in err and "internal error" not in err
    text = err.strip()
    assert text.startswith("coastmon: ") and "\n" not in text, err
    for name in names:
        assert name in text, f"{name!r} not in: {text}"
    if out is not None:
        assert not out.exists()


@pytest.fixture(scope="module")
def record():
    return bi.flow(bi.NT)


@pytest.fixture(scope="module")
def data(tmp_path_factory, record):
    folder = tmp_path_factory.mktemp("data")
    u, v = record
    t2 = np.arange(HALF, bi.NT)
    files = {
        "part1": bi.write(bi.dataset(u[:HALF], v[:HALF]), folder / "part1.nc"),
        "shifted": bi.write(bi.dataset(u[HALF:], v[HALF:], time=t2, lat=bi.LAT + 0.5),
                            folder / "part2_shifted.nc"),
        "smaller": bi.write(bi.dataset(u[HALF:, :-2], v[HALF:, :-2], time=t2,
                                       lat=bi.LAT[:-2]), folder / "part2_smaller.nc"),
    }
    noleap = bi.dataset(u[HALF:], v[HALF:], time=t2)
    noleap["time"].attrs["calendar"] = "noleap"
    files["noleap"] = bi.write(noleap, folder / "part2_noleap.nc")
    nan = np.full_like(u[HALF:], np.nan)
    files["fill"] = bi.write(bi.dataset(nan, nan, time=t2), folder / "part2_fill.nc")
    tail_u, tail_v = u.copy(), v.copy()
    tail_u[300:] = np.nan
    tail_v[300:] = np.nan
    files["tail"] = bi.write(bi.dataset(tail_u, tail_v), folder / "tail_missing.nc")
    files["cm"] = bi.write(bi.dataset(30.0 * u[:20], 30.0 * v[:20]), folder / "cm_as_m.nc")
    files["short"] = bi.write(bi.dataset(u[:20], v[:20]), folder / "twenty_days.nc")
    files["lean"] = folder / "lean.toml"
    files["lean"].write_text(LEAN, encoding="utf-8")
    return folder, files


# --------------------------------------------------------------------------- item 2


@pytest.mark.parametrize("case, names", [
    ("shifted", ["other latitudes", "0.5 degrees"]),
    ("smaller", ["grid shape (38, 40) instead of (40, 40)"]),
    ("noleap", ["'noleap' calendar"]),
])
def test_files_on_different_grids_or_calendars_are_not_joined(case, names, data, tmp_path,
                                                              capsys):
    folder, files = data
    before = bi.sha256_tree([folder])
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["part1"], files[case], "--out", out, *QUIET], capsys)
    _refused(rc, err, ["part1.nc", files[case].name, *names], out)
    assert bi.sha256_tree([folder]) == before


def test_one_grid_check_for_joined_files_and_the_monitoring_state():
    from coastmon.io import ingest
    from coastmon.monitor import state

    lon, lat = np.meshgrid(bi.LON, bi.LAT)
    assert state.grid_differences is grid_differences is ingest.grid_differences
    # check: planted truth (the same grid, its longitudes written 360 degrees apart)
    assert grid_differences(lon + 360.0, lat, lon, lat) == []
    # check: planted truth (latitudes shifted by 0.25 degrees)
    assert grid_differences(lon, lat + 0.25, lon, lat) == ["other latitudes (by up to 0.25 degrees)"]
    mask = np.ones(lon.shape, np.int8)
    other = mask.copy()
    other[3, 4] = 0
    # check: planted truth (one point of the mask flipped)
    assert grid_differences(lon, lat, lon, lat, other, mask) == ["another land/sea mask (1 points differ)"]


# --------------------------------------------------------------------------- item 3


def test_coverage_notes_name_dates_and_files():
    nt, n_sea = 100, 50
    mask = np.zeros((10, 10), np.int8)
    mask[:5] = 1
    times = pd.date_range("2003-01-01", periods=nt, freq="D").values
    valid = np.full(nt, n_sea)
    valid[40:50] = 0  # ten empty days in the second file
    valid[90] = n_sea - 5  # one day with a tenth of the sea missing, in the third file
    n_valid = np.where(mask == 1, nt - 11, 0)
    n_valid[0, :2] = 40  # two points with data at fewer than half the steps
    notes = check_coverage(valid, n_valid, mask, times, ["a.nc", "b.nc", "c.nc"], [30, 30, 40])
    text = " ".join(notes)
    # check: planted truth (gaps at steps 40-49 and 90 of a record starting 2003-01-01)
    assert "11 of 100 time steps" in text
    assert "2003-02-10 to 2003-02-19 (10 steps)" in text and "2003-04-01 (1 step)" in text
    assert "in b.nc, c.nc" in text and "a.nc" not in text
    assert "2 of 50 sea points" in text
    complete = check_coverage(np.full(nt, n_sea), np.where(mask == 1, nt, 0), mask, times,
                              ["a.nc"], [nt])
    assert complete == []


def test_coverage_refuses_a_record_mostly_missing():
    nt = 100
    mask = np.ones((4, 5), np.int8)
    valid = np.full(nt, 20)
    valid[:30] = 0
    # check: planted truth (70 % present, under the 75 % threshold)
    assert MIN_PRESENT_FRACTION == 0.75
    with pytest.raises(RecordError, match="Only 70 %"):
        check_coverage(valid, np.full((4, 5), 70), mask, None, ["x.nc"], [nt])


def test_a_second_file_of_fill_values_is_refused(data, tmp_path, capsys):
    folder, files = data
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["part1"], files["fill"], "--out", out, "--settings",
                       files["lean"], *QUIET], capsys)
    # check: planted truth (the second half of the record is all fill values: 50 % present;
    # its first step is day 180 of 2001, 2001-06-30)
    _refused(rc, err, ["Only 50 %", "part2_fill.nc", "2001-06-30 to 2001-12-26"], out)


def test_missing_steps_are_noted_and_nan_feeds_never_print(data, tmp_path, capsys):
    folder, files = data
    out = tmp_path / "out"
    settings = tmp_path / "figures_only.toml"
    settings.write_text("[output]\nreport = false\n", encoding="utf-8")
    rc, stdout, err = _run(["analyze", files["tail"], "--out", out, "--settings", settings,
                            *QUIET], capsys)
    assert rc == 0, err
    # check: planted truth (steps 300-359 missing: 2001-10-28 to 2001-12-26, 83.3 % present)
    assert "60 of 360 time steps, 2001-10-28 to 2001-12-26 (60 steps)" in stdout
    assert "tail_missing.nc" in stdout and "83.3 %" in stdout
    assert not re.search(r"\bnan\b", stdout, re.IGNORECASE)
    sources = pd.read_csv(out / "sources.csv")
    for _, row in sources.iterrows():
        if not np.isfinite(row["feed_w_per_m"]):
            assert "not measurable" in stdout


def test_summary_never_prints_nan_as_a_feed(tmp_path):
    src = pd.DataFrame({"rank": [1, 2], "lat": [-34.5, 12.0], "lon": [-17.65, 3.1],
                        "feed_w_per_m": [2.0e4, np.nan], "feed_lo": [1.0e4, np.nan],
                        "feed_hi": [3.0e4, np.nan], "persistence": [0.9, 0.8],
                        "cape_id": ["C01", ""]})
    products = Products(*([None] * 2), src, *([None] * 8))
    text = AnalyzeResult(tmp_path, products, {}).summary_text()
    assert not re.search(r"\bnan\b", text, re.IGNORECASE)
    assert "feed not measurable" in text
    # check: common practice, no source (hemisphere letters, no minus signs)
    assert "34.50S 17.65W" in text and "12.00N 3.10E" in text


def _zarr(folder: Path, name: str, chunks: dict) -> Path:
    u, v = bi.flow(bi.NT)
    path = folder / name
    bi.dataset(u, v).chunk(chunks).to_zarr(path, mode="w", consolidated=True, zarr_format=2)
    return path


def test_a_lost_first_zarr_chunk_draws_no_coast(tmp_path, capsys):
    store = _zarr(tmp_path, "lost_chunk.zarr", {"time": 30, "lat": 20, "lon": 20})
    for name in ("u", "v"):
        (store / name / "0.0.0").unlink()  # steps 0-29 of the south-west quadrant
    out = tmp_path / "out"
    rc, stdout, err = _run(["analyze", store, "--out", out, "--settings",
                            _lean(tmp_path), *QUIET], capsys)
    assert rc == 0, err
    # check: planted truth (the removed chunk holds steps 0-29, 2001-01-01 to 2001-01-30)
    assert "30 of 360 time steps, 2001-01-01 to 2001-01-30 (30 steps)" in stdout
    assert "lost_chunk.zarr" in stdout
    with xr.open_dataset(out / "results.nc") as res:
        n_valid = np.nan_to_num(np.asarray(res["n_valid"].values))
    sea = ~bi.land_mask()
    # check: planted truth (sea and land of the generator: no coast along the lost chunk)
    np.testing.assert_array_equal(n_valid > 0, sea)
    lost = np.zeros_like(sea)
    lost[:20, :20] = True
    # check: planted truth (the lost quadrant's sea points miss 30 of 360 steps)
    assert np.all(n_valid[lost & sea] == bi.NT - 30)
    sources = pd.read_csv(out / "sources.csv")
    assert np.isfinite(sources["feed_w_per_m"]).all()


def _lean(folder: Path) -> Path:
    path = folder / "lean.toml"
    path.write_text(LEAN, encoding="utf-8")
    return path


# --------------------------------------------------------------------------- item 6


def test_a_truncated_compressed_zarr_chunk_is_an_input_error(tmp_path, capsys):
    store = _zarr(tmp_path, "cut.zarr", {"time": 30})
    chunk = store / "u" / "3.0.0"  # steps 90-119: not one of the steps read for the mask
    chunk.write_bytes(chunk.read_bytes()[: chunk.stat().st_size // 2])
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", store, "--out", out, "--settings", _lean(tmp_path), *QUIET],
                      capsys)
    _refused(rc, err, ["cut.zarr", "cannot be decoded", "damaged"], out)


def test_a_truncated_zarr_chunk_read_for_the_mask_is_an_input_error(tmp_path, capsys):
    store = _zarr(tmp_path, "cut0.zarr", {"time": 30})
    chunk = store / "v" / "0.0.0"
    chunk.write_bytes(chunk.read_bytes()[:40])
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", store, "--out", out, *QUIET], capsys)
    _refused(rc, err, ["cut0.zarr", "cannot be decoded"], out)


SETTINGS_CASES = {
    "bootstrap": ("[sources]\nn_bootstrap = 1000000000\n", ["n_bootstrap", "100000"]),
    "inf_spacing": ("[coast]\nstation_spacing_km = inf\n", ["station_spacing_km", "finite"]),
    "nan_spacing": ("[coast]\nray_spacing_km = nan\n", ["ray_spacing_km", "finite"]),
    "readers": ("[stream]\nread_processes = 10000\n", ["stream.read_processes", "64"]),
    "period_zero": ("[signals]\neddy_period_days = [0, 120]\n",
                    ["signals.eddy_period_days", "positive"]),
    "same_uv": ('[ingest]\nu_var = "u"\nv_var = "u"\n', ["ingest.u_var", "same variable"]),
}


@pytest.mark.parametrize("case", sorted(SETTINGS_CASES))
def test_nonsense_settings_are_refused(case, data, tmp_path, capsys):
    folder, files = data
    text, names = SETTINGS_CASES[case]
    toml = tmp_path / f"{case}.toml"
    toml.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["short"], "--out", out, "--settings", toml, *QUIET],
                      capsys)
    _refused(rc, err, [f"{case}.toml", *names], out)


OPTION_CASES = {
    "negative_depth": (["--depth", "-5"], ["ingest.depth_m", "--depth"]),
    "nan_depth": (["--depth", "nan"], ["depth_m", "finite"]),
    "negative_smoothing": (["--ssh-smooth", "-5"], ["--ssh-smooth"]),
    "same_uv": (["--u-var", "v", "--v-var", "v"], ["--u-var", "same variable"]),
    "settings_folder": (["--settings", "."], ["is a folder"]),
}


@pytest.mark.parametrize("case", sorted(OPTION_CASES))
def test_nonsense_options_are_refused(case, data, tmp_path, capsys, monkeypatch):
    folder, files = data
    options, names = OPTION_CASES[case]
    monkeypatch.chdir(tmp_path)
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["short"], "--out", out, *options, *QUIET], capsys)
    _refused(rc, err, names, out)


def test_depth_on_single_level_data_is_refused(data, tmp_path, capsys):
    folder, files = data
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["short"], "--out", out, "--depth", "100", *QUIET],
                      capsys)
    _refused(rc, err, ["twenty_days.nc", "no depth dimension", "--depth"], out)


def test_an_eddy_band_below_two_time_steps_is_refused(data, tmp_path, capsys):
    folder, files = data
    toml = tmp_path / "fast.toml"
    toml.write_text("[signals]\neddy_period_days = [1.5, 120]\n", encoding="utf-8")
    out = tmp_path / "out"
    rc, _, err = _run(["analyze", files["tail"], "--out", out, "--settings", toml, *QUIET],
                      capsys)
    # check: Nyquist period of daily data, 2 days (any signal-processing text)
    _refused(rc, err, ["1.5 days", "2 days", "signals.eddy_period_days"], out)


def test_demo_on_a_read_only_disk(tmp_path, capsys, monkeypatch):
    real_mkdir = Path.mkdir

    def read_only(self, *args, **kwargs):
        if str(self).startswith(str(tmp_path)):
            raise OSError(errno.EROFS, "Read-only file system", str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", read_only)
    out = tmp_path / "demo"
    rc, _, err = _run(["demo", "--out", out, "--no-progress"], capsys)
    _refused(rc, err, ["read-only", str(tmp_path)], out)


@pytest.fixture(scope="module")
def state(tmp_path_factory, data):
    folder, files = data
    root = tmp_path_factory.mktemp("state")
    u, v = bi.flow(bi.NT + 20)
    first = bi.write(bi.dataset(u[:bi.NT], v[:bi.NT]), root / "first.nc")
    new = bi.write(bi.dataset(u[bi.NT:], v[bi.NT:], time=np.arange(bi.NT, bi.NT + 20)),
                   root / "next.nc")
    rc = main(["update", str(root / "st"), str(first), "--settings", str(files["lean"]),
               *QUIET])
    assert rc == 0
    return root / "st", new, files["lean"]


def _truncate(path: Path) -> None:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def _garble(path: Path) -> None:
    data = bytearray(path.read_bytes())
    mid = len(data) // 2
    data[mid:mid + 16] = bytes((b + 1) % 256 for b in data[mid:mid + 16])
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("target, damage", [
    ("v000001/moments.npz", _truncate),
    ("v000001/times.npz", lambda p: p.write_bytes(b"")),
    ("store/grid.npz", _garble),
    ("store/series", _garble),
    ("store/series", _truncate),
])
def test_a_damaged_monitoring_state_stops_with_a_clear_error(target, damage, state, tmp_path,
                                                             capsys):
    folder, new, lean = state
    copy = tmp_path / "st"
    shutil.copytree(folder, copy)
    path = copy / target
    if target == "store/series":
        manifest = json.loads((copy / "v000001" / "manifest.json").read_text())
        path = copy / "store" / manifest["series_parts"][0]
    damage(path)
    rc, _, err = _run(["update", copy, new, "--settings", lean, *QUIET], capsys)
    # a checksummed file names its own damage ("changed or truncated"); every message says
    # the monitoring state is damaged and names the file
    _refused(rc, err, [path.name, "monitoring state"])


# --------------------------------------------------------------------------- item 7


def test_speeds_that_look_like_cm_per_s_are_noted(data):
    folder, files = data
    prep = prepare([files["cm"]], Settings())
    text = " ".join(prep.notes)
    assert "centimetres per second" in text and "cm_as_m.nc" in text and "'u'" in text
    # check: from memory (typical ocean surface currents: a few tenths of m/s, the fastest
    # boundary currents about 2 m/s; the planted record has a 90th percentile of 0.2 m/s)
    assert prepare([files["short"]], Settings()).notes == []


# --------------------------------------------------------------------------- item 8


def test_reader_processes_do_not_import_from_the_current_folder(tmp_path, monkeypatch):
    from coastmon.stream import readers
    from coastmon.stream.pass_ import INPUT_VARIABLES, _input_arrays

    u, v = bi.flow(30)
    path = tmp_path / "deflated.nc"
    enc = {name: {"zlib": True, "complevel": 1, "chunksizes": (10, bi.NY, bi.NX)}
           for name in "uv"}
    bi.dataset(u, v).to_netcdf(path, engine="netcdf4", encoding=enc)
    ds = open_dataset([path], IngestSettings())
    arrays = _input_arrays(ds, [n for n in INPUT_VARIABLES if n in ds.data_vars])
    cwd = tmp_path / "cwd"
    cwd.mkdir()
    marker = cwd / "EXECUTED"
    (cwd / "mmap.py").write_text(f"open({str(marker)!r}, 'w').close()\n", encoding="utf-8")
    monkeypatch.chdir(cwd)
    with readers.ProcessReader(1, 2) as reader:
        reader.start(arrays, 30, 4)
        blocks, _ = reader.submit(0, 0, 30).result()
        first = np.array(blocks[0][0], copy=True)
    assert not marker.exists()
    # check: common practice, no source (the copy through the reader is bit for bit)
    np.testing.assert_array_equal(first, ds["u"].values[0])


def test_a_reader_process_that_crashes_on_a_chunk_names_that_chunk():
    """A decompressor that crashes the reader process (a segmentation fault on a damaged
    chunk) is reported as that chunk's damage, not as a lack of memory."""
    import faulthandler

    import dask
    import dask.array as da

    from coastmon.io.damage import ChunkDecodeError
    from coastmon.stream import readers

    good = da.zeros((30, 4, 5), dtype="float32", chunks=(30, 4, 5))
    crash = da.from_delayed(dask.delayed(faulthandler._sigsegv)(), shape=(30, 4, 5),
                            dtype="float32")
    arr = da.concatenate([good, crash], axis=0)
    with readers.ProcessReader(1, 2) as reader:
        reader.start([arr, arr], 30, 4)
        blocks, _ = reader.submit(0, 0, 30).result()
        # check: common practice, no source (the chunk before the crash is read intact)
        assert float(np.abs(np.asarray(blocks[0])).sum()) == 0.0
        with pytest.raises(ChunkDecodeError, match="crashed with signal 11 \\(SIGSEGV\\)"):
            reader.submit(1, 30, 60).result()


# --------------------------------------------------------------------------- item 9


def test_a_file_stored_time_lon_lat_is_read_as_time_lat_lon(data, record, tmp_path):
    u, v = record
    transposed = bi.dataset(u[:20], v[:20]).transpose("time", "lon", "lat")
    path = bi.write(transposed, tmp_path / "time_lon_lat.nc")
    ds = open_dataset([path], IngestSettings())
    normal = open_dataset([data[1]["short"]], IngestSettings())
    # check: planted truth (the same values stored in the other axis order)
    np.testing.assert_array_equal(ds["u"].values, normal["u"].values)
    np.testing.assert_array_equal(ds["lat"].values, normal["lat"].values)
    np.testing.assert_array_equal(ds["mask"].values, normal["mask"].values)
    sea = (~bi.land_mask()).astype(np.int8)
    mask_only = xr.Dataset(
        {"mask": (("lon", "lat"), sea.T, {"standard_name": "sea_binary_mask"})},
        coords={"lat": ("lat", bi.LAT, {"units": "degrees_north"}),
                "lon": ("lon", bi.LON, {"units": "degrees_east"})})
    static = open_mask([bi.write(mask_only, tmp_path / "mask_lon_lat.nc")], IngestSettings())
    # check: planted truth (the generator's mask, stored transposed)
    np.testing.assert_array_equal(static["mask"].values, sea)


# --------------------------------------------------------------------------- item 10


def test_positions_use_hemisphere_letters():
    from coastmon.report import figures, html

    # check: common practice, no source (ISO 6709 style text with N/S, E/W letters)
    assert position_text(-17.654, -34.5) == "34.50S 17.65W"
    assert lat_text(0.0) == "0.00" and lon_text(180.0, "g") == "180"
    assert lon_text(350.0) == "10.00W"
    assert html._position(-17.654, -34.5) == "34.50°S 17.65°W"
    assert figures._lon_text(-10.0) == "10°W" and figures._lat_text(-5.0) == "5°S"


def test_update_with_new_data_of_fill_values_is_refused(state, tmp_path, capsys):
    folder, new, lean = state
    copy = tmp_path / "st"
    shutil.copytree(folder, copy)
    u, v = bi.flow(bi.NT + 20)
    u, v = u[bi.NT:], v[bi.NT:]
    u[10:] = np.nan  # the second half of the new steps are fill values
    v[10:] = np.nan
    empty = bi.write(bi.dataset(u, v, time=np.arange(bi.NT, bi.NT + 20)),
                     tmp_path / "new_fill.nc")
    manifest = (copy / "v000001" / "manifest.json").read_bytes()
    rc, _, err = _run(["update", copy, empty, "--settings", lean, *QUIET], capsys)
    # check: planted truth (half of the new steps are fill values: 50 % present, the
    # last ten of 2001-12-27 + 0..19 days, 2002-01-06 to 2002-01-15)
    _refused(rc, err, ["new_fill.nc", "Only 50 %", "2002-01-06 to 2002-01-15"])
    assert (copy / "v000001" / "manifest.json").read_bytes() == manifest
    assert (copy / "current").read_text().strip() == "v000001"


# --------------------------------------------------------------------------- reader processes


def _reader_children() -> list[int]:
    """Process ids of this process's children that run a coastmon reader or the figure
    process (Linux /proc)."""
    me, found = os.getpid(), []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmd = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        if ppid == me and ("read_worker" in cmd or "draw_worker" in cmd):
            found.append(int(entry.name))
    return found


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs Linux /proc")
@pytest.mark.parametrize("case", ["record_too_short", "geometry", "damaged_in_pass"])
def test_a_failing_analyze_leaves_no_reader_process(case, data, record, tmp_path, capsys):
    folder, files = data
    u, v = record
    toml = tmp_path / "readers.toml"
    toml.write_text(LEAN + "[stream]\nread_processes = 2\n", encoding="utf-8")
    if case == "record_too_short":
        store = tmp_path / "short.zarr"
        bi.dataset(u[:60], v[:60]).chunk({"time": 30}).to_zarr(
            store, mode="w", consolidated=True, zarr_format=2)
        names = ["short.zarr", "60 days"]
    elif case == "geometry":
        store = tmp_path / "all_sea.zarr"
        bi.dataset(np.nan_to_num(u, nan=0.1) + 0.05, np.nan_to_num(v, nan=0.1) + 0.05).chunk(
            {"time": 30}).to_zarr(store, mode="w", consolidated=True, zarr_format=2)
        names = ["all_sea.zarr", "no land"]
    else:
        store = _zarr(tmp_path, "cut_pass.zarr", {"time": 30})
        chunk = store / "u" / "4.0.0"
        chunk.write_bytes(chunk.read_bytes()[: chunk.stat().st_size // 2])
        names = ["cut_pass.zarr", "cannot be decoded"]
    assert _reader_children() == []
    rc, _, err = _run(["analyze", store, "--out", tmp_path / "out", "--settings", toml,
                       *QUIET], capsys)
    _refused(rc, err, names, tmp_path / "out")
    # check: common practice, no source (a failed command leaves no child process behind)
    assert _reader_children() == []
