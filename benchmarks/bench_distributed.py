"""The streaming pass on a local dask.distributed cluster against local threads.

Not part of the test suite. On the record of ``bench_stream.py`` named by the options
(built if missing), times :func:`coastmon.stream.run_pass` with local threads and then
with ``stream.scheduler`` set to a local cluster of ``--workers`` worker processes (one
thread each), checks that the statistics and the sampled series are identical, and
prints the two times and their ratio.

Usage::

    python benchmarks/bench_distributed.py --dir /tmp/coastmon-bench --ny 121 --nx 131 --nt 5840
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_stream  # noqa: E402  (the records are shared)


def _pass(path: Path, work: Path, scheduler: str | None):
    from coastmon.config import Settings
    from coastmon.pipeline import prepare
    from coastmon.stream import run_pass

    settings = Settings().replace("stream", progress=False, scheduler=scheduler)
    settings = settings.replace("ingest", u_var="u", v_var="v", mask_var="mask")
    prep = prepare([path], settings)
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    start = time.perf_counter()
    result = run_pass(prep.ds, prep.metrics, prep.frame, settings.stream, work)
    return time.perf_counter() - start, result


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    bench_stream.record_arguments(parser, ["plain"])
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    from distributed import LocalCluster

    path = bench_stream.ensure_record(args, args.variants[0])
    local_s, local = _pass(path, args.dir / "work-local", None)
    with LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        cluster_s, remote = _pass(path, args.dir / "work-cluster", cluster.scheduler_address)
    same_stats = all(np.array_equal(local.stats[k].values, remote.stats[k].values,
                                    equal_nan=True) for k in local.stats.data_vars)
    same_series = all(np.array_equal(local.series[k].values, remote.series[k].values,
                                     equal_nan=True) for k in local.series.data_vars)
    print(json.dumps({"file": path.name, "threads_s": local_s, "cluster_s": cluster_s,
                      "ratio": cluster_s / local_s, "workers": args.workers,
                      "identical_stats": same_stats, "identical_series": same_series,
                      "load": os.getloadavg()[0]}))


if __name__ == "__main__":
    main()
