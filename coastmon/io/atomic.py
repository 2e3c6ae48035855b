"""Atomic file and folder writes.

Every output of a run is first written under a temporary name in the same folder as its
final place and moved there with :func:`os.replace`, which is atomic on one file system.
A run that fails or is interrupted therefore leaves either the previous complete file or
nothing, never a half-written file that looks real.

Two levels are offered:

- :func:`atomic_path` (and :func:`atomic_write_text`, :func:`atomic_write_bytes`) for one
  file: ``with atomic_path(final) as tmp: write(tmp)``.
- :func:`staging_dir` for a whole output folder: files are written into a hidden staging
  folder (``.<name>.partial-<random>`` beside the output folder, or
  ``<out>/.coastmon-stage-<random>`` inside it when its parent cannot be written); on
  success the staged content replaces, as a whole, what the previous coastmon run wrote
  there (listed in its ``coastmon-files.json``), and unrelated files are kept; on failure
  the staging folder is removed.

File-system failures (no permission, read-only file system, disk full, a file where a
folder is expected) are raised as :class:`coastmon.errors.OutputError`.
"""

from __future__ import annotations

import datetime as _dt
import errno
import json
import os
import secrets
import shutil
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from pathlib import Path, PurePosixPath
from typing import Any

from coastmon import __version__
from coastmon.errors import InputError, OutputError
from coastmon.io import owned

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
    while tmp.exists() or tmp.is_symlink():  # never one that is not ours to remove
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


RESULT_MANIFEST = "coastmon-files.json"
"""The list of files coastmon wrote into a result folder (written last when publishing)."""
JOURNAL = ".coastmon-publish.json"
"""Present in a result folder only while a publication is under way (or was killed)."""
STAGE_INSIDE = ".coastmon-stage-"
BACKUP = ".coastmon-old-"
_NOTES: list[str] = []


def publication_notes() -> list[str]:
    """Notes of the publications since the last call (files kept, runs recovered); cleared."""
    notes = list(_NOTES)
    _NOTES.clear()
    return notes


def _internal(rel: str) -> bool:
    top = rel.split("/", 1)[0]
    return (top in (JOURNAL, owned.MARKER) or top.startswith(STAGE_INSIDE)
            or top.startswith(BACKUP))


def _safe_rel(rel: Any) -> bool:
    """A manifest entry that names a place inside the folder (no absolute path, no ``..``)."""
    if not isinstance(rel, str) or not rel or "\\" in rel or "\x00" in rel:
        return False
    parts = PurePosixPath(rel).parts
    return (not PurePosixPath(rel).is_absolute() and ".." not in parts and "." not in parts
            and not _internal(rel))


def read_result_manifest(folder: Path) -> dict[str, Any] | None:
    """The manifest of a result folder, or None when there is none or it is not coastmon's.

    Only entries that name files inside the folder are kept, so a damaged or edited
    manifest can never make coastmon touch anything outside it.
    """
    try:
        data = json.loads((folder / RESULT_MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return None
    if not isinstance(data, dict) or data.get("format") != "coastmon result folder":
        return None
    files = data.get("files")
    folders = data.get("folders", [])
    if not isinstance(files, list) or not isinstance(folders, list):
        return None
    data["files"] = [f for f in files if _safe_rel(f)]
    data["folders"] = [f for f in folders if _safe_rel(f)]
    return data


def _exists(path: Path) -> bool:
    return path.exists() or path.is_symlink()


def _beside_ok(out_dir: Path) -> bool:
    """Stage beside ``out_dir`` when its parent is writable and on the same file system."""
    parent = out_dir.parent
    try:
        return os.access(parent, os.W_OK | os.X_OK) and (
            not out_dir.exists() or parent.stat().st_dev == out_dir.stat().st_dev)
    except OSError:
        return False


@contextmanager
def staging_dir(out_dir: str | os.PathLike[str],
                after_publish: Callable[[], None] | None = None) -> Iterator[Path]:
    """Stage a run's outputs and publish them as a whole on success.

    On entry an interrupted earlier publication into ``out_dir`` is finished
    (:func:`recover_result_folder`) and a staging folder holding an owner marker
    (:mod:`coastmon.io.owned`) is made: ``.<name>.partial-<random>`` beside ``out_dir``, or
    ``<out_dir>/.coastmon-stage-<random>`` when the parent cannot be written. It is yielded.

    When the body finishes without error the staged files are published:

    * a new ``out_dir`` is the staging folder renamed (one atomic rename);
    * into an existing ``out_dir`` the files the previous coastmon run wrote (listed in its
      ``coastmon-files.json``) are moved out first, then the new files moved in, the new
      manifest last, under a journal (``.coastmon-publish.json``) that lets the next run
      finish the job if this one is killed: at no moment does the folder hold files of
      two runs. Files coastmon did not write are kept (and named in
      :func:`publication_notes`); a new output whose name is taken by such a file is an
      :class:`~coastmon.errors.OutputError` (nothing is touched).

    SIGINT/SIGTERM/SIGHUP are held back while publishing (:func:`coastmon.io.owned.critical`);
    ``after_publish`` runs inside that same section (a monitoring state commits there).
    When the body raises (or is interrupted), the staging folder is removed and
    ``out_dir`` is left exactly as it was.

    Raises
    ------
    coastmon.errors.OutputError
        ``out_dir`` is a file, cannot be written (permissions, read-only, disk full), or
        holds files coastmon did not write under the names of new outputs.
    """
    out_dir = Path(out_dir).absolute()
    _check_folder_target(out_dir)
    parent = out_dir.parent
    recover_result_folder(out_dir)
    try:
        parent.mkdir(parents=True, exist_ok=True)
        inside = out_dir.is_dir() and not _beside_ok(out_dir)
        if not inside:
            owned.sweep(parent, (f".{out_dir.name}.partial-*",))
        base, prefix = (out_dir, STAGE_INSIDE) if inside else (parent, f".{out_dir.name}.partial-")
        stage = Path(tempfile.mkdtemp(prefix=prefix, dir=base))
    except OSError as exc:
        raise output_error(exc, parent, "create a working folder for the outputs") from None
    try:
        os.chmod(stage, 0o777 & ~_umask())  # mkdtemp's 0700 would become the folder's mode
        record = owned.write_marker(stage, "stage", out=str(out_dir))
    except OSError as exc:
        with suppress(OSError):
            stage.rmdir()
        raise output_error(exc, stage, "create a working folder for the outputs") from None
    owned.register(stage, record["token"])
    try:
        yield stage
        with owned.critical():
            _publish(stage, out_dir)
            if after_publish is not None:
                after_publish()
            owned.note_complete(str(out_dir))
    except OSError as exc:
        raise output_error(exc, out_dir, "write the outputs") from None
    finally:
        owned.remove_owned(stage)


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _staged_content(stage: Path) -> tuple[list[str], list[str]]:
    files, folders = [], []
    for p in sorted(stage.rglob("*")):
        rel = p.relative_to(stage).as_posix()
        if rel in (owned.MARKER, RESULT_MANIFEST):
            continue
        if p.is_dir() and not p.is_symlink():
            folders.append(rel)
        else:
            files.append(rel)
    return files, folders


def _publish(stage: Path, out_dir: Path) -> None:
    """Publish the staged files into ``out_dir`` (see :func:`staging_dir`)."""
    files, folders = _staged_content(stage)
    manifest = {"format": "coastmon result folder", "format_version": 1,
                "coastmon_version": __version__,
                "written": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
                "files": files + [RESULT_MANIFEST], "folders": folders,
                "note": "coastmon replaces exactly these files on the next run into this "
                        "folder; other files are kept"}
    atomic_write_text(stage / RESULT_MANIFEST, json.dumps(manifest, indent=1))
    _check_folder_target(out_dir)
    if not out_dir.exists() and stage.parent == out_dir.parent:
        try:
            os.rename(stage, out_dir)
        except OSError:
            pass  # the folder appeared meanwhile: publish into it file by file
        else:
            with suppress(OSError):
                (out_dir / owned.MARKER).unlink()
            return
    out_dir.mkdir(exist_ok=True)
    old = read_result_manifest(out_dir)
    old_files = [f for f in (old["files"] if old else []) if _exists(out_dir / f)]
    if old is not None and RESULT_MANIFEST not in old_files:
        old_files.append(RESULT_MANIFEST)
    new_files = manifest["files"]
    _check_collisions(out_dir, new_files, set(old_files))
    _note_kept(out_dir, set(old_files) | set(new_files))
    backup = Path(tempfile.mkdtemp(prefix=BACKUP, dir=out_dir))
    owned.write_marker(backup, "replaced")
    journal = {"format": "coastmon publish journal", "format_version": 1,
               "stage": str(stage), "backup": backup.name, "phase": "out",
               "old": old_files, "old_folders": old["folders"] if old else [],
               "new": new_files, **owned.owner_record("publish")}
    atomic_write_text(out_dir / JOURNAL, json.dumps(journal, indent=1))
    try:
        _roll_forward(out_dir, journal)
    except BaseException:
        _roll_back(out_dir, journal)
        raise


def _check_collisions(out_dir: Path, new_files: list[str], ours: set[str]) -> None:
    taken = []
    for rel in new_files:
        dst = out_dir / rel
        if dst.is_dir() and not dst.is_symlink():
            raise OutputError(
                "A folder in the output folder has the name of an output file",
                where=str(dst), todo="Move or rename that folder, then run again",
            )
        for up in dst.parents:
            if up == out_dir:
                break
            if _exists(up) and not up.is_dir():
                raise OutputError(
                    "A file in the output folder has the name of an output sub-folder",
                    where=str(up), todo="Move or rename that file, then run again",
                )
        if _exists(dst) and rel not in ours:
            taken.append(rel)
    if taken:
        shown = ", ".join(taken[:6]) + (f" and {len(taken) - 6} more" if len(taken) > 6 else "")
        raise OutputError(
            f"The output folder holds {len(taken)} file(s) that coastmon did not write (no "
            f"{RESULT_MANIFEST} there lists them) under the names of new outputs: {shown}; "
            "coastmon never replaces a file it cannot prove it wrote, so nothing was changed",
            where=str(out_dir),
            todo="Move or rename those files, or choose another (new or empty) output folder",
        )


def _note_kept(out_dir: Path, ours: set[str]) -> None:
    kept = []
    for p in sorted(out_dir.rglob("*")):
        rel = p.relative_to(out_dir).as_posix()
        if _internal(rel) or rel in ours or (p.is_dir() and not p.is_symlink()):
            continue
        kept.append(rel)
    if kept:
        shown = ", ".join(kept[:8]) + (f" and {len(kept) - 8} more" if len(kept) > 8 else "")
        _NOTES.append(f"kept {len(kept)} file(s) in {out_dir} that coastmon did not write: "
                      f"{shown}")


def _move(src: Path, dst: Path) -> None:
    dst.parent.mkdir(parents=True, exist_ok=True)
    os.replace(src, dst)


def _roll_forward(out_dir: Path, journal: dict[str, Any]) -> None:
    """Finish a publication: old files out to the backup, new ones in, manifest last."""
    stage, backup = Path(journal["stage"]), out_dir / journal["backup"]
    if journal["phase"] == "out":
        for rel in journal["old"]:
            if _exists(out_dir / rel) and not _exists(backup / rel):
                _move(out_dir / rel, backup / rel)
        journal["phase"] = "in"
        atomic_write_text(out_dir / JOURNAL, json.dumps(journal, indent=1))
    for rel in journal["new"]:
        if _exists(stage / rel):
            _move(stage / rel, out_dir / rel)
    missing = [rel for rel in journal["new"] if not _exists(out_dir / rel)]
    if missing:
        raise FileNotFoundError(errno.ENOENT, "staged output missing", str(stage / missing[0]))
    (out_dir / JOURNAL).unlink()
    _after_commit(out_dir, journal)


def _roll_back(out_dir: Path, journal: dict[str, Any]) -> None:
    """Undo a publication: new files back to the stage, the old ones back in place.

    Each step is tried on its own; when one fails (the disk went away) the journal stays
    and the next run into the folder finishes the job."""
    stage, backup = Path(journal["stage"]), out_dir / journal["backup"]
    failed = False
    if journal["phase"] == "in":  # every old file is in the backup: these are the new ones
        for rel in reversed(journal["new"]):
            if _exists(out_dir / rel):
                try:
                    if stage.is_dir():
                        _move(out_dir / rel, stage / rel)
                    else:  # listed in our journal, and no file of another's had its name
                        (out_dir / rel).unlink()
                except OSError:
                    failed = True
    for rel in journal["old"]:
        if _exists(backup / rel) and not _exists(out_dir / rel):
            try:
                _move(backup / rel, out_dir / rel)
            except OSError:
                failed = True
    if not failed:
        with suppress(OSError):
            (out_dir / JOURNAL).unlink()
            _after_commit(out_dir, {**journal, "old_folders": []})


def _after_commit(out_dir: Path, journal: dict[str, Any]) -> None:
    """Remove the backup and the previous run's folders left empty."""
    backup = out_dir / journal["backup"]
    if owned.read_marker(backup) is not None and not backup.is_symlink():
        shutil.rmtree(backup, ignore_errors=True)
    new_folders = {rel.rsplit("/", 1)[0] for rel in journal["new"] if "/" in rel}
    for rel in sorted((f for f in journal.get("old_folders", []) if _safe_rel(f)),
                      key=lambda f: -f.count("/")):
        if rel not in new_folders:
            with suppress(OSError):
                (out_dir / rel).rmdir()  # only when empty: a user's file keeps it


def recover_result_folder(out_dir: Path) -> None:
    """Finish (or undo) a publication into ``out_dir`` that a killed run left unfinished,
    and remove the dead runs' staging folders inside it. Nothing else is touched."""
    out_dir = Path(out_dir)
    if not out_dir.is_dir():
        return
    path = out_dir / JOURNAL
    if _exists(path):
        try:
            journal = json.loads(path.read_text(encoding="utf-8"))
            valid = (journal.get("format") == "coastmon publish journal"
                     and all(_safe_rel(r) for r in journal["old"] + journal["new"])
                     and str(journal["backup"]).startswith(BACKUP)
                     and "/" not in str(journal["backup"]))
        except (OSError, ValueError, UnicodeDecodeError, KeyError, TypeError, AttributeError):
            valid = False
        if not valid:
            raise OutputError(
                f"The output folder holds a damaged publication journal ({JOURNAL}): an "
                "earlier run was stopped while it published its results, and coastmon cannot "
                "tell which files are whose",
                where=str(out_dir),
                todo="Move the files you want to keep out of this folder, then give a new "
                     "output folder (or remove the folder) and run again",
            )
        if owned.process_alive(journal):
            raise OutputError(
                "Another coastmon run is publishing its results into this output folder",
                where=str(out_dir), todo="Wait for it to finish, or choose another folder")
        stage = Path(journal["stage"])
        stage_ok = stage.parent in (out_dir, out_dir.parent) and (
            not stage.exists() or owned.read_marker(stage) is not None)
        complete = stage_ok and all(_exists(stage / r) or _exists(out_dir / r)
                                    for r in journal["new"])
        try:
            if complete and journal.get("phase") == "in":
                _roll_forward(out_dir, journal)
                what = "finished"
            else:
                if not stage_ok:
                    journal["phase"] = "out"  # never move anything into an unproven folder
                _roll_back(out_dir, journal)
                what = "undone"
        except OSError as exc:
            raise output_error(exc, out_dir, "finish an interrupted publication") from None
        _NOTES.append(f"an earlier run was stopped while publishing into {out_dir}; its "
                      f"publication was {what}")
        if stage_ok and stage.exists():
            owned.sweep(stage.parent, (stage.name,))
    owned.sweep(out_dir, (f"{STAGE_INSIDE}*", f"{BACKUP}*"))
    stray = owned.read_marker(out_dir)
    if stray is not None and stray.get("kind") == "stage" and not owned.process_alive(stray):
        with suppress(OSError):
            (out_dir / owned.MARKER).unlink()


def check_result_folder(folder: Path) -> None:
    """Refuse to read a result folder whose publication was interrupted (left unfinished)."""
    if _exists(Path(folder) / JOURNAL):
        raise InputError(
            "This result folder is incomplete: a coastmon run was stopped while it published "
            "its results there",
            where=str(folder),
            todo="Run any coastmon command with --out pointing to this folder to finish the "
                 "publication (or run the analysis again), then read it",
        )
