"""Proof that coastmon wrote a folder, clean-up of dead runs' folders, and interrupts.

coastmon deletes only what it can prove it wrote. Every temporary folder it makes (the
working folder of the streaming pass ``coastmon-work-*``, of an update ``coastmon-update-*``,
of the demo ``coastmon-demo-*``, and the staging folders of a result ``.OUT.partial-*`` or
``OUT/.coastmon-stage-*``) holds an owner marker, ``.coastmon-owner.json``, written right
after the folder is made: the tool name, what the folder is for, the process id, the host,
the start time of the process (from ``/proc`` where there is one) and a random token.

* A run removes its own folders when it ends, fails, or is interrupted by SIGINT, SIGTERM
  or SIGHUP (:func:`install_signal_handlers`; the command then exits with 128 + the signal
  number). Folders still registered when the command ends are removed by
  :func:`remove_all_registered`.
* A killed run (SIGKILL, power loss) cannot clean up; later runs remove such debris with
  :func:`sweep`: only entries whose names match coastmon's patterns *and* that hold an owner
  marker naming a process of this host that is no longer alive (or whose process id was
  reused: another start time). Anything else is left alone.

Interrupts: :func:`critical` marks a short section (the renames that publish a result or
commit a monitoring state) during which a signal is held back and raised at its end, so a
result folder is never left half-published by SIGINT/SIGTERM/SIGHUP. :func:`note_complete`
records that the command's result is complete; the command line then reports an interrupt
that arrives afterwards as such (exit 0 with a note) instead of as a failed run.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import fnmatch
import json
import os
import secrets
import shutil
import signal
import socket
import tempfile
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

MARKER = ".coastmon-owner.json"
"""Name of the owner marker inside every temporary folder coastmon makes."""
TEMP_PREFIXES = ("coastmon-work-", "coastmon-update-", "coastmon-demo-")
"""Prefixes of coastmon's folders in the system temporary folder (swept by every run)."""
HANDLED_SIGNALS = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP")
                        if hasattr(signal, name))


class Interrupted(KeyboardInterrupt):
    """Raised in the main thread when SIGINT, SIGTERM or SIGHUP arrives."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = int(signum)

    @property
    def name(self) -> str:
        try:
            return signal.Signals(self.signum).name
        except ValueError:
            return f"signal {self.signum}"


# --------------------------------------------------------------------------- markers
def _start_time(pid: int) -> str | None:
    """The start time of process ``pid`` in clock ticks since boot (Linux), else None."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text.rsplit(")", 1)[-1].split()
    return fields[19] if len(fields) > 19 else None


def owner_record(kind: str, **extra: Any) -> dict[str, Any]:
    """What an owner marker says about the process writing it."""
    return {"tool": "coastmon", "kind": kind, "pid": os.getpid(),
            "host": socket.gethostname(), "pid_start": _start_time(os.getpid()),
            "token": secrets.token_hex(8),
            "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"), **extra}


def write_marker(folder: Path, kind: str, **extra: Any) -> dict[str, Any]:
    """Write the owner marker into ``folder`` (made by the caller a moment ago)."""
    record = owner_record(kind, **extra)
    fd = os.open(folder / MARKER, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        os.write(fd, json.dumps(record).encode("utf-8"))
    finally:
        os.close(fd)
    return record


def read_marker(folder: Path, name: str = MARKER) -> dict[str, Any] | None:
    """The owner marker of ``folder`` if it is a readable coastmon marker, else None."""
    try:
        record = json.loads((folder / name).read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return None
    if not isinstance(record, dict) or record.get("tool") != "coastmon":
        return None
    if not isinstance(record.get("pid"), int) or not isinstance(record.get("host"), str):
        return None
    return record


def process_alive(record: dict[str, Any]) -> bool:
    """Whether the process that wrote ``record`` may still run (True when unsure).

    A marker from another host is always taken as alive: its process cannot be checked.
    """
    if record.get("host") != socket.gethostname():
        return True
    pid = int(record["pid"])
    if pid <= 0:
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    started = record.get("pid_start")
    now = _start_time(pid)
    return not (started is not None and now is not None and started != now)


def is_debris(folder: Path) -> bool:
    """True when ``folder`` is a real folder holding a coastmon marker of a dead process."""
    if folder.is_symlink() or not folder.is_dir():
        return False
    record = read_marker(folder)
    return record is not None and not process_alive(record)


def sweep(folder: Path, patterns: tuple[str, ...]) -> list[Path]:
    """Remove the dead runs' folders in ``folder`` whose names match ``patterns``.

    Returns the folders removed. Entries that do not match, that hold no coastmon marker,
    or whose process may still run are never touched.
    """
    removed: list[Path] = []
    try:
        entries = list(Path(folder).iterdir())
    except OSError:
        return removed
    for entry in entries:
        if any(fnmatch.fnmatchcase(entry.name, p) for p in patterns) and is_debris(entry):
            shutil.rmtree(entry, ignore_errors=True)
            removed.append(entry)
    return removed


# --------------------------------------------------------------------------- registry
_REGISTRY: dict[Path, str] = {}
_REGISTRY_LOCK = threading.Lock()


def register(folder: Path, token: str) -> None:
    """Remember ``folder`` (with the token of its marker) for removal at the end."""
    with _REGISTRY_LOCK:
        _REGISTRY[Path(folder)] = token


def remove_owned(folder: Path) -> None:
    """Remove a folder this process registered, if its marker still carries our token."""
    folder = Path(folder)
    with _REGISTRY_LOCK:
        token = _REGISTRY.pop(folder, None)
    if token is None:
        return
    record = read_marker(folder)
    if record is not None and record.get("token") == token and not folder.is_symlink():
        shutil.rmtree(folder, ignore_errors=True)


def remove_all_registered() -> None:
    """Remove every folder still registered (the command line's last resort)."""
    with _REGISTRY_LOCK:
        folders = list(_REGISTRY)
    for folder in folders:
        remove_owned(folder)


@contextlib.contextmanager
def owned_dir(prefix: str, parent: str | os.PathLike[str] | None = None,
              kind: str = "work") -> Iterator[Path]:
    """A new folder ``<parent>/<prefix><random>`` with an owner marker, removed at the end.

    ``parent`` defaults to the system temporary folder (``TMPDIR``). Dead runs' folders
    there (any of :data:`TEMP_PREFIXES`, and ``prefix``) are removed first (:func:`sweep`).
    """
    base = Path(parent) if parent is not None else Path(tempfile.gettempdir())
    sweep(base, tuple(f"{p}*" for p in {*TEMP_PREFIXES, prefix}))
    folder = Path(tempfile.mkdtemp(prefix=prefix, dir=base))
    try:
        record = write_marker(folder, kind)
    except BaseException:
        with contextlib.suppress(OSError):
            folder.rmdir()
        raise
    register(folder, record["token"])
    try:
        yield folder
    finally:
        remove_owned(folder)


# --------------------------------------------------------------------------- interrupts
_STATE: dict[str, Any] = {"depth": 0, "pending": None, "stopping": False, "complete": []}


def _on_signal(signum: int, frame: Any) -> None:
    if _STATE["depth"] > 0 or _STATE["stopping"]:
        if _STATE["pending"] is None:
            _STATE["pending"] = signum
        return
    _STATE["stopping"] = True
    raise Interrupted(signum)


def install_signal_handlers() -> dict[int, Any]:
    """Turn SIGINT, SIGTERM and SIGHUP into :class:`Interrupted` (main thread only).

    Returns the previous handlers, for :func:`restore_signal_handlers`.
    """
    reset()
    previous: dict[int, Any] = {}
    if threading.current_thread() is not threading.main_thread():
        return previous
    for signum in HANDLED_SIGNALS:
        previous[signum] = signal.signal(signum, _on_signal)
    return previous


def restore_signal_handlers(previous: dict[int, Any]) -> None:
    for signum, handler in previous.items():
        signal.signal(signum, handler)


def ignore_signals() -> None:
    """Ignore SIGINT, SIGTERM and SIGHUP from now on (the command has reported its end)."""
    if threading.current_thread() is threading.main_thread():
        for signum in HANDLED_SIGNALS:
            signal.signal(signum, signal.SIG_IGN)


def reset() -> None:
    """Forget held-back signals and completed results (start of a command)."""
    _STATE.update(depth=0, pending=None, stopping=False, complete=[])


def pending_signal() -> int | None:
    """A signal that arrived while the command was already stopping, if any."""
    return _STATE["pending"]


@contextlib.contextmanager
def critical() -> Iterator[None]:
    """Hold back SIGINT/SIGTERM/SIGHUP during the body; raise a held one at its end."""
    _STATE["depth"] += 1
    try:
        yield
    finally:
        _STATE["depth"] -= 1
    if _STATE["depth"] == 0 and _STATE["pending"] is not None and not _STATE["stopping"]:
        signum, _STATE["pending"] = _STATE["pending"], None
        _STATE["stopping"] = True
        raise Interrupted(signum)


def note_complete(what: str) -> None:
    """Record that the command's result (``what``, e.g. the output folder) is complete."""
    _STATE["complete"].append(what)


def completed() -> list[str]:
    """The results recorded complete since the last :func:`reset`."""
    return list(_STATE["complete"])


__all__ = ["HANDLED_SIGNALS", "MARKER", "TEMP_PREFIXES", "Interrupted", "completed", "critical",
           "ignore_signals", "install_signal_handlers", "is_debris", "note_complete", "owned_dir",
           "process_alive", "read_marker", "register", "remove_all_registered", "remove_owned",
           "restore_signal_handlers", "sweep", "write_marker"]
