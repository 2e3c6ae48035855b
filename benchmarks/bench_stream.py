"""Benchmark of the streaming pass against a plain read and the straightforward xarray recipe.

Not part of the test suite. Builds (once) a NetCDF4 record of float32 u, v on a
``ny x nx`` grid over ``nt`` days (500 x 500 x 1100 = 2.2 GB by default), plain and
zlib-compressed, then times in separate subprocesses (peak memory = ``ru_maxrss`` of the
measuring process; for the pass also ``peak_tree_gb``, the proportional set size of the
process and its reader processes, sampled every 0.2 s):

* ``read``   — a plain read of u and v with netCDF4, chunk by chunk, one thread, nothing
  computed;
* ``pass``   — :func:`coastmon.stream.run_pass` on the dataset as ``coastmon analyze``
  opens it (default settings: on the compressed record, one reader thread whose chunks are
  decoded on all cores by :mod:`coastmon.io.chunks`), timed from starting the readers,
  with building the stand-in frame;
* ``pass-library`` — the same with the chunks decoded by the netCDF4/HDF5 library, as
  before 2026-12-02's fifth round (on the compressed record: in reader processes);
* ``pass-thread`` — the library decoding in one reader thread (``stream.read_processes = 0``);
* ``recipe`` — the straightforward xarray + dask recipe for the same statistics: time
  means, then anomalies, products and their means (a second read), vorticity and
  Okubo–Weiss with ``xarray.apply_ufunc``.

Usage::

    python benchmarks/bench_stream.py --dir /tmp/coastmon-bench            # everything
    python benchmarks/bench_stream.py --dir /tmp/coastmon-bench --runs read pass --variants plain

With ``--cold`` (root only) the page cache is dropped before each measurement.
Prints one JSON line per measurement and a summary table.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

TIME_CHUNK = 25


def make_record(path: Path, ny: int, nx: int, nt: int, zlib: bool) -> None:
    """Write a synthetic record: drifting eddies on a mean current, land to the east."""
    import netCDF4

    tmp = path.with_name(path.name + ".part")
    rng = np.random.default_rng(0)
    lon = np.linspace(-30.0, -10.0, nx)
    lat = np.linspace(20.0, 40.0, ny)
    lon2, lat2 = np.meshgrid(lon, lat)
    coast = -12.0 - 1.5 * np.sin(np.deg2rad(lat2) * 25.0)
    land = lon2 > coast
    k = rng.uniform(0.2, 0.8, size=(12, 2))
    phase = rng.uniform(0, 2 * np.pi, size=12)
    speed = rng.uniform(0.02, 0.08, size=12)
    with netCDF4.Dataset(tmp, "w") as nc:
        nc.createDimension("time", nt)
        nc.createDimension("y", ny)
        nc.createDimension("x", nx)
        t = nc.createVariable("time", "f8", ("time",))
        t.units = "days since 2001-01-01"
        t.calendar = "standard"
        t[:] = np.arange(nt)
        for name, values, units in (("lon", lon2, "degrees_east"), ("lat", lat2, "degrees_north")):
            var = nc.createVariable(name, "f8", ("y", "x"))
            var.units = units
            var[:] = values
        mask = nc.createVariable("mask", "i1", ("y", "x"))
        mask[:] = (~land).astype(np.int8)
        opts = {"zlib": True, "complevel": 1, "shuffle": True, "chunksizes": (1, ny, nx)} if zlib \
            else {"contiguous": True}
        u = nc.createVariable("u", "f4", ("time", "y", "x"), fill_value=np.float32(np.nan), **opts)
        v = nc.createVariable("v", "f4", ("time", "y", "x"), fill_value=np.float32(np.nan), **opts)
        u.units = v.units = "m s-1"
        for t0 in range(0, nt, 50):
            steps = np.arange(t0, min(nt, t0 + 50))
            psi = np.zeros((steps.size, ny, nx), dtype=np.float32)
            for e in range(12):
                arg = (k[e, 0] * (lon2 + speed[e] * steps[:, None, None]) + k[e, 1] * lat2
                       + phase[e])
                psi += np.sin(arg).astype(np.float32)
            uu = (0.1 - 0.05 * np.gradient(psi, axis=1)).astype(np.float32)
            vv = (0.05 * np.gradient(psi, axis=2)).astype(np.float32)
            uu += 0.01 * rng.standard_normal(uu.shape, dtype=np.float32)
            uu[:, land] = np.nan
            vv[:, land] = np.nan
            u[steps[0]:steps[-1] + 1] = uu
            v[steps[0]:steps[-1] + 1] = vv
    os.replace(tmp, path)


def _frame(ds, n_stations: int = 150, n_offsets: int = 7, n_rays: int = 60):
    """A stand-in frame with the layout of a real one: stations along the coast, each
    with an offshore section and a zonal ray westward, sampled bilinearly
    (:func:`coastmon.geometry.frame.bilinear_sampler`)."""
    from types import SimpleNamespace

    import pandas as pd

    from coastmon.geometry.frame import bilinear_sampler

    lon, lat = ds["lon"].values, ds["lat"].values
    mask = ds["mask"].values
    station_lat = np.linspace(lat.min() + 0.5, lat.max() - 0.5, n_stations)
    coast_lon = -12.0 - 1.5 * np.sin(np.deg2rad(station_lat) * 25.0)
    offsets = 0.1 * np.arange(n_offsets)  # degrees offshore
    rays = 0.25 * np.arange(1, n_rays + 1)
    sec_lon = coast_lon[:, None] - 0.05 - offsets[None, :]
    ray_lon = coast_lon[:, None] - 0.05 - rays[None, :]
    point_lon = np.concatenate([sec_lon.ravel(), ray_lon.ravel()])
    point_lat = np.concatenate([np.repeat(station_lat, n_offsets),
                                np.repeat(station_lat, n_rays)])
    sampler, valid = bilinear_sampler(lon, lat, mask, point_lon, point_lat)

    def split(samples):
        s, o = n_stations, n_offsets
        return (samples[..., : s * o].reshape(*samples.shape[:-1], s, o),
                samples[..., s * o:].reshape(*samples.shape[:-1], s, n_rays))

    return SimpleNamespace(
        sampler=sampler, valid=valid, split=split,
        stations=pd.DataFrame({"alongshore_km": 10.0 * np.arange(n_stations)}),
        offsets_km=10.0 * np.arange(n_offsets), ray_km=25.0 * np.arange(1, n_rays + 1),
    )


def measure_read(path: Path) -> dict:
    import netCDF4

    values = 0
    start = time.perf_counter()
    with netCDF4.Dataset(path) as nc:
        nc.set_auto_mask(False)
        nt = nc.dimensions["time"].size
        for t0 in range(0, nt, TIME_CHUNK):
            for name in ("u", "v"):
                values += nc[name][t0:t0 + TIME_CHUNK].size
    return {"work_s": time.perf_counter() - start, "values_read": values}


def measure_pass(path: Path, workdir: Path, read_processes: int | None = None,
                 library: bool = False) -> dict:
    """The pass on the canonical dataset as ``coastmon analyze`` opens it (its time chunks
    and reader); ``library``: every chunk decoded by the netCDF4/HDF5 library."""
    from coastmon.config import IngestSettings, StreamSettings
    from coastmon.grid.metrics import GridMetrics
    from coastmon.io import chunks
    from coastmon.io.ingest import open_dataset
    from coastmon.stream import prestart_readers, run_pass
    from coastmon.threads import small_pages

    small_pages()  # as the command line sets it (coastmon.threads)
    if library:
        chunks.eligible = lambda var: False

    ds = open_dataset([path], IngestSettings(u_var="u", v_var="v", mask_var="mask"))
    settings = StreamSettings(progress=False, read_processes=read_processes)
    start = time.perf_counter()
    prestart_readers(ds, settings)  # as analyze does, before building the frame
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    frame = _frame(ds)
    with PeakMemory(os.getpid()) as memory:
        result = run_pass(ds, metrics, frame, settings, workdir)
    return {"work_s": time.perf_counter() - start, "timings": result.timings,
            "peak_tree_gb": memory.peak / 1e9, "eke_mean": float(result.stats["eke"].mean())}


def tree_memory(pid: int) -> int:
    """Proportional set size (bytes) of a process and all its descendants: shared pages
    (the reader processes' slots) are counted once in all."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                stat = Path(f"/proc/{entry}/stat").read_text()
            except OSError:
                continue
            ppid = int(stat.rsplit(")", 1)[1].split()[1])
            children.setdefault(ppid, []).append(int(entry))
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        todo += children.get(p, [])
        try:
            for line in Path(f"/proc/{p}/smaps_rollup").read_text().splitlines():
                if line.startswith("Pss:"):
                    total += int(line.split()[1]) * 1024
                    break
        except OSError:
            pass
    return total


class PeakMemory:
    """Samples :func:`tree_memory` of ``pid`` every ``every`` seconds; ``peak`` in bytes."""

    def __init__(self, pid: int, every: float = 0.2) -> None:
        import threading

        self.pid, self.every, self.peak = pid, every, 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            self.peak = max(self.peak, tree_memory(self.pid))

    def __enter__(self) -> PeakMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()


def measure_recipe(path: Path | list[Path]) -> dict:
    """The recipe on one file, or on several joined in time."""
    import dask
    import xarray as xr

    from coastmon.grid import operators
    from coastmon.grid.metrics import GridMetrics

    start = time.perf_counter()
    ds = xr.open_mfdataset(path, chunks={"time": TIME_CHUNK}, combine="by_coords") \
        if isinstance(path, list) else xr.open_dataset(path, chunks={"time": TIME_CHUNK})
    metrics = GridMetrics.from_lonlat(ds["lon"].values, ds["lat"].values)
    u, v = ds["u"], ds["v"]
    core_dims = [["y", "x"], ["y", "x"]]
    zeta = xr.apply_ufunc(operators.vorticity, u, v, kwargs={"metrics": metrics},
                          input_core_dims=core_dims, output_core_dims=[["y", "x"]],
                          dask="parallelized", output_dtypes=[np.float64])
    w = xr.apply_ufunc(operators.okubo_weiss, u, v, kwargs={"metrics": metrics},
                       input_core_dims=core_dims, output_core_dims=[["y", "x"]],
                       dask="parallelized", output_dtypes=[np.float64])
    valid = u.notnull() & v.notnull() & zeta.notnull()
    fields = {"u": u.where(valid), "v": v.where(valid), "zeta": zeta.where(valid)}
    means = dask.compute({k: f.mean("time") for k, f in fields.items()})[0]
    anom = {k: f - means[k] for k, f in fields.items()}
    ua, va, za = anom["u"], anom["v"], anom["zeta"]
    out = {
        "uu": (ua * ua).mean("time"), "uv": (ua * va).mean("time"), "vv": (va * va).mean("time"),
        "u_zeta": (ua * za).mean("time"), "v_zeta": (va * za).mean("time"),
        "zeta_var": (za * za).mean("time"),
        "eke_flux_x": (0.5 * (ua * ua * ua + ua * va * va)).mean("time"),
        "eke_flux_y": (0.5 * (ua * ua * va + va * va * va)).mean("time"),
        "ow_core_fraction": (w < -0.2 * w.std(("y", "x"))).where(valid).mean("time"),
    }
    stats = dask.compute(out)[0]
    return {"work_s": time.perf_counter() - start,
            "eke_mean": float((0.5 * (stats["uu"] + stats["vv"])).mean())}


def _child(kind: str, path: Path, workdir: Path) -> None:
    start = time.perf_counter()
    if kind == "read":
        extra = measure_read(path)
    elif kind == "pass":
        extra = measure_pass(path, workdir)
    elif kind == "pass-library":
        extra = measure_pass(path, workdir, library=True)
    elif kind == "pass-thread":
        extra = measure_pass(path, workdir, read_processes=0, library=True)
    else:
        extra = measure_recipe(path)
    wall = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"kind": kind, "file": path.name, "wall_s": wall, "peak_rss_gb": peak / 1e9,
                      **extra}))


def _drop_caches() -> bool:
    try:
        subprocess.run(["sync"], check=True)
        Path("/proc/sys/vm/drop_caches").write_text("3\n")
        return True
    except OSError:
        return False


def record_arguments(parser: argparse.ArgumentParser, variants: list[str]) -> None:
    """The options naming the benchmark record (shared with ``bench_analyze.py``)."""
    parser.add_argument("--dir", type=Path, default=Path("/tmp/coastmon-bench"))
    parser.add_argument("--ny", type=int, default=500)
    parser.add_argument("--nx", type=int, default=500)
    parser.add_argument("--nt", type=int, default=1100)
    parser.add_argument("--variants", nargs="+", default=variants, choices=["plain", "zlib"])
    parser.add_argument("--cold", action="store_true", help="drop the page cache before each run")


def ensure_record(args: argparse.Namespace, variant: str) -> Path:
    """The record named by the options (:func:`record_arguments`), written if missing."""
    path = args.dir / f"record_{args.ny}x{args.nx}x{args.nt}_{variant}.nc"
    if not path.exists():
        start = time.perf_counter()
        make_record(path, args.ny, args.nx, args.nt, zlib=variant == "zlib")
        print(f"# wrote {path} ({path.stat().st_size / 1e9:.2f} GB) in "
              f"{time.perf_counter() - start:.0f} s", flush=True)
    return path


def run_child(script: str, directory: Path, child_args: list[str], cold: bool,
              options: tuple[str, ...] = ()) -> dict:
    """Run one measurement in a fresh subprocess (after dropping the page cache if ``cold``)
    and return its JSON record, with ``cache`` set to what was done.

    Dirty pages are written out first (``os.sync``): a record just built, or the previous
    run's outputs, would otherwise be written back during the measured run, and once they
    pass the kernel's dirty-page limits the run waits for the disk (the long record's pass
    took 13.7 s in the run right after the 0.74 GB record was written, 3.7 s in the next).
    """
    os.sync()
    dropped = _drop_caches() if cold else False
    out = subprocess.run(
        [sys.executable, script, "--dir", str(directory), *options, "--child", *child_args],
        check=True, capture_output=True, text=True,
    )
    record = json.loads(out.stdout.strip().splitlines()[-1])
    record["cache"] = "cold" if dropped else "warm"
    return record


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    record_arguments(parser, ["plain", "zlib"])
    parser.add_argument("--runs", nargs="+", default=["read", "pass", "recipe"],
                        choices=["read", "pass", "pass-library", "pass-thread", "recipe"])
    parser.add_argument("--child", nargs=2, metavar=("KIND", "FILE"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        _child(args.child[0], Path(args.child[1]), args.dir / "work")
        return
    args.dir.mkdir(parents=True, exist_ok=True)
    results = []
    for variant in args.variants:
        path = ensure_record(args, variant)
        for kind in args.runs:
            record = run_child(__file__, args.dir, [kind, str(path)], args.cold)
            record.update(variant=variant, size_gb=path.stat().st_size / 1e9)
            results.append(record)
            print(json.dumps(record), flush=True)
    print(f"\n{'variant':8} {'run':12} {'cache':5} {'work s':>8} {'process s':>10} "
          f"{'peak GB':>8} {'tree GB':>8}")
    for r in results:
        print(f"{r['variant']:8} {r['kind']:12} {r['cache']:5} {r['work_s']:8.1f} "
              f"{r['wall_s']:10.1f} {r['peak_rss_gb']:8.2f} {r.get('peak_tree_gb', 0):8.2f}")


if __name__ == "__main__":
    main()
