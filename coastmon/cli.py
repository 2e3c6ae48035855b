"""The ``coastmon`` command line: parse options, call the pipeline, report errors plainly.

No science lives here. User errors (:class:`coastmon.errors.CoastmonError`) are printed as
one paragraph on stderr with exit status 2 and no traceback. SIGINT, SIGTERM and SIGHUP stop
the run, remove its temporary folders and exit with 128 + the signal number (130, 143, 129);
when the result was already complete the run reports that and exits 0.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
import time
import warnings
from pathlib import Path

from coastmon import __version__
from coastmon.config import Settings, load_settings
from coastmon.errors import CoastmonError, SettingsError

EXIT_GRACE_S = 20.0
"""Longest wait for the interpreter to end once the command has returned (see
:func:`_end_within`)."""

_DESCRIPTION = (
    "Find the coastal vorticity sources (capes, headlands, island tips) that feed eddy "
    "energy offshore, from gridded ocean velocity or sea surface height. Research "
    "diagnostics only: not for navigation or any safety-of-life decision."
)


def _add_settings_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--settings", metavar="FILE", type=Path,
                   help="TOML settings file (sections as in docs/user-guide.md); options below override it")
    g = p.add_argument_group("input variables (found by CF standard_name when not given)")
    g.add_argument("--u-var", metavar="NAME", help="eastward (or grid-x) velocity variable")
    g.add_argument("--v-var", metavar="NAME", help="northward (or grid-y) velocity variable")
    g.add_argument("--ssh-var", metavar="NAME", help="sea surface height variable")
    g.add_argument("--ssh-smooth", metavar="KM", type=float,
                   help="Gaussian smoothing (sigma, km) of SSH before geostrophic velocity")
    g.add_argument("--mask-var", metavar="NAME", help="land/sea mask variable")
    g.add_argument("--depth", metavar="M", type=float,
                   help="depth to analyse in metres, positive down (default: the top level)")
    p.add_argument("--capes", metavar="CSV", type=Path,
                   help="cape catalogue (columns id, lon, lat; a capes.csv of another run "
                   "works): capes found near a catalogue cape take its id")


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the streaming pass on a dask.distributed scheduler (tcp://host:port)")
    p.add_argument("--gis", metavar="LIST",
                   help="GIS formats to write, comma-separated from gpkg,geojson,shp,csv (default gpkg,csv)")
    p.add_argument("--no-progress", action="store_true", help="do not show progress bars")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="coastmon", description=_DESCRIPTION)
    parser.add_argument("--version", action="version", version=f"coastmon {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser(
        "analyze", help="the whole job: coast, eddy statistics, signals, ranked sources, outputs",
        description="Read the input files once, find the coast and its capes, compute eddy "
        "statistics and along-shore time series in one streaming pass, then find and rank the "
        "vorticity sources by the eddy energy they feed offshore. Writes map.gpkg, sources.csv, "
        "results.nc, figures/, report.html and run.json into --out.",
    )
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="NetCDF files or a Zarr store")
    p.add_argument("--out", required=True, type=Path, metavar="DIR", help="output folder")
    _add_settings_options(p)
    _add_run_options(p)

    p = sub.add_parser(
        "coast", help="coastline, curvature and capes only (needs only a land/sea mask)",
        description="Extract the coastline from the land/sea mask, compute its curvature and "
        "list the capes. Writes map.gpkg (layers coastline, capes), capes.csv and a map PNG.",
    )
    p.add_argument("input", metavar="INPUT", help="a NetCDF file or Zarr store with a mask or velocity")
    p.add_argument("--out", required=True, type=Path, metavar="DIR", help="output folder")
    p.add_argument("--boundary", choices=["mask", "isobath"],
                   help="use the land/sea mask (default) or an isobath as the boundary")
    p.add_argument("--isobath", type=float, metavar="M", help="isobath depth in metres")
    p.add_argument("--bathymetry-var", metavar="NAME", help="bathymetry variable (positive down)")
    _add_settings_options(p)
    p.add_argument("--gis", metavar="LIST", help="GIS formats (default gpkg,csv)")

    p = sub.add_parser(
        "compare", help="compare result folders cape by cape (sensitivity runs, resolutions, "
        "an ensemble, or a run and observations)",
        description="Match the capes of two or more analyze result folders by position, follow "
        "the sources through their capes, and tell per cape whether the source appeared, "
        "vanished, grew, shrank or did not change significantly against the first folder "
        "(the reference). Writes compare.json, cape_changes.csv, matched_sources.csv, map.gpkg, "
        "cape_changes.geojson, compare.html and figures/ into --out.",
    )
    p.add_argument("run_dirs", type=Path, nargs="+", metavar="RUN_DIR",
                   help="result folders; the first is the reference (run A), the others are "
                   "runs B, C, ... each compared with A")
    p.add_argument("--out", required=True, type=Path, metavar="DIR", help="output folder")
    p.add_argument("--capes", metavar="CSV", type=Path,
                   help="cape catalogue (columns id, lon, lat; a capes.csv of a run works): "
                   "capes of every run near a catalogue cape take its id")

    p = sub.add_parser(
        "update", help="add new time steps to a monitoring state and refresh its outputs",
        description="The first call creates STATE_DIR from the inputs; later calls add only the "
        "time steps not seen before, merge them into the stored statistics, log shedding events "
        "and refresh every output of analyze inside STATE_DIR.",
    )
    p.add_argument("state_dir", type=Path, metavar="STATE_DIR", help="monitoring state folder")
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="NetCDF files or a Zarr store")
    p.add_argument("--allow-gaps", action="store_true",
                   help="accept new data that leaves a gap after the last time already seen")
    _add_settings_options(p)
    _add_run_options(p)

    p = sub.add_parser(
        "demo", help="build the invented scenario and run the whole job on it",
        description="Build the built-in scenario (an invented coast with planted eddy sources), "
        "run analyze on it, and compare the ranking found with the planted truth.",
    )
    p.add_argument("--out", type=Path, default=Path("coastmon-demo"), metavar="DIR",
                   help="output folder (default: ./coastmon-demo)")
    p.add_argument("--variant", choices=["default", "straight", "western"], default="default",
                   help="scenario variant: capes on an eastern-boundary coast (default), a "
                   "straight-coast control, or a western-boundary coast")
    p.add_argument("--no-progress", action="store_true", help="do not show progress bars")
    return parser


def settings_from_args(args: argparse.Namespace) -> Settings:
    """Settings file (if any) overridden by command-line options."""
    settings = load_settings(args.settings) if getattr(args, "settings", None) else Settings()
    ingest = {k: getattr(args, a) for k, a in (
        ("u_var", "u_var"), ("v_var", "v_var"), ("ssh_var", "ssh_var"),
        ("mask_var", "mask_var"), ("depth_m", "depth"), ("bathymetry_var", "bathymetry_var"),
        ("ssh_smooth_km", "ssh_smooth"),
    ) if getattr(args, a, None) is not None}
    if ingest:
        settings = settings.replace("ingest", **ingest)
    coast = {}
    if getattr(args, "boundary", None):
        coast["boundary"] = args.boundary
    if getattr(args, "isobath", None) is not None:
        coast["isobath_m"] = args.isobath
    if getattr(args, "capes", None) is not None:
        coast["cape_catalogue"] = str(args.capes)
    if coast:
        settings = settings.replace("coast", **coast)
    stream = {}
    if getattr(args, "scheduler", None):
        stream["scheduler"] = args.scheduler
    if getattr(args, "no_progress", False):
        stream["progress"] = False
    if stream:
        settings = settings.replace("stream", **stream)
    if getattr(args, "gis", None):
        formats = tuple(f.strip() for f in args.gis.split(",") if f.strip())
        bad = sorted(set(formats) - {"gpkg", "geojson", "shp", "csv"})
        if bad or not formats:
            raise SettingsError(
                f"Unknown GIS format(s) {', '.join(bad) or '(none given)'}", where="--gis",
                todo="Choose from gpkg, geojson, shp, csv, comma-separated",
            )
        settings = settings.replace("output", gis=formats)
    return settings


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    from coastmon.io import owned
    from coastmon.threads import small_pages

    previous = owned.install_signal_handlers()
    status = None
    pages = small_pages()
    try:
        with warnings.catch_warnings():
            _library_warnings_policy()
            status = _run(args)
    except KeyboardInterrupt as exc:
        # Arrived outside _run's own handlers: as it was returning (the command has
        # reported its end, so its status stands) or before it began.
        status = status if status is not None else _interrupted(exc)
    finally:
        # Signals first: the run is over and reported, so neither the clean-up below nor
        # the interpreter's shutdown may be cut short or change the status.
        if argv is None:
            owned.ignore_signals()
        else:
            owned.restore_signal_handlers(previous)
        owned.remove_all_registered()
        pages()
        if argv is None:  # the clean-up is done: nothing may keep the process from ending
            _end_within(EXIT_GRACE_S, status if status is not None else 1)
    if argv is None:
        _end_now(status)
    return status


def _end_now(status: int) -> None:
    """End the process with ``status`` once the command is done and reported.

    The exit handlers run (reader processes, multiprocessing's children), the output
    streams are flushed, and the process ends without the interpreter's teardown, which
    frees every object and module one by one: half a second after an ``analyze`` run on
    this project's benchmarks (``docs/performance.md``). Every output file is closed and
    published by then (:mod:`coastmon.io.atomic`); only the console command ends this way,
    :func:`main` called with arguments returns its status.
    """
    import atexit

    try:
        atexit._run_exitfuncs()   # a handler that hangs is ended by _end_within's watchdog
    finally:
        _flush_and_exit(status)


def _flush_and_exit(status: int) -> None:
    """Flush stdout and stderr (a closed stream is no reason to fail), then end the
    process with ``status`` at once."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(status)


def _end_within(seconds: float, status: int) -> None:
    """End the process with ``status`` if the interpreter has not ended ``seconds`` after
    the command returned.

    Once the command has reported its end, the interpreter waits for every non-daemon
    thread before it exits. A signal that lands while a library starts a worker thread
    (between the thread's start and its registration with its pool, for example the
    threaded scheduler's pool of dask) leaves a thread that nobody will ever wake, and the
    process would wait for it forever after printing its result (seen once in the
    fault-injection tests). A daemon thread that outlives that wait ends the process with
    the status already reported; on a normal exit it is stopped with the interpreter.
    """

    def end() -> None:
        time.sleep(seconds)
        _flush_and_exit(status)

    threading.Thread(target=end, name="coastmon-exit", daemon=True).start()


def _library_warnings_policy() -> None:
    """No library warnings on a user's terminal: numeric RuntimeWarnings (all-NaN slices,
    division by zero; coastmon counts and reports missing data itself) and every warning
    raised outside coastmon (dask chunking, xarray, netCDF4) are ignored; coastmon's own
    warnings are printed as one line each."""
    warnings.filterwarnings("ignore", module=r"(?!coastmon(\.|$))")
    warnings.simplefilter("ignore", RuntimeWarning)

    def show(message, category, filename, lineno, file=None, line=None):
        _say(f"coastmon: warning: {message}")

    warnings.showwarning = show


def _say(text: str) -> None:
    """Print on stderr; a closed stderr is no reason to fail."""
    try:
        print(text, file=sys.stderr, flush=True)
    except (OSError, ValueError):
        pass


def _print_result(text: str) -> None:
    from coastmon.io.atomic import publication_notes

    notes = [f"  note: {n}" for n in publication_notes()]
    print("\n".join([text, *notes]), flush=True)


def _run(args: argparse.Namespace) -> int:
    from coastmon.io import owned
    from coastmon.io.atomic import publication_notes

    publication_notes()  # start with none
    try:
        from coastmon import pipeline  # imported late so --help stays fast

        if args.command == "analyze":
            result = pipeline.analyze(args.inputs, args.out, settings_from_args(args))
            _print_result(result.summary_text())
        elif args.command == "coast":
            result = pipeline.coast(args.input, args.out, settings_from_args(args))
            _print_result(result.summary_text())
        elif args.command == "compare":
            from coastmon.assess.compare import compare_folders

            result = compare_folders(*args.run_dirs, out=args.out, catalogue=args.capes)
            _print_result(result.summary_text())
        elif args.command == "update":
            from coastmon.monitor.state import update

            result = update(args.state_dir, args.inputs, settings_from_args(args),
                            allow_gaps=args.allow_gaps)
            _print_result(result.summary_text())
        elif args.command == "demo":
            text = pipeline.demo(args.out, variant=args.variant, progress=not args.no_progress)
            _print_result(text)
    except CoastmonError as exc:
        if (interrupt := _interrupt_behind(exc)) is not None:
            return _interrupted(interrupt)
        _say(f"coastmon: {exc}")
        return exc.exit_code
    except KeyboardInterrupt as exc:
        return _interrupted(exc)
    except BrokenPipeError:
        _silence_stdout()
        done = owned.completed()
        if done:
            _say(f"coastmon: the output pipe closed before the summary was printed; the "
                 f"results are complete in {done[-1]}.")
            return 0
        _say("coastmon: the output pipe closed; the run stopped and nothing was written to "
             "the output folder.")
        return 128 + int(getattr(signal, "SIGPIPE", 13))
    except Exception as exc:  # a bug in coastmon, not a user error: keep the details
        if (interrupt := _interrupt_behind(exc)) is not None:
            return _interrupted(interrupt)
        report = _save_traceback(exc)
        done = owned.completed()
        state = (f"the results in {done[-1]} are complete" if done
                 else "nothing was written to the output folder")
        _say(f"coastmon: internal error ({type(exc).__name__}: {exc}). This is a bug in "
             f"coastmon, not in your input; {state}. The full traceback is in {report}; "
             "please include it when you report the problem.")
        return 1
    return 0


def _interrupt_behind(exc: BaseException) -> KeyboardInterrupt | None:
    """The signal behind an error that wraps it, or None.

    A signal can arrive while a library runs code that turns every exception into its own
    (Python 3.11 wraps an exception raised in a class body's ``__set_name__`` during an
    import in a RuntimeError; a reader may turn it into "cannot read the file"). Such an
    error is the signal, not a bug nor a bad input: it is found in the chain of causes.
    """
    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:
        if isinstance(current, KeyboardInterrupt):
            return current
        seen.add(id(current))
        current = current.__cause__ or current.__context__
    return None


def _interrupted(exc: KeyboardInterrupt) -> int:
    """Report a run stopped by SIGINT, SIGTERM or SIGHUP; the exit status (0 if complete)."""
    from coastmon.io import owned

    signum = getattr(exc, "signum", int(signal.SIGINT))
    name = getattr(exc, "name", "SIGINT")
    owned.remove_all_registered()
    done = owned.completed()
    if done:
        _say(f"coastmon: {name} arrived after the results were complete; they are kept, "
             f"complete, in {done[-1]} (exit status 0).")
        return 0
    _say(f"coastmon: interrupted ({name}); nothing was written to the output folder (its "
         "earlier content, if any, is unchanged) and the temporary files were removed.")
    return 128 + signum


def _silence_stdout() -> None:
    """Point stdout at /dev/null so the interpreter's last flush does not fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass


def _save_traceback(exc: BaseException) -> str:
    """Write the traceback of an unexpected error to a file in the temp folder."""
    import tempfile
    import traceback

    text = "".join(traceback.format_exception(exc))
    with tempfile.NamedTemporaryFile("w", prefix="coastmon-error-", suffix=".txt",
                                     delete=False) as fh:
        fh.write(text)
        return fh.name


if __name__ == "__main__":
    raise SystemExit(main())
