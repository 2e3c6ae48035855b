"""How coastmon shares the cores and the memory: its own threads, one thread inside the
linear-algebra library while they run, and ordinary memory pages for numpy's arrays.

The analyses of the sampled series run on threads of their own (rays, groups of
stations, the side sweeps), each calling numpy. numpy's matrix products go to the BLAS
library (OpenBLAS in the wheels), which starts threads of its own for each product and
keeps them spinning between products. Under coastmon's threads those spinning threads
take the cores the work needs: on the 23 360-step benchmark record the gates took 22.5 s
and 42 s of processor time with the library's threads, 15.0 s and 26.7 s with one
(docs/performance.md). :func:`one_blas_thread` limits the library to one thread for the
duration of a call (``threadpoolctl``), and restores it after.

:func:`import_in_background` imports modules needed later (the figures) on a thread of
their own while the streaming pass waits on its reads.

:func:`small_pages` stops numpy from asking the kernel for transparent huge pages (2 MB)
for its large arrays. The pass and the analyses make many short-lived arrays of a few to
a few tens of megabytes; each new one is given fresh pages, which the kernel must fill
with zeros first, and with huge pages it zeroes whole 2 MB pages at each first touch.
On the long benchmark record that zeroing took a fifth of all the processor time of
``analyze`` (``perf``: ``clear_page_erms`` under ``do_huge_pmd_anonymous_page``), 7-9 s
of system time in a 12.7 s run; with ordinary pages the system time was about 2 s and
the run 9.1-9.4 s (docs/performance.md). A user who sets ``NUMPY_MADVISE_HUGEPAGE``
keeps their choice.
"""

from __future__ import annotations

import functools
import importlib
import os
import threading
from collections.abc import Callable
from typing import ParamSpec, TypeVar

P = ParamSpec("P")
R = TypeVar("R")


def one_blas_thread(func: Callable[P, R]) -> Callable[P, R]:
    """Decorator: run ``func`` with the BLAS library limited to one thread."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(limits=1, user_api="blas"):
            return func(*args, **kwargs)

    return wrapper


def import_in_background(*modules: str) -> threading.Thread:
    """Import ``modules`` on a daemon thread, so that a later import finds them loaded.

    An import that fails here is left for the later, real import to report; Python's
    per-module import locks make the later import wait for one still in progress.
    """

    def load() -> None:
        for name in modules:
            try:
                importlib.import_module(name)
            except Exception:  # reported by the import that needs the module
                return

    thread = threading.Thread(target=load, name="coastmon-imports", daemon=True)
    thread.start()
    return thread


HUGE_PAGES_ENV = "NUMPY_MADVISE_HUGEPAGE"
"""numpy's own switch for huge pages, read when numpy is imported (so it reaches the reader
and figure processes, which import numpy after they start)."""


def small_pages() -> Callable[[], None]:
    """Ordinary memory pages for numpy's arrays in this process and the processes it starts,
    unless the user has set ``NUMPY_MADVISE_HUGEPAGE``; returns a function that restores
    the previous setting (see the module docstring for why)."""
    if HUGE_PAGES_ENV in os.environ:
        return lambda: None
    try:
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:  # numpy 1.x
        try:
            from numpy.core.multiarray import _set_madvise_hugepage
        except ImportError:  # a numpy without the switch: nothing to change
            return lambda: None
    previous = _set_madvise_hugepage(False)
    os.environ[HUGE_PAGES_ENV] = "0"

    def restore() -> None:
        _set_madvise_hugepage(previous)
        os.environ.pop(HUGE_PAGES_ENV, None)

    return restore
