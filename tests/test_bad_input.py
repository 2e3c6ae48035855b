"""Bad input and faults through the real command line.

Every case runs ``coastmon`` on a file of the corpus in ``tests/bad_inputs.py`` (most
in-process through ``coastmon.cli.main``, a few in a real subprocess to prove no traceback
reaches the terminal) and checks the contract of DEVELOPERS.md: exit status 2 for a user
error (130 for an interrupt), one paragraph on stderr naming the file, variable or option
concerned and no traceback, no output folder or staging folder left behind (or the
existing output folder unchanged), and every input byte-identical.

Runtime budget of this file: under 90 s on 2 cores.
"""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import bad_inputs as bi
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from coastmon.cli import main

QUIET = ["--no-progress"]
LEAN = "[output]\nfigures = false\nreport = false\n"
"""Settings for fault cases that need a whole run but not its figures."""


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    folder = tmp_path_factory.mktemp("corpus")
    cases = bi.build_corpus(folder)
    cases["holes"] = [bi.holes_file(folder)]
    cases["zarr"] = [bi.zarr_store(folder, nt=20)]
    lean = folder / "lean.toml"
    lean.write_text(LEAN, encoding="utf-8")
    cases["lean_settings"] = [lean]
    return folder, cases


def _inputs(corpus) -> list[Path]:
    folder, _ = corpus
    return sorted(folder.iterdir())


def _in_process(argv: list[str], capsys) -> tuple[int, str, str]:
    capsys.readouterr()
    rc = main(argv)
    out, err = capsys.readouterr()
    return rc, out, err


def _subprocess(argv: list[str], cwd: Path, env: dict[str, str] | None = None
                ) -> tuple[int, str, str]:
    proc = subprocess.run([sys.executable, "-m", "coastmon", *argv], capture_output=True,
                          text=True, cwd=cwd, timeout=120, env=env)
    return proc.returncode, proc.stdout, proc.stderr


def _snapshot(folder: Path) -> dict[str, str]:
    return bi.sha256_tree([folder]) if folder.exists() else {}


def _assert_refused(rc: int, err: str, out_dir: Path, names: list[str],
                    inputs_before: dict[str, str], inputs: list[Path],
                    out_before: dict[str, str] | None = None, code: int = 2) -> None:
    # check: common practice, no source (exit status 2 = usage error, as argparse does)
    assert rc == code, err
    assert "Traceback" not in err
    text = err.strip()
    assert text.startswith("coastmon: ")
    assert "\n" not in text, f"more than one paragraph on stderr:\n{err}"
    for name in names:
        assert name in text, f"{name!r} not named in: {text}"
    if out_before is None:
        assert not out_dir.exists()
    else:
        assert _snapshot(out_dir) == out_before
    assert not [p for p in out_dir.parent.iterdir() if ".partial-" in p.name]
    assert bi.sha256_tree(inputs) == inputs_before


# --------------------------------------------------------------------------- corpus


IN_PROCESS_CASES = {
    # case: (command, names the message must contain)
    "zero_size": ("analyze", ["empty.nc", "empty"]),
    "no_velocity": ("analyze", ["temperature_only.nc", "temp", "ingest.u_var"]),
    "no_latlon": ("analyze", ["no_latlon.nc", "latitude"]),
    "all_missing": ("analyze", ["all_missing.nc", "missing"]),
    "mismatched_shapes": ("analyze", ["mismatched_shapes.nc", "lat_short"]),
    "lat_out_of_range": ("analyze", ["lat_out_of_range.nc", "'lat'", "90"]),
    "unknown_units": ("analyze", ["unknown_units.nc", "'u'", "leagues per watch"]),
    "single_step": ("analyze", ["single_step.nc", "1 time step"]),
    "time_repeats": ("analyze", ["time_repeats.nc", "steps 149 and 150"]),
    "time_backwards": ("analyze", ["time_backwards.nc", "steps 100 and 101"]),
    "all_land": ("analyze", ["all_land.nc", "no sea"]),
    "all_sea": ("analyze", ["all_sea.nc", "no land"]),
    "record_too_short": ("analyze", ["sixty_days.nc", "60 days", "signals.eddy_period_days"]),
    "absurd_first_step": ("analyze", ["absurd.nc", "u (m s-1)", "y=5, x=5"]),
    "inf_later_step": ("analyze", ["inf_later.nc", "u (m s-1)", "y=7, x=3"]),
    "damaged_chunk": ("analyze", ["damaged_chunk.nc", "'u'", "damaged"]),
    "no_velocity_coast": ("coast", ["temperature_only.nc", "ingest.mask_var"]),
    "all_land_coast": ("coast", ["all_land.nc", "no sea"]),
}


@pytest.mark.parametrize("case", sorted(IN_PROCESS_CASES))
def test_bad_file_is_refused_cleanly(case, corpus, tmp_path, capsys):
    _, cases = corpus
    command, names = IN_PROCESS_CASES[case]
    paths = cases[case.removesuffix("_coast")]
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    out = tmp_path / "out"
    rc, _, err = _in_process([command, *map(str, paths), "--out", str(out)]
                             + (QUIET if command == "analyze" else []), capsys)
    _assert_refused(rc, err, out, names, before, inputs)


def test_record_too_short_is_refused_before_the_streaming_pass(corpus, tmp_path, capsys,
                                                               monkeypatch):
    _, cases = corpus
    calls = []
    monkeypatch.setattr("coastmon.pipeline.run_pass", lambda *a, **k: calls.append(a))
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    rc, _, err = _in_process(["analyze", str(cases["record_too_short"][0]), "--out",
                              str(tmp_path / "out"), *QUIET], capsys)
    # check: Torrence & Compo 1998 sec. 3g: the Morlet cone of influence at the middle of
    # an N-step record is (4 pi / (6 + sqrt(38))) N dt / (2 sqrt 2) = 0.365 N dt, which must
    # reach 120 d, so N dt >= 328.5 d; the message gives the rounded-up 329
    assert "329 days" in err
    _assert_refused(rc, err, tmp_path / "out", ["sixty_days.nc"], before, inputs)
    assert calls == []


SUBPROCESS_CASES = {
    "missing_file": ("analyze", ["nowhere.nc", "does not exist"]),
    "text_file": ("analyze", ["notes.nc", "neither NetCDF nor Zarr"]),
    "truncated": ("analyze", ["cut_in_half.nc", "truncated"]),
    "all_sea": ("coast", ["all_sea.nc", "no land"]),
}


@pytest.mark.parametrize("case", sorted(SUBPROCESS_CASES))
def test_bad_file_in_a_real_process_prints_no_traceback(case, corpus, tmp_path):
    _, cases = corpus
    command, names = SUBPROCESS_CASES[case]
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    out = tmp_path / "out"
    rc, _, err = _subprocess([command, *map(str, cases[case]), "--out", str(out)]
                             + (QUIET if command == "analyze" else []), cwd=tmp_path)
    _assert_refused(rc, err, out, names, before, inputs)


SETTINGS_CASES = {
    "unknown_key": ("[coast]\nstation_spacing = 10.0\n",
                    ["station_spacing", "[coast]", "station_spacing_km"]),
    "wrong_type": ('[signals]\neddy_period_days = "long"\n',
                   ["[signals] eddy_period_days", "Expected a list"]),
    "unknown_section": ("[plots]\ndpi = 100\n", ["[plots]"]),
    "not_toml": ("[coast\nresample_km = \n", ["not valid TOML"]),
}


@pytest.mark.parametrize("case", sorted(SETTINGS_CASES))
def test_bad_settings_file_is_refused(case, corpus, tmp_path, capsys):
    _, cases = corpus
    text, names = SETTINGS_CASES[case]
    toml = tmp_path / f"{case}.toml"
    toml.write_text(text, encoding="utf-8")
    inputs = [*_inputs(corpus), toml]
    before = bi.sha256_tree(inputs)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(tmp_path / "out"),
                              "--settings", str(toml), *QUIET], capsys)
    _assert_refused(rc, err, tmp_path / "out", [f"{case}.toml", *names], before, inputs)


def test_bad_settings_in_a_real_process(corpus, tmp_path):
    _, cases = corpus
    toml = tmp_path / "typo.toml"
    toml.write_text("[sources]\nn_bootstraps = 50\n", encoding="utf-8")
    inputs = [*_inputs(corpus), toml]
    before = bi.sha256_tree(inputs)
    rc, _, err = _subprocess(["analyze", str(cases["holes"][0]), "--out", str(tmp_path / "out"),
                              "--settings", str(toml), *QUIET], cwd=tmp_path)
    _assert_refused(rc, err, tmp_path / "out", ["typo.toml", "n_bootstraps", "n_bootstrap"],
                    before, inputs)


def test_unknown_gis_format_is_refused(corpus, tmp_path, capsys):
    _, cases = corpus
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(tmp_path / "out"),
                              "--gis", "gpkg,kml", *QUIET], capsys)
    _assert_refused(rc, err, tmp_path / "out", ["--gis", "kml"], before, inputs)


@pytest.mark.parametrize("where", ["input_folder", "inside_zarr", "input_file"])
def test_output_folder_may_not_be_or_hold_an_input(where, corpus, tmp_path, capsys):
    folder, cases = corpus
    zarr = cases["zarr"][0]
    source, out = {
        "input_folder": (cases["holes"][0], folder),
        "inside_zarr": (zarr, zarr / "results"),
        "input_file": (cases["holes"][0], cases["holes"][0]),
    }[where]
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    out_before = _snapshot(out) if out.is_dir() else None
    rc, _, err = _in_process(["analyze", str(source), "--out", str(out), *QUIET], capsys)
    assert rc == 2 and "Traceback" not in err
    assert str(out) in err
    if out_before is not None:
        _assert_refused(rc, err, out, [], before, inputs, out_before=out_before)
    else:
        assert not (zarr / "results").exists()
        assert bi.sha256_tree(inputs) == before


# --------------------------------------------------------------------------- faults


def test_interrupt_inside_the_streaming_pass_leaves_nothing(corpus, tmp_path, capsys,
                                                            monkeypatch):
    _, cases = corpus
    import coastmon.pipeline as pipeline

    real = pipeline.run_pass
    chunks_seen = []

    def interrupted(*args, **kwargs):
        def stop(done, total):
            chunks_seen.append((done, total))
            raise KeyboardInterrupt
        return real(*args, progress=stop, **kwargs)

    monkeypatch.setattr(pipeline, "run_pass", interrupted)
    systmp = tmp_path / "systmp"
    systmp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(systmp))
    toml = tmp_path / "chunks.toml"
    toml.write_text("[ingest]\ntime_chunk = 60\n", encoding="utf-8")
    inputs = [*_inputs(corpus), toml]
    before = bi.sha256_tree(inputs)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(tmp_path / "out"),
                              "--settings", str(toml), *QUIET], capsys)
    # check: common practice, no source (128 + SIGINT 2 is the shell's status for Ctrl-C)
    _assert_refused(rc, err, tmp_path / "out", ["interrupted"], before, inputs, code=130)
    # check: planted truth, 360 steps in chunks of 60 = 6 chunks; interrupted after the first
    assert chunks_seen == [(1, 6)]
    assert list(systmp.iterdir()) == []


def _existing_out(tmp_path: Path) -> tuple[Path, dict[str, str]]:
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("kept by the user\n", encoding="utf-8")
    (out / "sources.csv").write_text("an older run\n", encoding="utf-8")
    (out / "figures").mkdir()
    (out / "figures" / "old.png").write_bytes(b"\x89PNG old")
    # an older coastmon run: its manifest lists what it wrote (the notes are the user's)
    (out / "coastmon-files.json").write_text(json.dumps(
        {"format": "coastmon result folder", "format_version": 1,
         "files": ["sources.csv", "figures/old.png", "coastmon-files.json"],
         "folders": ["figures"]}), encoding="utf-8")
    return out, _snapshot(out)


def test_read_only_output_folder(corpus, tmp_path, capsys, monkeypatch):
    _, cases = corpus
    inputs = [*_inputs(corpus)]
    before = bi.sha256_tree(inputs)
    out = tmp_path / "out"
    real_mkdir = os.mkdir

    def refuse(path, *args, **kwargs):
        if Path(path).parent == tmp_path:
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_mkdir(path, *args, **kwargs)

    monkeypatch.setattr(os, "mkdir", refuse)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(out),
                              "--settings", str(cases["lean_settings"][0]), *QUIET], capsys)
    _assert_refused(rc, err, out, [str(tmp_path), "permission was denied"], before, inputs)


def test_permission_lost_while_publishing_restores_the_old_folder(corpus, tmp_path, capsys,
                                                                   monkeypatch):
    _, cases = corpus
    inputs = [*_inputs(corpus)]
    before = bi.sha256_tree(inputs)
    out, out_before = _existing_out(tmp_path)
    real_replace = os.replace
    moved_in = []

    def flaky(src, dst, *args, **kwargs):
        # one rename refused part-way (permission lost, then given back for the undo)
        if Path(dst).parent == out or Path(dst).parent.parent == out:
            moved_in.append(dst)
            if len(moved_in) == 4:
                raise PermissionError(errno.EACCES, "Permission denied", str(dst))
        return real_replace(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", flaky)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(out), *QUIET],
                             capsys)
    assert len(moved_in) > 4  # the fault struck part-way through the publication
    _assert_refused(rc, err, out, [str(out), "permission was denied"], before, inputs,
                    out_before=out_before)


def test_full_disk_while_writing_outputs(corpus, tmp_path, capsys, monkeypatch):
    _, cases = corpus
    inputs = [*_inputs(corpus)]
    before = bi.sha256_tree(inputs)
    out, out_before = _existing_out(tmp_path)

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(out),
                              "--settings", str(cases["lean_settings"][0]), *QUIET], capsys)
    _assert_refused(rc, err, out, ["the disk is full", "Free some space"], before, inputs,
                    out_before=out_before)


def test_full_disk_in_the_streaming_pass_work_folder(corpus, tmp_path, capsys, monkeypatch):
    _, cases = corpus
    inputs = [*_inputs(corpus)]
    before = bi.sha256_tree(inputs)
    systmp = tmp_path / "systmp"
    systmp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(systmp))

    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(np.lib.format, "open_memmap", full)
    rc, _, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(tmp_path / "out"),
                              *QUIET], capsys)
    _assert_refused(rc, err, tmp_path / "out",
                    ["the disk is full", str(systmp), "TMPDIR"], before, inputs)
    assert list(systmp.iterdir()) == []


def test_failed_first_update_leaves_no_state_folder(corpus, tmp_path, capsys):
    _, cases = corpus
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    state = tmp_path / "state"
    rc, _, err = _in_process(["update", str(state), str(cases["text_file"][0]), *QUIET], capsys)
    _assert_refused(rc, err, state, ["notes.nc"], before, inputs)


def test_compare_refuses_folders_that_are_not_results(corpus, tmp_path, capsys):
    folder, _ = corpus
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    rc, _, err = _in_process(["compare", str(folder), str(tmp_path / "absent"), "--out",
                              str(tmp_path / "out")], capsys)
    _assert_refused(rc, err, tmp_path / "out", [str(folder), "sources.csv"], before, inputs)


# --------------------------------------------------------------------------- holes succeed


def test_holes_of_missing_values_at_sea_are_skipped(corpus, tmp_path, capsys):
    """Decided behaviour: missing values at sea after the first time step are skipped by
    the statistics (they count fewer valid samples); a point missing at the first step (and
    every step) is land. The run succeeds and still finds the planted cape source."""
    _, cases = corpus
    inputs = _inputs(corpus)
    before = bi.sha256_tree(inputs)
    out = tmp_path / "out"
    rc, stdout, err = _in_process(["analyze", str(cases["holes"][0]), "--out", str(out),
                                   "--settings", str(cases["lean_settings"][0]), *QUIET], capsys)
    assert rc == 0, err
    assert "Traceback" not in err
    assert bi.sha256_tree(inputs) == before
    assert {"map.gpkg", "sources.csv", "results.nc", "run.json"} <= {p.name for p in out.iterdir()}
    with xr.open_dataset(out / "results.nc") as res:
        n_valid = np.asarray(res["n_valid"].values)
        lat = np.asarray(res["lat"].values)
        lon = np.asarray(res["lon"].values)
    planted_gaps = np.zeros((bi.NY, bi.NX), int)
    for k in range(2, bi.NT, 5):
        j0 = 15 + (k // 5) % 10
        planted_gaps[j0:j0 + 6, 4:10] += 1
    sea = ~bi.land_mask()
    sea[10:12, 8:10] = False
    lat2 = np.broadcast_to(bi.LAT[:, None], (bi.NY, bi.NX))
    lon2 = np.broadcast_to(bi.LON[None, :], (bi.NY, bi.NX))
    # check: planted truth (gaps written by the generator); results on the input grid
    np.testing.assert_allclose(lat.reshape(bi.NY, bi.NX) if lat.ndim == 2 else
                               np.broadcast_to(lat[:, None], (bi.NY, bi.NX)), lat2)
    np.testing.assert_allclose(lon.reshape(bi.NY, bi.NX) if lon.ndim == 2 else
                               np.broadcast_to(lon[None, :], (bi.NY, bi.NX)), lon2, atol=1e-9)
    # check: planted truth, every sea point counts NT minus the steps it was hidden
    np.testing.assert_array_equal(n_valid[sea], (bi.NT - planted_gaps)[sea])
    assert np.all(np.nan_to_num(n_valid[~sea]) == 0)
    found = pd.read_csv(out / "sources.csv")
    tip_lat, tip_lon = 32.0, float(bi.coast_lon(32.0))
    dist_km = np.hypot((found["lat"] - tip_lat) * bi.KM_PER_DEG,
                       (found["lon"] - tip_lon) * bi.KM_PER_DEG * np.cos(np.radians(32.0)))
    # check: planted truth, eddies are shed at the cape tip (lat 32, coast_lon(32));
    # 20 km is two grid cells
    assert dist_km.min() < 20.0


# --------------------------------------------------------------------------- containment


def _tree(folder: Path) -> set[str]:
    return {str(p.relative_to(folder)) for p in folder.rglob("*")}


def test_a_run_writes_nothing_outside_its_output_folder(tmp_path):
    """A whole analyze in a real process, with relative paths: the only new paths are inside
    --out (the system temp folder is redirected with TMPDIR and must be empty afterwards)."""
    data, work, systmp = tmp_path / "data", tmp_path / "work", tmp_path / "systmp"
    for folder in (data, work, systmp):
        folder.mkdir()
    bi.good_file(data)
    before_tree = _tree(tmp_path)
    before_hash = bi.sha256_tree([data])
    env = {**os.environ, "TMPDIR": str(systmp)}
    rc, stdout, err = _subprocess(["analyze", "../data/good.nc", "--out", "results", *QUIET],
                                  cwd=work, env=env)
    assert rc == 0, err
    assert "Traceback" not in err
    new = _tree(tmp_path) - before_tree
    assert new, "the run wrote nothing"
    outside = sorted(p for p in new if not p.startswith(os.path.join("work", "results")))
    assert outside == []
    assert list(systmp.iterdir()) == []
    assert bi.sha256_tree([data]) == before_hash
    names = {p.name for p in (work / "results").iterdir()}
    # check: design.md section 5, the output contract of analyze
    assert {"map.gpkg", "sources.csv", "results.nc", "report.html", "run.json",
            "figures"} <= names
    assert str(work / "results") in stdout
