"""Settings validation and the command line's behaviour on user errors."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time

import pytest

from coastmon.cli import main
from coastmon.config import Settings, load_settings, settings_from_dict
from coastmon.errors import SettingsError


def test_defaults_live_in_one_place_and_roundtrip():
    s = Settings()
    # check: common practice, no source (a dict of the defaults rebuilds the same settings)
    assert settings_from_dict(s.to_dict()) == s


def test_unknown_key_gets_a_suggestion(tmp_path):
    f = tmp_path / "run.toml"
    f.write_text("[coast]\nstation_spacing = 5.0\n")
    with pytest.raises(SettingsError) as err:
        load_settings(f)
    msg = str(err.value)
    assert "station_spacing" in msg and "station_spacing_km" in msg and str(f) in msg


def test_unknown_section_and_bad_types(tmp_path):
    with pytest.raises(SettingsError, match="sourcse|sources"):
        settings_from_dict({"sourcse": {}})
    with pytest.raises(SettingsError, match="number"):
        settings_from_dict({"coast": {"resample_km": "two"}})
    with pytest.raises(SettingsError, match="one of"):
        settings_from_dict({"coast": {"boundary": "shoreline"}})
    with pytest.raises(SettingsError, match="increasing"):
        settings_from_dict({"coast": {"scales_km": [40.0, 10.0]}})


def test_bad_toml_is_one_paragraph(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text("[coast\nx=1\n")
    with pytest.raises(SettingsError) as err:
        load_settings(f)
    assert "\n" not in str(err.value)


def test_cli_lists_commands(capsys):
    with pytest.raises(SystemExit) as ex:
        main(["--help"])
    assert ex.value.code == 0
    out = capsys.readouterr().out
    for cmd in ("analyze", "coast", "compare", "update", "demo"):
        assert cmd in out


@pytest.mark.parametrize("cmd", ["analyze", "coast", "compare", "update", "demo"])
def test_every_command_has_help(cmd, capsys):
    with pytest.raises(SystemExit) as ex:
        main([cmd, "--help"])
    assert ex.value.code == 0
    assert len(capsys.readouterr().out) > 200


def test_missing_input_exits_2_without_traceback(tmp_path):
    proc = subprocess.run(
        [sys.executable, "-m", "coastmon", "analyze", str(tmp_path / "nope.nc"),
         "--out", str(tmp_path / "out")],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "nope.nc" in proc.stderr
    assert not (tmp_path / "out").exists()


def test_bad_gis_option_is_refused(tmp_path):
    assert main(["analyze", "x.nc", "--out", str(tmp_path / "o"), "--gis", "kml"]) == 2


def test_an_internal_error_is_reported_without_a_traceback(tmp_path, monkeypatch, capsys):
    import coastmon.pipeline

    def broken(*_args, **_kwargs):
        raise KeyError("planted bug")

    monkeypatch.setattr(coastmon.pipeline, "coast", broken)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))  # the report stays in tmp_path
    assert main(["coast", "x.nc", "--out", str(tmp_path / "o")]) == 1
    err = capsys.readouterr().err
    # check: common practice, no source (one paragraph, details saved for the bug report)
    assert "internal error" in err and "Traceback" not in err
    saved = err.split("traceback is in ")[1].split(";")[0]
    assert "planted bug" in open(saved).read()
    assert os.path.dirname(saved) == str(tmp_path)


@pytest.mark.parametrize("wrapper", ["RuntimeError", "InputError"])
def test_a_signal_wrapped_by_a_library_is_reported_as_the_signal(wrapper, tmp_path,
                                                                  monkeypatch, capsys):
    # A SIGINT landing inside a class body during an import reaches us as a RuntimeError
    # (Python 3.11 wraps __set_name__ errors); a reader may turn one into an input error.
    import signal

    import coastmon.pipeline
    from coastmon.errors import InputError
    from coastmon.io.owned import Interrupted

    def interrupted(*_args, **_kwargs):
        try:
            raise Interrupted(signal.SIGINT)
        except Interrupted as exc:
            if wrapper == "RuntimeError":
                raise RuntimeError("Error calling __set_name__ on ...") from exc
            raise InputError("Cannot read x.nc", where="x.nc") from exc

    monkeypatch.setattr(coastmon.pipeline, "coast", interrupted)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    # check: common practice, no source (a shell reports death by signal N as 128 + N)
    assert main(["coast", "x.nc", "--out", str(tmp_path / "o")]) == 128 + signal.SIGINT
    err = capsys.readouterr().err
    assert "interrupted (SIGINT)" in err
    assert "internal error" not in err and "Cannot read" not in err
    assert not list(tmp_path.glob("coastmon-error-*"))


@pytest.mark.parametrize("status", [0, 2])
def test_a_signal_as_the_command_returns_keeps_its_status(status, tmp_path, monkeypatch,
                                                          capsys):
    # A signal landing after the run has reported its end (here: as the warnings context
    # is left) must not turn into a traceback or change the reported status.
    import contextlib
    import signal

    import coastmon.cli
    from coastmon.io.owned import Interrupted

    @contextlib.contextmanager
    def interrupted_on_exit():
        yield
        raise Interrupted(signal.SIGINT)

    monkeypatch.setattr(coastmon.cli, "_run", lambda args: status)
    real = coastmon.cli.warnings.catch_warnings

    def catch_warnings(*args, **kwargs):   # the command's own call has no arguments
        return real(*args, **kwargs) if args or kwargs else interrupted_on_exit()

    monkeypatch.setattr(coastmon.cli.warnings, "catch_warnings", catch_warnings)
    # check: common practice, no source (a command's exit status is the one it reported)
    assert main(["coast", "x.nc", "--out", str(tmp_path / "o")]) == status
    assert "Traceback" not in capsys.readouterr().err


def test_the_command_starts_without_the_slow_modules():
    # check: common practice, no source (scipy.signal and scipy.stats take about a second
    # to import, pint with its unit registry half a second, matplotlib a third: the
    # functions that need them import them when they run; matplotlib is imported on a side
    # thread during the pass and in the figure process)
    code = ("import sys, coastmon.cli, coastmon.pipeline; "
            "print([m for m in ('scipy.signal', 'scipy.stats', 'pint', 'matplotlib') "
            "if m in sys.modules])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "[]"


def test_a_thread_nobody_wakes_does_not_keep_the_process_alive(tmp_path):
    # A signal landing while a library starts a worker thread can leave a non-daemon
    # thread that waits forever; the interpreter would wait for it at exit. Here such a
    # thread is started on purpose during a command that fails (exit 2).
    code = (
        "import sys, threading\n"
        "import coastmon.cli as cli\n"
        "cli.EXIT_GRACE_S = 1.0\n"
        "run = cli._run\n"
        "def stuck(args):\n"
        "    threading.Thread(target=threading.Event().wait, name='stray').start()\n"
        "    return run(args)\n"
        "cli._run = stuck\n"
        "sys.argv = ['coastmon', 'analyze', sys.argv[1], '--out', sys.argv[2]]\n"
        "raise SystemExit(cli.main())\n")
    missing = tmp_path / "no_such_file.nc"
    start = time.monotonic()
    run = subprocess.run([sys.executable, "-c", code, str(missing), str(tmp_path / "out")],
                         capture_output=True, text=True, timeout=120)
    # check: common practice, no source (the status the command reported, no traceback,
    # and the process ends soon after instead of waiting for the stray thread)
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stderr and "no_such_file.nc" in run.stderr
    assert time.monotonic() - start < 60


def test_the_console_command_ends_with_its_status_output_and_exit_handlers(tmp_path):
    # The console command ends without the interpreter's teardown (cli._end_now). What
    # a normal exit guarantees must still hold: the status, everything printed (here a
    # last line with no newline, still in the buffer) and the exit handlers, which close
    # reader processes and multiprocessing's children.
    code = (
        "import atexit, sys\n"
        "import coastmon.cli as cli\n"
        "marker = sys.argv[3]\n"
        "atexit.register(lambda: open(marker, 'w').write('ran'))\n"
        "run = cli._run\n"
        "def last_words(args):\n"
        "    status = run(args)\n"
        "    sys.stdout.write('last words')\n"
        "    return status\n"
        "cli._run = last_words\n"
        "sys.argv = ['coastmon', 'analyze', sys.argv[1], '--out', sys.argv[2]]\n"
        "cli.main()\n"
        "print('never reached')\n")
    marker = tmp_path / "handlers.txt"
    run = subprocess.run([sys.executable, "-c", code, str(tmp_path / "no_such_file.nc"),
                          str(tmp_path / "out"), str(marker)],
                         capture_output=True, text=True, timeout=120)
    # check: common practice, no source (POSIX _exit(2) ends the process with the status
    # given; Python's os._exit flushes nothing and runs no atexit handler, so the command
    # must do both itself)
    assert run.returncode == 2, run.stderr
    assert run.stdout == "last words"
    assert "no_such_file.nc" in run.stderr and "Traceback" not in run.stderr
    assert marker.read_text() == "ran"
