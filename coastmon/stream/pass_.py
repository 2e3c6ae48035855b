"""The one streaming pass over the ``(time, y, x)`` data.

:func:`run_pass` reads each time chunk of u, v (and ssh) exactly once and, in one compiled
kernel per chunk, computes vorticity and Okubo–Weiss eddy cores, accumulates the chunk's
moments, merges them into the running :class:`~coastmon.stream.moments.MomentState`, and
samples u, v, ζ (and ssh) onto the along-shore frame. When the canonical dataset carries
its own ``zeta`` (the native vorticity of a C-grid input), that ζ is used instead of the
kernel's, in the moments, the samples and the Okubo–Weiss parameter (whose strain still
comes from u and v). The sampled time series are written to files in a work folder,
station by station (positioned writes, no memory map), so memory stays bounded by a few
chunks whatever the record length, and the analyses that read one station at a time
touch only that station's part of the files.

On local threads, one reader thread reads the chunks in order as one uninterrupted stream
while one worker thread per core runs the compiled kernels (they release the GIL); at
most ``workers + 1`` chunks are read and not yet merged. With ``settings.scheduler`` set
to an address, the chunk tasks run on a dask.distributed cluster instead, on a sliding
window of ``2 x`` its threads. Results are merged in chunk order, so a run is
reproducible to the last bit whatever the scheduler.
"""

from __future__ import annotations

import functools
import json
import os
import queue
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import NamedTuple, ParamSpec, TypeVar

import dask
import dask.array as da
import numba
import numpy as np
import xarray as xr

from coastmon.config import StreamSettings
from coastmon.errors import InputError, SettingsError
from coastmon.grid.metrics import GridMetrics
from coastmon.grid.operators import gradient
from coastmon.io.damage import ChunkDecodeError
from coastmon.io.pages import preallocate
from coastmon.stream import kernels, rays, readers
from coastmon.stream.moments import MomentState, grid_signature, time_text
from coastmon.stream.rays import TiledPoints
from coastmon.stream.readers import ProcessReader, read_chunk

OPEN_FILES = 4
"""Input files kept open during the pass (xarray's file cache): the reader goes through
the files in time order, and every open NetCDF file holds buffers and caches (several MB
per variable), so keeping all of them open would grow the memory with the record."""
CHUNK_BUDGET_BYTES = 128 * 2**20
"""Memory budget of one time chunk (inputs and the kernel's per-chunk arrays)."""
SCRATCH_BYTES_PER_POINT = 16
"""Kernel scratch per grid point and time step: ζ (for sampling) and Okubo–Weiss W (for
the eddy-core count), both float64."""
KERNEL_BLOCK_BYTES = 16 * 2**20
"""Kernel scratch of one worker thread: a chunk is computed in sub-blocks of time steps
whose ζ and W fit in it (at least :data:`KERNEL_MIN_STEPS`), one scratch reused for all.
Scratch as large as a whole chunk (98 MB per worker on the long benchmark record) is
memory the system must clear before its first use, and the next sub-block finds ζ in
cache when it samples it."""
KERNEL_MIN_STEPS = 32
"""Fewest time steps of a kernel sub-block, whatever the grid: each sub-block's moments
are merged into the chunk's, a sweep over the whole grid, which shorter sub-blocks would
repeat too often (with 8 steps the wide benchmark's pass took 0.3 s longer)."""

P = ParamSpec("P")
R = TypeVar("R")

SERIES_BUFFER_BYTES = 4 * 2**20
"""Sampled series gathered per file before they are written (bytes): a few MB per file
turn one small write per station and chunk into one per station and a few dozen chunks."""

TILE_BYTES = 16 * 2**20
"""Least size of a tile of a ray grid-point file (:class:`TileFile`), but for the last:
the rays of one station are read from every tile, so fewer, larger tiles read faster."""
SERIES_VARIABLES = ("u", "v", "zeta", "ssh")
INPUT_VARIABLES = ("u", "v", "ssh", "zeta")
"""Variables read from the canonical dataset, in the order the chunk tasks take them; a
given ``zeta`` (native C-grid vorticity) replaces the kernel's own vorticity."""
_SERIES_ATTRS = {
    "u": ("eastward velocity", "m s-1"),
    "v": ("northward velocity", "m s-1"),
    "zeta": ("relative vorticity", "s-1"),
    "ssh": ("sea surface height", "m"),
}


@dataclass
class PassResult:
    """Everything the streaming pass produces.

    Attributes
    ----------
    stats : eddy statistics on the grid (y, x); see :func:`stats_from_state`.
    series : sampled time series, float32, backed by files in the work folder:
        ``section_<var>`` (time, station, offset) and ``ray_<var>`` (time, station, ray)
        for var in u, v, zeta[, ssh]; the files are stored station-major (each station's
        record contiguous), and the arrays are views in this dimension order. Each
        ``ray_<var>`` may instead hold a :class:`~coastmon.stream.rays.RayField` (see
        ``ray_points`` of :func:`run_pass`): read the rays through ``.data``, a station or
        a block of stations at a time (``.values`` computes them all).
    state : the accumulators (mergeable; save with :func:`~coastmon.stream.save_state`).
    timings : seconds spent per stage (``read_s``, ``kernel_s``, ``sample_s`` summed over
        chunks and workers; ``merge_s``, ``write_s``, ``stats_s``, ``total_s`` wall time).
    n_time : number of time steps read.
    valid_steps : (time,) int64, the number of grid points with both u and v present at
        each time step (land is missing at every step), for the missing-data checks of
        :mod:`coastmon.assess.coverage`.
    """

    stats: xr.Dataset
    series: xr.Dataset
    state: MomentState
    timings: dict[str, float] = field(default_factory=dict)
    n_time: int = 0
    valid_steps: np.ndarray | None = None


@dataclass(frozen=True)
class _Constants:
    """What every chunk task needs besides its data (shipped once to each worker)."""

    gx: np.ndarray
    gy: np.ndarray
    sampler: kernels.Sampler
    ow_threshold: float
    kernel_threads: int
    step_limit: int


def _process_block(u, v, h, z, groups, consts: _Constants, workspace=None,
                   blocks: Callable[[int], tuple[np.ndarray, np.ndarray]] | None = None
                   ) -> dict:
    """All the work on one chunk: vorticity, eddy cores, moments per group, sampling.

    ``z`` is the given vorticity (the canonical ``zeta``, e.g. native C-grid vorticity) or
    None, when the kernel computes it from u and v. ``blocks(n_time)`` gives the
    station-major blocks the samples go to (:meth:`_BlockPool.take`; new ones when None).

    The kernels run on sub-blocks of at most ``consts.step_limit`` time steps so that
    their scratch arrays stay within :data:`KERNEL_BLOCK_BYTES` however large the
    input's chunks are; sub-block moments are merged here (Chan et al. 1983).
    """
    numba.set_num_threads(max(1, min(consts.kernel_threads, numba.config.NUMBA_NUM_THREADS)))
    u, v = _as_float(u), _as_float(v)
    h = None if h is None else _as_float(h)
    z = None if z is None else _as_float(z)
    workspace = kernels.Workspace() if workspace is None else workspace
    blocks = consts.sampler.blocks if blocks is None else blocks
    nt = u.shape[0]
    parts: dict[int, tuple] = {}
    # Station-major blocks, as the series files hold them: each sub-block's samples go
    # straight to their place (no copies between the sampler and the file).
    samples: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    valid = np.zeros(nt, dtype=np.int64)
    kernel_s = sample_s = 0.0
    for s0 in range(0, nt, consts.step_limit):
        s1 = min(nt, s0 + consts.step_limit)
        t0 = time.perf_counter()
        ub, vb = u[s0:s1], v[s0:s1]
        hb = None if h is None else h[s0:s1]
        zeta, _, _, sub_parts = kernels.chunk_fields(
            ub, vb, consts.gx, consts.gy, consts.ow_threshold, groups=groups[s0:s1], ssh=hb,
            zeta=None if z is None else z[s0:s1], workspace=workspace)
        for g, part in sub_parts.items():
            if g in parts:
                kernels.merge_moments(parts[g], part)
            else:
                parts[g] = part
        t1 = time.perf_counter()
        # Valid points per step, in the workspace's memory (not two new chunk-sized arrays).
        both = np.add(ub, vb, out=workspace.get("u+v", ub.shape, ub.dtype))
        finite = np.isfinite(both, out=workspace.get("finite", ub.shape, np.bool_))
        valid[s0:s1] = np.count_nonzero(finite.reshape(s1 - s0, -1), axis=1)
        for name, arr in (("u", ub), ("v", vb), ("zeta", zeta), ("ssh", hb)):
            if arr is not None:
                if name not in samples:
                    samples[name] = blocks(nt)
                consts.sampler.into(arr.reshape(s1 - s0, -1), *samples[name], s0)
        t2 = time.perf_counter()
        kernel_s += t1 - t0
        sample_s += t2 - t1
    return {
        "parts": parts,
        "samples": samples,
        "valid_steps": valid,
        "kernel_s": kernel_s,
        "sample_s": sample_s,
    }


def _as_float(a) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype not in (np.float32, np.float64):
        a = a.astype(np.float32)
    return np.ascontiguousarray(a)


def _input_array(ds: xr.Dataset, name: str):
    """The variable as (time, y, x): a dask array whole in space, or a lazy DataArray."""
    var = ds[name].transpose("time", "y", "x")
    if var.chunks is None:
        return var
    data = var.data
    if len(data.chunks[1]) > 1 or len(data.chunks[2]) > 1:
        data = data.rechunk({1: -1, 2: -1})
    return data


class _Inline:
    """An executor that runs each task at once in the calling thread."""

    def submit(self, fn, *args) -> Future:
        future: Future = Future()
        try:
            future.set_result(fn(*args))
        except BaseException as exc:  # delivered by future.result(), as a pool would
            future.set_exception(exc)
        return future

    def shutdown(self, wait: bool = True, cancel_futures: bool = False) -> None:
        pass


WORKER_NICENESS = 5
"""Scheduling priority given up by the compute threads (Linux niceness), so that the
reader thread, which bounds the pass on compressed input, gets a core when it needs one."""


def _yield_to_reader() -> None:
    """Pool initializer: lower this worker thread's priority (Linux; no-op elsewhere)."""
    try:
        os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), WORKER_NICENESS)
    except (AttributeError, OSError):  # not Linux, or not permitted
        pass


def _process_read(read, groups, consts: _Constants, workspaces: queue.SimpleQueue,
                  pool: _BlockPool) -> dict:
    """Local-thread task: wait for a chunk's read (done by the reader thread), then process it.

    ``workspaces`` holds one kernel workspace per worker thread, reused between chunks;
    ``pool`` the sample blocks, handed back once written.
    """
    blocks, read_s = read.result()
    workspace = workspaces.get()
    try:
        out = _process_block(*blocks, groups, consts, workspace, pool.take)
    finally:
        workspaces.put(workspace)
    out["read_s"] = read_s
    return out


class _BlockPool:
    """Sample blocks (:meth:`kernels.Sampler.blocks`) reused from chunk to chunk.

    A new block is new memory, which the system must clear before the sampler first writes
    to it; with a new set for every chunk that came to as many bytes as the series files
    themselves (1.1 GB on the long benchmark record), and clearing fresh pages is slow on
    some machines (see :mod:`coastmon.threads`). The consumer gives each chunk's blocks back
    once they are written (:func:`_consume`), so at most the chunks in flight hold blocks.
    Thread-safe: the workers take, the main thread gives.
    """

    def __init__(self, sampler: kernels.Sampler) -> None:
        self.sampler = sampler
        self.lock = threading.Lock()
        self.free: dict[int, list[tuple[np.ndarray, np.ndarray]]] = {}

    def take(self, n_time: int) -> tuple[np.ndarray, np.ndarray]:
        with self.lock:
            spare = self.free.get(n_time)
            if spare:
                return spare.pop()
        return self.sampler.blocks(n_time)

    def give(self, blocks: tuple[np.ndarray, np.ndarray]) -> None:
        with self.lock:
            self.free.setdefault(blocks[0].shape[1], []).append(blocks)


def _check_dataset(ds: xr.Dataset, metrics: GridMetrics) -> list[str]:
    names = [n for n in ("u", "v", "ssh", "zeta") if n in ds.data_vars]
    for required in ("u", "v"):
        if required not in ds.data_vars:
            raise InputError(
                f"The dataset given to the streaming pass has no '{required}' variable",
                where="streaming pass input",
                todo="Open the input with coastmon.io.ingest.open_dataset, which finds and "
                "names the velocity variables",
            )
    for name in names:
        if set(ds[name].dims) != {"time", "y", "x"}:
            raise InputError(
                f"Variable '{name}' has dimensions {ds[name].dims}, expected (time, y, x)",
                where="streaming pass input",
                todo="Open the input with coastmon.io.ingest.open_dataset",
            )
    shape = (ds.sizes["y"], ds.sizes["x"])
    if shape != metrics.shape:
        raise InputError(
            f"The data grid {shape} does not match the grid metrics {metrics.shape}",
            where="streaming pass input",
            todo="Build GridMetrics from the same dataset's lon and lat",
        )
    if ds.sizes["time"] < 1:
        raise InputError(
            "The dataset has no time steps", where="streaming pass input",
            todo="Check the input files and any time selection",
        )
    return names


def _time_bounds(arrays: list, nt: int) -> list[tuple[int, int]]:
    """Chunk boundaries along time: the input's dask chunks, or sized from the budget."""
    first = arrays[0]
    if isinstance(first, da.Array):
        sizes = list(first.chunks[0])
    else:
        ny, nx = first.shape[1:]
        per_step = ny * nx * (sum(a.dtype.itemsize for a in arrays if a is not None)
                              + SCRATCH_BYTES_PER_POINT)
        step = int(max(1, min(nt, CHUNK_BUDGET_BYTES // max(per_step, 1))))
        sizes = [step] * (nt // step) + ([nt % step] if nt % step else [])
    edges = np.concatenate([[0], np.cumsum(sizes)]).astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def _input_arrays(ds: xr.Dataset, names: list[str]) -> list:
    """The inputs in :data:`INPUT_VARIABLES` order (:func:`_input_array`), None if absent."""
    return [_input_array(ds, n) if n in names else None for n in INPUT_VARIABLES]


class _Plan(NamedTuple):
    workers: int
    n_readers: int
    window: int
    inline: bool


def _local_plan(ds: xr.Dataset, settings: StreamSettings, arrays, n_chunks: int) -> _Plan:
    """Compute threads, reader processes and chunks in flight of a pass on local threads.

    One compute thread per core, or everything inline in the calling thread when the
    kernels may not run concurrently; reader processes as
    :func:`coastmon.stream.readers.read_processes` decides for a compressed input that the
    HDF5 or Zarr library decodes (one thread at a time), else one reader thread (on inputs
    that :mod:`coastmon.io.chunks` decodes, that thread decodes each chunk on all cores); in flight, one chunk per compute thread and per reader (the reader
    thread counting one).
    """
    ncpu = os.cpu_count() or 1
    if not kernels.concurrent_calls_safe():
        return _Plan(1, 0, 2, True)
    workers = max(1, min(ncpu, n_chunks))
    nbytes = sum(int(a.dtype.itemsize) * int(np.prod(a.shape)) for a in arrays if a is not None)
    serial = bool(ds.attrs.get("compressed_input", 0)) and not ds.attrs.get("direct_read")
    n_readers = readers.read_processes(settings.read_processes, serial, nbytes, ncpu)
    return _Plan(workers, n_readers, workers + max(1, n_readers), False)


def prestart_readers(ds: xr.Dataset, settings: StreamSettings) -> None:
    """Start the reader processes that :func:`run_pass` will use on ``ds`` now.

    They take a second or two to import their libraries; started before the geometry is
    built, they are ready when the pass begins. Does nothing when the pass would read in
    a thread (uncompressed or short input, one core, a dask scheduler).
    """
    names = [n for n in INPUT_VARIABLES if n in ds.data_vars]
    if settings.scheduler or "u" not in names or ds.sizes.get("time", 0) < 1:
        return  # no local pass, or run_pass will say what is wrong
    arrays = _input_arrays(ds, names)
    plan = _local_plan(ds, settings, arrays, len(_time_bounds(arrays, ds.sizes["time"])))
    readers.prestart(plan.n_readers, plan.window)


def closing_spare_readers(run: Callable[P, R]) -> Callable[P, R]:
    """Decorate a command so that reader processes started ahead by
    :func:`prestart_readers` and not taken by a pass are closed when it returns or fails
    (e.g. a record found too short after the readers were started)."""
    @functools.wraps(run)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        try:
            return run(*args, **kwargs)
        finally:
            readers.close_spares()

    return wrapper


def _groups(ds: xr.Dataset, seasonal: bool) -> np.ndarray:
    nt = ds.sizes["time"]
    if not seasonal:
        return np.zeros(nt, dtype=np.int64)
    if "time" not in ds.coords:
        raise InputError(
            "Seasonal anomalies need a time coordinate, and the dataset has none",
            where="stream.seasonal = true",
            todo="Give the input a CF time coordinate or set stream.seasonal = false",
        )
    try:
        months = np.asarray(ds["time"].dt.month.values, dtype=np.int64)
    except (TypeError, AttributeError):
        raise InputError(
            "Seasonal anomalies need calendar dates, but the time coordinate is not a date",
            where="stream.seasonal = true",
            todo="Give the time coordinate CF units such as 'days since 2000-01-01' or set "
            "stream.seasonal = false",
        ) from None
    return months - 1


def _client(address: str):
    try:
        from distributed import Client
    except ImportError:  # pragma: no cover - distributed is a dependency
        raise SettingsError(
            "A scheduler address was given but dask.distributed is not installed",
            where="stream.scheduler", todo="Install 'distributed' or leave the scheduler unset",
        ) from None
    try:
        return Client(address, timeout=30, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise SettingsError(
            f"Cannot reach the dask scheduler at {address} ({exc})",
            where="stream.scheduler",
            todo="Start the scheduler and its workers first, check the address, or leave the "
            "scheduler unset to use local threads",
        ) from None


def _progress_bar(total: int, enabled: bool):
    from tqdm import tqdm

    show = enabled and sys.stderr.isatty()
    return tqdm(total=total, file=sys.stderr, disable=not show, unit="chunk",
                desc="streaming pass")


def run_pass(
    ds: xr.Dataset,
    metrics: GridMetrics,
    frame,
    settings: StreamSettings,
    workdir: Path,
    progress: Callable[[int, int], None] | None = None,
    ray_points: bool = True,
) -> PassResult:
    """Read the record once: eddy statistics on the grid and time series on the frame.

    Parameters
    ----------
    ds : canonical dataset (``u``, ``v`` [, ``ssh``] on (time, y, x), NaN on land;
        ``lon``, ``lat`` (y, x)), dask-chunked along time or not chunked (then chunks of
        about :data:`CHUNK_BUDGET_BYTES` are read).
    metrics : grid metrics of the same grid.
    frame : an along-shore frame with ``sampler`` (CSR, ``(n_points, y*x)``), ``valid``,
        ``split``, ``stations`` (with ``alongshore_km``), ``offsets_km``, ``ray_km``.
    settings : stream settings (scheduler, seasonal, progress bar, Okubo–Weiss threshold).
    workdir : folder for the disk-backed series (created if needed; must stay while the
        series are used): a folder of its own for each pass, since the series of an
        earlier pass may still be read from it (a ray file already there is an error).
    progress : optional callback ``progress(chunks_done, chunks_total)``.
    ray_points : where the rays draw on clearly fewer grid points than they have points
        (:func:`coastmon.stream.rays.plan_ray_points`), write those grid points' series
        and give each ``ray_<var>`` as a :class:`~coastmon.stream.rays.RayField` that
        computes the rays when read; False: always write the rays themselves (memory-mapped
        arrays, as the monitoring state stores them).

    Returns
    -------
    PassResult

    Notes
    -----
    Anomalies are about the time mean (or the monthly climatology when
    ``settings.seasonal``). Sampling skips missing values: ``(W @ fill0(x)) /
    (W @ isfinite(x))`` per time step, NaN where no weight meets a finite value.
    """
    with xr.set_options(file_cache_maxsize=OPEN_FILES):
        return _run_pass(ds, metrics, frame, settings, workdir, progress, ray_points)


def _run_pass(ds, metrics, frame, settings, workdir, progress, ray_points) -> PassResult:
    wall0 = time.perf_counter()
    names = _check_dataset(ds, metrics)
    has_h = "ssh" in names
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    arrays = _input_arrays(ds, names)
    nt = ds.sizes["time"]
    bounds = _time_bounds(arrays, nt)
    groups = _groups(ds, settings.seasonal)
    times = ds["time"].values if "time" in ds.coords else None

    sampler = frame.sampler.tocsr()
    n_points = sampler.shape[0]
    if sampler.shape[1] != metrics.shape[0] * metrics.shape[1]:
        raise InputError(
            f"The frame's sampler has {sampler.shape[1]} columns but the grid has "
            f"{metrics.shape[0] * metrics.shape[1]} points",
            where="streaming pass", todo="Build the frame on the same grid as the data",
        )
    series_names = [n for n in SERIES_VARIABLES if n != "ssh" or has_h]
    probe = frame.split(np.zeros((1, n_points), dtype=np.float32))
    sec_shape, ray_shape = probe[0].shape[1:], probe[1].shape[1:]
    valid_rows = np.asarray(frame.valid, dtype=np.bool_)
    plan = rays.plan_ray_points(sampler, valid_rows, sec_shape[0], sec_shape[1],
                                ray_shape[1]) if ray_points else None
    if plan is not None:   # the rays' grid points are written; the rays computed on reading
        sampler, valid_rows = rays.sampling_matrix(sampler, valid_rows,
                                                   sec_shape[0] * sec_shape[1], plan)
        ray_shape = (plan.n_points, 1)
    files = {}
    valid_steps = np.zeros(nt, dtype=np.int64)
    state = MomentState.empty(metrics.shape, has_h, settings.seasonal, settings.ow_threshold,
                              grid_signature(metrics.lon, metrics.lat))
    ncpu = os.cpu_count() or 1
    grid_size = metrics.shape[0] * metrics.shape[1]
    timings = dict.fromkeys(("read_s", "kernel_s", "sample_s", "merge_s", "write_s"), 0.0)
    client = reader = None
    try:
        # Each series file reserves its disk when created: a full disk stops the pass here,
        # before anything is read (the files made so far are closed below).
        for name in series_names:
            files[f"section_{name}"] = SeriesFile(workdir / f"section_{name}.npy",
                                                  (nt, *sec_shape))
            files[f"ray_{name}"] = SeriesFile(workdir / f"ray_{name}.npy", (nt, *ray_shape)) \
                if plan is None else TileFile(workdir / f"ray_{name}.tiles", nt, plan.n_points)
        client = _client(settings.scheduler) if settings.scheduler else None
        if client is not None:
            nthreads = sum(client.nthreads().values()) or 1
            workers = max(1, len(client.nthreads()))
            kernel_threads = max(1, ncpu // nthreads)
        else:
            workers, n_readers, window, inline = _local_plan(ds, settings, arrays, len(bounds))
            nthreads = workers
            kernel_threads = max(1, ncpu // workers)
        consts = _Constants(
            gx=np.ascontiguousarray(metrics.gx), gy=np.ascontiguousarray(metrics.gy),
            sampler=kernels.Sampler(sampler, valid_rows, *sec_shape,  # the frame's split
                                    grid_points=None if plan is None else plan.n_points),
            ow_threshold=float(settings.ow_threshold), kernel_threads=kernel_threads,
            step_limit=max(KERNEL_MIN_STEPS,
                           KERNEL_BLOCK_BYTES // (SCRATCH_BYTES_PER_POINT * grid_size)),
        )
        bar = _progress_bar(len(bounds), settings.progress)
        if client is not None:
            window = 2 * nthreads
            submit, collect, pool = _distributed_submitter(client, ds, names, bounds, consts,
                                                           groups)
            give_back = None  # the blocks were made by the workers
        else:
            # One reader thread reads the chunks in order, so the input is read as one
            # uninterrupted stream, while the workers compute; on compressed input a few
            # reader processes decompress several chunks at once instead. At most
            # `window` chunks are read and not yet merged.
            if inline:
                # Kernels may not run in two threads at once: everything in this thread
                # (each kernel still uses every core).
                reader, pool = _Inline(), _Inline()
            else:
                if n_readers:
                    # Compressed input: several chunks decompressed at once, in processes.
                    reader = readers.take(n_readers, window)
                    try:
                        reader.start(arrays, max(b - a for a, b in bounds), OPEN_FILES)
                    except readers.CannotShip:
                        reader.close()
                        if settings.read_processes:
                            raise
                        n_readers, window = 0, workers + 1  # cannot ship: read in a thread
                if not n_readers:
                    reader = ThreadPoolExecutor(max_workers=1,
                                                thread_name_prefix="coastmon-read")
                pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="coastmon-pass",
                                          initializer=_yield_to_reader)
            workspaces = queue.SimpleQueue()
            for _ in range(workers):
                workspaces.put(kernels.Workspace())
            block_pool = _BlockPool(consts.sampler)
            give_back = block_pool.give
            counter = iter(range(len(bounds)))

            def submit(t0, t1):
                if n_readers:
                    read = reader.submit(next(counter), t0, t1)
                else:
                    read = reader.submit(read_chunk, arrays, t0, t1)
                return pool.submit(_process_read, read, groups[t0:t1], consts, workspaces,
                                   block_pool)

            def collect(future):
                return future.result()

        try:
            pending = deque()
            todo = iter(bounds)
            for t0, t1 in todo:
                pending.append((t0, t1, submit(t0, t1)))
                if len(pending) >= window:
                    break
            done = 0
            while pending:
                t0, t1, future = pending.popleft()
                try:
                    out = collect(future)
                except ChunkDecodeError as exc:
                    raise _damaged(ds, t0, t1, str(exc)) from None
                nxt = next(todo, None)
                if nxt is not None:
                    pending.append((*nxt, submit(*nxt)))
                _consume(out, t0, t1, state, files, times, timings, give_back)
                valid_steps[t0:t1] = out["valid_steps"]
                done += 1
                bar.update(1)
                if progress is not None:
                    progress(done, len(bounds))
        finally:
            bar.close()
            if pool is not None:
                pool.shutdown(wait=True, cancel_futures=True)
            if isinstance(reader, ProcessReader):
                reader.close()
            elif reader is not None:
                reader.shutdown(wait=True, cancel_futures=True)
    finally:
        if isinstance(reader, ProcessReader):
            reader.close()  # again: also when setting up the pass failed (closing is idempotent)
        if client is not None:
            client.close()
        for writer in files.values():
            writer.close()

    t = time.perf_counter()
    # A ray file of grid points opens as their tiles, which the RayField reads.
    opened = {k: (rays.RayField(w.open(), plan) if isinstance(w, TileFile) else w.open())
              for k, w in files.items()}
    series = _series_dataset(opened, frame, ds, series_names)
    timings["write_s"] += time.perf_counter() - t
    t = time.perf_counter()
    stats = stats_from_state(state, metrics)
    timings["stats_s"] = time.perf_counter() - t
    timings["total_s"] = time.perf_counter() - wall0
    if client is not None:
        timings.pop("read_s")
    return PassResult(stats=stats, series=series, state=state, timings=timings, n_time=nt,
                      valid_steps=valid_steps)


def _damaged(ds: xr.Dataset, t0: int, t1: int, detail: str) -> InputError:
    """The error for a stored chunk of time steps [t0, t1) that cannot be decoded."""
    files = json.loads(ds.attrs.get("source_files", "[]"))
    steps = json.loads(ds.attrs.get("source_steps", "[]"))
    if files and len(steps) == len(files):
        edges = np.cumsum(steps)
        which = np.unique(np.searchsorted(edges, np.arange(t0, t1), side="right"))
        files = [files[int(k)] for k in which if k < len(files)]
    times = ds["time"].values if "time" in ds.coords else None
    span = (f"{time_text(times[t0])} to {time_text(times[t1 - 1])}" if times is not None
            else f"steps {t0} to {t1 - 1}")
    return InputError(
        f"A stored chunk of the input cannot be decoded ({detail}); the file is damaged or "
        "truncated (or its decompression library failed on it)",
        where=f"{', '.join(files) or 'the input'}, time {span}",
        todo="Check the file with a NetCDF or Zarr tool, or copy it again")


def _distributed_submitter(client, ds, names, bounds, consts, groups):
    """Submit chunk tasks to a dask.distributed cluster; constants are scattered once."""
    if ds["u"].chunks is None:
        ds = ds[names].chunk({"time": bounds[0][1] - bounds[0][0]})
    lazy = _input_arrays(ds, names)
    consts_future = client.scatter(consts, broadcast=True)

    def submit(t0, t1):
        task = dask.delayed(_process_block)(
            *[None if a is None else a[t0:t1] for a in lazy], groups[t0:t1], consts_future
        )
        return client.compute(task)

    def collect(future):
        return future.result()

    return submit, collect, None


def _write_at(fd: int, block: np.ndarray, at: int) -> None:
    """Write a C-ordered array's bytes at byte ``at`` of the open file ``fd``, whole."""
    data = memoryview(block.reshape(-1)).cast("B")   # (an empty block: nothing to write)
    done = 0
    while done < len(data):
        done += os.pwrite(fd, data[done:], at + done)


class _GatheredWrites:
    """A file written with positioned writes, some blocks gathered in ``_buffer`` first
    (the subclass's ``flush`` writes them): :meth:`close` writes what is gathered, closes
    the file and drops the buffer."""

    fd: int
    _buffer: np.ndarray | None

    def close(self) -> None:
        if self.fd >= 0:
            try:
                self.flush()  # type: ignore[attr-defined]  # each subclass has its own
            finally:
                os.close(self.fd)
                self.fd = -1
                self._buffer = None


class SeriesFile(_GatheredWrites):
    """A float32 series ``(time, station, k)`` kept on disk station by station.

    The ``.npy`` file holds ``(station, time, k)``: each station's whole record is one
    contiguous block, so reading one station (as the per-station analyses do) touches only
    that station's pages. Blocks of time steps are written with positioned writes (no
    memory map), so the series already written do not stay in the process's memory;
    consecutive blocks smaller than :data:`SERIES_BUFFER_BYTES` are gathered in one buffer
    of that size first (the file's own, reused, so the caller may reuse its block as soon
    as the call returns), so that each station gets one write per gathered block rather
    than one per chunk of the pass; larger blocks are written as they are.
    :meth:`close` writes what is gathered; :meth:`open` gives the ``(time, station, k)``
    view of the file.
    """

    def __init__(self, path: Path, shape: tuple[int, ...]) -> None:
        self.path = path
        nt, ns, *rest = shape
        header = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32,
                                           shape=(ns, nt, *rest))
        self.offset = header.offset
        del header
        self.n_time = nt
        self.station_shape = (ns, *(int(r) for r in rest))  # (station, k...) of one step
        self.step_bytes = 4 * int(np.prod(rest))  # one station, one step
        # Steps gathered before a write: the first count that reaches the buffer's size.
        self.buffer_steps = max(1, -(-SERIES_BUFFER_BYTES // max(self.step_bytes * ns, 1)))
        self.fd = os.open(path, os.O_WRONLY)
        try:
            preallocate(self.fd, self.offset + ns * nt * self.step_bytes)
        except OSError:
            os.close(self.fd)
            raise
        self._buffer: np.ndarray | None = None
        self._held_t0 = 0
        self._held_steps = 0

    def write(self, t0: int, values: np.ndarray) -> None:
        """Write ``values`` ``(steps, station, k)`` at time steps ``t0, t0 + 1, ...``."""
        self.write_stations(t0, np.swapaxes(np.asarray(values), 0, 1))

    def write_stations(self, t0: int, values: np.ndarray) -> None:
        """Write station-major ``values`` ``(station, steps, k)`` at steps ``t0, t0 + 1, ...``.

        A C-ordered float32 block as large as the buffer (as the pass's sampler makes them
        for the rays) is written as it is; a smaller one is copied into the buffer.
        """
        values = np.asarray(values)
        steps = values.shape[1]
        if self._held_steps and (t0 != self._held_t0 + self._held_steps
                                 or self._held_steps + steps > self.buffer_steps):
            self.flush()
        if steps >= self.buffer_steps:
            self._write(t0, np.ascontiguousarray(values, dtype=np.float32))
            return
        if self._buffer is None:
            ns, *rest = self.station_shape
            self._buffer = np.empty((ns, self.buffer_steps, *rest), dtype=np.float32)
        if not self._held_steps:
            self._held_t0 = t0
        self._buffer[:, self._held_steps:self._held_steps + steps] = values
        self._held_steps += steps
        if self._held_steps >= self.buffer_steps:
            self.flush()

    def flush(self) -> None:
        """Write the gathered blocks, station by station."""
        if self._held_steps:
            self._write(self._held_t0, self._buffer[:, :self._held_steps])
        self._held_steps = 0

    def _write(self, t0: int, blocks: np.ndarray) -> None:
        """Write ``(station, steps, k)`` float32 blocks whose stations are each contiguous."""
        for s, block in enumerate(blocks):
            _write_at(self.fd, block, self.offset + (s * self.n_time + t0) * self.step_bytes)

    def open(self) -> np.ndarray:
        """The written series as a read-only, disk-backed ``(time, station, k)`` view."""
        return np.swapaxes(np.load(self.path, mmap_mode="r"), 0, 1)


class TileFile(_GatheredWrites):
    """Grid-point series ``(time, P)`` kept on disk in tiles of consecutive time steps.

    The file is :class:`coastmon.stream.rays.TiledPoints`' layout (raw float32, no
    header): each tile is every point's series over a run of steps, point-major, and is
    written with one positioned write. Blocks come in time order, station-major
    ``(P, steps, 1)`` as the pass's sampler makes them: a block of at least
    :data:`TILE_BYTES` is one tile as it is; smaller ones are gathered (copied, so the
    caller may reuse its block when the call returns) into one tile of that size.
    """

    def __init__(self, path: Path, n_time: int, n_points: int) -> None:
        self.path = path
        self.n_time, self.n_points = int(n_time), int(n_points)
        self.buffer_steps = max(1, TILE_BYTES // max(4 * self.n_points, 1))
        self.starts = [0]
        self._buffer: np.ndarray | None = None
        self._held = 0
        self.fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        try:
            preallocate(self.fd, 4 * self.n_points * self.n_time)
        except OSError:
            os.close(self.fd)
            raise

    def write_stations(self, t0: int, values: np.ndarray) -> None:
        """Write ``values`` ``(P, steps, 1)`` (or ``(P, steps)``) at steps ``t0, t0 + 1, ...``,
        which follow the steps written so far."""
        values = np.asarray(values)
        if values.ndim == 3:
            values = values[:, :, 0]
        if values.ndim != 2 or values.shape[0] != self.n_points:
            raise ValueError(f"a block of shape {values.shape} is not {self.n_points} points' "
                             "series")
        steps = values.shape[1]
        if t0 != self.starts[-1] + self._held:
            raise ValueError(f"steps from {t0} do not follow the {self.starts[-1] + self._held}"
                             " steps written")
        if not self._held and steps >= self.buffer_steps:
            self._write(np.ascontiguousarray(values, dtype=np.float32))
            return
        if self._held + steps > self.buffer_steps:
            self.flush()
        if steps >= self.buffer_steps:
            self._write(np.ascontiguousarray(values, dtype=np.float32))
            return
        if self._buffer is None:
            self._buffer = np.empty((self.n_points, self.buffer_steps), dtype=np.float32)
        self._buffer[:, self._held:self._held + steps] = values
        self._held += steps

    def flush(self) -> None:
        """Write the gathered steps as one tile."""
        if self._held:
            held, self._held = self._held, 0
            self._write(np.ascontiguousarray(self._buffer[:, :held]))

    def _write(self, tile: np.ndarray) -> None:
        _write_at(self.fd, tile, 4 * self.n_points * self.starts[-1])
        self.starts.append(self.starts[-1] + tile.shape[1])

    def open(self) -> TiledPoints:
        """The written series as read-only, disk-backed :class:`TiledPoints`."""
        if self.starts[-1] != self.n_time:
            raise ValueError(f"{self.starts[-1]} of {self.n_time} steps were written to "
                             f"{self.path}")
        size = self.n_points * self.n_time
        flat = np.memmap(self.path, dtype=np.float32, mode="r", shape=(size,)) if size \
            else np.zeros(0, dtype=np.float32)
        return TiledPoints(flat, self.n_points, self.starts)


def _consume(out, t0, t1, state, files, times, timings, give_back=None) -> None:
    """Merge one chunk's moments into the running state and write its samples; the
    written sample blocks go to ``give_back`` (:meth:`_BlockPool.give`) when given."""
    for key in ("read_s", "kernel_s", "sample_s"):
        timings[key] += out.get(key, 0.0)
    t = time.perf_counter()
    start = end = ""
    if times is not None:
        start, end = time_text(times[t0]), time_text(times[t1 - 1])
    state.merge_parts(out["parts"], t1 - t0, start, end)
    t2 = time.perf_counter()
    timings["merge_s"] += t2 - t
    for name, (section, ray_block) in out["samples"].items():   # station-major blocks
        files[f"section_{name}"].write_stations(t0, section)
        files[f"ray_{name}"].write_stations(t0, ray_block)
        if give_back is not None:
            give_back((section, ray_block))
    timings["write_s"] += time.perf_counter() - t2


def _series_dataset(files, frame, ds, names) -> xr.Dataset:
    stations = frame.stations
    ns = len(stations)
    coords = {
        "station": np.arange(ns),
        "offset_km": ("offset", np.asarray(frame.offsets_km, dtype=np.float64)),
        "ray_km": ("ray", np.asarray(frame.ray_km, dtype=np.float64)),
    }
    if "alongshore_km" in getattr(stations, "columns", ()):
        coords["alongshore_km"] = ("station", np.asarray(stations["alongshore_km"], dtype=float))
    if "time" in ds.coords:
        coords["time"] = ds["time"].values
    data = {}
    for name in names:
        long_name, units = _SERIES_ATTRS[name]
        data[f"section_{name}"] = xr.DataArray(
            files[f"section_{name}"], dims=("time", "station", "offset"),
            attrs={"long_name": f"{long_name} on the offshore sections", "units": units},
        )
        data[f"ray_{name}"] = xr.DataArray(
            files[f"ray_{name}"], dims=("time", "station", "ray"),
            attrs={"long_name": f"{long_name} along the zonal rays", "units": units},
        )
    coords["offset_km"] = (*coords["offset_km"], {"long_name": "offshore distance", "units": "km"})
    coords["ray_km"] = (*coords["ray_km"], {"long_name": "distance along the ray", "units": "km"})
    return xr.Dataset(data, coords=coords)


_STATS_ATTRS = {
    "mean_u": ("time-mean eastward velocity", "m s-1"),
    "mean_v": ("time-mean northward velocity", "m s-1"),
    "mean_zeta": ("time-mean relative vorticity", "s-1"),
    "eke": ("eddy kinetic energy per unit mass", "m2 s-2"),
    "uu": ("Reynolds stress <u'u'>", "m2 s-2"),
    "uv": ("Reynolds stress <u'v'>", "m2 s-2"),
    "vv": ("Reynolds stress <v'v'>", "m2 s-2"),
    "u_zeta": ("eastward eddy vorticity flux <u'zeta'>", "m s-2"),
    "v_zeta": ("northward eddy vorticity flux <v'zeta'>", "m s-2"),
    "zeta_var": ("relative vorticity variance", "s-2"),
    "rossby_var": ("Rossby number variance <zeta'^2>/f^2", "1"),
    "bt_conversion": ("barotropic conversion from mean to eddy kinetic energy", "m2 s-3"),
    "eke_flux_x": ("eastward eddy flux of eddy kinetic energy <u'k'>", "m3 s-3"),
    "eke_flux_y": ("northward eddy flux of eddy kinetic energy <v'k'>", "m3 s-3"),
    "ow_core_fraction": ("fraction of time in an Okubo-Weiss eddy core", "1"),
    "n_valid": ("number of valid time steps", "1"),
    "mean_ssh": ("time-mean sea surface height", "m"),
    "ssh_var": ("sea surface height variance", "m2"),
    "u_ssh": ("covariance <u'ssh'>", "m2 s-1"),
    "v_ssh": ("covariance <v'ssh'>", "m2 s-1"),
}


def stats_from_state(state: MomentState, metrics: GridMetrics) -> xr.Dataset:
    r"""Eddy statistics on the grid from accumulated moments (no pass over the data).

    With primes the anomalies about the time mean (or the monthly climatology) and
    :math:`\langle\cdot\rangle` the time average over valid steps (divide by n):

    * ``eke`` :math:`= \tfrac12(\langle u'u'\rangle + \langle v'v'\rangle)`;
    * Reynolds stresses ``uu``, ``uv``, ``vv``; eddy vorticity fluxes ``u_zeta``,
      ``v_zeta``; ``zeta_var``; ``rossby_var`` :math:`=\langle\zeta'^2\rangle/f^2`;
    * ``bt_conversion`` :math:`= -(\langle u'u'\rangle\partial_x\bar u + \langle u'v'\rangle
      (\partial_y\bar u + \partial_x\bar v) + \langle v'v'\rangle\partial_y\bar v)`, positive
      where the mean flow loses kinetic energy to the eddies (Cushman-Roisin & Beckers
      2011, ch. on barotropic instability); gradients by
      :func:`coastmon.grid.operators.gradient`;
    * ``eke_flux_x`` :math:`=\langle u'k'\rangle = \tfrac12\langle u'u'u' + u'v'v'\rangle`,
      ``eke_flux_y`` :math:`=\langle v'k'\rangle = \tfrac12\langle u'u'v' + v'v'v'\rangle`;
    * ``ow_core_fraction``: eddy-core snapshots over valid snapshots;
    * with ssh: ``mean_ssh``, ``ssh_var``, ``u_ssh``, ``v_ssh``.

    Values are NaN where no time step was valid.
    """
    n, _, _, _, ow = state.pooled()
    mean_u, mean_v = state.mean_of("u"), state.mean_of("v")
    uu, uv, vv = state.covariance("u", "u"), state.covariance("u", "v"), state.covariance("v", "v")
    ux, uy = gradient(mean_u, metrics)
    vx, vy = gradient(mean_v, metrics)
    zeta_var = state.covariance("zeta", "zeta")
    with np.errstate(invalid="ignore", divide="ignore"):
        rossby_var = zeta_var / metrics.f**2
        ow_fraction = np.where(n > 0, ow / n, np.nan)
    values = {
        "mean_u": mean_u,
        "mean_v": mean_v,
        "mean_zeta": state.mean_of("zeta"),
        "eke": 0.5 * (uu + vv),
        "uu": uu,
        "uv": uv,
        "vv": vv,
        "u_zeta": state.covariance("u", "zeta"),
        "v_zeta": state.covariance("v", "zeta"),
        "zeta_var": zeta_var,
        "rossby_var": rossby_var,
        "bt_conversion": -(uu * ux + uv * (uy + vx) + vv * vy),
        "eke_flux_x": 0.5 * (state.third("uuu") + state.third("uvv")),
        "eke_flux_y": 0.5 * (state.third("uuv") + state.third("vvv")),
        "ow_core_fraction": ow_fraction,
        "n_valid": n.astype(np.int64),
    }
    if "ssh" in state.variables:
        values.update(
            mean_ssh=state.mean_of("ssh"),
            ssh_var=state.covariance("ssh", "ssh"),
            u_ssh=state.covariance("u", "ssh"),
            v_ssh=state.covariance("v", "ssh"),
        )
    data = {}
    for name, arr in values.items():
        long_name, units = _STATS_ATTRS[name]
        data[name] = xr.DataArray(arr, dims=("y", "x"),
                                  attrs={"long_name": long_name, "units": units})
    attrs = {
        "anomalies_about": "monthly climatology" if state.seasonal else "time mean",
        "n_time": state.n_time,
        "time_start": state.time_start,
        "time_end": state.time_end,
        "ow_threshold": state.ow_threshold,
    }
    return xr.Dataset(
        data,
        coords={
            "lon": (("y", "x"), metrics.lon, {"long_name": "longitude", "units": "degrees_east"}),
            "lat": (("y", "x"), metrics.lat, {"long_name": "latitude", "units": "degrees_north"}),
        },
        attrs=attrs,
    )
