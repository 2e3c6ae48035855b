"""Reading the pass's chunks in reader processes (compressed input) against one reader thread."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coastmon.config import IngestSettings
from coastmon.errors import InputError
from coastmon.io.ingest import open_dataset
from coastmon.stream import readers
from coastmon.stream.pass_ import INPUT_VARIABLES, _input_arrays, _time_bounds

INGEST = IngestSettings(u_var="u", v_var="v", mask_var="mask")


def write_record(folder: Path, n_files=3, nt=9, ny=30, nx=40, zlib=True, bad_at=None):
    """Compressed NetCDF-4 files, one time step per HDF5 chunk, a land corner."""
    lon, lat = np.meshgrid(np.linspace(-15, -5, nx), np.linspace(15, 25, ny))
    sea = np.ones((ny, nx), dtype=np.int8)
    sea[:6, -8:] = 0
    rng = np.random.default_rng(7)
    files = []
    for k in range(n_files):
        times = pd.date_range("2001-01-01", periods=nt, freq="D") + pd.Timedelta(days=nt * k)
        u = (0.3 * rng.standard_normal((nt, ny, nx))).astype(np.float32)
        v = (0.2 * rng.standard_normal((nt, ny, nx)) - 0.05).astype(np.float32)
        if bad_at is not None and k == bad_at[0]:
            u[bad_at[1], 20, 10] = 5.0e4  # far beyond any ocean current
        ds = xr.Dataset(
            {"u": (("time", "y", "x"), u, {"units": "m s-1"}),
             "v": (("time", "y", "x"), v, {"units": "m s-1"})},
            coords={"time": times, "lon": (("y", "x"), lon), "lat": (("y", "x"), lat),
                    "mask": (("y", "x"), sea)},
        )
        enc = {name: {"zlib": zlib, "complevel": 1, "chunksizes": (1, ny, nx)}
               for name in ("u", "v")}
        files.append(folder / f"part{k}.nc")
        ds.to_netcdf(files[-1], encoding=enc)
    return files


def arrays_of(ds):
    return _input_arrays(ds, [n for n in INPUT_VARIABLES if n in ds.data_vars])


def test_how_many_reader_processes():
    gib = 2**30
    assert readers.read_processes(None, True, 2 * gib, 2) == 2
    assert readers.read_processes(None, True, 2 * gib, 16) == readers.MAX_READ_PROCESSES
    assert readers.read_processes(None, False, 2 * gib, 16) == 0  # uncompressed: a thread
    assert readers.read_processes(None, True, gib // 2, 16) == 0  # too short to pay back
    assert readers.read_processes(None, True, 2 * gib, 1) == 0  # one core
    assert readers.read_processes(3, False, 1, 1) == 3  # the setting wins
    assert readers.read_processes(0, True, 2 * gib, 16) == 0


def test_no_reader_processes_where_they_cannot_be_fed(monkeypatch):
    monkeypatch.setattr(readers, "PROCESSES_SUPPORTED", False)  # as on Windows
    assert readers.read_processes(None, True, 2**31, 16) == 0
    assert readers.read_processes(4, True, 2**31, 16) == 0


def test_ingest_says_whether_the_input_is_compressed(tmp_path):
    (tmp_path / "z").mkdir()
    (tmp_path / "p").mkdir()
    zipped = open_dataset(write_record(tmp_path / "z", n_files=1), INGEST)
    plain = open_dataset(write_record(tmp_path / "p", n_files=1, zlib=False), INGEST)
    assert zipped.attrs["compressed_input"] == 1
    assert plain.attrs["compressed_input"] == 0


def test_reader_processes_give_the_chunks_the_thread_reads(tmp_path):
    ds = open_dataset(write_record(tmp_path), INGEST)
    arrays = arrays_of(ds)
    bounds = _time_bounds(arrays, ds.sizes["time"])
    assert len(bounds) >= 3
    with readers.ProcessReader(2, 3) as reader:
        reader.start(arrays, max(b - a for a, b in bounds), 4)
        for index, (t0, t1) in enumerate(bounds):
            got, seconds = reader.submit(index, t0, t1).result()
            want, _ = readers.read_chunk(arrays, t0, t1)
            assert seconds > 0
            for g, w in zip(got, want, strict=True):
                if w is None:
                    assert g is None
                else:
                    # check: common practice, no source (a copy through shared memory is
                    # bit for bit, NaN on land included)
                    np.testing.assert_array_equal(g, w)
        procs = [w.proc for w in reader.workers]
    assert all(p.returncode == 0 for p in procs)  # stopped cleanly, none left behind


def test_a_corrupt_value_met_by_a_reader_process_is_reported_as_the_thread_reports_it(tmp_path):
    ds = open_dataset(write_record(tmp_path, bad_at=(1, 4)), INGEST)
    arrays = arrays_of(ds)
    bounds = _time_bounds(arrays, ds.sizes["time"])
    with readers.ProcessReader(1, 2) as reader:
        reader.start(arrays, max(b - a for a, b in bounds), 4)
        messages = []
        for index, (t0, t1) in enumerate(bounds):
            try:
                reader.submit(index, t0, t1).result()
            except InputError as exc:
                messages.append(str(exc))
                with pytest.raises(InputError) as thread_exc:
                    readers.read_chunk(arrays, t0, t1)
                assert str(exc) == str(thread_exc.value)
                assert exc.where == thread_exc.value.where and exc.todo
    assert len(messages) == 1 and "part1.nc" in messages[0]


def test_a_killed_reader_process_is_reported_not_waited_on(tmp_path):
    ds = open_dataset(write_record(tmp_path, n_files=1), INGEST)
    arrays = arrays_of(ds)
    with readers.ProcessReader(1, 2) as reader:
        reader.workers[0].proc.kill()
        reader.start(arrays, ds.sizes["time"], 4)
        start = time.perf_counter()
        with pytest.raises(InputError, match="reader process of the streaming pass stopped"):
            reader.submit(0, 0, 3).result()
        with pytest.raises(InputError, match="stream.read_processes = 0"):
            reader.submit(1, 3, 6).result()
        assert time.perf_counter() - start < 30


SCRIPT = textwrap.dedent(
    """
    # No `if __name__ == "__main__"` guard, as in many users' scripts: reader processes
    # must not run this script again.
    import json, sys
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_stream_pass import make_frame
    from coastmon.config import IngestSettings, StreamSettings
    from coastmon.grid.metrics import GridMetrics
    from coastmon.io.ingest import open_dataset
    from coastmon.stream import run_pass

    ds = open_dataset({files!r}, IngestSettings(u_var="u", v_var="v", mask_var="mask"))
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    frame = make_frame(metrics.shape, ds["mask"].values == 1, np.random.default_rng(0))
    out = {{}}
    for n in (0, 2):
        r = run_pass(ds, metrics, frame, StreamSettings(progress=False, read_processes=n),
                     {work!r} + str(n))
        out[n] = {{k: np.array(r.stats[k].values) for k in r.stats.data_vars}}
        out[n].update({{k: np.array(r.series[k].values) for k in r.series.data_vars}})
    same = sorted(out[0]) == sorted(out[2]) and all(
        np.array_equal(out[0][k], out[2][k], equal_nan=True) for k in out[0])
    print("RESULT " + json.dumps({{"same": same, "n_time": r.n_time,
                                  "eke": float(np.nanmean(out[2]["eke"]))}}))
    """
)


def test_pass_with_reader_processes_equals_the_thread_reader_from_an_unguarded_script(tmp_path):
    files = write_record(tmp_path)
    script = tmp_path / "user_script.py"
    script.write_text(SCRIPT.format(tests=str(Path(__file__).parent),
                                    files=[str(f.resolve()) for f in files],
                                    work=str(tmp_path / "work")))
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                         timeout=600, cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-3000:]
    lines = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")]
    assert len(lines) == 1, out.stdout[-2000:]  # the script ran once, not once per reader
    result = json.loads(lines[0][len("RESULT "):])
    # check: common practice, no source (the same chunks merged in the same order give the
    # same numbers, whoever reads them)
    assert result["same"] is True and result["n_time"] == 27
    # check: common practice, no source (eke = (var u + var v) / 2 = (0.3² + 0.2²) / 2
    # = 0.065 m2 s-2 for these random fields)
    assert 0.055 < result["eke"] < 0.075


def test_slots_leave_nothing_in_the_file_system(tmp_path):
    shm = Path("/dev/shm")
    before = set(os.listdir(shm)) if shm.is_dir() else set()
    ds = open_dataset(write_record(tmp_path, n_files=1), INGEST)
    with readers.ProcessReader(1, 2) as reader:
        reader.start(arrays_of(ds), ds.sizes["time"], 4)
        reader.submit(0, 0, 9).result()
        during = set(os.listdir(shm)) if shm.is_dir() else set()
    # check: common practice, no source (anonymous shared memory has no name, so a pass
    # that is killed leaves nothing behind in /dev/shm)
    assert during == before


def test_readers_started_ahead_are_the_ones_the_pass_uses(tmp_path):
    from test_stream_pass import make_frame

    from coastmon.config import StreamSettings
    from coastmon.grid.metrics import GridMetrics
    from coastmon.stream import prestart_readers, run_pass

    ds = open_dataset(write_record(tmp_path), INGEST)
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    frame = make_frame(metrics.shape, ds["mask"].values == 1, np.random.default_rng(0))
    settings = StreamSettings(progress=False, read_processes=1)
    prestart_readers(ds, settings)
    assert len(readers._SPARE) == 1
    (ahead,) = readers._SPARE.values()
    ahead_procs = [w.proc for w in ahead.workers]
    result = run_pass(ds, metrics, frame, settings, tmp_path / "ahead")
    assert readers._SPARE == {}  # taken by the pass, not left for exit
    assert all(p.returncode == 0 for p in ahead_procs)  # and stopped by it
    thread = run_pass(ds, metrics, frame, StreamSettings(progress=False, read_processes=0),
                      tmp_path / "thread")
    for name in thread.stats.data_vars:
        # check: common practice, no source (same chunks, same merge order => same numbers)
        np.testing.assert_array_equal(result.stats[name].values, thread.stats[name].values)


@pytest.mark.parametrize("layout", ["cgrid", "ssh_only", "s_levels", "zarr"])
def test_reader_processes_read_native_layouts_as_the_thread_does(tmp_path, layout):
    """Inputs whose canonical arrays are computed in the graph (C-grid averaging and
    native vorticity, geostrophic velocity from SSH, vertical interpolation) ship to the
    reader processes and come back bit for bit."""
    import test_native_grids as native

    if layout == "cgrid":
        path = native._rotated_cgrid(tmp_path / "c.nc", 30.0)[0]
        settings = IngestSettings(time_chunk=2)
    elif layout == "ssh_only":
        path = native._ssh_file(tmp_path / "s.nc", 28.0, 32.0)[0]
        settings = IngestSettings(time_chunk=2)
    elif layout == "s_levels":
        path = native._s_coordinate_file(tmp_path / "z.nc", "ocean_s_coordinate_g2")[0]
        settings = IngestSettings(u_var="uu", v_var="vv", depth_m=55.0, depth_method="linear",
                                  time_chunk=2)
    else:
        (tmp_path / "nc").mkdir()
        source = xr.open_mfdataset(write_record(tmp_path / "nc", n_files=2), combine="by_coords")
        path = tmp_path / "record.zarr"
        source.chunk({"time": 4}).to_zarr(path, consolidated=False)  # the default compressor
        settings = INGEST
    ds = open_dataset([path], settings)
    if layout == "zarr":
        assert ds.attrs["compressed_input"] == 1
    arrays = arrays_of(ds)
    bounds = _time_bounds(arrays, ds.sizes["time"])
    with readers.ProcessReader(2, 2) as reader:
        reader.start(arrays, max(b - a for a, b in bounds), 4)
        for index, (t0, t1) in enumerate(bounds[:2]):
            got, _ = reader.submit(index, t0, t1).result()
            want, _ = readers.read_chunk(arrays, t0, t1)
            assert sum(w is not None for w in want) >= 2
            for g, w in zip(got, want, strict=True):
                if w is not None:
                    # check: common practice, no source (the same graph computed in
                    # another process gives the same bits)
                    np.testing.assert_array_equal(g, w)
