"""Keep watching: a monitoring state that grows with each batch of new time steps.

``update(state_dir, inputs, settings)`` creates the state on its first call (coastline,
capes, along-shore frame, accumulators, sampled series, settings) and on later calls adds
only the time steps it has not seen: it runs the streaming pass on those steps alone,
merges their accumulators into the stored ones (Chan, Golub & LeVeque 1983), appends their
sampled series, and refreshes every output of ``analyze`` in ``STATE_DIR/outputs``, plus
``events.csv`` (shedding events, :mod:`coastmon.monitor.events`). The geometry is never
recomputed: the frame's sampling operator is stored and reloaded, so every statistic stays
on the same frame.

Layout of ``STATE_DIR``::

    coastmon-state.json  the marker: format, format version, a random state id (written
                       first, when the folder is made; coastmon writes into, and cleans, only
                       a folder that carries it, or a new or empty one)
    current            name of the committed version folder (the pointer)
    v000003/           manifest.json (format version, settings, record, history),
                       moments.npz (accumulators), times.npz (time steps seen)
    store/             grid.npz, frame.npz, coastline.npz, capes.npz (written once)
                       series-*.nc (sampled series, one file per update, append-only)
    outputs/           the outputs of analyze, and events.csv

Nothing is ever pickled: ``.npz`` files are read with ``allow_pickle=False``, the rest is
JSON and NetCDF. Crash safety: an update writes a *new* version folder and then replaces
the pointer with :func:`os.replace` (atomic on POSIX and Windows); an update that dies
before that leaves the previous version current and usable, and the next call removes the
leftovers and starts again from it. Only leftovers coastmon can prove it wrote are removed,
and only after the new inputs were checked: the files of version folders whose owner
marker carries the state id, and series files in ``store/`` that no committed version
lists and whose name carries the tag of the state id; anything else is never touched. The
outputs are refreshed (atomically, as a whole) just before the pointer moves, so after a
crash between the two the outputs can be one update ahead of the state until the next call.

Rules for new data:

* a time step equal to one already seen is skipped (feeding a file twice changes nothing);
* a time step earlier than the last one seen but not seen before (out of order) is refused
  with :class:`~coastmon.errors.RecordError`, always;
* a gap larger than 1.5 × the record's time step (after the last step seen, or inside the
  new data) is refused with :class:`~coastmon.errors.RecordError` unless
  ``allow_gaps``; accepted gaps are filled with missing values in the sampled series so
  that the series stay evenly spaced, and add nothing to the statistics.

Settings: those stored in the state win. A later call may pass the defaults (no settings
file) or the very same settings; anything else is refused with
:class:`~coastmon.errors.SettingsError`. Settings that do not change the statistics (the
run options ``stream.scheduler``, ``stream.progress`` and ``stream.read_processes``, and
the ``output`` section) are taken from the call where it sets them to something other than
the default, and are otherwise the stored ones.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import errno
import hashlib
import json
import os
import re
import secrets
import shutil
import time
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr
from scipy import sparse

from coastmon import __version__, pipeline
from coastmon.config import Settings, settings_from_dict
from coastmon.errors import InputError, OutputError, RecordError, SettingsError
from coastmon.geometry import Coastline, Frame, Segment, local_projection
from coastmon.grid.metrics import GridMetrics, coriolis_parameter
from coastmon.io.atomic import RESULT_MANIFEST, atomic_write_text, output_error, staging_dir
from coastmon.io.gridcheck import calendar_of, grid_differences
from coastmon.io.owned import (
    MARKER,
    critical,
    note_complete,
    owned_dir,
    read_marker,
    write_marker,
)
from coastmon.io.results import without_cluster_lookup
from coastmon.monitor.events import shedding_events
from coastmon.stream import (
    SeriesFile,
    load_state,
    merge_states,
    run_pass,
    save_state,
    stats_from_state,
)
from coastmon.stream.moments import grid_signature
from coastmon.stream.pass_ import closing_spare_readers

STATE_FORMAT_VERSION = 1
"""Layout version of a monitoring state; a state with another version is refused."""
STATE_MARKER = "coastmon-state.json"
"""The marker file that makes a folder provably a coastmon monitoring state."""
POINTER = "current"
STORE = "store"
OUTPUTS = "outputs"
GAP_FACTOR = 1.5
"""A step longer than this many record time steps is a gap."""
_TIME_UNITS = "seconds since 1970-01-01 00:00:00"
_RUN_ONLY = (("stream", "scheduler"), ("stream", "progress"), ("stream", "read_processes"))


# --------------------------------------------------------------------------- result
@dataclass
class UpdateResult:
    """What one call of :func:`update` did."""

    state_dir: Path
    created: bool
    version: int
    n_new: int
    n_duplicate: int
    n_filled: int
    n_time: int
    time_start: str
    time_end: str
    outputs_refreshed: bool
    n_events: int = 0
    products: pipeline.Products | None = None
    notes: list[str] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)

    def summary_text(self) -> str:
        head = "created" if self.created else ("updated" if self.n_new else "unchanged")
        lines = [f"coastmon: monitoring state {head} (version {self.version}) in {self.state_dir}",
                 f"  {self.n_new} new time step(s), {self.n_duplicate} already seen and skipped"
                 + (f", {self.n_filled} missing step(s) filled" if self.n_filled else ""),
                 f"  record: {self.n_time} time steps, {self.time_start} to {self.time_end}"]
        if self.outputs_refreshed and self.products is not None:
            lines.append(f"  {len(self.products.sources)} source(s); {self.n_events} shedding "
                         f"event(s) logged; outputs in {self.state_dir / OUTPUTS}")
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)


# --------------------------------------------------------------------------- time
def time_seconds(values: np.ndarray) -> np.ndarray:
    """Seconds since 1970-01-01 of datetime64 or cftime values (in their own calendar)."""
    values = np.asarray(values)
    if np.issubdtype(values.dtype, np.datetime64):
        return values.astype("datetime64[ns]").astype(np.int64) / 1.0e9
    import cftime

    return np.asarray(cftime.date2num(list(values.ravel()), _TIME_UNITS,
                                      calendar=calendar_of(values)), dtype=np.float64)


def _times_from_seconds(seconds: np.ndarray, calendar: str, like: np.ndarray) -> np.ndarray:
    if np.issubdtype(np.asarray(like).dtype, np.datetime64):
        return (np.round(np.asarray(seconds) * 1e9).astype(np.int64)).astype("datetime64[ns]")
    import cftime

    return np.asarray(cftime.num2date(np.asarray(seconds), _TIME_UNITS, calendar=calendar))


def _text(seconds: float, calendar: str, like: np.ndarray) -> str:
    value = _times_from_seconds(np.array([seconds]), calendar, like)[0]
    if isinstance(value, np.datetime64):
        return str(np.datetime_as_string(value, unit="s"))
    return value.isoformat()


# --------------------------------------------------------------------------- tables
def _table_arrays(table: pd.DataFrame, prefix: str) -> dict[str, np.ndarray]:
    """A DataFrame as plain arrays (numbers keep their dtype, everything else becomes text)."""
    out = {f"{prefix}__columns": np.array(list(table.columns), dtype=str)}
    for col in table.columns:
        values = table[col].to_numpy()
        if values.dtype.kind not in "biuf":
            values = np.array(["" if v is None or (isinstance(v, float) and np.isnan(v))
                               else str(v) for v in values], dtype=str)
        out[f"{prefix}__{col}"] = values
    return out


def _table_from(data: Any, prefix: str) -> pd.DataFrame:
    columns = [str(c) for c in data[f"{prefix}__columns"]]
    return pd.DataFrame({c: np.asarray(data[f"{prefix}__{c}"]) for c in columns},
                        columns=columns)


def _savez(path: Path, arrays: dict[str, np.ndarray]) -> None:
    tmp = path.with_name(path.name + ".part")
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def _loadz(path: Path) -> dict[str, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: np.array(data[k]) for k in data.files}
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
        raise InputError(
            f"A file of the monitoring state cannot be read ({type(exc).__name__}: {exc})",
            where=str(path),
            todo="The state is damaged; start a new state folder from the full record",
        ) from None


# --------------------------------------------------------------------------- geometry
def save_geometry(store: Path, lon: np.ndarray, lat: np.ndarray, mask: np.ndarray,
                  coastline: Coastline, capes: pd.DataFrame, frame: Frame) -> list[str]:
    """Write grid, coastline, capes and frame as ``.npz`` files; returns their names."""
    _savez(store / "grid.npz", {"lon": np.asarray(lon, np.float64),
                                "lat": np.asarray(lat, np.float64),
                                "mask": np.asarray(mask)})
    seg: dict[str, np.ndarray] = {
        "n_segments": np.array(len(coastline.segments)),
        "lon_ref": np.array(coastline.lon_ref, np.float64),
        "lat_ref": np.array(coastline.lat_ref, np.float64),
        "boundary": np.array(coastline.boundary, dtype=str),
    }
    for i, s in enumerate(coastline.segments):
        for name in ("lon", "lat", "x_km", "y_km", "alongshore_km"):
            seg[f"s{i}_{name}"] = np.asarray(getattr(s, name), np.float64)
        seg[f"s{i}_meta"] = np.array([s.segment_id, int(s.closed), int(s.island)], np.int64)
    _savez(store / "coastline.npz", seg)
    _savez(store / "capes.npz", _table_arrays(capes, "capes"))
    csr = sparse.csr_matrix(frame.sampler)
    arrays = {
        "sampler_data": csr.data, "sampler_indices": csr.indices, "sampler_indptr": csr.indptr,
        "sampler_shape": np.array(csr.shape, np.int64), "valid": np.asarray(frame.valid),
        "offsets_km": np.asarray(frame.offsets_km), "ray_km": np.asarray(frame.ray_km),
        "section_lon": frame.section_lon, "section_lat": frame.section_lat,
        "ray_lon": frame.ray_lon, "ray_lat": frame.ray_lat,
    }
    arrays.update(_table_arrays(frame.stations, "stations"))
    _savez(store / "frame.npz", arrays)
    return ["grid.npz", "coastline.npz", "capes.npz", "frame.npz"]


def load_geometry(store: Path) -> tuple[dict[str, np.ndarray], Coastline, pd.DataFrame, Frame]:
    """Read what :func:`save_geometry` wrote (grid arrays, coastline, capes, frame)."""
    try:
        return _load_geometry(store)
    except (KeyError, ValueError, TypeError, IndexError) as exc:
        raise InputError(
            f"The geometry stored in the monitoring state is incomplete or inconsistent "
            f"({type(exc).__name__}: {exc})", where=str(store),
            todo="The state is damaged; start a new state folder from the full record",
        ) from None


def _load_geometry(store: Path) -> tuple[dict[str, np.ndarray], Coastline, pd.DataFrame, Frame]:
    grid = _loadz(store / "grid.npz")
    c = _loadz(store / "coastline.npz")
    lon_ref, lat_ref = float(c["lon_ref"]), float(c["lat_ref"])
    crs, forward, inverse = local_projection(lon_ref, lat_ref)
    segments = []
    for i in range(int(c["n_segments"])):
        sid, closed, island = (int(v) for v in c[f"s{i}_meta"])
        segments.append(Segment(segment_id=sid, closed=bool(closed), island=bool(island),
                                **{n: c[f"s{i}_{n}"] for n in ("lon", "lat", "x_km", "y_km",
                                                               "alongshore_km")}))
    coastline = Coastline(segments, crs, forward, inverse, lon_ref, lat_ref, str(c["boundary"]))
    capes = _table_from(_loadz(store / "capes.npz"), "capes")
    f = _loadz(store / "frame.npz")
    sampler = sparse.csr_matrix((f["sampler_data"], f["sampler_indices"], f["sampler_indptr"]),
                                shape=tuple(int(n) for n in f["sampler_shape"]))
    frame = Frame(stations=_table_from(f, "stations"), offsets_km=f["offsets_km"],
                  ray_km=f["ray_km"], section_lon=f["section_lon"], section_lat=f["section_lat"],
                  ray_lon=f["ray_lon"], ray_lat=f["ray_lat"], sampler=sampler, valid=f["valid"])
    return grid, coastline, capes, frame


# --------------------------------------------------------------------------- folder
@contextlib.contextmanager
def _locked(state_dir: Path) -> Iterator[None]:
    """Hold an exclusive lock on the state folder (POSIX); one update at a time."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows has no fcntl
        yield
        return
    fh = open(state_dir / ".lock", "a+")  # noqa: SIM115 - held open for the lock's life
    try:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            raise OutputError(
                "Another update of this monitoring state is running", where=str(state_dir),
                todo="Wait for it to finish, then run the update again",
            ) from None
        yield
    finally:
        fh.close()


def _damaged(what: str, where: Path) -> InputError:
    return InputError(
        f"The monitoring state is damaged: {what}", where=str(where),
        todo="The state folder was edited or damaged; restore it from a backup, or start a new "
             "state folder from the full record (coastmon changed nothing here)",
    )


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _current(state_dir: Path) -> str | None:
    """The committed version folder named by the pointer."""
    pointer = state_dir / POINTER
    if not pointer.exists() and not pointer.is_symlink():
        return None
    try:
        name = pointer.read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError):
        raise _damaged("its pointer file cannot be read", pointer) from None
    if not _VERSION.fullmatch(name):
        raise _damaged("its pointer file does not name a version folder", pointer)
    if not (state_dir / name / "manifest.json").is_file():
        raise InputError(
            "The monitoring state's pointer names a version folder that is missing",
            where=str(pointer),
            todo="The state folder was edited or damaged; start a new state folder",
        )
    return name


def _manifest_digest(manifest: dict[str, Any]) -> str:
    """Checksum of a manifest's content (every key but the checksum itself)."""
    body = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    text = json.dumps(body, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _verify_files(state_dir: Path, manifest: dict[str, Any], current: str) -> None:
    """Check every file the committed version needs against the manifest's checksums."""
    sums = manifest.get("sha256")
    if sums is None:
        return  # a state written before the checksums
    needed = [f"{STORE}/{n}" for n in [*manifest["store_files"], *manifest["series_parts"]]]
    needed += [f"{current}/moments.npz", f"{current}/times.npz"]
    for rel in needed:
        path = state_dir / rel
        if not isinstance(sums, dict) or rel not in sums:
            raise _damaged(f"its manifest holds no checksum for {rel}", state_dir / current)
        if not path.is_file():
            raise _damaged(f"the file {rel} is missing", path)
        if _sha256(path) != sums[rel]:
            raise _damaged(f"the file {rel} was changed or truncated (its checksum differs)",
                           path)


_VERSION = re.compile(r"v\d{6}")
_PARTIAL_VERSION = re.compile(r"\.v\d{6}\.partial-[0-9a-f]{8}")
_STORE_FILE = re.compile(r"series-(\d{6})-([0-9a-f]{6})-([0-9a-f]{8})\.nc(\.part)?")


def _tag(state_id: str, number: int, token: str) -> str:
    return hashlib.sha256(f"{state_id}:{number}:{token}".encode()).hexdigest()[:8]


def _part_name(state_id: str, number: int) -> str:
    """Name of a new series part: ``series-<version>-<random>-<tag>.nc``; the tag is derived
    from the state id, so the name itself proves which state wrote the file."""
    token = secrets.token_hex(3)
    return f"series-{number:06d}-{token}-{_tag(state_id, number, token)}.nc"


def _provable_part(name: str, state_id: str) -> bool:
    """A series part (or its temporary ``.part``) that this state's updates wrote."""
    m = _STORE_FILE.fullmatch(name)
    return m is not None and m[3] == _tag(state_id, int(m[1]), m[2])


_GEOMETRY = ("grid.npz", "coastline.npz", "capes.npz", "frame.npz")


def _not_a_state(state_dir: Path, why: str) -> OutputError:
    return OutputError(
        f"The folder is not a coastmon monitoring state ({why}); coastmon update writes only "
        f"into a new or empty folder or into a state it created, and changed nothing here",
        where=str(state_dir),
        todo="Give the folder of an existing monitoring state, or a new (or empty) folder to "
             "start one",
    )


def _read_state_marker(state_dir: Path) -> str:
    """The state id of a marked state folder (refuses a damaged or foreign marker)."""
    path = state_dir / STATE_MARKER
    try:
        marker = json.loads(path.read_text(encoding="utf-8"))
        ok = (marker.get("format") == "coastmon monitoring state"
              and isinstance(marker.get("state_id"), str)
              and re.fullmatch(r"[0-9a-f]{16}", marker["state_id"]) is not None)
    except (OSError, ValueError, UnicodeDecodeError, AttributeError):
        ok = False
    if not ok:
        raise InputError(
            f"The monitoring state's marker file ({STATE_MARKER}) is damaged",
            where=str(path),
            todo="The state folder was edited or damaged; start a new state folder from the "
                 "full record (coastmon changed nothing here)",
        )
    version = marker.get("format_version")
    if not isinstance(version, int) or version != STATE_FORMAT_VERSION:
        raise InputError(
            f"The monitoring state has format version {version}; this coastmon "
            f"({__version__}) reads version {STATE_FORMAT_VERSION}",
            where=str(path),
            todo="Use the coastmon version that wrote the state, or start a new state folder",
        )
    return str(marker["state_id"])


def _claim(state_dir: Path) -> tuple[str, bool]:
    """Make sure ``state_dir`` is (or becomes) a marked monitoring state.

    Returns the state id and whether the folder was made by this call. A new or empty
    folder gets the marker first of all; an existing folder must carry it. A non-empty
    folder without it is refused before anything in it is touched.
    """
    made = False
    if not state_dir.exists():
        try:
            state_dir.mkdir(parents=True)
        except FileExistsError:
            pass
        except OSError as exc:
            raise OutputError(f"Cannot create the monitoring state folder ({exc.strerror})",
                              where=str(state_dir),
                              todo="Choose a folder you may write to") from None
        else:
            made = True
    if (state_dir / STATE_MARKER).exists() or (state_dir / STATE_MARKER).is_symlink():
        return _read_state_marker(state_dir), made
    try:
        entries = [p.name for p in state_dir.iterdir()]
    except OSError as exc:
        raise OutputError(f"Cannot read the monitoring state folder ({exc.strerror})",
                          where=str(state_dir), todo="Check the folder's permissions") from None
    if entries and not _legacy_state(state_dir):
        raise _not_a_state(state_dir, f"it holds {len(entries)} entr"
                           f"{'y' if len(entries) == 1 else 'ies'} but no {STATE_MARKER}")
    state_id = secrets.token_hex(8)
    marker = {"format": "coastmon monitoring state", "format_version": STATE_FORMAT_VERSION,
              "state_id": state_id, "coastmon_version": __version__,
              "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
              "note": "Written by coastmon update; coastmon writes into and cleans this folder "
                      "because this file is here."}
    try:
        fd = os.open(state_dir / STATE_MARKER, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        try:
            os.write(fd, json.dumps(marker, indent=1).encode("utf-8"))
        finally:
            os.close(fd)
    except FileExistsError:
        return _read_state_marker(state_dir), made
    except OSError as exc:
        raise OutputError(f"Cannot write into the monitoring state folder ({exc.strerror})",
                          where=str(state_dir), todo="Choose a folder you may write to") from None
    return state_id, made


def _legacy_state(state_dir: Path) -> bool:
    """A state written before the marker existed: its pointer names a version folder whose
    manifest is a monitoring-state manifest (it gets the marker; its old version folders,
    which carry no owner marker, are never removed)."""
    try:
        name = (state_dir / POINTER).read_text(encoding="utf-8").strip()
        manifest = json.loads((state_dir / name / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return False
    return (_VERSION.fullmatch(name) is not None and isinstance(manifest, dict)
            and manifest.get("format") == "coastmon monitoring state")


_VERSION_FILES = re.compile(
    r"(manifest\.json|moments\.npz|times\.npz|(moments|times)\.npz\.part"
    r"|\.manifest\.tmp-[0-9a-f]{8}\.json|" + re.escape(MARKER) + ")")


def _remove_version_folder(folder: Path) -> bool:
    """Remove the files a version folder of coastmon holds, then the folder if that left it
    empty; a file of anyone else's keeps it (and itself). True when the folder is gone."""
    for p in folder.iterdir():
        if _VERSION_FILES.fullmatch(p.name) and p.is_file() and not p.is_symlink():
            p.unlink(missing_ok=True)
    try:
        folder.rmdir()
    except OSError:
        return False
    return True


def _ours(folder: Path, state_id: str) -> bool:
    """A version folder (final or partial) that this state's updates wrote."""
    if folder.is_symlink() or not folder.is_dir():
        return False
    record = read_marker(folder)
    return record is not None and record.get("state_id") == state_id


def _clean_leftovers(state_dir: Path, current: str | None, keep_store: set[str],
                     state_id: str) -> None:
    """Remove what interrupted updates left, and only what they provably wrote: version
    folders (partial or superseded) whose owner marker carries the state id (only their
    coastmon files), and series files that no committed version lists and whose name
    carries the tag of this state id. Everything else is left alone."""
    for p in state_dir.iterdir():
        if p.name == current:
            continue
        if (_VERSION.fullmatch(p.name) or _PARTIAL_VERSION.fullmatch(p.name)) \
                and _ours(p, state_id):
            _remove_version_folder(p)
    store = state_dir / STORE
    if store.is_dir() and not store.is_symlink():
        for p in store.iterdir():
            if (p.name not in keep_store and _provable_part(p.name, state_id) and p.is_file()
                    and not p.is_symlink()):
                p.unlink(missing_ok=True)


def _discard_new_state(state_dir: Path, made: bool, state_id: str) -> None:
    """Undo a first update that failed: remove what it wrote, and the folder if it made it."""
    _clean_leftovers(state_dir, None, set(), state_id)
    store = state_dir / STORE
    if store.is_dir() and not store.is_symlink():
        for name in _GEOMETRY:
            with contextlib.suppress(OSError):
                (store / name).unlink()
        with contextlib.suppress(OSError):
            store.rmdir()
    if (state_dir / OUTPUTS / RESULT_MANIFEST).is_file():
        return  # outputs were published: the marker stays, so they stay provably ours
    for name in (".lock", STATE_MARKER):
        with contextlib.suppress(OSError):
            (state_dir / name).unlink()
    if made:
        with contextlib.suppress(OSError):
            state_dir.rmdir()


def _read_manifest(state_dir: Path, name: str) -> dict[str, Any]:
    path = state_dir / name / "manifest.json"
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"The monitoring state's manifest cannot be read ({exc})",
                         where=str(path),
                         todo="The state is damaged; start a new state folder") from None
    if not isinstance(manifest, dict):
        raise _damaged("its manifest is not a JSON object", path)
    version = manifest.get("format_version")
    if not isinstance(version, int) or version > STATE_FORMAT_VERSION:
        raise InputError(
            f"The monitoring state has format version {version}, newer than this coastmon "
            f"({__version__}) reads (version {STATE_FORMAT_VERSION})",
            where=str(path),
            todo="Update coastmon to the version that wrote the state, or start a new state "
                 "folder",
        )
    if version < STATE_FORMAT_VERSION:
        raise InputError(
            f"The monitoring state has the old format version {version}; this coastmon reads "
            f"version {STATE_FORMAT_VERSION} only",
            where=str(path),
            todo="Start a new state folder from the full record with this coastmon",
        )
    if ("manifest_sha256" in manifest or "sha256" in manifest) \
            and manifest.get("manifest_sha256") != _manifest_digest(manifest):
        raise _damaged("its manifest was changed (its checksum differs)", path)
    return manifest


def _commit(state_dir: Path, number: int, manifest: dict[str, Any], moments, seen_s: np.ndarray
            ) -> str:
    """Write version ``number`` beside the current one and move the pointer to it."""
    name = f"v{number:06d}"
    partial = state_dir / f".{name}.partial-{secrets.token_hex(4)}"
    partial.mkdir()
    write_marker(partial, "state-version", state_id=manifest["state_id"])
    save_state(moments, partial / "moments.npz")
    _savez(partial / "times.npz", {"seen_s": np.asarray(seen_s, np.float64)})
    manifest["sha256"] = {**manifest["sha256"],
                          **{f"{name}/{f}": _sha256(partial / f)
                             for f in ("moments.npz", "times.npz")}}
    manifest["manifest_sha256"] = _manifest_digest(manifest)
    atomic_write_text(partial / "manifest.json", json.dumps(manifest, indent=2, default=str))
    final = state_dir / name
    with critical():
        if final.exists() or final.is_symlink():
            if not (_ours(final, manifest["state_id"]) and _remove_version_folder(final)):
                _remove_version_folder(partial)
                raise _not_a_state(state_dir, f"a folder '{name}' holding files that coastmon "
                                   "did not write stands where the next version goes")
        os.replace(partial, final)
        _switch_pointer(state_dir, name)
        note_complete(str(state_dir))
    return name


def _switch_pointer(state_dir: Path, name: str) -> None:
    """Make ``name`` the current version (one atomic rename)."""
    atomic_write_text(state_dir / POINTER, name + "\n")


def _run_only(settings: Settings) -> list[tuple[str, str]]:
    """Keys that do not change the stored statistics: the run options and the output section."""
    return list(_RUN_ONLY) + [("output", f.name) for f in dataclasses.fields(settings.output)]


def _resolve_settings(stored: Settings, given: Settings) -> Settings:
    """The stored settings, with run options and output choices taken from the call when
    the call sets them (differs from the defaults); refuse any other difference."""
    default = Settings()
    free = _run_only(default)

    def key(s: Settings) -> dict[str, dict[str, Any]]:
        d = s.to_dict()
        for section, name in free:
            d[section].pop(name)
        return d

    if key(given) not in (key(stored), key(default)):
        stored_d, given_d = key(stored), key(given)
        diffs = [f"{sec}.{k} (stored {stored_d[sec][k]!r}, given {v!r})"
                 for sec, table in given_d.items() for k, v in table.items()
                 if stored_d[sec][k] != v]
        raise SettingsError(
            "The settings given differ from those the monitoring state was created with: "
            + "; ".join(diffs),
            where="coastmon update --settings",
            todo="Run the update without --settings (the stored settings are used), or start "
                 "a new state folder to analyse with other settings",
        )
    out = stored
    for section, name in free:
        value = getattr(getattr(given, section), name)
        if value != getattr(getattr(default, section), name):
            out = dataclasses.replace(out, **{section: dataclasses.replace(
                getattr(out, section), **{name: value})})
    return out


# --------------------------------------------------------------------------- time steps
@dataclass
class _Plan:
    new: np.ndarray          # indices of the new steps in the dataset
    n_duplicate: int
    fill_before: list[int]   # missing steps to insert before each new step
    dt_s: float | None


def _plan_steps(t_s: np.ndarray, seen_s: np.ndarray, dt_s: float | None, allow_gaps: bool,
                where: str, calendar: str, like: np.ndarray) -> _Plan:
    """Which steps are new, which are duplicates, and the gaps to fill."""
    seen = set(np.round(seen_s, 3).tolist())
    last = float(seen_s.max()) if seen_s.size else -np.inf
    dup = np.array([round(float(t), 3) in seen for t in t_s], dtype=bool)
    late = ~dup & (t_s <= last)
    if late.any():
        k = int(np.flatnonzero(late)[0])
        raise RecordError(
            f"The time step {_text(t_s[k], calendar, like)} lies before the last time already "
            f"in the monitoring state ({_text(last, calendar, like)}) but was not part of it: "
            "the new data are out of order",
            where=where,
            todo="Give the new files in time order; to include earlier data, start a new state "
                 "folder from the full record",
        )
    new = np.flatnonzero(~dup)
    if dt_s is None:
        steps = np.diff(np.concatenate([seen_s[-1:], t_s[new]]))
        dt_s = float(np.median(steps)) if steps.size else None
    fill = [0] * new.size
    if new.size and dt_s:
        prev = np.concatenate([[last], t_s[new][:-1]])
        steps = t_s[new] - prev
        for i, step in enumerate(steps):
            if np.isfinite(step) and step > GAP_FACTOR * dt_s:
                if not allow_gaps:
                    raise RecordError(
                        f"The new data leave a gap of {step / 86400.0:g} days before "
                        f"{_text(t_s[new][i], calendar, like)}; the record's time step is "
                        f"{dt_s / 86400.0:g} days",
                        where=where,
                        todo="Give the missing files first, or pass --allow-gaps to accept the "
                             "gap (it is filled with missing values)",
                    )
                fill[i] = int(round(step / dt_s)) - 1
    return _Plan(new, int(dup.sum()), fill, dt_s)


def _with_fill(series: xr.Dataset, plan: _Plan, t_new_s: np.ndarray, calendar: str
               ) -> xr.Dataset:
    """Insert rows of missing values where the plan has gaps (keeps the series even)."""
    if not any(plan.fill_before):
        return series
    times, rows = [], []
    for i, n_fill in enumerate(plan.fill_before):
        for k in range(n_fill, 0, -1):
            times.append(t_new_s[i] - k * plan.dt_s)
            rows.append(-1)
        times.append(t_new_s[i])
        rows.append(i)
    rows_arr = np.array(rows)
    out = series.isel(time=np.where(rows_arr >= 0, rows_arr, 0)).copy(deep=True)
    for name, var in out.data_vars.items():
        if "time" in var.dims:
            data = np.array(var.values)
            data[rows_arr < 0] = np.nan
            out[name] = (var.dims, data, var.attrs)
    return out.assign_coords(time=_times_from_seconds(np.array(times), calendar,
                                                      series["time"].values))


SERIES_BLOCK_STEPS = 512
"""Time steps copied at a time when the stored series parts are stacked on disk."""


def _load_series(state_dir: Path, parts: list[str], work: Path) -> xr.Dataset:
    """The stored series parts as one series, in disk-backed files in ``work``.

    Every part was checked against its sha256 in the manifest before use
    (:func:`_verify_files`), so damaged bytes are refused, never analysed.
    """
    try:
        return _stack_series(state_dir, parts, work)
    except (OSError, ValueError, RuntimeError, KeyError, IndexError) as exc:
        raise InputError(f"A series file of the monitoring state cannot be read "
                         f"({type(exc).__name__}: {exc})", where=str(state_dir / STORE),
                         todo="The state is damaged; start a new state folder from the full "
                              "record") from None


def _stack_series(state_dir: Path, parts: list[str], work: Path) -> xr.Dataset:
    """The parts stacked along time. The (time, station, k) variables are copied a block
    of time steps at a time into station-major files (as the streaming pass writes them),
    so memory does not grow with the length of the monitored record; the small
    coordinates are kept in memory."""
    work.mkdir(parents=True, exist_ok=True)
    opened = [xr.open_dataset(state_dir / STORE / name, engine="netcdf4") for name in parts]
    try:
        first = opened[0]
        n_time = sum(ds.sizes["time"] for ds in opened)
        big = [name for name, var in first.data_vars.items()
               if var.dims[:1] == ("time",) and var.ndim == 3]
        writers = {name: SeriesFile(work / f"{name}.npy", (n_time, *first[name].shape[1:]))
                   for name in big}
        try:
            offset = 0
            for ds in opened:
                n = ds.sizes["time"]
                for t0 in range(0, n, SERIES_BLOCK_STEPS):
                    t1 = min(n, t0 + SERIES_BLOCK_STEPS)
                    for name, writer in writers.items():
                        writer.write(offset + t0, ds[name][t0:t1].values)
                offset += n
        finally:
            for writer in writers.values():
                writer.close()
        small = [ds.drop_vars(big).load() for ds in opened]
    finally:
        for ds in opened:
            ds.close()
    rest = small[0] if len(small) == 1 else xr.concat(
        small, dim="time", data_vars="minimal", coords="minimal", compat="override")
    data = {name: xr.DataArray(writers[name].open(), dims=first[name].dims,
                               attrs=first[name].attrs) for name in big}
    return rest.assign(data)[list(first.data_vars)]


def _write_part(series: xr.Dataset, path: Path) -> None:
    enc = {"time": {"units": _TIME_UNITS, "dtype": "float64"}}
    tmp = path.with_name(path.name + ".part")
    try:
        with critical(), without_cluster_lookup():
            # (a signal inside xarray's file lock would deadlock its clean-up)
            series.to_netcdf(tmp, engine="netcdf4", encoding=enc)
    except RuntimeError:  # the NetCDF library reports a full disk as "HDF error"
        tmp.unlink(missing_ok=True)  # our own temporary name, written just now
        if shutil.disk_usage(path.parent).free < (1 << 20):
            raise OSError(errno.ENOSPC, "No space left on device", str(path)) from None
        raise
    os.replace(tmp, path)


# --------------------------------------------------------------------------- update
def update(state_dir: str | os.PathLike[str], inputs: list[str | os.PathLike[str]],
           settings: Settings, allow_gaps: bool = False) -> UpdateResult:
    """Create or extend the monitoring state in ``state_dir`` with the time steps of ``inputs``.

    Parameters
    ----------
    state_dir
        The state folder (created on the first call).
    inputs
        NetCDF files or a Zarr store, on the grid of the state.
    settings
        Used to create the state; on later calls see the module notes (stored ones win).
    allow_gaps
        Accept new data that leave a gap after the last step seen (filled with missing
        values in the series).

    Returns
    -------
    UpdateResult

    Raises
    ------
    coastmon.errors.RecordError
        Out-of-order time steps, or a gap without ``allow_gaps``.
    coastmon.errors.InputError
        The inputs are on another grid, or the state is damaged or of another version.
    coastmon.errors.SettingsError
        Settings different from the stored ones.
    """
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    state_dir = Path(state_dir).absolute()
    paths = [Path(p) for p in inputs]
    if state_dir.exists() and not state_dir.is_dir():
        raise OutputError("The monitoring state path is a file", where=str(state_dir),
                          todo="Give a folder (it is created on the first update)")
    for p in paths:
        rp = p.resolve()
        if rp == state_dir.resolve() or state_dir.resolve() in rp.parents:
            raise OutputError(
                "An input lies inside the monitoring state folder", where=str(rp),
                todo="Keep the input files outside the state folder")
    state_id, made = _claim(state_dir)
    new_state = made  # known for sure once the lock is held (never another run's state)
    try:
        try:
            (state_dir / STORE).mkdir(exist_ok=True)
        except OSError as exc:
            raise OutputError(f"Cannot create the monitoring state folder ({exc.strerror})",
                              where=str(state_dir),
                              todo="Choose a folder you may write to") from None
        with _locked(state_dir):
            current = _current(state_dir)
            new_state = current is None
            manifest = _read_manifest(state_dir, current) if current else None
            if manifest is not None:
                _verify_files(state_dir, manifest, current)
            if manifest is not None and manifest.get("state_id", state_id) != state_id:
                raise InputError(
                    f"The monitoring state's version folder {current} belongs to another state "
                    f"than its marker ({STATE_MARKER})", where=str(state_dir / current),
                    todo="The state folder was edited or damaged; start a new state folder")
            with owned_dir("coastmon-update-") as work:
                result = _update(state_dir, paths, settings, allow_gaps, manifest, current,
                                 timings, work, state_id)
    except BaseException as exc:
        if new_state:  # a first update that failed leaves no half-made state behind
            _discard_new_state(state_dir, made, state_id)
        if isinstance(exc, OSError):
            raise output_error(exc, state_dir, "write the monitoring state") from None
        raise
    result.timings["total_s"] = time.perf_counter() - t0
    return result


@closing_spare_readers
def _update(state_dir: Path, paths: list[Path], settings: Settings, allow_gaps: bool,
            manifest: dict[str, Any] | None, current: str | None,
            timings: dict[str, float], work: Path, state_id: str) -> UpdateResult:
    """The update itself; ``work`` is a temporary folder for the pass and the series."""
    store = state_dir / STORE
    where = paths[0].name if len(paths) == 1 else f"{paths[0].name} (and {len(paths) - 1} more)"
    created = manifest is None
    t = time.perf_counter()
    if created:
        prep = pipeline.prepare(paths, settings)
        ds, metrics, coastline, capes, frame = (prep.ds, prep.metrics, prep.coastline,
                                                prep.capes, prep.frame)
        lon, lat = metrics.lon, metrics.lat
        mask = np.asarray(ds["mask"].values)
        ld_km = prep.ld_km
        notes = list(prep.notes)
        calendar = calendar_of(ds["time"].values)
        seen_s = np.zeros(0)
        dt_s = None
        moments = None
        parts: list[str] = []
        number = 1
        history: list[dict[str, Any]] = []
        inputs_seen: list[dict[str, Any]] = []
    else:
        settings = _resolve_settings(settings_from_dict(manifest["settings"],
                                                        where="the monitoring state"), settings)
        grid, coastline, capes, frame = load_geometry(store)
        lon, lat, mask = grid["lon"], grid["lat"], grid["mask"]
        ds, notes = pipeline.open_with_notes(paths, settings)
        _check_same_grid(ds, lon, lat, mask, manifest, where)
        metrics = GridMetrics.from_lonlat(lon, lat)
        ld_km = float(manifest["deformation_radius_km"])
        calendar = manifest["calendar"]
        if calendar_of(ds["time"].values) != calendar:
            raise InputError(
                f"The new data use the '{calendar_of(ds['time'].values)}' calendar, the "
                f"monitoring state '{calendar}'", where=where,
                todo="Give data of the same model run or product, in the same calendar")
        seen_s = _loadz(state_dir / current / "times.npz")["seen_s"]
        dt_s = manifest["time_step_s"]
        moments = load_state(state_dir / current / "moments.npz")
        parts = list(manifest["series_parts"])
        number = int(current[1:]) + 1
        history = list(manifest["history"])
        inputs_seen = list(manifest["inputs"])
    timings["prepare_s"] = time.perf_counter() - t

    like = ds["time"].values
    t_s = time_seconds(like)
    plan = _plan_steps(t_s, seen_s, dt_s, allow_gaps, where, calendar, like)
    if plan.new.size == 0:
        return UpdateResult(
            state_dir, False, number - 1, 0, plan.n_duplicate, 0, int(seen_s.size),
            _text(seen_s.min(), calendar, like), _text(seen_s.max(), calendar, like),
            False, notes=["Every time step given was already in the state; nothing changed."],
            timings=timings)

    # The inputs are checked: only now are an interrupted update's leftovers removed.
    keep = set(manifest["store_files"]) | set(manifest["series_parts"]) if manifest else set()
    _clean_leftovers(state_dir, current, keep, state_id)
    if created:
        store_files = save_geometry(store, lon, lat, mask, coastline, capes, frame)
    else:
        store_files = list(manifest["store_files"])

    t = time.perf_counter()
    steps = plan.new
    if np.all(np.diff(steps) == 1):
        steps = slice(int(steps[0]), int(steps[-1]) + 1)
    passed = run_pass(ds.isel(time=steps), metrics, frame, settings.stream, work / "pass",
                      ray_points=False)  # the stored parts hold the rays themselves
    timings["stream_pass_s"] = time.perf_counter() - t
    notes += pipeline.coverage_notes(ds.isel(time=steps), passed)
    merged = passed.state if moments is None else merge_states(moments, passed.state)
    new_series = _with_fill(passed.series, plan, t_s[plan.new], calendar)
    part = _part_name(state_id, number)
    _write_part(new_series, store / part)
    del passed, new_series
    parts.append(part)
    stats = stats_from_state(merged, metrics)
    series = _load_series(state_dir, parts, work / "series")
    seen_all = np.concatenate([seen_s, t_s[plan.new]])
    n_filled = int(sum(plan.fill_before))

    light = xr.Dataset({"mask": (("y", "x"), np.asarray(mask))},
                       coords={"lon": (("y", "x"), lon), "lat": (("y", "x"), lat),
                               "time": series["time"].values},
                       attrs={k: ds.attrs.get(k, manifest["dataset_attrs"].get(k) if manifest
                                              else None)
                              for k in ("velocity_kind", "depth_m")})
    prep = pipeline.Prepared(light, metrics, coastline, capes, frame, ld_km, paths)
    t = time.perf_counter()
    products = None
    n_events = 0
    try:
        products = pipeline.analyse_series(stats, series, frame, capes, settings, ld_km)
    except RecordError as exc:
        notes.append(f"Outputs not refreshed yet: {exc}")
    timings["analyses_s"] = time.perf_counter() - t

    inputs_seen = inputs_seen + [pipeline.describe_input(p) for p in paths]
    now = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
    history.append({"version": number, "when": now, "n_new": int(plan.new.size),
                    "n_duplicate": plan.n_duplicate, "n_filled": n_filled,
                    "inputs": [str(p.resolve()) for p in paths]})
    new_manifest = {
        "format": "coastmon monitoring state",
        "format_version": STATE_FORMAT_VERSION,
        "state_id": state_id,
        "coastmon_version": __version__,
        "created": manifest["created"] if manifest else now,
        "updated": now,
        "settings": settings.to_dict(),
        "grid_id": grid_signature(lon, lat),
        "grid_shape": list(np.shape(lon)),
        "calendar": calendar,
        "time_units": _TIME_UNITS,
        "time_step_s": plan.dt_s,
        "n_seen": int(seen_all.size),
        "n_filled_total": int((manifest or {}).get("n_filled_total", 0)) + n_filled,
        "time_start": _text(seen_all.min(), calendar, like),
        "time_end": _text(seen_all.max(), calendar, like),
        "deformation_radius_km": ld_km,
        "dataset_attrs": {k: light.attrs.get(k) for k in ("velocity_kind", "depth_m")},
        "store_files": store_files,
        "series_parts": parts,
        "sha256": {**{k: v for k, v in (manifest or {}).get("sha256", {}).items()
                      if k.startswith(f"{STORE}/")},
                   **{f"{STORE}/{n}": _sha256(store / n) for n in [*store_files, *parts]
                      if manifest is None or f"{STORE}/{n}" not in manifest.get("sha256", {})}},
        "inputs": inputs_seen,
        "history": history,
    }
    if products is not None:
        t = time.perf_counter()
        f_station = coriolis_parameter(frame.stations["lat"].to_numpy(float))
        events = shedding_events(series, products.sources, frame, f_station, settings)
        n_events = len(events)
        provenance = {
            "coastmon_version": __version__, "command": "update", "state_version": number,
            "inputs": inputs_seen, "settings": settings.to_dict(),
            "versions": pipeline.versions(), "timings_s": timings,
            "n_time": int(series.sizes["time"]), "n_time_seen": int(seen_all.size),
            "n_time_filled": new_manifest["n_filled_total"],
            "grid_shape": list(metrics.shape), "deformation_radius_km": ld_km,
            "history": history,
        }
        # The outputs are published and the state committed in one section that holds
        # back SIGINT/SIGTERM/SIGHUP: an interrupt lands before both or after both.
        with staging_dir(state_dir / OUTPUTS, after_publish=lambda: _commit(
                state_dir, number, new_manifest, merged, seen_all)) as stage:
            pipeline.write_outputs(stage, prep, products, settings, provenance, series=series)
            events.to_csv(stage / "events.csv", index=False)
        timings["outputs_s"] = time.perf_counter() - t
    else:
        _commit(state_dir, number, new_manifest, merged, seen_all)
    _clean_leftovers(state_dir, f"v{number:06d}", set(store_files) | set(parts), state_id)
    return UpdateResult(state_dir, created, number, int(plan.new.size), plan.n_duplicate,
                        n_filled, int(seen_all.size), new_manifest["time_start"],
                        new_manifest["time_end"], products is not None, n_events, products,
                        notes, timings)


def _check_same_grid(ds: xr.Dataset, lon: np.ndarray, lat: np.ndarray, mask: np.ndarray,
                     manifest: dict[str, Any], where: str) -> None:
    new_lon = np.asarray(ds["lon"].values, np.float64)
    new_lat = np.asarray(ds["lat"].values, np.float64)
    problems = grid_differences(new_lon, new_lat, lon, lat, np.asarray(ds["mask"].values), mask)
    kind = ds.attrs.get("velocity_kind")
    stored_kind = manifest["dataset_attrs"].get("velocity_kind")
    if kind and stored_kind and kind != stored_kind:
        problems.append(f"{kind} velocity where the state holds {stored_kind} velocity")
    if problems:
        raise InputError(
            "The new data do not belong to this monitoring state: " + "; ".join(problems),
            where=where,
            todo="Give files of the same grid and variables as the state, or start a new state "
                 "folder for this grid",
        )


__all__ = ["STATE_FORMAT_VERSION", "STATE_MARKER", "UpdateResult", "load_geometry", "save_geometry",
           "time_seconds", "update"]
