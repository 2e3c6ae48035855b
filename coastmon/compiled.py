"""One way to compile numerical kernels with numba, shared by every module that has them.

Compiled code is cached on disk when the package directory (or ``NUMBA_CACHE_DIR``) is
writable, and compiled in memory on first use otherwise. Every kernel releases the GIL
(``nogil``), so several threads can run kernels at once; ``parallel`` kernels spread
their ``prange`` loops over numba's threads.
"""

from __future__ import annotations

from numba import njit


def compiled(parallel: bool = False):
    """Decorator: ``numba.njit(nogil=True, parallel=parallel)``, cached on disk if possible."""

    def wrap(func):
        options = {"parallel": parallel, "nogil": True, "fastmath": False}
        try:
            return njit(cache=True, **options)(func)
        except RuntimeError:  # no writable cache location
            return njit(cache=False, **options)(func)

    return wrap
