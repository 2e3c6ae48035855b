"""Atomic file and folder writes.

Every output of a run is first written under a temporary name in the same folder as its
final place and moved there with :func:`os.replace`, which is atomic on one file system.
A run that fails or is interrupted therefore leaves either the previous complete file or
nothing, never a half-written file that looks real.

Two levels are offered:

- :func:`atomic_path` (and :func:`atomic_write_text`, :func:`atomic_write_bytes`) for one
  file: ``with atomic_path(final) as tmp: write(tmp)``.
- :func:`staging_dir` for a whole output folder: files are written into a hidden sibling
  folder ``.<name>.partial-<random>``; on success each file is moved into the output
  folder (created if needed, files of the same name replaced, unrelated files left alone);
  on failure the staging folder is removed.

File-system failures (no permission, read-only file system, disk full, a file where a
folder is expected) are raised as :class:`coastmon.errors.OutputError`.
"""

from __future__ import annotations

import errno
import os
import secrets
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path

from coastmon.errors import OutputError

_REASONS = {
    errno.ENOSPC: ("the disk is full", "Free some space or choose another output folder"),
    errno.EDQUOT: ("the disk quota is exceeded",
                   "Free some space or choose another output folder"),
    errno.EROFS: ("the file system is read-only", "Choose an output folder on a writable disk"),
    errno.EACCES: ("permission was denied",
                   "Choose an output folder you may write to, or change its permissions"),
    errno.EPERM: ("permission was denied",
                  "Choose an output folder you may write to, or change its permissions"),
    errno.ENOTDIR: ("a file stands where a folder is needed",
                    "Give --out a folder path, not the path of an existing file"),
    errno.EEXIST: ("a file stands where a folder is needed",
                   "Give --out a folder path, not the path of an existing file"),
    errno.EISDIR: ("a folder stands where a file is to be written",
                   "Move or rename that folder, or choose another output folder"),
}


def output_error(exc: OSError, where: Path | str, action: str) -> OutputError:
    """Translate an :class:`OSError` into a one-paragraph :class:`OutputError`.

    Parameters
    ----------
    exc
        The error raised by the operating system.
    where
        The file or folder being written.
    action
        What was being done, e.g. ``"write the results file"``.
    """
    reason, todo = _REASONS.get(
        exc.errno or -1,
        (f"the system reported: {exc.strerror or exc}",
         "Check that the output folder exists, is writable and has free space"),
    )
    return OutputError(f"Could not {action}: {reason}", where=str(where), todo=todo)


def _temp_name(final: Path) -> Path:
    """Hidden sibling name that keeps the suffix (drivers guess formats from it)."""
    return final.with_name(f".{final.stem}.tmp-{secrets.token_hex(4)}{final.suffix}")


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with suppress(OSError):
            path.unlink(missing_ok=True)


@contextmanager
def atomic_path(final: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path next to ``final``; move it onto ``final`` on success.

    The parent folder is created if needed. If the body raises, the temporary file (or
    folder) is removed and the error propagates; an :class:`OSError` from the file system
    becomes an :class:`~coastmon.errors.OutputError`.

    Parameters
    ----------
    final
        Where the file must end up.

    Yields
    ------
    pathlib.Path
        A path in the same folder, not yet existing, with the same suffix as ``final``.

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> with atomic_path(folder / "a.txt") as tmp:
    ...     _ = tmp.write_text("done")
    >>> (folder / "a.txt").read_text()
    'done'
    """
    final = Path(final)
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise output_error(exc, final.parent, "create the output folder") from None
    tmp = _temp_name(final)
    try:
        yield tmp
        os.replace(tmp, final)
    except OSError as exc:
        _remove(tmp)
        raise output_error(exc, final, f"write {final.name}") from None
    except BaseException:
        _remove(tmp)
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically (flushed to disk before the move)."""
    final = Path(path)
    with atomic_path(final) as tmp, open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    return final


def atomic_write_text(path: str | os.PathLike[str], text: str, encoding: str = "utf-8") -> Path:
    """Write ``text`` to ``path`` atomically (``encoding`` defaults to UTF-8)."""
    return atomic_write_bytes(path, text.encode(encoding))


def _check_folder_target(out_dir: Path) -> None:
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(
            "The output folder is an existing file", where=str(out_dir),
            todo="Give --out the path of a folder (new or existing), not of a file",
        )


@contextmanager
def staging_dir(out_dir: str | os.PathLike[str]) -> Iterator[Path]:
    """Stage a run's outputs in a hidden sibling folder and publish them on success.

    On entry a folder ``.<name>.partial-<random>`` is created beside ``out_dir`` and
    yielded. When the body finishes without error every file in it (sub-folders included,
    e.g. ``figures/``) is moved into ``out_dir`` with :func:`os.replace`, replacing files of
    the same name; files already in ``out_dir`` that the run did not produce are kept.
    When the body raises (or is interrupted), the staging folder is deleted and
    ``out_dir`` is left exactly as it was; so it is when a move fails part-way (the moves
    already made are undone and the files they replaced are put back).

    Parameters
    ----------
    out_dir
        The output folder; created if missing.

    Yields
    ------
    pathlib.Path
        The staging folder to write into.

    Raises
    ------
    coastmon.errors.OutputError
        ``out_dir`` is a file, or its parent cannot be written (permissions, read-only,
        disk full).
    """
    out_dir = Path(out_dir).absolute()
    _check_folder_target(out_dir)
    parent = out_dir.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        stage = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.partial-", dir=parent))
    except OSError as exc:
        raise output_error(exc, parent, "create a working folder for the outputs") from None
    try:
        yield stage
        _publish(stage, out_dir)
    except OSError as exc:
        raise output_error(exc, out_dir, "write the outputs") from None
    finally:
        shutil.rmtree(stage, ignore_errors=True)


def _publish(stage: Path, out_dir: Path) -> None:
    """Move every file under ``stage`` to the same relative place under ``out_dir``."""
    files = sorted(p for p in stage.rglob("*") if p.is_file() or p.is_symlink())
    moves = [(src, out_dir / src.relative_to(stage)) for src in files]
    _check_folder_target(out_dir)
    for _, dst in moves:
        if dst.is_dir():
            raise OutputError(
                "A folder in the output folder has the name of an output file",
                where=str(dst), todo="Move or rename that folder, then run again",
            )
        for up in dst.parents:
            if up == out_dir.parent:
                break
            if up.exists() and not up.is_dir():
                raise OutputError(
                    "A file in the output folder has the name of an output sub-folder",
                    where=str(up), todo="Move or rename that file, then run again",
                )
    backups = stage.with_name(stage.name + "-replaced")
    done: list[tuple[Path, Path, Path | None]] = []
    created: list[Path] = []
    try:
        for src, dst in moves:
            for folder in reversed([dst.parent, *dst.parent.parents]):
                if not folder.exists():
                    folder.mkdir()
                    created.append(folder)
            backup = None
            if dst.exists() or dst.is_symlink():
                backup = backups / src.relative_to(stage)
                backup.parent.mkdir(parents=True, exist_ok=True)
                os.replace(dst, backup)
            done.append((src, dst, backup))
            os.replace(src, dst)
    except BaseException:
        _roll_back(done, created)
        raise
    finally:
        shutil.rmtree(backups, ignore_errors=True)


def _roll_back(done: list[tuple[Path, Path, Path | None]], created: list[Path]) -> None:
    """Undo a failed publication: every replaced file back in place, new folders removed."""
    for src, dst, backup in reversed(done):
        with suppress(OSError):
            if not (src.exists() or src.is_symlink()):
                os.replace(dst, src)
            if backup is not None:
                os.replace(backup, dst)
    for folder in reversed(created):
        with suppress(OSError):
            folder.rmdir()
