"""How coastmon shares the cores: its own threads, and one thread inside the linear-algebra
library while they run.

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
"""

from __future__ import annotations

import functools
import importlib
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
