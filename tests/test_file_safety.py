"""coastmon never deletes what it cannot prove it wrote; results are published whole.

Issue cases: ``update`` into a folder that is not a state, stale files in a reused
``--out``, a kill at every rename of a publication, dead runs' folders, an interrupt after
the result is complete, a closed stdout pipe, ``--out`` under a read-only parent, the
demo's record of its input.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from coastmon.cli import main
from coastmon.errors import OutputError
from coastmon.io import atomic, owned
from coastmon.io.atomic import JOURNAL, RESULT_MANIFEST, staging_dir
from coastmon.monitor import state as monitor_state


def _tree(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _dead_pid() -> int:
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    return int(proc.stdout)


# --------------------------------------------------------------------------- update
def test_update_never_touches_a_folder_that_is_not_a_state(tmp_path, capsys):
    project = tmp_path / "proj"
    (project / ".git").mkdir(parents=True)
    (project / "v2").mkdir()
    (project / "v2" / "paper.tex").write_text("x")
    (project / "store").mkdir()
    (project / "store" / "series-000001-abcdef.nc").write_text("looks like ours, is not")
    before = _tree(project)
    bad = tmp_path / "bad.nc"
    bad.write_text("not a NetCDF file")
    rc = main(["update", str(project), str(bad), "--no-progress"])
    err = capsys.readouterr().err
    assert rc == 2  # check: common practice, no source (exit 2 = user error)
    assert "not a coastmon monitoring state" in err and "coastmon-state.json" in err
    assert _tree(project) == before and (project / ".git").is_dir()


def test_first_update_that_fails_leaves_nothing_and_empty_folder_is_kept(tmp_path, capsys):
    bad = tmp_path / "bad.nc"
    bad.write_text("not a NetCDF file")
    assert main(["update", str(tmp_path / "new"), str(bad), "--no-progress"]) == 2
    assert not (tmp_path / "new").exists()
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["update", str(empty), str(bad), "--no-progress"]) == 2
    assert empty.is_dir() and list(empty.iterdir()) == []
    capsys.readouterr()


def test_damaged_marker_stops_with_a_clear_error(tmp_path, capsys):
    state = tmp_path / "state"
    state.mkdir()
    (state / monitor_state.STATE_MARKER).write_text("{not json")
    (state / "v000001").mkdir()
    bad = tmp_path / "bad.nc"
    bad.write_text("x")
    assert main(["update", str(state), str(bad), "--no-progress"]) == 2
    assert "marker file" in capsys.readouterr().err
    assert (state / "v000001").is_dir()


def test_cleaner_removes_only_provable_leftovers(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    state_id, made = monitor_state._claim(state)
    assert not made and len(state_id) == 16
    other, _ = monitor_state._claim(tmp_path / "other")
    (state / "store").mkdir()
    ours = state / ".v000002.partial-0123abcd"
    ours.mkdir()
    owned.write_marker(ours, "state-version", state_id=state_id)
    foreign = state / "v000003"  # our name pattern, another state's marker
    foreign.mkdir()
    owned.write_marker(foreign, "state-version", state_id=other)
    users = [state / "v000004", state / ".git", state / "store" / "notes.txt",
             state / "store" / "series-1.nc"]
    users[0].mkdir()
    (users[0] / "paper.tex").write_text("x")
    users[1].mkdir()
    users[2].write_text("x")
    users[3].write_text("x")
    stale = state / "store" / monitor_state._part_name(state_id, 2)
    stale.write_text("an uncommitted part")
    users.append(state / "store" / "series-000009-abcdef-01234567.nc")  # our pattern, no tag
    users[-1].write_text("x")
    users.append(state / "store" / monitor_state._part_name(other, 2))  # another state's tag
    users[-1].write_text("x")
    kept_part = state / "store" / "series-000001-123456.nc"
    kept_part.write_text("a committed part")
    monitor_state._clean_leftovers(state, None, {kept_part.name}, state_id)
    assert not ours.exists() and not stale.exists()
    assert foreign.is_dir() and kept_part.exists() and all(p.exists() for p in users)


# --------------------------------------------------------------------------- publication
def _publish(out: Path, files: dict[str, str]) -> None:
    with staging_dir(out) as stage:
        for rel, text in files.items():
            (stage / rel).parent.mkdir(parents=True, exist_ok=True)
            (stage / rel).write_text(text)


def test_reused_out_holds_one_run_and_keeps_user_files(tmp_path):
    out = tmp_path / "out"
    _publish(out, {"run.json": "old", "figures/hovmoller_rank2.png": "old",
                   "planted_truth.json": "old"})
    (out / "notes.txt").write_text("mine")
    (out / "figures" / "my_plot.png").write_text("mine")
    atomic.publication_notes()
    _publish(out, {"run.json": "new", "figures/hovmoller_rank1.png": "new"})
    assert _tree(out).keys() == {"run.json", "figures/hovmoller_rank1.png", RESULT_MANIFEST,
                                 "notes.txt", "figures/my_plot.png"}
    assert (out / "run.json").read_text() == "new"
    notes = atomic.publication_notes()
    assert len(notes) == 1 and "notes.txt" in notes[0] and "figures/my_plot.png" in notes[0]
    _publish(out, {"run.json": "newer"})
    assert (out / "figures" / "my_plot.png").exists()  # a folder with a user file stays
    assert not (out / "figures" / "hovmoller_rank1.png").exists()


def test_a_file_coastmon_did_not_write_is_never_replaced(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "run.json").write_text("the user's")
    with pytest.raises(OutputError, match="did not write"):
        _publish(out, {"run.json": "new", "sources.csv": "new"})
    assert _tree(out) == {"run.json": b"the user's"}


def test_manifest_cannot_reach_outside_the_folder(tmp_path):
    out = tmp_path / "out"
    _publish(out, {"run.json": "old"})
    victim = tmp_path / "victim.txt"
    victim.write_text("outside")
    manifest = json.loads((out / RESULT_MANIFEST).read_text())
    manifest["files"] += ["../victim.txt", str(victim), "./run.json/.."]
    (out / RESULT_MANIFEST).write_text(json.dumps(manifest))
    _publish(out, {"run.json": "new"})
    assert victim.read_text() == "outside"


_KILLER = textwrap.dedent("""
    import os, sys
    from pathlib import Path
    from coastmon.io import atomic
    out, limit = Path(sys.argv[1]), int(sys.argv[2])
    real, count = atomic._move, [0]
    def move(src, dst):
        if count[0] == limit:
            os._exit(9)  # as a SIGKILL: no clean-up runs
        count[0] += 1
        real(src, dst)
    atomic._move = move
    with atomic.staging_dir(out) as stage:
        for name in ("a.txt", "b.txt", "figures/c.png"):
            (stage / name).parent.mkdir(exist_ok=True)
            (stage / name).write_text("new " + name)
""")


def test_kill_at_every_rename_of_a_publication_never_mixes_two_runs(tmp_path):
    script = tmp_path / "killer.py"
    script.write_text(_KILLER)
    outcomes = []
    for limit in range(12):
        out = tmp_path / f"out{limit}"
        _publish(out, {"a.txt": "old a.txt", "figures/c.png": "old figures/c.png",
                       "old_only.txt": "old old_only.txt"})
        (out / "mine.txt").write_text("user")
        proc = subprocess.run([sys.executable, str(script), str(out), str(limit)],
                              capture_output=True, text=True, check=False)
        contents = {rel: data.decode() for rel, data in _tree(out).items()
                    if rel not in ("mine.txt", RESULT_MANIFEST)
                    and not rel.startswith(".coastmon-")}
        runs = {text.split(" ", 1)[0] for text in contents.values()}
        assert len(runs) <= 1, f"kill after {limit} renames mixed two runs: {contents}"
        if proc.returncode == 9:
            assert (out / JOURNAL).exists()
        atomic.recover_result_folder(out)
        after = _tree(out)
        assert after.pop("mine.txt") == b"user"
        manifest = json.loads(after.pop(RESULT_MANIFEST))
        assert sorted(after) == sorted(f for f in manifest["files"] if f != RESULT_MANIFEST)
        assert {v.decode().split(" ", 1)[0] for v in after.values()} in ({"new"}, {"old"})
        assert not [p for p in out.iterdir() if p.name.startswith(".coastmon-")]
        outcomes.append((proc.returncode, after.get("a.txt", b"").decode()))
        assert not list(tmp_path.glob(f".{out.name}.partial-*")) or proc.returncode == 9
    # the kill came at every rename (old files out, new in) and once after all of them
    assert [rc for rc, _ in outcomes].count(0) >= 1 and [rc for rc, _ in outcomes].count(9) >= 6


def test_dead_runs_folders_are_removed_live_and_foreign_ones_kept(tmp_path):
    dead = tmp_path / "coastmon-work-dead"
    dead.mkdir()
    (dead / owned.MARKER).write_text(json.dumps(
        {**owned.owner_record("work"), "pid": _dead_pid()}))
    (dead / "series.npy").write_bytes(b"0" * 100)
    live = tmp_path / "coastmon-work-live"
    live.mkdir()
    owned.write_marker(live, "work")
    reused = tmp_path / "coastmon-work-reused"  # a live pid, another start time: reused
    reused.mkdir()
    (reused / owned.MARKER).write_text(json.dumps(
        {**owned.owner_record("work"), "pid_start": "1"}))
    other_host = tmp_path / "coastmon-work-host"
    other_host.mkdir()
    (other_host / owned.MARKER).write_text(json.dumps(
        {**owned.owner_record("work"), "pid": _dead_pid(), "host": "elsewhere"}))
    users = tmp_path / "coastmon-work-mine"  # our name, no marker
    users.mkdir()
    (users / "data.nc").write_text("x")
    removed = owned.sweep(tmp_path, ("coastmon-work-*",))
    assert sorted(p.name for p in removed) == ["coastmon-work-dead", "coastmon-work-reused"]
    assert live.is_dir() and other_host.is_dir() and (users / "data.nc").exists()


def test_damaged_journal_stops_with_a_clear_error(tmp_path):
    out = tmp_path / "out"
    _publish(out, {"run.json": "old"})
    (out / JOURNAL).write_text("{broken")
    with pytest.raises(OutputError, match="damaged publication journal"):
        _publish(out, {"run.json": "new"})
    assert (out / "run.json").read_text() == "old"


# --------------------------------------------------------------------------- command line
def test_interrupt_after_the_result_is_complete_exits_0_with_a_note(tmp_path, capsys,
                                                                    monkeypatch):
    from coastmon import pipeline

    def analyze(inputs, out, settings):
        _publish(Path(out), {"run.json": "done"})
        raise KeyboardInterrupt  # Ctrl-C right after the publication

    monkeypatch.setattr(pipeline, "analyze", analyze)
    rc = main(["analyze", str(tmp_path / "in.nc"), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert rc == 0 and "after the results were complete" in err
    assert (tmp_path / "out" / "run.json").read_text() == "done"

    def analyze_early(inputs, out, settings):
        with staging_dir(out) as stage:
            (stage / "run.json").write_text("never")
            raise owned.Interrupted(15)

    monkeypatch.setattr(pipeline, "analyze", analyze_early)
    rc = main(["analyze", str(tmp_path / "in.nc"), "--out", str(tmp_path / "out2")])
    err = capsys.readouterr().err
    # check: common practice, no source (128 + SIGTERM 15)
    assert rc == 143 and "interrupted (SIGTERM)" in err and "nothing was written" in err
    assert not (tmp_path / "out2").exists()


def test_closed_stdout_does_not_claim_nothing_was_written(tmp_path):
    code = textwrap.dedent(f"""
        import sys
        from pathlib import Path
        from coastmon import cli, pipeline
        from coastmon.io.atomic import staging_dir
        class Result:
            def summary_text(self):
                return "line\\n" * 200000
        def analyze(inputs, out, settings):
            with staging_dir(out) as stage:
                (stage / "run.json").write_text("done")
            return Result()
        pipeline.analyze = analyze
        sys.exit(cli.main(["analyze", "in.nc", "--out", {str(tmp_path / "out")!r}]))
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    proc.stdout.close()  # as `coastmon analyze ... | head -0`
    err = proc.stderr.read()
    proc.wait(timeout=120)
    assert proc.returncode == 0, err
    assert "nothing was written" not in err and "results are complete" in err
    assert "Traceback" not in err and "Exception ignored" not in err
    assert (tmp_path / "out" / "run.json").read_text() == "done"


def test_out_under_a_read_only_parent(tmp_path):
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("needs root and 'mount' to make a read-only parent with a writable --out")
    parent = tmp_path / "parent"
    parent.mkdir()
    mounts = []
    try:
        for cmd in (["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(parent)],
                    ["mkdir", str(parent / "out")],
                    ["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(parent / "out")],
                    ["mount", "-o", "remount,ro", str(parent)]):
            done = subprocess.run(cmd, capture_output=True, text=True, check=False)
            if done.returncode != 0:
                pytest.skip(f"could not build a read-only parent here: {done.stderr.strip()}")
            if cmd[0] == "mount" and "remount,ro" not in cmd:
                mounts.append(cmd[-1])
        out = parent / "out"
        assert not os.access(parent, os.W_OK) and os.access(out, os.W_OK)
        (out / "notes.txt").write_text("mine")
        _publish(out, {"run.json": "first"})
        _publish(out, {"run.json": "second", "sources.csv": "s"})
        assert _tree(out) == {"run.json": b"second", "sources.csv": b"s",
                              "notes.txt": b"mine",
                              RESULT_MANIFEST: (out / RESULT_MANIFEST).read_bytes()}
        with pytest.raises(OutputError, match="read-only"):
            _publish(parent / "new_out", {"run.json": "x"})
    finally:
        for mount in reversed(mounts):
            subprocess.run(["umount", mount], check=False)


def test_library_warnings_do_not_reach_the_terminal(tmp_path, capsys, monkeypatch):
    import warnings

    import numpy as np

    from coastmon import pipeline

    def analyze(inputs, out, settings):
        np.nanmean(np.full(3, np.nan))  # numpy: "Mean of empty slice"
        warnings.warn_explicit("chunks separate the stored chunks", UserWarning,
                               "dask/array/core.py", 1, module="dask.array.core")
        raise OutputError("stop here", where="test")

    monkeypatch.setattr(pipeline, "analyze", analyze)
    assert main(["analyze", "in.nc", "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "Mean of empty slice" not in err and "chunks" not in err
    assert err.strip() == "coastmon: stop here. Where: test."
