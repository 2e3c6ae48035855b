"""Reading the streaming pass's time chunks: in a thread, or in parallel processes.

:func:`read_chunk` reads one time chunk of every input variable (the canonical dataset's
lazy arrays, computed synchronously). The pass calls it from one reader thread, in order.

Reading a compressed file is decompression, and the HDF5 library lets only one thread of a
process decompress at a time: on compressed inputs one reader thread sets the pace of the
whole pass. :class:`ProcessReader` reads chunks in a few worker processes instead, each
with its own copy of the libraries, so several chunks are decompressed at once. A worker
computes the chunk exactly as :func:`read_chunk` does (the same lazy arrays, shipped to it
once: file opening, CF decoding, land mask and the corrupt-value check all happen there)
and copies it into a *slot*, anonymous shared memory that the pass maps too; the pass hands
out views of the slot, so the chunk's data cross between processes with one copy.
A slot is reused only after the chunk in it has been processed (the pass collects the
chunks in order and has at most one chunk per slot in flight).

This is the one module of coastmon that uses :mod:`pickle`: the lazy arrays go to the
reader processes, and answers (seconds, or an exception) come back, through the anonymous
pipes between the pass and the processes it started. Nothing read from a file or a socket
is ever unpickled.
"""

from __future__ import annotations

import atexit
import mmap
import os
import pickle
import queue
import signal
import subprocess
import sys
import tempfile
import threading
import time
from concurrent.futures import Future
from pathlib import Path

import dask
import dask.array as da
import dask.local
import numpy as np
import xarray as xr

from coastmon.errors import InputError
from coastmon.io import chunks
from coastmon.io.damage import ChunkDecodeError, decode_failure

MAX_READ_PROCESSES = 4
"""Most reader processes used by default (decompression scales with them until the cores
are busy with the compiled kernels too)."""
MIN_PROCESS_READ_BYTES = 2**30
"""Smallest decoded record read in processes by default: starting a reader process costs
about 2 s of CPU time (its libraries), which a short record does not pay back."""
PROCESSES_SUPPORTED = os.name == "posix"
"""Reader processes need POSIX (descriptors handed down to a child with ``pass_fds``)."""
SLOT_ALIGN = 64
"""Byte alignment of each variable inside a slot."""


class CannotShip(Exception):
    """The arrays to read cannot be handed to a reader process (they hold objects that do
    not pickle, e.g. functions defined in a script)."""


def one_block(x: da.Array):
    """A dask array of one block as a delayed object, else the array itself.

    Computing a one-block dask array copies the result (dask's guard against handing out
    a buffer held by the graph); the pass only reads its input blocks, and that copy cost
    as much as reading an uncompressed file from the page cache.
    """
    parts = x.to_delayed().ravel()
    return parts[0] if parts.size == 1 else x


def read_chunk(arrays, t0: int, t1: int) -> tuple[list, float]:
    """Read one time chunk of every input (dask arrays computed synchronously here)."""
    start = time.perf_counter()
    blocks = [None if a is None else a[t0:t1] for a in arrays]
    lazy = [one_block(b) for b in blocks if isinstance(b, da.Array)]
    try:
        if lazy:
            # The scheduler given as the function: by name, dask imports
            # dask.distributed to look for a client first (a sixth of a second).
            computed = iter(dask.compute(*lazy, scheduler=dask.local.get_sync))
            blocks = [next(computed) if isinstance(b, da.Array) else b for b in blocks]
        blocks = [None if b is None else np.asarray(b.values if isinstance(b, xr.DataArray)
                                                     else b) for b in blocks]
    except Exception as exc:
        if not decode_failure(exc):
            raise
        raise ChunkDecodeError(f"{type(exc).__name__}: {exc}") from None
    return blocks, time.perf_counter() - start


def read_processes(setting: int | None, compressed: bool, nbytes: int, ncpu: int) -> int:
    """Number of reader processes: the setting, or (None) one per core up to
    :data:`MAX_READ_PROCESSES` when the input is compressed in a way that only its own
    library decodes (one thread of a process at a time; not the deflated NetCDF-4 chunks
    that :mod:`coastmon.io.chunks` decodes on all cores), holds at least
    :data:`MIN_PROCESS_READ_BYTES` once decoded, and there are 2 cores or more; 0 means
    the reader thread (always, where processes cannot be fed as here: not POSIX)."""
    if not PROCESSES_SUPPORTED:
        return 0
    if setting is not None:
        return max(0, int(setting))
    if not compressed or nbytes < MIN_PROCESS_READ_BYTES or ncpu < 2:
        return 0
    return min(ncpu, MAX_READ_PROCESSES)


def _slot_fd(nbytes: int) -> int:
    """A file descriptor of ``nbytes`` of anonymous shared memory (no name to leak if the
    process is killed): ``memfd_create`` on Linux, else an unlinked temporary file."""
    if hasattr(os, "memfd_create"):
        fd = os.memfd_create("coastmon-slot")
    else:  # pragma: no cover - not Linux
        shm = Path("/dev/shm")
        folder = shm if shm.is_dir() and os.access(shm, os.W_OK) else None
        with tempfile.TemporaryFile(dir=folder) as f:
            fd = os.dup(f.fileno())
    os.ftruncate(fd, nbytes)
    return fd


def _map(fd: int, nbytes: int) -> np.ndarray:
    return np.frombuffer(mmap.mmap(fd, nbytes), dtype=np.uint8)


def _layout(arrays, steps: int) -> tuple[list, int]:
    """Byte offset, per-step shape and dtype of each input inside a slot of ``steps`` steps."""
    layout, size = [], 0
    for a in arrays:
        if a is None:
            layout.append(None)
            continue
        dtype = np.dtype(a.dtype)
        if dtype not in (np.float32, np.float64):
            dtype = np.dtype(np.float32)
        shape = tuple(int(n) for n in a.shape[1:])
        layout.append((size, shape, dtype.str))
        nbytes = steps * dtype.itemsize * int(np.prod(shape))
        size += -(-nbytes // SLOT_ALIGN) * SLOT_ALIGN
    return layout, max(size, SLOT_ALIGN)


# --------------------------------------------------------------------------- worker side


def serve() -> None:
    """Main loop of a reader process (``python -m coastmon.stream.read_worker``).

    Reads its set-up, then requests ``(slot, t0, t1)`` from stdin (pickled), and answers
    each on the original stdout with ``("ok", seconds)`` or ``("error", exception)``.
    Anything else printed goes to stderr. Ends at end of input.
    """
    from coastmon.io.ingest import _small_chunk_cache

    # Ctrl-C reaches the whole process group: the pass handles it and closes the pipes.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    requests = sys.stdin.buffer
    answers = os.fdopen(os.dup(sys.stdout.fileno()), "wb")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())
    try:
        arrays, fds, slot_bytes, layout, open_files = pickle.load(requests)
    except EOFError:  # started ahead of a pass that did not come
        return
    _small_chunk_cache()
    chunks.set_decode_threads(1)  # the processes are the parallelism here
    xr.set_options(file_cache_maxsize=open_files)
    dask.config.set(scheduler=dask.local.get_sync)
    slots = [_map(fd, slot_bytes) for fd in fds]
    while True:
        try:
            slot, t0, t1 = pickle.load(requests)
        except EOFError:
            return
        try:
            answer = ("ok", _read_into(arrays, layout, slots[slot], t0, t1))
        except Exception as exc:  # handed to the pass, which raises it
            answer = ("error", exc)
        try:
            data = pickle.dumps(answer)
        except Exception:
            data = pickle.dumps(("error", RuntimeError(repr(answer[1]))))
        answers.write(data)
        answers.flush()


def _read_into(arrays, layout, buf: np.ndarray, t0: int, t1: int) -> float:
    """Read chunk [t0, t1) into the slot ``buf``; the seconds it took.

    The variables are computed together, as :func:`read_chunk` does, so that inputs
    derived from others (the native C-grid vorticity from u and v) read them once.
    """
    start = time.perf_counter()
    blocks, _ = read_chunk(arrays, t0, t1)
    for block, place in zip(blocks, layout, strict=True):
        if block is not None:
            offset, shape, dtype = place
            view = np.ndarray((t1 - t0, *shape), dtype=dtype, buffer=buf, offset=offset)
            view[...] = block
    return time.perf_counter() - start


# --------------------------------------------------------------------------- pass side


CRASH_SIGNALS = frozenset(int(getattr(signal, name)) for name in
                          ("SIGSEGV", "SIGBUS", "SIGILL", "SIGFPE", "SIGABRT")
                          if hasattr(signal, name))
"""Signals a process gets from a fault of its own code (a kill from outside is SIGKILL)."""


class _SlotRead:
    """The future of one chunk read into a slot: ``result()`` gives views of the slot."""

    def __init__(self, future: Future, slot: np.ndarray, layout: list, steps: int) -> None:
        self.future = future
        self.slot = slot
        self.layout = layout
        self.steps = steps

    def result(self) -> tuple[list, float]:
        read_s = self.future.result()
        blocks = [None if place is None else
                  np.ndarray((self.steps, *place[1]), dtype=place[2], buffer=self.slot,
                             offset=place[0])
                  for place in self.layout]
        return blocks, read_s


class _Worker:
    """One reader process and the thread that feeds it requests from the shared queue.

    The process starts at once (importing its libraries takes a second or two); its
    set-up is sent by :meth:`begin`.
    """

    def __init__(self, fds: list[int], tasks: queue.SimpleQueue) -> None:
        self.tasks = tasks
        self.log = tempfile.TemporaryFile()
        env = dict(os.environ)
        # The reader must import this very coastmon, wherever it was imported from.
        here = str(Path(__file__).resolve().parents[2])
        env["PYTHONPATH"] = os.pathsep.join(p for p in (here, env.get("PYTHONPATH")) if p)
        # -P: the current folder is not put on the module path, so a file there named like
        # a library module (mmap.py, numpy.py ...) is never imported by the reader.
        self.proc = subprocess.Popen(
            [sys.executable, "-P", "-m", "coastmon.stream.read_worker"], stdin=subprocess.PIPE,
            stdout=subprocess.PIPE, stderr=self.log, pass_fds=fds, close_fds=True, env=env)
        self.thread: threading.Thread | None = None

    def begin(self, payload: bytes) -> None:
        self.thread = threading.Thread(target=self._run, args=(payload,), name="coastmon-read",
                                       daemon=True)
        self.thread.start()

    def _run(self, payload: bytes) -> None:
        died = None
        try:  # blocks until the process has imported its libraries and reads its set-up
            self.proc.stdin.write(payload)
            self.proc.stdin.flush()
        except OSError:
            died = self._died()
        while True:
            item = self.tasks.get()
            if item is None:
                return
            future, slot, t0, t1 = item
            if not future.set_running_or_notify_cancel():
                continue
            if died is not None:  # fail fast, so that nothing waits on a dead process
                future.set_exception(died)
                continue
            try:
                pickle.dump((slot, t0, t1), self.proc.stdin)
                self.proc.stdin.flush()
                kind, value = pickle.load(self.proc.stdout)
            except (OSError, EOFError, pickle.UnpicklingError):
                died = self._died()
                crash = self._crash_signal()
                if crash:
                    # A decoder that crashes on the chunk it was given: with the pass's
                    # own chunk and time span, the error names the file (see pass_._damaged).
                    future.set_exception(ChunkDecodeError(
                        f"a reader process crashed with signal {crash} while decoding it"))
                else:
                    future.set_exception(died)
                continue
            if kind == "ok":
                future.set_result(value)
            else:
                future.set_exception(value)

    def _crash_signal(self) -> str:
        """The name of the signal that crashed the process (segmentation fault, bus error,
        abort ...), "" when it ended otherwise (a kill for lack of memory, an exit)."""
        code = self.proc.returncode
        if code is None or code >= 0 or -code not in CRASH_SIGNALS:
            return ""
        return f"{-code} ({signal.Signals(-code).name})"

    def _died(self) -> InputError:
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:  # pragma: no cover - alive but not answering
            self.proc.kill()
            self.proc.wait()
        self.log.seek(0)
        tail = self.log.read().decode("utf-8", "replace").strip().splitlines()[-3:]
        said = f" It said: {' / '.join(tail)}" if tail else ""
        code = self.proc.returncode
        crash = self._crash_signal()
        if crash:
            how = (f"crashed (signal {crash}), most likely in a decompression library given "
                   "a damaged chunk")
        elif code is not None and code < 0:
            how = f"was killed (signal {-code}), most likely by the system for lack of memory"
        else:
            how = f"ended with exit status {code}"
        return InputError(
            f"A reader process of the streaming pass stopped: it {how}.{said}",
            where="streaming pass, reading the input",
            todo="Free memory, set a smaller ingest.time_chunk, or set "
            "stream.read_processes = 0 to read in one thread")

    def stop(self) -> None:
        try:
            self.proc.stdin.close()
        except OSError:
            pass
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:  # pragma: no cover - a stuck worker
            self.proc.kill()
            self.proc.wait()
        self.proc.stdout.close()
        self.log.close()


class ProcessReader:
    """Reads time chunks in ``n_proc`` reader processes into ``n_slots`` shared slots.

    The reader processes are plain ``python -m coastmon.stream.read_worker`` programs fed
    through pipes (not :mod:`multiprocessing`, which would re-run the caller's main
    script in each of them); the slots are anonymous shared memory handed down as file
    descriptors, so nothing is left behind if the pass is killed.

    The processes start when the reader is made (:func:`prestart` makes one ahead of the
    pass, so that they import their libraries while the geometry is built); :meth:`start`
    gives them the arrays to read. :meth:`submit` then takes the chunk's index (its slot
    is ``index % n_slots``) and returns an object whose ``result()`` is
    ``(blocks, seconds)`` as :func:`read_chunk` gives. The caller must have finished with
    the chunk that last used a slot before submitting the next chunk for it. Call
    :meth:`close` when done (or use as a context manager).
    """

    def __init__(self, n_proc: int, n_slots: int) -> None:
        self.n_proc, self.n_slots = n_proc, n_slots
        self.tasks: queue.SimpleQueue = queue.SimpleQueue()
        self.workers: list[_Worker] = []
        self.slots: list[np.ndarray] = []
        self.fds: list[int] = []
        try:
            self.fds = [_slot_fd(0) for _ in range(n_slots)]
            for _ in range(n_proc):
                self.workers.append(_Worker(self.fds, self.tasks))
        except BaseException:
            self.close()
            raise

    def start(self, arrays, max_steps: int, open_files: int) -> None:
        """Size the slots for chunks of up to ``max_steps`` steps and hand out the arrays."""
        self.layout, slot_bytes = _layout(arrays, max_steps)
        try:
            payload = pickle.dumps((arrays, self.fds, slot_bytes, self.layout, open_files))
        except (pickle.PicklingError, TypeError, AttributeError) as exc:
            raise CannotShip(str(exc)) from exc
        for fd in self.fds:
            os.ftruncate(fd, slot_bytes)
        self.slots = [_map(fd, slot_bytes) for fd in self.fds]
        self._close_fds()  # the maps (here and in the processes) keep the memory
        for worker in self.workers:
            worker.begin(payload)

    def submit(self, index: int, t0: int, t1: int) -> _SlotRead:
        slot = index % len(self.slots)
        future: Future = Future()
        self.tasks.put((future, slot, t0, t1))
        return _SlotRead(future, self.slots[slot], self.layout, t1 - t0)

    def _close_fds(self) -> None:
        for fd in self.fds:
            os.close(fd)
        self.fds = []

    def close(self) -> None:
        """Cancel the reads not started, stop the processes, let the slots go."""
        pending = []
        while True:
            try:
                pending.append(self.tasks.get_nowait())
            except queue.Empty:
                break
        for item in pending:
            if item is not None:
                item[0].cancel()
        for worker in self.workers:
            if worker.thread is not None:
                self.tasks.put(None)
        for worker in self.workers:
            if worker.thread is not None:
                worker.thread.join()
            worker.stop()
        self.workers = []
        self.slots = []
        self._close_fds()

    def __enter__(self) -> ProcessReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


_SPARE: dict[tuple[int, int], ProcessReader] = {}


def prestart(n_proc: int, n_slots: int) -> None:
    """Start a reader of ``n_proc`` processes now, for the next :func:`take` that asks for
    the same. At most one is kept: a spare of other numbers is closed first; one not
    taken is closed by :func:`close_spares` (the commands call it when they end) or at
    exit."""
    if n_proc > 0 and (n_proc, n_slots) not in _SPARE:
        close_spares()
        _SPARE[(n_proc, n_slots)] = ProcessReader(n_proc, n_slots)


def take(n_proc: int, n_slots: int) -> ProcessReader:
    """The reader started by :func:`prestart` for these numbers, else a new one."""
    reader = _SPARE.pop((n_proc, n_slots), None)
    return reader if reader is not None else ProcessReader(n_proc, n_slots)


def close_spares() -> None:
    """Close the readers started ahead and not taken by a pass."""
    while _SPARE:
        _SPARE.popitem()[1].close()


atexit.register(close_spares)
