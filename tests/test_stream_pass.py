"""The streaming pass against the straightforward xarray recipe and direct sampling."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from distributed import LocalCluster
from planted import StandInFrame
from scipy import sparse

from coastmon.config import StreamSettings
from coastmon.errors import InputError
from coastmon.grid import operators
from coastmon.grid.metrics import GridMetrics
from coastmon.stream import kernels, run_pass

SETTINGS = StreamSettings(progress=False)


def make_frame(shape, sea, rng, n_stations=3, n_offsets=2, n_rays=4,
               ray_pool=None) -> StandInFrame:
    """Rows of 4 random sea points with random positive weights summing to 1; last row empty.

    With ``ray_pool`` (grid indices) the ray rows draw their points from that pool only,
    as neighbouring stations' rays do on a grid coarse beside the station spacing.
    """
    n_points = n_stations * (n_offsets + n_rays)
    sea_idx = np.flatnonzero(sea.ravel())
    rows, cols, vals = [], [], []
    for p in range(n_points - 1):
        from_pool = ray_pool is not None and p >= n_stations * n_offsets
        pick = rng.choice(ray_pool if from_pool else sea_idx, size=4, replace=False)
        w = rng.uniform(0.1, 1.0, size=4)
        rows += [p] * 4
        cols += list(pick)
        vals += list(w / w.sum())
    sampler = sparse.csr_matrix((vals, (rows, cols)), shape=(n_points, shape[0] * shape[1]))
    valid = np.ones(n_points, dtype=bool)
    valid[-1] = False
    stations = pd.DataFrame({"station_id": np.arange(n_stations),
                             "alongshore_km": 10.0 * np.arange(n_stations)})
    return StandInFrame(sampler, valid, stations, np.array([0.0, 10.0]),
                        10.0 * np.arange(1, n_rays + 1))


def make_dataset(nt=40, ny=9, nx=11, chunk=7, ssh=True, seed=0, start="2001-01-01",
                 freq="D"):
    """Random smooth-ish flow with a land corner (NaN) and a mean current."""
    rng = np.random.default_rng(seed)
    lon = np.linspace(-12.0, -9.0, nx)
    lat = np.linspace(37.0, 40.0, ny)
    lon2, lat2 = np.meshgrid(lon, lat)
    sea = np.ones((ny, nx), dtype=bool)
    sea[:3, -3:] = False
    sea[-2:, -1] = False
    base_u = 0.2 * np.cos(np.deg2rad(lat2 * 40))
    u = base_u + 0.1 * rng.standard_normal((nt, ny, nx))
    v = -0.05 + 0.1 * rng.standard_normal((nt, ny, nx))
    h = 0.3 + 0.05 * rng.standard_normal((nt, ny, nx))
    for a in (u, v, h):
        a[:, ~sea] = np.nan
    time = pd.date_range(start, periods=nt, freq=freq)
    data = {"u": (("time", "y", "x"), u), "v": (("time", "y", "x"), v)}
    if ssh:
        data["ssh"] = (("time", "y", "x"), h)
    ds = xr.Dataset(data, coords={"time": time, "lon": (("y", "x"), lon2),
                                  "lat": (("y", "x"), lat2),
                                  "mask": (("y", "x"), sea.astype(np.int8))})
    if chunk:
        ds = ds.chunk({"time": chunk})
    return ds, GridMetrics.from_lonlat(lon2, lat2), sea, rng


def xarray_recipe(ds, metrics, ow_threshold, seasonal=False):
    """Mean, anomalies, products, means — the straightforward way, on the whole record."""
    u, v = ds["u"].load(), ds["v"].load()
    zeta = xr.DataArray(operators.vorticity(u.values, v.values, metrics), dims=u.dims,
                        coords=u.coords)
    w = xr.DataArray(operators.okubo_weiss(u.values, v.values, metrics), dims=u.dims,
                     coords=u.coords)
    fields = {"u": u, "v": v, "zeta": zeta}
    if "ssh" in ds:
        fields["ssh"] = ds["ssh"].load()
    valid = xr.concat([f.notnull() for f in fields.values()], "var").all("var")
    fields = {k: f.where(valid) for k, f in fields.items()}
    if seasonal:
        anom = {k: f.groupby("time.month") - f.groupby("time.month").mean("time")
                for k, f in fields.items()}
    else:
        anom = {k: f - f.mean("time") for k, f in fields.items()}
    out = {f"mean_{k}": f.mean("time") for k, f in fields.items()}
    for a, b, name in [("u", "u", "uu"), ("u", "v", "uv"), ("v", "v", "vv"),
                       ("u", "zeta", "u_zeta"), ("v", "zeta", "v_zeta"),
                       ("zeta", "zeta", "zeta_var")]:
        out[name] = (anom[a] * anom[b]).mean("time")
    if "ssh" in fields:
        for a, b, name in [("ssh", "ssh", "ssh_var"), ("u", "ssh", "u_ssh"), ("v", "ssh", "v_ssh")]:
            out[name] = (anom[a] * anom[b]).mean("time")
    ua, va = anom["u"], anom["v"]
    out["eke"] = 0.5 * (out["uu"] + out["vv"])
    out["eke_flux_x"] = (0.5 * (ua * ua * ua + ua * va * va)).mean("time")
    out["eke_flux_y"] = (0.5 * (ua * ua * va + va * va * va)).mean("time")
    sigma = w.std(("y", "x"))
    core = (w < -ow_threshold * sigma).where(valid)
    out["ow_core_fraction"] = core.sum("time") / valid.sum("time")
    out["n_valid"] = valid.sum("time")
    ux, uy = operators.gradient(out["mean_u"].values, metrics)
    vx, vy = operators.gradient(out["mean_v"].values, metrics)
    out["bt_conversion"] = -(out["uu"] * ux + out["uv"] * (uy + vx) + out["vv"] * vy)
    out["rossby_var"] = out["zeta_var"] / metrics.f**2
    return {k: np.asarray(val) for k, val in out.items()}


def assert_matches_recipe(stats, ref, rtol=1e-10):
    for name, expected in ref.items():
        got = stats[name].values
        assert np.array_equal(np.isnan(got), np.isnan(expected)), name
        scale = np.nanmax(np.abs(expected))
        # check: xarray/numpy recipe on the whole record as the reference library
        np.testing.assert_allclose(got, expected, rtol=0, atol=rtol * scale, err_msg=name)


def test_fused_vorticity_matches_operators():
    rng = np.random.default_rng(3)
    lon = np.linspace(-80.0, -70.0, 23)
    lat = np.linspace(-30.0, -20.0, 17)
    metrics = GridMetrics.from_lonlat(*np.meshgrid(lon, lat))
    u = rng.standard_normal((5, 17, 23))
    v = rng.standard_normal((5, 17, 23))
    u[:, 5:9, 10:14] = np.nan
    v[:, 5:9, 10:14] = np.nan
    u[:, 0, 0] = np.nan
    v[:, 0, 0] = np.nan
    u32, v32 = u.astype(np.float32), v.astype(np.float32)
    zeta, w, limit = kernels.dual_fields(u32, v32, metrics.gx, metrics.gy, 0.2)
    expected = operators.vorticity(u32, v32, metrics)
    assert np.array_equal(np.isnan(zeta), np.isnan(expected))
    # check: coastmon.grid.operators.vorticity (numpy reference of the same Green's-theorem sums)
    np.testing.assert_allclose(zeta, expected, rtol=1e-12, atol=0)
    expected_w = operators.okubo_weiss(u32, v32, metrics)
    # check: coastmon.grid.operators.okubo_weiss (numpy reference; Okubo 1970, Weiss 1991)
    np.testing.assert_allclose(w, expected_w, rtol=1e-12, atol=1e-12 * np.nanmax(np.abs(expected_w)))
    sigma = np.nanstd(expected_w, axis=(1, 2))
    # check: Okubo 1970; Weiss 1991 (cores where W < -0.2 sigma_W), numpy nanstd
    np.testing.assert_allclose(limit, -0.2 * sigma, rtol=1e-10)
    assert np.array_equal(w < limit[:, None, None], expected_w < -0.2 * sigma[:, None, None])


def test_solid_body_rotation_vorticity():
    lon = np.linspace(-20.0, -10.0, 21)
    lat = np.linspace(20.0, 30.0, 21)
    lon2, lat2 = np.meshgrid(lon, lat)
    metrics = GridMetrics.from_lonlat(lon2, lat2)
    omega = 1e-5
    radius = 6_371_000.0
    u = (omega * radius * np.cos(np.deg2rad(lat2)))[None]
    v = np.zeros_like(u)
    zeta, _, _ = kernels.dual_fields(u, v, metrics.gx, metrics.gy, 0.2)
    # check: solid-body rotation about the polar axis has zeta = 2 omega sin(lat)
    # (Vallis 2017, section 2.2), to the dual-cell averaging error
    np.testing.assert_allclose(zeta[0, 1:-1, 1:-1], 2 * omega * np.sin(np.deg2rad(lat2))[1:-1, 1:-1],
                               rtol=2e-4)


@pytest.mark.parametrize("ssh", [True, False])
def test_pass_matches_xarray_recipe(tmp_path, ssh):
    ds, metrics, sea, rng = make_dataset(ssh=ssh)
    frame = make_frame(metrics.shape, sea, rng)
    result = run_pass(ds, metrics, frame, SETTINGS, tmp_path)
    assert result.n_time == 40
    assert_matches_recipe(result.stats, xarray_recipe(ds, metrics, SETTINGS.ow_threshold))
    assert ("mean_ssh" in result.stats) == ssh
    assert result.stats["eke"].attrs["units"] == "m2 s-2"


def test_pass_seasonal_matches_monthly_climatology(tmp_path):
    ds, metrics, sea, rng = make_dataset(nt=120, ny=6, nx=7, chunk=25, freq="5D")
    frame = make_frame(metrics.shape, sea, rng)
    settings = StreamSettings(progress=False, seasonal=True)
    result = run_pass(ds, metrics, frame, settings, tmp_path)
    ref = xarray_recipe(ds, metrics, settings.ow_threshold, seasonal=True)
    assert_matches_recipe(result.stats, ref)


def test_pass_unchunked_input(tmp_path):
    ds, metrics, sea, rng = make_dataset(chunk=None, ssh=False)
    frame = make_frame(metrics.shape, sea, rng)
    result = run_pass(ds, metrics, frame, SETTINGS, tmp_path)
    assert_matches_recipe(result.stats, xarray_recipe(ds, metrics, SETTINGS.ow_threshold))


@pytest.mark.parametrize("seasonal", [False, True])
def test_kernel_sub_blocks_give_the_statistics_of_the_whole_chunk(tmp_path, monkeypatch,
                                                                   seasonal):
    from coastmon.stream import pass_

    ds, metrics, sea, rng = make_dataset(nt=90, chunk=None, freq="3D")
    frame = make_frame(metrics.shape, sea, rng)
    settings = StreamSettings(progress=False, seasonal=seasonal)
    whole = run_pass(ds, metrics, frame, settings, tmp_path / "whole")
    # sub-blocks of 4 steps: one chunk of 90 steps computed in 23 pieces whose moments
    # are merged (months split across pieces when seasonal)
    monkeypatch.setattr(pass_, "KERNEL_BLOCK_BYTES", 1)
    monkeypatch.setattr(pass_, "KERNEL_MIN_STEPS", 4)
    pieces = run_pass(ds, metrics, frame, settings, tmp_path / "pieces")
    # check: the xarray recipe (an independent two-pass computation of the same moments)
    assert_matches_recipe(pieces.stats, xarray_recipe(ds, metrics, settings.ow_threshold,
                                                      seasonal=seasonal))
    # check: Chan, Golub & LeVeque 1983 — pairwise-merged moments equal the moments of
    # the whole, to float64 rounding; the sampled series are the same numbers
    for name in whole.stats.data_vars:
        np.testing.assert_allclose(pieces.stats[name].values, whole.stats[name].values,
                                   rtol=1e-9, atol=1e-18, err_msg=name)
    for name in ("section_u", "section_zeta", "ray_v"):
        np.testing.assert_array_equal(pieces.series[name].values, whole.series[name].values)


def sparse_sampling(frame, field: np.ndarray) -> np.ndarray:
    """(time, point): the frame's sampler applied to each step of ``field`` with
    scipy.sparse, renormalised over the finite values; NaN on rows that are not valid."""
    expected = np.empty((field.shape[0], frame.sampler.shape[0]))
    for t in range(field.shape[0]):
        flat = field[t].ravel()
        ok = np.isfinite(flat)
        with np.errstate(invalid="ignore", divide="ignore"):
            expected[t] = (frame.sampler @ np.where(ok, flat, 0.0)) / (frame.sampler @ ok)
    expected[:, ~frame.valid] = np.nan
    return expected


def test_series_equal_direct_sampling(tmp_path):
    ds, metrics, sea, rng = make_dataset()
    frame = make_frame(metrics.shape, sea, rng)
    result = run_pass(ds, metrics, frame, SETTINGS, tmp_path)
    u = ds["u"].values
    zeta = operators.vorticity(u, ds["v"].values, metrics)
    for name, field in (("u", u), ("zeta", zeta), ("ssh", ds["ssh"].values)):
        section, rays = frame.split(sparse_sampling(frame, field))
        # check: scipy.sparse product applied to each time step, renormalised over finite values
        np.testing.assert_allclose(result.series[f"section_{name}"].values, section, rtol=1e-6)
        np.testing.assert_allclose(result.series[f"ray_{name}"].values, rays, rtol=1e-6)
    assert result.series["section_u"].dims == ("time", "station", "offset")
    assert result.series["ray_v"].dims == ("time", "station", "ray")
    assert np.isnan(result.series["ray_u"].values[:, -1, -1]).all()


def test_distributed_cluster_equals_threads(tmp_path):
    ds, metrics, sea, rng = make_dataset()
    frame = make_frame(metrics.shape, sea, rng)
    local = run_pass(ds, metrics, frame, SETTINGS, tmp_path / "local")
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        settings = StreamSettings(progress=False, scheduler=cluster.scheduler_address)
        remote = run_pass(ds, metrics, frame, settings, tmp_path / "remote")
    for name in local.stats.data_vars:
        # check: common practice, no source (same chunks, same merge order => same numbers)
        np.testing.assert_allclose(remote.stats[name].values, local.stats[name].values,
                                   rtol=1e-13, atol=0, err_msg=name)
    for name in local.series.data_vars:
        np.testing.assert_array_equal(remote.series[name].values, local.series[name].values)


def test_missing_variable_and_wrong_grid(tmp_path):
    ds, metrics, sea, rng = make_dataset(ssh=False)
    frame = make_frame(metrics.shape, sea, rng)
    with pytest.raises(InputError, match="no 'v' variable"):
        run_pass(ds.drop_vars("v"), metrics, frame, SETTINGS, tmp_path)
    other = GridMetrics.from_lonlat(np.linspace(0, 1, 5), np.linspace(0, 1, 4))
    with pytest.raises(InputError, match="does not match the grid metrics"):
        run_pass(ds, other, frame, SETTINGS, tmp_path)


MEMORY_SCRIPT = textwrap.dedent(
    """
    import json, sys
    from pathlib import Path
    import numpy as np, xarray as xr
    sys.path.insert(0, {tests!r})
    from test_stream_pass import make_frame
    from coastmon.config import StreamSettings
    from coastmon.grid.metrics import GridMetrics
    from coastmon.stream import run_pass

    def high_water_kb():
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])

    ds = xr.open_dataset({path!r}, chunks={{"time": 25}})
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    sea = ds["mask"].values.astype(bool)
    frame = make_frame(metrics.shape, sea, np.random.default_rng(0))
    settings = StreamSettings(progress=False)
    run_pass(ds.isel(time=slice(0, 25)), metrics, frame, settings, {work!r} + "-warm")
    Path("/proc/self/clear_refs").write_text("5")  # reset the peak RSS (Linux proc(5))
    before = high_water_kb()
    run_pass(ds, metrics, frame, settings, {work!r})
    print(json.dumps({{"before_kb": before, "after_kb": high_water_kb()}}))
    """
)


def test_memory_does_not_grow_with_record_length(tmp_path):
    ny, nx = 150, 160
    peaks = {}
    sizes = {}
    for factor in (1, 4):
        nt = 100 * factor
        rng = np.random.default_rng(factor)
        lon, lat = np.meshgrid(np.linspace(-15, -5, nx), np.linspace(15, 25, ny))
        u = rng.standard_normal((nt, ny, nx), dtype=np.float32)
        ds = xr.Dataset(
            {"u": (("time", "y", "x"), u), "v": (("time", "y", "x"), u[::-1].copy())},
            coords={"lon": (("y", "x"), lon), "lat": (("y", "x"), lat),
                    "mask": (("y", "x"), np.ones((ny, nx), dtype=np.int8))},
        )
        path = tmp_path / f"record{factor}.nc"
        ds.to_netcdf(path)
        sizes[factor] = u.nbytes * 2
        del ds, u
        script = MEMORY_SCRIPT.format(tests=str(Path(__file__).parent),
                                      path=str(path), work=str(tmp_path / f"work{factor}"))
        out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                             check=True)
        usage = json.loads(out.stdout.strip().splitlines()[-1])
        peaks[factor] = (usage["after_kb"] - usage["before_kb"]) * 1024
    growth = peaks[4] - peaks[1]
    # check: common practice, no source (a streaming pass holds a few chunks, not the record;
    # a pass that kept the record would grow by at least the records' size difference, 58 MB)
    assert growth < 0.5 * (sizes[4] - sizes[1]), (peaks, sizes)


LAYER_SCRIPT = textwrap.dedent(
    """
    import sys
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_stream_pass import SETTINGS, make_dataset, make_frame
    from coastmon.stream import run_pass

    ds, metrics, sea, rng = make_dataset()
    result = run_pass(ds, metrics, make_frame(metrics.shape, sea, rng), SETTINGS, {work!r})
    np.save({out!r}, result.stats["eke"].values)
    """
)


def test_same_statistics_without_a_threadsafe_threading_layer(tmp_path):
    import os

    ds, metrics, sea, rng = make_dataset()
    expected = run_pass(ds, metrics, make_frame(metrics.shape, sea, rng), SETTINGS,
                        tmp_path / "here").stats["eke"].values
    script = LAYER_SCRIPT.format(tests=str(Path(__file__).parent), work=str(tmp_path / "wq"),
                                 out=str(tmp_path / "eke.npy"))
    env = {**os.environ, "NUMBA_THREADING_LAYER": "workqueue"}
    subprocess.run([sys.executable, "-c", script], check=True, env=env, capture_output=True)
    # check: common practice, no source — numba's workqueue layer refuses concurrent kernel
    # launches from several threads; the pass must then run one chunk at a time, with the
    # same merge order and so the same numbers
    np.testing.assert_array_equal(np.load(tmp_path / "eke.npy"), expected)


def test_sampler_blocks_hold_the_sparse_product_at_their_steps():
    from scipy import sparse

    from coastmon.stream import kernels

    rng = np.random.default_rng(11)
    n_st, n_off, n_ray, n_grid = 5, 3, 4, 60
    n_pts = n_st * (n_off + n_ray)
    rows = np.repeat(np.arange(n_pts), 4)
    cols = rng.integers(0, n_grid, rows.size)
    matrix = sparse.csr_matrix((rng.random(rows.size), (rows, cols)), shape=(n_pts, n_grid))
    valid = rng.random(n_pts) > 0.1
    x = rng.standard_normal((37, n_grid)).astype(np.float32)  # 2 blocks of 16 and 5 steps
    x[rng.random(x.shape) < 0.3] = np.nan
    x[:, cols[:4]] = np.nan                                  # point 0: no finite value
    sampler = kernels.Sampler(matrix, valid, n_st, n_off)
    section, rays = sampler.blocks(50)
    section[:] = rays[:] = -1.0
    sampler.into(x, section, rays, t0=5)
    ok = np.isfinite(x)
    with np.errstate(invalid="ignore", divide="ignore"):
        expected = (matrix @ np.where(ok, x, 0.0).T.astype(np.float64)) / (matrix @ ok.T)
    expected[~valid] = np.nan
    expected = expected.T                                    # (time, point)
    # check: scipy.sparse product renormalised over the finite values, each step at its
    # own place in the station-major blocks (station s, offset o is point s * O + o; ray
    # points follow all section points)
    np.testing.assert_allclose(section[:, 5:42], expected[:, :n_st * n_off]
                               .reshape(37, n_st, n_off).swapaxes(0, 1), rtol=1e-6)
    np.testing.assert_allclose(rays[:, 5:42], expected[:, n_st * n_off:]
                               .reshape(37, n_st, n_ray).swapaxes(0, 1), rtol=1e-6)
    assert np.isnan(section[0, 5:42, 0]).all()
    assert (section[:, :5] == -1).all() and (rays[:, 42:] == -1).all()  # untouched
    with pytest.raises(ValueError):
        sampler.into(x, section, rays, t0=20)               # 37 steps do not fit after 20


def test_series_files_are_station_major(tmp_path):
    from coastmon.stream import SeriesFile

    rng = np.random.default_rng(3)
    full = rng.standard_normal((23, 5, 4)).astype(np.float32)
    writer = SeriesFile(tmp_path / "ray_u.npy", full.shape)
    for t0 in (0, 7, 14, 21):  # blocks of time steps, as the pass writes them
        writer.write(t0, full[t0:t0 + 7])
    writer.close()
    view = writer.open()
    # check: common practice, no source (the view gives back exactly what was written)
    np.testing.assert_array_equal(view, full)
    on_disk = np.load(tmp_path / "ray_u.npy")
    assert on_disk.shape == (5, 23, 4)
    # check: numpy .npy format (C order): station s's whole record is one contiguous block
    np.testing.assert_array_equal(on_disk[2], full[:, 2, :])


def test_series_files_reserve_their_disk_before_the_pass(tmp_path, monkeypatch):
    import ctypes
    import errno

    from coastmon.io import pages
    from coastmon.stream import SeriesFile

    shape = (500, 40, 60)
    writer = SeriesFile(tmp_path / "ray_v.npy", shape)
    size = (tmp_path / "ray_v.npy").stat().st_size
    reserved = (tmp_path / "ray_v.npy").stat().st_blocks * 512
    writer.close()
    # check: numpy .npy format — header plus 4 bytes per value
    assert size >= 4 * np.prod(shape)
    if pages._FALLOCATE is not None and reserved:
        # check: Linux fallocate(2) manual page — the blocks are allocated at once, so
        # the file holds its whole size on disk before any value is written (skipped in
        # effect where the file system cannot reserve blocks)
        assert reserved >= 4 * np.prod(shape)

    def full_disk(fd, mode, offset, length):
        ctypes.set_errno(errno.ENOSPC)
        return -1

    monkeypatch.setattr(pages, "_FALLOCATE", full_disk)
    # check: Linux fallocate(2) manual page — ENOSPC: not enough space left; the series
    # file says so when it is created, before the pass reads anything
    with pytest.raises(OSError) as info:
        SeriesFile(tmp_path / "ray_u.npy", shape)
    assert info.value.errno == errno.ENOSPC

    def unsupported(fd, mode, offset, length):
        ctypes.set_errno(errno.EOPNOTSUPP)
        return -1

    monkeypatch.setattr(pages, "_FALLOCATE", unsupported)
    # a file system that cannot reserve blocks: nothing reserved, the series still work
    writer = SeriesFile(tmp_path / "ray_w.npy", (3, 2, 2))
    writer.write(0, np.ones((3, 2, 2), np.float32))
    writer.close()
    np.testing.assert_array_equal(writer.open(), np.ones((3, 2, 2)))


@pytest.mark.parametrize("buffer_bytes", [1, 600, 2**20])
def test_series_blocks_gathered_or_not_land_where_they_belong(tmp_path, monkeypatch,
                                                               buffer_bytes):
    from coastmon.stream import SeriesFile, pass_

    monkeypatch.setattr(pass_, "SERIES_BUFFER_BYTES", buffer_bytes)
    rng = np.random.default_rng(5)
    full = rng.standard_normal((30, 3, 2)).astype(np.float32)
    writer = SeriesFile(tmp_path / "s.npy", full.shape)
    # in order, then a jump back (as a re-run block would), then the rest
    for t0, t1 in ((0, 4), (4, 11), (11, 12), (20, 30), (12, 20)):
        writer.write(t0, full[t0:t1])
    writer.close()
    # check: common practice, no source (every step lands at its own place, whatever
    # was gathered before writing)
    np.testing.assert_array_equal(writer.open(), full)


@pytest.mark.parametrize("buffer_bytes", [1, 600, 2**20])
def test_a_written_block_may_be_reused_at_once(tmp_path, monkeypatch, buffer_bytes):
    # The pass hands each chunk's sample blocks back for the next chunk as soon as they
    # are written, so what the file gathers must not depend on the caller's block.
    from coastmon.stream import SeriesFile, pass_

    monkeypatch.setattr(pass_, "SERIES_BUFFER_BYTES", buffer_bytes)
    rng = np.random.default_rng(7)
    full = rng.standard_normal((3, 26, 2)).astype(np.float32)   # (station, time, k)
    writer = SeriesFile(tmp_path / "s.npy", (26, 3, 2))
    scratch = np.empty((3, 5, 2), np.float32)
    for t0 in range(0, 26, 5):
        block = scratch[:, :min(5, 26 - t0)]
        block[...] = full[:, t0:t0 + block.shape[1]]
        writer.write_stations(t0, block)
        block[...] = np.nan                                      # reused at once
    writer.close()
    # check: common practice, no source (the file holds what was written, not what the
    # caller's block held later)
    np.testing.assert_array_equal(np.swapaxes(writer.open(), 0, 1), full)


FILES_SCRIPT = textwrap.dedent(
    """
    import json, os, sys
    import netCDF4
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_stream_pass import make_frame
    from coastmon.config import IngestSettings, StreamSettings
    from coastmon.grid.metrics import GridMetrics
    from coastmon.io.ingest import open_dataset
    from coastmon.stream import run_pass

    files = {files!r}
    ds = open_dataset(files, IngestSettings(u_var="u", v_var="v", mask_var="mask"))
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    frame = make_frame(metrics.shape, ds["mask"].values == 1, np.random.default_rng(0))
    run_pass(ds, metrics, frame, StreamSettings(progress=False), {work!r})
    links = [os.path.realpath(f"/proc/self/fd/{{fd}}") for fd in os.listdir("/proc/self/fd")]
    print(json.dumps({{"open": sum(link in files for link in links),
                      "cache": netCDF4.get_chunk_cache()[0]}}))
    """
)


def test_input_files_are_let_go_after_the_pass_reads_them(tmp_path):
    ny, nx, nt = 60, 70, 6
    lon, lat = np.meshgrid(np.linspace(-15, -5, nx), np.linspace(15, 25, ny))
    rng = np.random.default_rng(4)
    files = []
    for k in range(8):
        times = pd.date_range("2001-01-01", periods=nt, freq="D") + pd.Timedelta(days=nt * k)
        u = rng.standard_normal((nt, ny, nx)).astype(np.float32)
        ds = xr.Dataset(
            {"u": (("time", "y", "x"), u, {"units": "m s-1"}),
             "v": (("time", "y", "x"), 0.5 * u, {"units": "m s-1"})},
            coords={"time": times, "lon": (("y", "x"), lon), "lat": (("y", "x"), lat),
                    "mask": (("y", "x"), np.ones((ny, nx), dtype=np.int8))},
        )
        # Compressed, one time step per chunk: the usual layout of model output.
        enc = {name: {"zlib": True, "complevel": 1, "chunksizes": (1, ny, nx)}
               for name in ("u", "v")}
        files.append(tmp_path / f"part{k}.nc")
        ds.to_netcdf(files[-1], encoding=enc)
    script = FILES_SCRIPT.format(tests=str(Path(__file__).parent),
                                 files=[str(f.resolve()) for f in files],
                                 work=str(tmp_path / "work"))
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr[-2000:]
    usage = json.loads(out.stdout.strip().splitlines()[-1])
    # check: common practice, no source (every open NetCDF-4 file keeps buffers and a chunk
    # cache per variable, 64 MB by default in the netCDF-C library: a reader that kept each
    # file it has read open would grow with the number of files, here 8)
    assert usage["open"] <= 4, usage
    assert usage["cache"] <= 4 * 2**20, usage


def shared_ray_frame(shape, sea, rng, missing_weight=False) -> StandInFrame:
    """Six stations whose rays of 5 points draw on 9 grid points, one of them on land when
    ``missing_weight``."""
    pool = np.flatnonzero(sea.ravel())[:9].copy()
    if missing_weight:
        pool[0] = np.flatnonzero(~sea.ravel())[0]
    return make_frame(shape, sea, rng, n_stations=6, n_rays=5, ray_pool=pool)


@pytest.mark.parametrize("missing_weight", [False, True])
def test_rays_from_stored_grid_points_equal_the_written_rays(tmp_path, missing_weight):
    from coastmon.stream.rays import RayField

    ds, metrics, sea, rng = make_dataset()
    ds = ds.astype(np.float32)    # the pass's u, v and ssh are float32, as read
    frame = shared_ray_frame(metrics.shape, sea, rng, missing_weight=missing_weight)
    points = run_pass(ds, metrics, frame, SETTINGS, tmp_path / "points")
    written = run_pass(ds, metrics, frame, SETTINGS, tmp_path / "rays", ray_points=False)
    assert isinstance(points.series["ray_u"].data, RayField)
    assert not isinstance(written.series["ray_u"].data, RayField)
    # 6 stations x 5 ray points drawn from 9 grid points: 9 series written instead of 30
    assert points.series["ray_u"].data.points.shape == (9, 40)
    for name in ("u", "v", "ssh"):
        # check: common practice, no source — the same float64 sums of the same float32
        # values in the same order give the same float32 numbers, bit for bit
        np.testing.assert_array_equal(points.series[f"ray_{name}"].values,
                                      written.series[f"ray_{name}"].values)
    # vorticity is computed in float64 and rounded to float32 at the grid points instead
    # of after interpolation: a difference of float32 rounding
    np.testing.assert_allclose(points.series["ray_zeta"].values,
                               written.series["ray_zeta"].values, rtol=3e-7, atol=1e-12)
    expected = sparse_sampling(frame, ds["u"].values.astype(np.float64))
    # check: scipy.sparse product applied to each time step, renormalised over the
    # finite values (an independent computation of the rays)
    np.testing.assert_allclose(points.series["ray_u"].values, frame.split(expected)[1],
                               rtol=1e-6)
    assert np.isnan(points.series["ray_u"].values[:, -1, -1]).all()
    assert points.series["section_u"].dims == ("time", "station", "offset")
    assert points.series["ray_v"].dims == ("time", "station", "ray")


def test_ray_field_indexes_like_the_array_it_stands_for(tmp_path):
    from coastmon.io.pages import release, station_sweep
    from coastmon.stream import rays

    ds, metrics, sea, rng = make_dataset(nt=23)
    frame = shared_ray_frame(metrics.shape, sea, rng)
    field = run_pass(ds, metrics, frame, SETTINGS, tmp_path).series["ray_v"].data
    assert isinstance(field, rays.RayField)
    full = np.asarray(field)
    assert full.shape == field.shape == (23, 6, 5) and full.dtype == np.float32
    # check: numpy indexing rules (basic indexing; orthogonal for two integer arrays)
    for key in [(slice(None), 2, slice(None)), (slice(None), 3, 1), (slice(2, 9), 4),
                (slice(None), slice(1, 5), slice(None)), (Ellipsis, 2), 5, (-1, -1, -1),
                (slice(None), slice(None, None, 2), slice(1, 4))]:
        np.testing.assert_array_equal(field[key], full[key], err_msg=str(key))
    np.testing.assert_array_equal(field[np.array([1, 4])][:, :, np.array([0, 3])],
                                  full[np.array([1, 4])][:, :, np.array([0, 3])])
    swept = np.concatenate([block for _, block in station_sweep(field)], axis=1)
    np.testing.assert_array_equal(swept, full)
    release(field)        # a no-op on its memory-mapped grid points, never an error
    with pytest.raises(ValueError):
        field.reshape(23, -1)
    with pytest.raises(IndexError):
        field[:, 6]
    for station, (a, b) in [(0, (0, 5)), (3, (1, 4)), (5, (4, 5)), (2, (2, 2))]:
        np.testing.assert_array_equal(field.window(station, a, b), full[:, station, a:b])
    with pytest.raises(IndexError):
        field.window(6, 0, 1)
    # check: scipy.sparse product (an independent computation): each station's weights
    # on its grid points, applied to their series, give its rays to float32 rounding
    matrix, points = field.station_weights(2, 5)
    assert matrix.shape == (3 * 5, points.size) and np.all(np.diff(points) > 0)
    rays_of = (matrix @ np.asarray(field.points[points], dtype=np.float64)).T
    sampled = np.diff(matrix.indptr) > 0
    np.testing.assert_allclose(rays_of[:, sampled],
                               full[:, 2:5].reshape(23, 15)[:, sampled], rtol=1e-6)
    assert np.isnan(full[:, 2:5].reshape(23, 15)[:, ~sampled]).all()
    assert field.complete_points().all()
    gappy = np.array(field.points)
    gappy[4, 7] = np.nan
    assert np.flatnonzero(~rays.RayField(gappy, field.plan).complete_points()).tolist() == [4]
    # a frame whose rays draw on as many grid points as they have points keeps the rays
    plain = make_frame(metrics.shape, sea, rng)
    s, o, r = len(plain.stations), plain.offsets_km.size, plain.ray_km.size
    assert rays.plan_ray_points(plain.sampler, plain.valid, s, o, r) is None


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_linear_ray_consumers_release_the_pages_they_read(tmp_path):
    from coastmon.assess.spinup import spinup_curve
    from coastmon.stream import kernels
    from coastmon.stream.rays import RayField, RayPlan

    def mapped_file_kb():
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("RssFile:"):
                return int(line.split()[1])

    n_points, nt = 2000, 8192                      # 64 MB of grid-point series
    values = np.repeat(1.0 + np.arange(n_points, dtype=np.float32)[:, None], nt, axis=1)
    np.save(tmp_path / "points.npy", values)      # written, not mapped
    del values
    points = np.load(tmp_path / "points.npy", mmap_mode="r")
    rows = np.arange(n_points)                     # one ray point per grid point
    plan = RayPlan(points=np.arange(n_points), indptr=kernels.row_pointers(rows, n_points),
                   cols=rows.astype(np.int64), weights=np.ones(n_points), valid=np.ones(
                       n_points, dtype=bool), n_stations=n_points // 4, n_ray=4)
    np.save(tmp_path / "small.npy", np.ones((n_points, 16), dtype=np.float32))
    small = RayField(np.load(tmp_path / "small.npy", mmap_mode="r"), plan)
    spinup_curve([small], np.arange(16, dtype=float))   # libraries and kernels loaded
    field = RayField(points, plan)
    before = mapped_file_kb()
    assert field.complete_points().all()
    after_complete = mapped_file_kb()
    curve = spinup_curve([field], np.arange(nt, dtype=float))
    after_spinup = mapped_file_kb()
    # check: common practice, no source (proc(5): RssFile counts the file pages mapped
    # into the process; pages read a block at a time and released stay near one block)
    assert after_complete - before < 32 * 1024, (before, after_complete)
    assert after_spinup - before < 32 * 1024, (before, after_spinup)
    assert np.allclose(curve.correlation, 1.0)     # constant series: every mean is final


@pytest.mark.parametrize("tile_bytes", [1, 6 * 4 * 9, 2**30])
def test_tiled_grid_points_give_back_the_series_written(tmp_path, monkeypatch, tile_bytes):
    from coastmon.stream import pass_

    monkeypatch.setattr(pass_, "TILE_BYTES", tile_bytes)
    rng = np.random.default_rng(11)
    full = rng.standard_normal((9, 40)).astype(np.float32)        # (grid point, time)
    writer = pass_.TileFile(tmp_path / "ray_u.tiles", 40, 9)
    # blocks of uneven length in time order, as the pass's chunks come (some smaller
    # than a tile, gathered; some larger, written as they are)
    for t0, t1 in [(0, 3), (3, 5), (5, 17), (17, 18), (18, 33), (33, 40)]:
        writer.write_stations(t0, full[:, t0:t1, None].copy())
    with pytest.raises(ValueError):
        writer.write_stations(5, full[:, 5:7, None])              # not after step 40
    writer.close()
    tiles = writer.open()
    assert tiles.shape == (9, 40) and tiles.starts[0] == 0 and tiles.starts[-1] == 40
    # one write per tile: the file holds the tiles one after another, each point-major
    on_disk = np.fromfile(tmp_path / "ray_u.tiles", dtype=np.float32)
    assert on_disk.size == full.size
    # check: numpy indexing — every way of reading the tiles gives the array written
    np.testing.assert_array_equal(np.asarray(tiles), full)
    np.testing.assert_array_equal(tiles[2:7], full[2:7])
    np.testing.assert_array_equal(tiles[np.array([8, 0, 4, 4])], full[[8, 0, 4, 4]])
    np.testing.assert_array_equal(tiles[-1], full[-1])
    mask = np.zeros(9, dtype=bool)
    mask[[1, 5]] = True
    np.testing.assert_array_equal(tiles[mask], full[mask])
    np.testing.assert_array_equal(tiles[np.array([1, 3]), 5:9], full[[1, 3], 5:9])
    out = np.empty((4, 40), dtype=np.float32)
    assert tiles.rows(np.array([6, 2]), out=out).base is out
    np.testing.assert_array_equal(out[:2], full[[6, 2]])
    with pytest.raises(IndexError):
        tiles[np.array([9])]
    if tile_bytes == 1:        # every block its own tile
        assert tiles.starts.tolist() == [0, 3, 5, 17, 18, 33, 40]
    if tile_bytes == 2**30:    # all gathered into one tile
        assert tiles.starts.tolist() == [0, 40]
    # a frame whose rays are all on land keeps no grid point: empty series, no error
    empty = pass_.TileFile(tmp_path / "ray_v.tiles", 40, 0)
    empty.write_stations(0, np.zeros((0, 40, 1), dtype=np.float32))
    empty.close()
    assert np.asarray(empty.open()).shape == (0, 40)


def test_rays_read_from_tiles_equal_the_rays_of_one_array(tmp_path, monkeypatch):
    from coastmon.stream import pass_
    from coastmon.stream.rays import RayField, TiledPoints

    ds, metrics, sea, rng = make_dataset(nt=23)
    frame = shared_ray_frame(metrics.shape, sea, rng, missing_weight=True)
    monkeypatch.setattr(pass_, "TILE_BYTES", 9 * 4 * 5)          # tiles of 5 steps
    field = run_pass(ds.astype(np.float32), metrics, frame, SETTINGS,
                     tmp_path).series["ray_u"].data
    starts = field.points.starts
    assert isinstance(field, RayField) and starts.size > 3        # several tiles
    whole = np.array(field.points)
    whole[4, 8] = np.nan                                           # a gap at one step
    gappy = field.points.flat.copy()
    q = int(np.searchsorted(starts, 8, side="right")) - 1          # the tile of step 8
    t0, n = int(starts[q]), int(starts[q + 1] - starts[q])
    assert 0 < t0 < 8
    gappy[9 * t0 + 4 * n + (8 - t0)] = np.nan                      # point 4 in that tile
    tiled = RayField(TiledPoints(gappy, 9, starts), field.plan)
    plain = RayField(whole, field.plan)
    # check: common practice, no source — the same float64 sums of the same float32
    # values in the same order give the same float32 numbers, bit for bit, however the
    # series are laid out (IEEE 754 arithmetic is deterministic)
    np.testing.assert_array_equal(np.asarray(tiled), np.asarray(plain))
    np.testing.assert_array_equal(tiled.window(3, 1, 4), plain.window(3, 1, 4))
    np.testing.assert_array_equal(tiled.complete_points(), np.isfinite(whole).all(axis=1))
    assert not tiled.complete_points()[4]


def test_station_sweep_keeps_its_blocks_within_the_byte_budget(monkeypatch):
    from coastmon.io import pages

    values = np.arange(50 * 7 * 3, dtype=np.float32).reshape(50, 7, 3)
    monkeypatch.setattr(pages, "SWEEP_BLOCK_BYTES", 2 * 50 * 3 * 4)      # two stations
    blocks = list(pages.station_sweep(values))
    assert [b.shape[1] for _, b in blocks] == [2, 2, 2, 1]
    assert [c for c, _ in blocks][-1] == slice(18, 21)
    # check: common practice, no source (numpy concatenation of the blocks is the array)
    np.testing.assert_array_equal(np.concatenate([b for _, b in blocks], axis=1), values)
    monkeypatch.setattr(pages, "SWEEP_BLOCK_BYTES", 1)                   # at least one
    assert len(list(pages.station_sweep(values))) == 7
