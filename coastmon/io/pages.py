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

import mmap

import numpy as np


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
