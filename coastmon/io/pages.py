"""Memory-mapped series: let go of pages already read.

The sampled series live in files in the pass's work folder and are read through memory
maps. Pages read through a map count in the process's resident memory until the map is
dropped, so a scan over a long record would keep the whole series resident after it is
done. The scans call :func:`release` as they go: the pages leave the process (they stay
in the system's page cache and are read back from there if needed). A scan that reads one
station of a (time, station, ray) series still maps nearly every page while it runs
(each time step's row is a few pages, and the kernel maps neighbouring pages on a fault),
so the peak resident size of the analyses includes up to the size of the ray series.
"""

from __future__ import annotations

import mmap

import numpy as np


def _mapping(arr):
    base = arr
    while base is not None and not isinstance(base, np.memmap):
        base = getattr(base, "base", None)
    handle = getattr(base, "_mmap", None)
    return handle if handle is not None and hasattr(handle, "madvise") else None


def _advise(arr, name: str) -> None:
    advice = getattr(mmap, name, None)
    handle = _mapping(arr)
    if advice is None or handle is None:
        return
    try:
        handle.madvise(advice)
    except (OSError, ValueError):  # closed or not allowed: nothing to do
        pass


def release(*arrays) -> None:
    """Unmap the pages of memory-mapped arrays (or views of them) from this process.

    A no-op for arrays in memory and on systems without ``madvise(MADV_DONTNEED)``.
    """
    for arr in arrays:
        _advise(arr, "MADV_DONTNEED")
