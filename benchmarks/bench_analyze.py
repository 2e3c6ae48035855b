"""Benchmark of the whole ``coastmon analyze`` against a plain read of the same files.

Not part of the test suite. Uses the records of ``bench_stream.py`` (built there if
missing) and, with ``--repeat N``, a record N times as long made of N copies of the file
with shifted time axes (multi-file input, as decades of model output usually come). For
each input it times, each in its own subprocess:

* ``read``    — a plain read of u and v with netCDF4, file after file (as in
  ``bench_stream.py``);
* ``analyze`` — ``coastmon analyze FILES --out DIR --u-var u --v-var v --mask-var mask``,
  with the stage timings from the run's ``run.json`` and the peak memory of the process.

Usage::

    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --variants zlib plain --cold
    python benchmarks/bench_analyze.py --dir /tmp/coastmon-bench --variants zlib --repeat 4 --cold

Prints one JSON line per measurement and a summary table with analyze ÷ read.
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_stream  # noqa: E402  (the records and the plain read are shared)


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
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        kind, files = args.child[0], [Path(f) for f in args.child[1:]]
        out = args.dir / "analyze-out"
        result = _read(files) if kind == "read" else _analyze(files, out, args.read_processes)
        print(json.dumps({"kind": kind, **result}))
        return
    args.dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for variant in args.variants:
        files = repeated_record(bench_stream.ensure_record(args, variant), args.repeat)
        size = sum(f.stat().st_size for f in files) / 1e9
        for kind in ("read", "analyze"):
            options = () if args.read_processes is None else (
                "--read-processes", str(args.read_processes))
            record = bench_stream.run_child(__file__, args.dir, [kind, *map(str, files)],
                                            args.cold, options)
            record.update(variant=variant, repeat=args.repeat, size_gb=size,
                          n_time=args.nt * args.repeat)
            rows.append(record)
            print(json.dumps(record), flush=True)
    print(f"\n{'variant':8} {'steps':>6} {'GB':>5} {'read s':>7} {'analyze s':>10} "
          f"{'ratio':>6} {'peak GB':>8} {'tree GB':>8}  "
          "stages (prepare / pass / analyses / outputs)")
    for read, an in zip(rows[::2], rows[1::2], strict=True):
        st = an["stages_s"]
        stages = " / ".join(f"{st.get(k, float('nan')):.1f}" for k in
                            ("prepare_s", "stream_pass_s", "analyses_s", "outputs_s"))
        print(f"{an['variant']:8} {an['n_time']:6d} {an['size_gb']:5.2f} {read['work_s']:7.1f} "
              f"{an['work_s']:10.1f} {an['work_s'] / read['work_s']:6.2f} "
              f"{an['peak_rss_gb']:8.2f} {an['peak_tree_gb']:8.2f}  {stages}")


if __name__ == "__main__":
    main()
