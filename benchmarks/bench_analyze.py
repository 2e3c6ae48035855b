"""Benchmark of the whole ``coastmon analyze`` against a plain read of the same files.

Not part of the test suite. Uses the records of ``bench_stream.py`` (built there if
missing) and, with ``--repeat N``, a record N times as long made of N copies of the file
with shifted time axes (multi-file input, as decades of model output usually come). For
each input it times, each in its own subprocess:

* ``read``    — a plain read of u and v with netCDF4, file after file (as in
  ``bench_stream.py``);
* ``xread``   — a plain read with xarray and dask: open the files lazily, sum u and v
  (``--xread``);
* ``recipe``  — the straightforward xarray + dask recipe for the eddy statistics of
  ``bench_stream.py`` on the same files (``--recipe``);
* ``analyze`` — ``coastmon analyze FILES --out DIR --u-var u --v-var v --mask-var mask``,
  with the stage timings from the run's ``run.json`` and the peak memory of the process.

Two record shapes: ``--shape wide`` (500 x 500 points, 1100 days: a wide grid) and
``--shape long`` (121 x 131 points, 5840 days: a modest coastal domain over a long
record, where the sampled series hold more numbers than the grid). ``--ny``, ``--nx`` and
``--nt`` override either. With ``--best N`` each measurement is repeated N times and the
fastest kept.

Usage::

    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --variants zlib plain --cold
    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --variants zlib --repeat 4 --cold
    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --shape long --xread --best 3
    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --shape long --nt 1460 --repeat 16

Prints one JSON line per measurement and a summary table with analyze ÷ read.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_stream  # noqa: E402  (the records and the plain read are shared)

SHAPES = {"wide": (500, 500, 1100), "long": (121, 131, 5840)}
"""Record shapes (ny, nx, nt): a wide grid, and a modest coastal domain over a long record."""


def repeated_record(path: Path, n: int) -> list[Path]:
    """``n`` copies of ``path`` whose time axes follow one another (made once)."""
    import netCDF4

    if n == 1:
        return [path]
    folder = path.parent / f"{path.stem}_x{n}"
    folder.mkdir(exist_ok=True)
    parts = []
    with netCDF4.Dataset(path) as nc:
        nt = nc.dimensions["time"].size
        times = np.asarray(nc["time"][:], dtype=float)
        step = float(np.median(np.diff(times))) if nt > 1 else 1.0
    for k in range(n):
        part = folder / f"part{k}.nc"
        if not part.exists():
            tmp = part.with_name(part.name + ".part")
            shutil.copyfile(path, tmp)
            with netCDF4.Dataset(tmp, "a") as nc:
                nc["time"][:] = nc["time"][:] + k * nt * step
            tmp.replace(part)
        parts.append(part)
    return parts


def _read(files: list[Path]) -> dict:
    work = sum(bench_stream.measure_read(f)["work_s"] for f in files)
    return {"work_s": work}


def _xread(files: list[Path]) -> dict:
    import xarray as xr

    start = time.perf_counter()
    with xr.open_mfdataset(files, chunks="auto", combine="by_coords") as ds:
        total = float((ds["u"].sum() + ds["v"].sum()).compute())
    return {"work_s": time.perf_counter() - start, "sum": total}


def _recipe(files: list[Path]) -> dict:
    return bench_stream.measure_recipe(files if len(files) > 1 else files[0])


def _analyze(files: list[Path], out: Path, read_processes: int | None) -> dict:
    shutil.rmtree(out, ignore_errors=True)
    extra = []
    if read_processes is not None:
        settings = out.with_name("bench-settings.toml")
        settings.write_text(f"[stream]\nread_processes = {read_processes}\n")
        extra = ["--settings", str(settings)]
    start = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, "-m", "coastmon", "analyze", *map(str, files), "--out", str(out),
         "--u-var", "u", "--v-var", "v", "--mask-var", "mask", "--no-progress", *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    with bench_stream.PeakMemory(proc.pid) as memory:
        stdout, stderr = proc.communicate()
    wall = time.perf_counter() - start
    if proc.returncode:
        raise SystemExit(f"analyze failed: {stderr[-2000:]}")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    run = json.loads((out / "run.json").read_text())
    return {"work_s": wall, "stages_s": run["timings_s"], "peak_rss_gb": peak / 1e9,
            "peak_tree_gb": memory.peak / 1e9}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    bench_stream.record_arguments(parser, ["zlib"])
    parser.add_argument("--repeat", type=int, default=1, help="copies of the record in time")
    parser.add_argument("--read-processes", type=int, default=None,
                        help="stream.read_processes for analyze (default: automatic)")
    parser.add_argument("--shape", choices=list(SHAPES), default=None,
                        help="record shape preset (ny, nx, nt); --ny/--nx/--nt override it")
    parser.add_argument("--xread", action="store_true",
                        help="also time a plain read with xarray + dask (sum of u and v)")
    parser.add_argument("--recipe", action="store_true",
                        help="also time the straightforward xarray recipe of the statistics")
    parser.add_argument("--best", type=int, default=1, help="repeats; the fastest is kept")
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.shape:
        given = set(argv if argv is not None else sys.argv[1:])
        for name, value in zip(("ny", "nx", "nt"), SHAPES[args.shape], strict=True):
            if f"--{name}" not in given:
                setattr(args, name, value)
    if args.child:
        kind, files = args.child[0], [Path(f) for f in args.child[1:]]
        out = args.dir / "analyze-out"
        measure = {"read": _read, "xread": _xread, "recipe": _recipe}.get(kind)
        result = measure(files) if measure else _analyze(files, out, args.read_processes)
        print(json.dumps({"kind": kind, **result}))
        return
    args.dir.mkdir(parents=True, exist_ok=True)
    kinds = ["read"] + ["xread"] * args.xread + ["recipe"] * args.recipe + ["analyze"]
    table = []
    for variant in args.variants:
        files = repeated_record(bench_stream.ensure_record(args, variant), args.repeat)
        size = sum(f.stat().st_size for f in files) / 1e9
        best = {}
        for _ in range(max(1, args.best)):
            for kind in kinds:
                options = () if args.read_processes is None else (
                    "--read-processes", str(args.read_processes))
                record = bench_stream.run_child(__file__, args.dir, [kind, *map(str, files)],
                                                args.cold, options)
                record.update(variant=variant, repeat=args.repeat, size_gb=size,
                              n_time=args.nt * args.repeat, grid=[args.ny, args.nx],
                              load=os.getloadavg()[0])
                print(json.dumps(record), flush=True)
                if kind not in best or record["work_s"] < best[kind]["work_s"]:
                    best[kind] = record
        table.append(best)
    print(f"\n{'variant':8} {'grid':>9} {'steps':>6} {'GB':>5} {'read s':>7} {'xread s':>8} "
          f"{'recipe s':>9} {'analyze s':>10} {'÷read':>6} {'÷xread':>7} {'÷recipe':>8} "
          f"{'peak GB':>8} {'tree GB':>8}  stages (prepare / pass / analyses / outputs)")
    for best in table:
        an, read = best["analyze"], best["read"]
        xread = best.get("xread", {}).get("work_s", float("nan"))
        recipe = best.get("recipe", {}).get("work_s", float("nan"))
        st = an["stages_s"]
        stages = " / ".join(f"{st.get(k, float('nan')):.1f}" for k in
                            ("prepare_s", "stream_pass_s", "analyses_s", "outputs_s"))
        grid = f"{an['grid'][0]}x{an['grid'][1]}"
        print(f"{an['variant']:8} {grid:>9} {an['n_time']:6d} {an['size_gb']:5.2f} "
              f"{read['work_s']:7.1f} {xread:8.1f} {recipe:9.1f} {an['work_s']:10.1f} "
              f"{an['work_s'] / read['work_s']:6.2f} {an['work_s'] / xread:7.2f} "
              f"{an['work_s'] / recipe:8.2f} {an['peak_rss_gb']:8.2f} "
              f"{an['peak_tree_gb']:8.2f}  {stages}")


if __name__ == "__main__":
    main()
