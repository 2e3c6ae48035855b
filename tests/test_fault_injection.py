"""Fault injection: signals at many timings, a full disk, random damage to a state folder.

Every case runs the real command (a subprocess for signals) on a small invented record and
then checks what a user relies on:

* no debris is left that a later run does not remove (temporary folders in TMPDIR, staging
  folders beside or inside ``--out``, partial version folders of a state);
* ``--out`` is absent, or holds the previous run unchanged, or a complete new run (every
  file its ``coastmon-files.json`` lists, the same sources as an uninterrupted run), never a
  mix;
* a monitoring state either recovers exactly (accumulators bit-identical to an
  uninterrupted run) or stops with one clear paragraph and exit status 2;
* files coastmon did not write survive every case.

Outcomes of every case are appended to ``$COASTMON_FAULT_LOG`` when that variable is set
(the counts quoted in the issue's closing note come from there).
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import signal
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from coastmon.cli import main
from coastmon.io.atomic import JOURNAL, RESULT_MANIFEST
from coastmon.scenario import default_params, make_scenario

TOML = ("[signals]\neddy_period_days = [10.0, 60.0]\n[sources]\nn_bootstrap = 20\n"
        "[coast]\nray_length_km = 300.0\nstation_spacing_km = 15.0\n"
        "[output]\nfigures = false\nreport = false\n")
PIECES = [(0, 120), (120, 180), (180, 240)]


def _log(case: str, outcome: str) -> None:
    path = os.environ.get("COASTMON_FAULT_LOG")
    if path:
        with open(path, "a", encoding="utf-8") as fh:
            fh.write(f"{case}\t{outcome}\n")


def _env(tmpdir: Path) -> dict[str, str]:
    env = dict(os.environ, TMPDIR=str(tmpdir), PYTHONUNBUFFERED="1")
    env.pop("COVERAGE_PROCESS_START", None)
    return env


def _cli(argv: list[str], tmpdir: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "coastmon", *argv], capture_output=True,
                          text=True, env=_env(tmpdir), timeout=300, check=False)


def _signalled(argv: list[str], tmpdir: Path, delay_s: float, signum: int
               ) -> tuple[int, str]:
    proc = subprocess.Popen([sys.executable, "-m", "coastmon", *argv], env=_env(tmpdir),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    time.sleep(delay_s)
    if proc.poll() is None:
        proc.send_signal(signum)
    try:
        _, err = proc.communicate(timeout=300)
    except subprocess.TimeoutExpired:  # a hung run (e.g. a deadlock) fails, never stalls
        proc.kill()
        _, err = proc.communicate()
        pytest.fail(f"coastmon {' '.join(argv)} did not end within 300 s of signal {signum}")
    return proc.returncode, err


@pytest.fixture(scope="module")
def record(tmp_path_factory):
    """A 240-day invented record on a 0.16 degree grid, in three pieces, with reference
    runs: analyze of the whole, and states after the first piece and after two pieces."""
    base = default_params()
    params = dataclasses.replace(base, n_days=240, resolution_deg=0.16, lat_min=33.0,
                                 lat_max=37.5, lon_min=-41.0, capes=base.capes[1:3],
                                 sources=base.sources[:2], islands=())
    root = tmp_path_factory.mktemp("faults")
    nc, _ = make_scenario(params, root / "data")
    pieces = []
    with xr.open_dataset(nc) as whole:
        for i, (a, b) in enumerate(PIECES):
            pieces.append(root / f"piece{i}.nc")
            whole.isel(time=slice(a, b)).to_netcdf(pieces[-1])
    toml = root / "small.toml"
    toml.write_text(TOML, encoding="utf-8")
    tmpdir = root / "systmp"
    tmpdir.mkdir()
    for name in ("warm-up", "ref"):  # the second run is timed (caches warm, as later)
        t = time.perf_counter()
        done = _cli(["analyze", str(nc), "--out", str(root / name), "--settings", str(toml),
                     "--no-progress"], tmpdir)
        analyze_s = time.perf_counter() - t
        assert done.returncode == 0, done.stderr
    state1 = root / "state1"
    assert _cli(["update", str(state1), str(pieces[0]), "--settings", str(toml),
                 "--no-progress"], tmpdir).returncode == 0
    state2 = root / "state2"
    shutil.copytree(state1, state2)
    t = time.perf_counter()
    done = _cli(["update", str(state2), str(pieces[1]), "--no-progress"], tmpdir)
    update_s = time.perf_counter() - t
    assert done.returncode == 0, done.stderr
    return types.SimpleNamespace(root=root, nc=nc, pieces=pieces, toml=toml, ref=root / "ref",
                                 state1=state1, state2=state2, analyze_s=analyze_s,
                                 update_s=update_s)


# --------------------------------------------------------------------------- checks
def _debris(tmpdir: Path, out: Path) -> list[str]:
    found = [p.name for p in tmpdir.iterdir() if p.name.startswith("coastmon-")
             and not p.name.startswith("coastmon-error-")]
    if out.parent.is_dir():
        found += [p.name for p in out.parent.iterdir() if ".partial-" in p.name]
    if out.is_dir():
        found += [p.name for p in out.iterdir() if p.name.startswith(".coastmon-")]
    return found


def _tree(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _assert_complete(out: Path, ref: Path, user: dict[str, bytes]) -> None:
    """A complete result: exactly the files its manifest lists, plus the user's files, and
    the sources of the uninterrupted reference run."""
    assert not (out / JOURNAL).exists()
    manifest = json.loads((out / RESULT_MANIFEST).read_text())
    files = set(_tree(out))
    assert files == set(manifest["files"]) | set(user), files ^ set(manifest["files"])
    # check: an uninterrupted run of the same command on the same input (independent run)
    assert (out / "sources.csv").read_text() == (ref / "sources.csv").read_text()
    for name, data in user.items():
        assert (out / name).read_bytes() == data


def _moments(state: Path) -> dict[str, np.ndarray]:
    current = (state / "current").read_text().strip()
    with np.load(state / current / "moments.npz", allow_pickle=False) as data:
        return {k: np.array(data[k]) for k in data.files}


def _assert_same_moments(state: Path, ref: Path) -> None:
    a, b = _moments(state), _moments(ref)
    assert sorted(a) == sorted(b)
    for key in a:
        # check: Chan, Golub & LeVeque 1983 (same merges in the same order: bit-identical)
        assert np.array_equal(a[key], b[key], equal_nan=a[key].dtype.kind in "fc"), key


def _one_paragraph(err: str) -> None:
    text = err.strip()
    assert text.startswith("coastmon: ") and "\n" not in text, err
    assert "Traceback" not in err


# --------------------------------------------------------------------------- analyze
FRACTIONS = (0.4, 0.75, 1.0)
SIGNALS = (("INT", signal.SIGINT), ("TERM", signal.SIGTERM), ("KILL", signal.SIGKILL))
FAST = {("TERM", 0.75, False), ("KILL", 1.0, True)}


def _cases():
    """Every signal at every timing into a new --out; into a reused --out only near the
    end, where the results are published."""
    return [pytest.param(name, signum, frac, existing,
                         id=f"{name}-{frac}-{'reused' if existing else 'new'}-out",
                         marks=() if (name, frac, existing) in FAST else pytest.mark.slow)
            for name, signum in SIGNALS for frac in FRACTIONS for existing in (False, True)
            if not existing or frac > 0.7]


@pytest.mark.parametrize(("name", "signum", "frac", "existing"), _cases())
def test_signal_during_analyze(record, tmp_path, name, signum, frac, existing):
    tmpdir = tmp_path / "systmp"
    tmpdir.mkdir()
    out = tmp_path / "out"
    user = {}
    if existing:
        shutil.copytree(record.ref, out)
        # an older run's output that the new run does not write: must go, as a whole
        manifest = json.loads((out / RESULT_MANIFEST).read_text())
        manifest["files"].append("planted_truth.json")
        (out / RESULT_MANIFEST).write_text(json.dumps(manifest))
        (out / "planted_truth.json").write_text("{}")
        (out / "my_notes.txt").write_text("the user's own file")
        user = {"my_notes.txt": b"the user's own file"}
    before = _tree(out) if existing else None
    argv = ["analyze", str(record.nc), "--out", str(out), "--settings", str(record.toml),
            "--no-progress"]
    rc, err = _signalled(argv, tmpdir, frac * record.analyze_s, signum)
    if rc == 0:
        outcome = ("signal after the result: complete, exit 0 with a note"
                   if "after the results were complete" in err
                   else "finished before the signal: complete")
        _assert_complete(out, record.ref, user)
        assert not (out / "planted_truth.json").exists()
    elif signum == signal.SIGKILL:
        assert rc == -signal.SIGKILL
        outcome = "killed"
    else:
        # check: common practice, no source (128 + signal number, as shells report)
        assert rc == 128 + signum, err
        assert f"interrupted (SIG{name})" in err
        _one_paragraph(err)
        outcome = "interrupted, nothing written"
    if rc != 0:
        if signum != signal.SIGKILL:
            assert _debris(tmpdir, out) == []
        if existing and not (out / JOURNAL).exists():
            if signum != signal.SIGKILL or _tree(out) == before:
                assert _tree(out) == before  # the old run, untouched
            else:  # killed after the publication: the new run, complete
                _assert_complete(out, record.ref, user)
                outcome += " after the result was published (complete)"
        elif not existing:
            assert not out.exists() or _debris(tmpdir, out) == [] and not any(out.iterdir()) \
                or (out / RESULT_MANIFEST).exists()
        if (out / RESULT_MANIFEST).exists() and not (out / JOURNAL).exists() and not existing:
            _assert_complete(out, record.ref, user)
        had_debris = bool(_debris(tmpdir, out))
        again = _cli(argv, tmpdir)
        assert again.returncode == 0, again.stderr
        _assert_complete(out, record.ref, user)
        assert _debris(tmpdir, out) == []
        outcome += "; debris removed by the next run" if had_debris else "; no debris"
    _log(f"analyze {'reused' if existing else 'new'} SIG{name} at {frac:.2f}", outcome)


# --------------------------------------------------------------------------- update
UPDATE_FRACTIONS = (0.5, 0.9)
FAST_UPDATE = {("KILL", 0.9)}


@pytest.mark.parametrize(("name", "signum", "frac"), [
    pytest.param(n, s, f, id=f"{n}-{f}",
                 marks=() if (n, f) in FAST_UPDATE else pytest.mark.slow)
    for n, s in SIGNALS for f in UPDATE_FRACTIONS])
def test_signal_during_update(record, tmp_path, name, signum, frac):
    tmpdir = tmp_path / "systmp"
    tmpdir.mkdir()
    state = tmp_path / "state"
    shutil.copytree(record.state1, state)
    (state / "my_notes.txt").write_text("kept")
    (state / "store" / "readme.txt").write_text("also kept")
    argv = ["update", str(state), str(record.pieces[1]), "--no-progress"]
    rc, err = _signalled(argv, tmpdir, frac * record.update_s, signum)
    current = (state / "current").read_text().strip()
    if rc == 0:
        assert current == "v000002"
        outcome = ("signal after the update: complete, exit 0 with a note"
                   if "after the results were complete" in err else "finished before the signal")
    else:
        if signum == signal.SIGKILL:
            assert rc == -signal.SIGKILL
            outcome = f"killed at {current}"
        else:
            # check: common practice, no source (128 + signal number)
            assert rc == 128 + signum, err
            _one_paragraph(err)
            assert current == "v000001"
            assert _debris(tmpdir, state / "outputs") == []
            assert not [p for p in state.iterdir() if ".partial-" in p.name]
            outcome = "interrupted at v000001"
    assert current in ("v000001", "v000002")
    again = _cli(argv, tmpdir)
    assert again.returncode == 0, again.stderr
    _assert_same_moments(state, record.state2)
    assert (state / "my_notes.txt").read_text() == "kept"
    assert (state / "store" / "readme.txt").read_text() == "also kept"
    assert _debris(tmpdir, state / "outputs") == []
    assert not [p for p in state.iterdir() if ".partial-" in p.name]
    assert not list((state / "store").glob("*.part"))
    manifest = json.loads((state / "v000002" / "manifest.json").read_text())
    parts = {p.name for p in (state / "store").iterdir()} - {"readme.txt"}
    assert parts == set(manifest["store_files"]) | set(manifest["series_parts"])
    _log(f"update SIG{name} at {frac:.2f}", outcome + "; recovered exactly")


# --------------------------------------------------------------------------- full disk
def _mount_tmpfs(path: Path, size: str) -> None:
    path.mkdir()
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("the full-disk test mounts a small tmpfs, which needs root and 'mount'")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                          capture_output=True, text=True, check=False)
    if done.returncode != 0:
        pytest.skip(f"the full-disk test could not mount a tmpfs here: {done.stderr.strip()}")


@pytest.fixture
def disks(tmp_path):
    """Two small tmpfs: 120 kB (too small for any result) and 8 MB (filled up later)."""
    mounted = []
    try:
        for name, size in (("disk", "120k"), ("big", "8m")):
            _mount_tmpfs(tmp_path / name, size)
            mounted.append(tmp_path / name)
        yield mounted
    finally:
        for path in mounted:
            subprocess.run(["umount", str(path)], check=False)


@pytest.mark.slow
def test_full_disk(record, tmp_path, disks):
    small_disk, big_disk = disks
    tmpdir = tmp_path / "systmp"
    tmpdir.mkdir()
    (small_disk / "keep.txt").write_text("the user's own file")
    out = small_disk / "out"
    argv = ["analyze", str(record.nc), "--out", str(out), "--settings", str(record.toml),
            "--no-progress"]
    done = _cli(argv, tmpdir)
    assert done.returncode == 2, done.stderr
    _one_paragraph(done.stderr)
    assert "disk is full" in done.stderr
    assert sorted(p.name for p in small_disk.iterdir()) == ["keep.txt"]
    assert _debris(tmpdir, out) == []
    _log("analyze --out on a full disk", "exit 2, disk is full, nothing left")
    # the streaming pass's working folder on the full disk (TMPDIR)
    done = _cli(["analyze", str(record.nc), "--out", str(tmp_path / "out2"), "--settings",
                 str(record.toml), "--no-progress"], small_disk)
    assert done.returncode == 2, done.stderr
    _one_paragraph(done.stderr)
    assert "TMPDIR" in done.stderr and "disk is full" in done.stderr
    assert sorted(p.name for p in small_disk.iterdir()) == ["keep.txt"]
    assert not (tmp_path / "out2").exists()
    _log("analyze with TMPDIR on a full disk", "exit 2, disk is full, names TMPDIR")
    # a monitoring state on a disk that fills up during an update
    state = big_disk / "state"
    shutil.copytree(record.state1, state, ignore=shutil.ignore_patterns("outputs"))
    free = shutil.disk_usage(big_disk).free
    (big_disk / "filler.bin").write_bytes(b"\0" * max(0, free - 64 * 1024))
    done = _cli(["update", str(state), str(record.pieces[1]), "--no-progress"], tmpdir)
    assert done.returncode == 2, done.stderr
    _one_paragraph(done.stderr)
    assert (state / "current").read_text().strip() == "v000001"
    (big_disk / "filler.bin").unlink()
    done = _cli(["update", str(state), str(record.pieces[1]), "--no-progress"], tmpdir)
    assert done.returncode == 0, done.stderr
    _assert_same_moments(state, record.state2)
    assert (small_disk / "keep.txt").read_text() == "the user's own file"
    _log("update on a full disk, then with space", "exit 2 at v000001; then recovered exactly")


# --------------------------------------------------------------------------- damage
_DAMAGE = st.lists(st.tuples(
    st.sampled_from(["truncate", "delete", "garble", "add_file", "add_dir"]),
    st.integers(min_value=0, max_value=10_000),
    st.integers(min_value=0, max_value=255)), min_size=1, max_size=3)


def _damage(state: Path, ops) -> tuple[list[str], dict[Path, bytes]]:
    """Apply ``ops``; returns a description and the user files planted (path -> content)."""
    planted: dict[Path, bytes] = {}
    done = []
    for op, pick, byte in ops:
        files = sorted(p for p in state.rglob("*") if p.is_file() and p not in planted
                       and p.name != ".lock")
        folders = sorted(p for p in [state, *state.rglob("*")] if p.is_dir())
        if op in ("add_file", "add_dir"):
            where = folders[pick % len(folders)]
            name = ["notes.txt", "v000009", ".hidden", "series-000009-abcdef.nc",
                    "current.bak"][pick % 5]
            target = where / name
            if target.exists():
                continue
            if op == "add_dir":
                target.mkdir()
                target = target / "paper.tex"
            data = f"user data {pick}".encode()
            target.write_bytes(data)
            planted[target] = data
            done.append(f"{op} {target.relative_to(state)}")
            continue
        path = files[pick % len(files)]
        size = path.stat().st_size
        if op == "truncate":
            path.write_bytes(path.read_bytes()[: pick % max(size, 1)])
        elif op == "delete":
            path.unlink()
        else:
            data = bytearray(path.read_bytes())
            if not data:
                continue
            k = pick % len(data)
            data[k] = byte if data[k] != byte else (byte + 1) % 256
            path.write_bytes(bytes(data))
        done.append(f"{op} {path.relative_to(state)} at {pick % max(size, 1)}")
    return done, planted


@pytest.mark.slow
@settings(max_examples=int(os.environ.get("COASTMON_DAMAGE_EXAMPLES", "8")), deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=_DAMAGE)
@example(ops=[("add_file", 20, 0)])  # a user's file inside the version folder superseded
@example(ops=[("add_file", 3493, 0)])  # a user's file named like a series part
def test_random_damage_to_a_state(record, tmp_path_factory, capsys, ops):
    work = tmp_path_factory.mktemp("damage")
    state = work / "state"
    shutil.copytree(record.state1, state)
    what, planted = _damage(state, ops)
    capsys.readouterr()
    rc = main(["update", str(state), str(record.pieces[1]), "--no-progress"])
    err = capsys.readouterr().err
    for path, data in planted.items():
        assert path.read_bytes() == data, f"{path} was changed or removed after {what}"
    assert rc in (0, 2), f"exit {rc} after {what}: {err}"
    if rc == 0:
        _assert_same_moments(state, record.state2)
        outcome = "recovered exactly"
    else:
        _one_paragraph(err.split("\n")[-2] if err.count("\n") > 1 else err)
        outcome = "stopped: " + err.strip().split(". ")[0][10:80]
    _log("damage: " + "; ".join(what), outcome)
