"""Memory-mapped series: let go of pages already read.

The sampled series live in files in the pass's work folder and are read through memory
maps. Pages read through a map count in the process's resident memory until the map is
dropped, so a scan over a long record would keep the whole series resident after it is
done. The scans call :func:`release` as they go: the pages leave the process (they stay
in the system's page cache and are read back from there if needed). The files are stored
station by station, so a scan over stations maps only the stations it has read since the
last release, and a scan over blocks of time maps only those blocks.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import errno
import mmap
import os

import numpy as np

STATIONS_PER_RELEASE = 16
"""Most stations of a station-by-station sweep read between two :func:`release` calls."""
SWEEP_BLOCK_BYTES = 16 * 2**20
"""Most bytes of one sweep block: a block computed on reading (a ray field) is a new
array, and past the C library's largest heap block (32 MB) every new array is fresh
memory from the system, which on long records cost more than the sums made on it."""


def station_sweep(values):
    """A (time, station, ...) series swept in file order (the series files are station
    major), :data:`STATIONS_PER_RELEASE` stations at a time, fewer when their block would
    pass :data:`SWEEP_BLOCK_BYTES`.

    Yields ``(columns, block)``: ``block`` is the ``(time, stations, k)`` view of those
    stations (k: the trailing axes flattened, 1 when there are none) and ``columns`` the
    slice they take in the flattened ``station * k`` point axis. The pages the block
    mapped are released once the caller is done with it.
    """
    n_t = values.shape[0]
    view = values.reshape(n_t, values.shape[1] if values.ndim > 1 else 1, -1)
    k = view.shape[2]
    per_station = max(1, n_t * k * np.dtype(view.dtype).itemsize)
    step = max(1, min(STATIONS_PER_RELEASE, SWEEP_BLOCK_BYTES // per_station))
    for s0 in range(0, view.shape[1], step):
        s1 = min(view.shape[1], s0 + step)
        yield slice(s0 * k, s1 * k), view[:, s0:s1]
        release(values)


def release(*arrays) -> None:
    """Unmap the pages of memory-mapped arrays (or views of them) from this process.

    A no-op for arrays in memory and on systems without ``madvise(MADV_DONTNEED)``.
    """
    advice = getattr(mmap, "MADV_DONTNEED", None)
    if advice is None:
        return
    for arr in arrays:
        base = arr
        while base is not None and not isinstance(base, np.memmap):
            base = getattr(base, "base", None)
        handle = getattr(base, "_mmap", None)
        if handle is None or not hasattr(handle, "madvise"):
            continue
        try:
            handle.madvise(advice)
        except (OSError, ValueError):  # closed or not allowed: nothing to release
            pass


def _libc_fallocate():
    """libc's ``fallocate`` (Linux), or None where there is none."""
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or None, use_errno=True)
        func = libc.fallocate
    except (OSError, AttributeError):
        return None
    func.argtypes = (ctypes.c_int, ctypes.c_int, ctypes.c_int64, ctypes.c_int64)
    func.restype = ctypes.c_int
    return func


_FALLOCATE = _libc_fallocate() if os.name == "posix" else None


def preallocate(fd: int, size: int) -> bool:
    """Reserve ``size`` bytes of disk for an open file before it is written.

    Blocks reserved at once make the many positioned writes of the series several times
    cheaper on file systems that otherwise allocate while writing back (measured: 1 GB in
    0.2 s instead of 1.6–2.1 s on ext4, docs/performance.md), and a disk too small for the
    series fails here, before the pass, with ENOSPC. Only the system call itself is used:
    where the file system cannot reserve blocks (no emulation by writing zeros), nothing
    is done and False is returned.
    """
    if _FALLOCATE is None or size <= 0:
        return False
    if _FALLOCATE(fd, 0, 0, int(size)) == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSPC, errno.EDQUOT):
        raise OSError(err, os.strerror(err))
    return False
