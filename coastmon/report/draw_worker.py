"""Entry point of the figure process (see :mod:`coastmon.report.process`).

Reads ``(function name, args, kwargs)`` jobs pickled on stdin until the end of its input,
calls the named function of :mod:`coastmon.report.figures` for each and answers on the
original stdout with ``("ok", path)`` or ``("error", exception)``. Anything else printed
goes to stderr.
"""

from __future__ import annotations

import os
import pickle
import signal
import sys


def serve() -> None:
    # Ctrl-C reaches the whole process group: the main process handles it and ends this one.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    answers = os.fdopen(os.dup(sys.stdout.fileno()), "wb")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())
    from coastmon.report import figures
    from coastmon.report.process import FIGURES

    jobs = sys.stdin.buffer
    while True:
        try:
            name, args, kwargs = pickle.load(jobs)
        except EOFError:
            return
        try:
            if name not in FIGURES:
                raise ValueError(f"{name} is not a figure function")
            answer = ("ok", str(getattr(figures, name)(*args, **kwargs)))
        except Exception as exc:  # sent back and raised in the main process
            answer = ("error", exc)
        try:
            data = pickle.dumps(answer)
            pickle.loads(data)
        except Exception:
            data = pickle.dumps(("error", RuntimeError(f"{type(answer[1]).__name__}: "
                                                       f"{answer[1]}")))
        answers.write(data)
        answers.flush()


if __name__ == "__main__":
    serve()
