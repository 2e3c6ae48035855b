"""Some of the figures drawn in a second process, beside this one.

The figures are the largest fixed cost of ``analyze``: about 3.5 s of matplotlib on one
core, whatever the record (docs/performance.md), while the other core waits.
:class:`FigureProcess` starts ``python -m coastmon.report.draw_worker`` when a run begins,
so that it imports matplotlib while this process builds the geometry on the other core,
and later draws the figures handed to it (by the name of their function in
:mod:`coastmon.report.figures`) while this process writes the other outputs and draws the
other figures; this process then draws the handed-over figures the other has not started,
from the last one back (:func:`take_back`), so that neither waits while figures remain.
Each figure is written by its own function, atomically, as when drawn here.

Jobs and answers are pickled through the pipes between the two processes only, as for the
reader processes of the pass (:mod:`coastmon.stream.readers`); nothing read from a file is
unpickled. A figure the process cannot draw because it has stopped (killed, out of memory,
failed to start) or hangs (no answer within :data:`FIGURE_TIMEOUT_S`; it is then ended) is
drawn here instead (:func:`drawn`): the outputs never depend on it.
An error of the figure function itself (a full disk, say) comes back and is raised here.
"""

from __future__ import annotations

import os
import pickle
import queue
import subprocess
import sys
import tempfile
import threading
from collections.abc import Callable
from concurrent.futures import Future, wait
from pathlib import Path

FIGURE_TIMEOUT_S = 120.0
"""Longest wait for one figure of the process (each takes about a second): beyond it the
process is taken as hung, ended, and the figure drawn here."""

FIGURES = ("alongshore_figure", "hovmoller_figure", "map_figure", "ranking_figure",
           "spinup_figure", "wavelet_figure")
"""The functions of :mod:`coastmon.report.figures` the process may be asked to call."""


class ProcessLost(Exception):
    """The figure process stopped before answering; the figure is drawn here instead."""


class _Job(Future):
    """The future of one figure, knowing the process that draws it."""

    def __init__(self, process: FigureProcess) -> None:
        super().__init__()
        self.process = process


class FigureProcess:
    """A second Python process that draws figures on request (see the module docstring).

    :meth:`submit` returns a future of the figure's path; :meth:`close` ends the process
    after the figures already submitted (each takes under a second), so that nothing is
    written after it returns.
    """

    def __init__(self) -> None:
        self.log = tempfile.TemporaryFile()
        env = dict(os.environ)
        # The process must import this very coastmon, wherever it was imported from; -P
        # keeps the current folder off its module path.
        here = str(Path(__file__).resolve().parents[2])
        env["PYTHONPATH"] = os.pathsep.join(p for p in (here, env.get("PYTHONPATH")) if p)
        self.proc = subprocess.Popen(
            [sys.executable, "-P", "-m", "coastmon.report.draw_worker"],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=self.log, close_fds=True,
            env=env)
        self.jobs: queue.SimpleQueue = queue.SimpleQueue()
        self.pending: list[Future] = []
        self.thread = threading.Thread(target=self._run, name="coastmon-figures", daemon=True)
        self.thread.start()

    def submit(self, name: str, *args, **kwargs) -> Future:
        """Ask the process to call ``coastmon.report.figures.<name>(*args, **kwargs)``."""
        if name not in FIGURES:
            raise ValueError(f"{name} is not a figure function")
        future = _Job(self)
        self.pending.append(future)
        self.jobs.put((future, name, args, kwargs))
        return future

    def _run(self) -> None:
        lost = False
        while True:
            item = self.jobs.get()
            if item is None:
                return
            future, name, args, kwargs = item
            if not future.set_running_or_notify_cancel():
                continue
            if lost:
                future.set_exception(ProcessLost())
                continue
            try:
                pickle.dump((name, args, kwargs), self.proc.stdin)
                self.proc.stdin.flush()
                kind, value = pickle.load(self.proc.stdout)
            except (OSError, EOFError, pickle.PickleError):
                lost = True
                future.set_exception(ProcessLost())
                continue
            if kind == "ok":
                future.set_result(Path(value))
            else:
                future.set_exception(value)

    def stop(self) -> None:
        """End the process now (it is hung): what it was asked is answered with
        :class:`ProcessLost`."""
        self.proc.kill()

    def settle(self) -> None:
        """Cancel the figures not yet started and wait for the one being drawn."""
        for future in self.pending:
            future.cancel()
        wait(self.pending)

    def close(self) -> None:
        """End the process once the figures submitted so far are answered (or cancelled).

        Each figure is written before its answer, so after the last answer the process
        holds nothing unfinished: it is ended at once rather than left to unwind its
        interpreter (a third of a second of matplotlib's clean-up the run would wait for).
        """
        self.jobs.put(None)
        self.thread.join()
        self.proc.kill()
        try:
            self.proc.stdin.close()
        except OSError:
            pass
        self.proc.wait()
        self.proc.stdout.close()
        self.log.close()


def start_figure_process(enabled: bool) -> FigureProcess | None:
    """A :class:`FigureProcess` when figures are wanted and there is a second core."""
    if not enabled or (os.cpu_count() or 1) < 2:
        return None
    try:
        return FigureProcess()
    except (OSError, ValueError):  # no process can be started: all figures drawn here
        return None


def drawn(job: Future | Path, draw: Callable[[], Path]) -> Path:
    """The path of a figure: ``job`` itself, the answer of the figure process, or, when the
    process stopped before drawing it or gave no answer within :data:`FIGURE_TIMEOUT_S`
    (it is then ended), ``draw()`` here."""
    if not isinstance(job, Future):
        return job
    try:
        return job.result(timeout=FIGURE_TIMEOUT_S)
    except TimeoutError:
        if isinstance(job, _Job):
            job.process.stop()
        return draw()
    except ProcessLost:
        return draw()


def take_back(jobs: list[tuple[Future | Path, Callable[[], Path]]]) -> list[Path | None]:
    """Draw here the figures the process has not started, from the last one back, while it
    draws from the first one on; stop at the first that it has started (or answered).

    Both processes then share the figures, whichever finishes its own work first taking
    more of them. Returns, per job, the path drawn here, or None where the job is left to
    the process (:func:`drawn` gives it).
    """
    out: list[Path | None] = [None] * len(jobs)
    for i in range(len(jobs) - 1, -1, -1):
        job, draw = jobs[i]
        if not isinstance(job, Future) or not job.cancel():
            break
        out[i] = draw()
    return out
