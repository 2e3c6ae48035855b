"""Figures and the HTML report: PNGs decode, the page is well formed, self-contained and
renders in a real headless browser."""

from __future__ import annotations

import base64
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import geopandas as gpd
import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest
from shapely.geometry import LineString, Point

from coastmon.io.results import CAUTIONS
from coastmon.report import (
    alongshore_figure,
    coast_map_figure,
    hovmoller_figure,
    map_figure,
    ranking_figure,
    spinup_figure,
    wavelet_figure,
    write_report,
)
from coastmon.report.figures import DPI

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # check: PNG specification (ISO/IEC 15948) §5.2
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}  # check: HTML Living Standard §13.1.2 (void elements)


# ------------------------------------------------------------------ inputs


def _grid():
    """Invented coast: a straight north-south shore with one cape, south-west Africa
    latitudes (the figure code only sees numbers)."""
    lon1 = np.linspace(10.0, 16.0, 61)
    lat1 = np.linspace(-30.0, -22.0, 81)
    lon, lat = np.meshgrid(lon1, lat1)
    coast_x = 14.5 - 0.8 * np.exp(-((lat1 + 26.0) / 0.5) ** 2)
    mask = (lon < coast_x[:, None]).astype(np.int8)
    coast = gpd.GeoDataFrame({"segment_id": [0]}, geometry=[LineString(np.c_[coast_x, lat1])],
                             crs="EPSG:4326")
    return lon, lat, mask, coast


def _capes():
    return gpd.GeoDataFrame(
        {"cape_id": ["C1"], "curvature_per_km": [0.02], "scale_km": [40.0],
         "protrusion_km": [70.0]}, geometry=[Point(13.7, -26.0)], crs="EPSG:4326")


def _sources():
    return gpd.GeoDataFrame(
        {"rank": [1, 2], "feed_w_per_m": [95.0, 30.0], "feed_lo": [60.0, 5.0],
         "feed_hi": [140.0, 48.0], "persistence": [0.8, 0.55], "cape_id": ["C1", ""],
         "dist_to_cape_km": [6.0, 210.0], "alongshore_km": [450.0, 180.0],
         "west_speed_cm_s": [2.4, 1.9]},
        geometry=[Point(13.6, -25.9), Point(14.4, -24.0)], crs="EPSG:4326")


def _decode(path: Path) -> np.ndarray:
    assert path.read_bytes()[:8] == PNG_SIGNATURE
    image = mpimg.imread(path)
    assert image.ndim == 3 and image.shape[2] in (3, 4)
    assert float(image[..., :3].std()) > 0.05  # check: common practice, no source (not blank)
    return image


# ------------------------------------------------------------------ figures


@pytest.fixture(scope="module")
def figure_files(tmp_path_factory) -> dict[str, Path]:
    out = tmp_path_factory.mktemp("figures")
    lon, lat, mask, coast = _grid()
    eke = 100 + 300 * np.exp(-((lat + 26.0) / 1.0) ** 2) * np.exp((lon - 14.0) / 2.0)
    eke[mask == 0] = np.nan
    gates = gpd.GeoDataFrame({"source_rank": [1]},
                             geometry=[LineString([(12.0, -26.5), (12.0, -25.3)])])
    plumes = gpd.GeoDataFrame({"source_rank": [1]},
                              geometry=[LineString([(13.6, -25.9), (10.2, -26.2)])])
    files = {
        "map": map_figure(out / "map.png", lon, lat, eke, "mean EKE (cm² s⁻²)", coast,
                          _capes(), _sources(), gates, plumes, mask),
        "coast": coast_map_figure(out / "coast.png", lon, lat, mask, coast, _capes()),
    }
    s = np.arange(0.0, 900.0, 10.0)
    files["alongshore"] = alongshore_figure(
        out / "alongshore.png", s,
        [("EKE (cm² s⁻²)", 100 + 50 * np.exp(-((s - 450) / 60) ** 2)),
         ("ζ variance (10⁻¹⁰ s⁻²)", 1 + np.exp(-((s - 450) / 40) ** 2))],
        [("C1", 445.0)], [(1, 450.0), (2, 180.0)])
    t = np.arange(0.0, 720.0, 3.0)
    d = np.arange(0.0, 600.0, 10.0)
    tt, dd = np.meshgrid(t, d, indexing="ij")
    files["hovmoller"] = hovmoller_figure(
        out / "hovmoller.png", t, d, np.sin(2 * np.pi * (dd - 1.73 * tt) / 150.0),
        "ζ (10⁻⁵ s⁻¹)", speed_m_s=0.02, rossby_speed_m_s=0.016)
    periods = 2.0 ** np.arange(2.0, 8.0, 0.25)
    tw = np.arange(0.0, 1000.0, 2.0)
    power = np.exp(-((np.log2(periods)[:, None] - 5.0) ** 2)) * np.ones(tw.size) + 0.01
    coi = 1.033 / np.sqrt(2.0) * np.minimum(tw + 1.0, tw[-1] - tw + 1.0)
    files["wavelet"] = wavelet_figure(out / "wavelet.png", tw, periods, power, power / 0.5, coi,
                                      np.sin(2 * np.pi * tw / 32.0))
    files["ranking"] = ranking_figure(out / "ranking.png", _sources())
    files["ranking_empty"] = ranking_figure(out / "ranking_empty.png", _sources().iloc[:0])
    lengths = np.arange(30.0, 1500.0, 30.0)
    files["spinup"] = spinup_figure(out / "spinup.png", lengths,
                                    1 - 0.5 * np.exp(-lengths / 250.0), 0.9, 420.0)
    return files


def test_every_figure_writes_a_decodable_png(figure_files):
    for name, path in figure_files.items():
        image = _decode(path)
        height, width = image.shape[:2]
        assert 400 <= width <= 1400 and 200 <= height <= 1400, name
        assert not list(path.parent.glob(".*")), "temporary files left behind"


def test_figure_pixel_size_follows_dpi(figure_files):
    image = mpimg.imread(figure_files["spinup"])
    # check: matplotlib savefig (pixels = inches × dpi); figure is 6.0 × 3.6 in
    assert image.shape[:2] == (round(3.6 * DPI), round(6.0 * DPI))


def test_map_aspect_is_corrected_for_latitude(figure_files):
    """Figure sized for the map: width/height of the data area ≈ Δlon·cos φ / Δlat."""
    image = mpimg.imread(figure_files["coast"])[..., :3]
    land = np.all(np.abs(image - 0.78) < 0.02, axis=-1)  # the grey land colour
    wide = np.flatnonzero(land.sum(axis=1) > 50)  # rows crossing the land strip
    row = wide.min() + 3
    column = int(np.median(np.flatnonzero(land[row])))
    rows = np.flatnonzero(land[:, column])
    map_height = rows.max() - rows.min() + 1  # land runs the full 8° of latitude there
    land_width = np.count_nonzero(land[row])
    # land cells (centres >= 14.5°E, half-cell 0.05°) reach from 14.45°E to the 16°E edge
    # check: common practice, no source (aspect 1/cos(mean latitude) on lon/lat maps)
    expected = 1.55 * np.cos(np.deg2rad(26.0)) / 8.0 * map_height
    assert abs(land_width - expected) / expected < 0.03


# ------------------------------------------------------------------ HTML


class _Checker(HTMLParser):
    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.images: list[dict[str, str | None]] = []
        self.tags: list[str] = []
        self.ids: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.append(attrs["id"])
        if tag == "img":
            self.images.append(attrs)
        for key in ("src", "href"):
            value = attrs.get(key) or ""
            if re.match(r"^(https?:|//|file:)", value):
                self.errors.append(f"external resource {value[:40]}")
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in VOID:
            self.stack.pop()

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unbalanced </{tag}> (open: {self.stack[-3:]})")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def _report(tmp_path: Path, figure_files: dict[str, Path]) -> tuple[Path, list[Path]]:
    sources = pd.DataFrame(_sources().drop(columns="geometry"))
    sources["lon"] = _sources().geometry.x
    sources["lat"] = _sources().geometry.y
    capes = pd.DataFrame(_capes().drop(columns="geometry"))
    pngs = [figure_files["map"], figure_files["ranking"], figure_files["wavelet"]]
    path = write_report(
        tmp_path / "report.html",
        title="Coastal sources <demo> & friends",
        summary={"record": "2.0 years", "capes found": 1},
        sources=sources.iloc[::-1],
        capes=capes,
        figures=[("Mean EKE <with> capes", pngs[0]), ("Ranking", pngs[1]),
                 ("Wavelet power", pngs[2])],
        provenance={"inputs": [{"path": "/data/x.nc", "size": 10}],
                    "versions": {"coastmon": "0.1.0"}, "timings_s": {"pass": 1.5}},
        warnings=["Record shorter than the spin-up length <check>."],
    )
    return path, pngs


def test_report_is_well_formed_and_self_contained(tmp_path, figure_files):
    path, pngs = _report(tmp_path, figure_files)
    text = path.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")  # check: HTML Living Standard §13.1.1
    parser = _Checker()
    parser.feed(text)
    parser.close()
    assert parser.errors == []
    assert parser.stack == []
    assert "script" not in parser.tags and "link" not in parser.tags
    assert len(parser.images) == len(pngs)
    for attrs, png in zip(parser.images, pngs, strict=True):
        src = attrs["src"] or ""
        assert src.startswith("data:image/png;base64,")  # check: RFC 2397 (data URLs)
        assert base64.b64decode(src.split(",", 1)[1], validate=True) == png.read_bytes()
        assert attrs.get("alt")
    # escaped text arrives as text, never as markup
    assert "demo" not in parser.tags and "with" not in parser.tags
    page = "".join(parser.text)
    assert "Coastal sources <demo> & friends" in page
    assert CAUTIONS in page
    order = [parser.ids.index(s) for s in ("answer", "figures", "warnings", "provenance",
                                           "cautions")]
    assert order == sorted(order)
    # the answer names the top source (rank 1 given last in the input table)
    assert "source #1 at cape C1 (6 km away)" in page
    assert page.index("95 % interval 60 to 140") < page.index("Figure 1.")


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    message = ("The browser test needs Debian's Chromium: install it with "
               "'apt-get update && apt-get install -y chromium' (CI does this in .ci/run).")
    if os.environ.get("CI", "").strip().lower() in ("", "0", "false", "no"):
        pytest.skip(f"{message} Skipped outside CI (the environment variable CI is not set); "
                    "mandatory in CI.")
    pytest.fail(message)


_PROBE = (
    "<script>window.addEventListener('load', function () {"
    " var imgs = Array.prototype.slice.call(document.images);"
    " var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; });"
    " document.body.setAttribute('data-images-total', imgs.length);"
    " document.body.setAttribute('data-images-ok', ok.length);"
    " document.body.setAttribute('data-widths', imgs.map(function (i) {"
    " return i.naturalWidth; }).join(','));"
    "});</script></body>"
)


def _browser(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", *args],
        capture_output=True, text=True, timeout=120, check=False)


def test_report_renders_in_headless_chromium(tmp_path, figure_files):
    path, pngs = _report(tmp_path, figure_files)
    probe = tmp_path / "probe.html"
    probe.write_text(path.read_text(encoding="utf-8").replace("</body>", _PROBE),
                     encoding="utf-8")
    run = _browser(tmp_path, "--virtual-time-budget=10000", "--dump-dom", probe.as_uri())
    assert run.returncode == 0, run.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", run.stdout)
    assert body, run.stdout[:500]
    attrs = dict(re.findall(r'([\w-]+)="([^"]*)"', body.group(1)))
    # check: the browser's own image decoder (Chromium), against PNG sizes read by matplotlib
    assert attrs["data-images-total"] == str(len(pngs))
    assert attrs["data-images-ok"] == str(len(pngs))
    widths = [mpimg.imread(p).shape[1] for p in pngs]
    assert attrs["data-widths"] == ",".join(str(w) for w in widths)

    shot = tmp_path / "shot.png"
    run = _browser(tmp_path, "--hide-scrollbars", "--window-size=1200,1600",
                   f"--screenshot={shot}", path.as_uri())
    assert run.returncode == 0, run.stderr[-2000:]
    _decode(shot)


def test_long_records_are_drawn_as_block_means(tmp_path):
    from coastmon.report.figures import MAX_COLUMNS, _thin_columns

    t = np.arange(5000, dtype=float)
    field = np.vstack([t, np.sin(2 * np.pi * t / 400.0)])
    shown_t, (shown,) = _thin_columns(t, [field])
    k = int(np.ceil(t.size / MAX_COLUMNS))
    assert shown_t.size <= MAX_COLUMNS and k == 9
    # check: common practice, no source — the mean of k consecutive integers starting at
    # n is n + (k - 1)/2, and a block mean of a slow sine is the sine at the block centre
    # times the moving-average response sin(k w/2) / (k sin(w/2)), about 1 - 8e-4 here
    np.testing.assert_allclose(shown_t, np.arange(shown_t.size) * k + (k - 1) / 2)
    np.testing.assert_allclose(shown[0], shown_t)
    gain = np.sinc(k / 400.0) / np.sinc(1 / 400.0)
    np.testing.assert_allclose(shown[1], gain * np.sin(2 * np.pi * shown_t / 400.0), atol=1e-12)
    # a 5000-day wavelet figure still writes a normal-sized PNG
    periods = 2.0 ** np.linspace(2, 9, 40)
    power = np.outer(np.ones(40), 1 + field[1] ** 2)
    path = wavelet_figure(tmp_path / "long.png", t, periods, power, power / 1.5,
                          np.minimum(t, t[::-1]) + 4.0, field[1])
    assert _decode(path).shape[1] <= 1400


@pytest.mark.parametrize("decades", [(1.5, 12.0), (1e-6, 1e-2)])
def test_log_colour_bars_are_labelled_in_plain_text(decades):
    from matplotlib.colors import LogNorm
    from matplotlib.figure import Figure

    from coastmon.report.figures import _plain_log_colorbar

    fig = Figure(figsize=(2, 4), dpi=DPI)
    ax = fig.add_subplot()
    mesh = ax.pcolormesh(np.geomspace(*decades, 16).reshape(4, 4), norm=LogNorm(*decades))
    bar = fig.colorbar(mesh, ax=ax)
    _plain_log_colorbar(bar)
    fig.canvas.draw()
    axis = bar.ax.yaxis
    shown = [(loc, t.get_text()) for minor in (False, True)
             for loc, t in zip(axis.get_ticklocs(minor=minor), axis.get_ticklabels(minor=minor),
                               strict=True)
             if decades[0] * 0.999 <= loc <= decades[1] * 1.001 and t.get_text()]
    # check: common practice, no source — a log scale is labelled at its decades (and at
    # some of the 2…9 multiples when it spans few decades), here in plain text, never in
    # mathtext (no "$"), each label the number at its tick
    digits = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
    assert len(shown) >= 2 and not any("$" in text for _, text in shown)
    for loc, text in shown:
        value = 10.0 ** int(text[2:].translate(digits)) if text.startswith("10") and \
            len(text) > 2 and not text[2].isdigit() else float(text)
        assert value == pytest.approx(loc, rel=1e-9), (loc, text)
    if decades[1] / decades[0] > 1e3:   # many decades: the decades alone
        assert [text for _, text in sorted(shown)] == ["10⁻⁶", "10⁻⁵", "10⁻⁴", "0.001", "0.01"]
    else:                               # under one decade: some multiples too
        assert "10" in {text for _, text in shown}
        assert any(not np.isclose(np.log10(loc) % 1.0, 0.0) for loc, _ in shown)


def test_cape_labels_that_would_overlap_are_left_out():
    from coastmon.report.figures import _apart

    x = np.array([0.0, 1000.0])
    labels = [("C30.3N012.9W", 100.0), ("C30.4N012.9W", 105.0), ("C31.0N013.0W", 400.0)]
    kept = _apart(labels, x, width_in=7.0, fontsize=7.0)
    # check: common practice, no source — 12 characters at 7 pt are about 50 pt wide, and
    # 1000 km over 85 % of 7 in (428 pt) is 2.3 km per pt: labels 5 km apart collide,
    # 300 km apart do not
    assert kept == [labels[0], labels[2]]
    assert _apart(labels, x, width_in=700.0, fontsize=7.0) == labels


# ------------------------------------------------------------------ the figure process


def _hovmoller_args(path):
    t = np.arange(0.0, 720.0, 3.0)
    d = np.arange(0.0, 600.0, 10.0)
    tt, dd = np.meshgrid(t, d, indexing="ij")
    return (path, t, d, np.sin(2 * np.pi * (dd - 1.73 * tt) / 150.0), "ζ (10⁻⁵ s⁻¹)")


def test_the_figure_process_draws_the_same_picture(tmp_path):
    from coastmon.report.process import FigureProcess, drawn

    here = hovmoller_figure(*_hovmoller_args(tmp_path / "here.png"), speed_m_s=0.02)
    process = FigureProcess()
    try:
        job = process.submit("hovmoller_figure", *_hovmoller_args(tmp_path / "there.png"),
                             speed_m_s=0.02)
        there = drawn(job, lambda: pytest.fail("the figure process was lost"))
        # an error of the figure function comes back as itself
        bad = process.submit("alongshore_figure", tmp_path / "bad.png", np.arange(3.0), [])
        with pytest.raises(ValueError, match="at least one panel"):
            bad.result(timeout=120)
        with pytest.raises(ValueError):
            process.submit("not_a_figure")
        # it answered everything: it did not crash (it is ended on close, not left to unwind)
        assert process.proc.poll() is None
    finally:
        process.close()
    assert process.proc.returncode is not None
    # check: common practice, no source — the same function on the same numbers with the
    # same libraries draws the same pixels in either process
    np.testing.assert_array_equal(_decode(there), _decode(here))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["here.png", "there.png"]


@pytest.mark.skipif(not hasattr(__import__("signal"), "SIGSTOP"), reason="needs SIGSTOP")
def test_figures_the_process_has_not_started_are_drawn_here_once(tmp_path):
    import signal
    import time

    from coastmon.report.process import FigureProcess, drawn, take_back

    process = FigureProcess()
    try:
        process.proc.send_signal(signal.SIGSTOP)          # busy with the first figure
        jobs = []
        for name in ("a", "b", "c"):
            args = _hovmoller_args(tmp_path / f"{name}.png")
            jobs.append((process.submit("hovmoller_figure", *args),
                         lambda args=args: hovmoller_figure(*args)))
        deadline = time.monotonic() + 30
        while not jobs[0][0].running() and time.monotonic() < deadline:
            time.sleep(0.01)
        here = take_back(jobs)
        process.proc.send_signal(signal.SIGCONT)
        paths = [mine or drawn(job, lambda: pytest.fail("the process was lost"))
                 for (job, _), mine in zip(jobs, here, strict=True)]
    finally:
        process.close()
    # check: common practice, no source — work sharing: the two figures the process had not
    # started are drawn here, from the last one back, and cancelled there (each drawn once);
    # the one it was drawing comes from it
    assert here[0] is None and here[1:] == [tmp_path / "b.png", tmp_path / "c.png"]
    assert jobs[0][0].done() and not jobs[0][0].cancelled()
    assert jobs[1][0].cancelled() and jobs[2][0].cancelled()
    assert paths == [tmp_path / f"{n}.png" for n in "abc"]
    for p in paths:
        _decode(p)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.png", "b.png", "c.png"]


def test_a_figure_of_a_lost_process_is_drawn_here(tmp_path):
    from coastmon.report.process import FigureProcess, drawn

    process = FigureProcess()
    process.proc.kill()
    process.proc.wait()
    try:
        args = _hovmoller_args(tmp_path / "h.png")
        job = process.submit("hovmoller_figure", *args)
        path = drawn(job, lambda: hovmoller_figure(*args))
    finally:
        process.close()
    # check: common practice, no source — a helper that dies costs time, never an output
    assert path == tmp_path / "h.png"
    _decode(path)


def test_an_unused_figure_process_ends_at_once():
    import time

    from coastmon.report.process import FigureProcess

    process = FigureProcess()
    start = time.perf_counter()
    process.close()
    # check: common practice, no source — a run that stops early (an input error) does not
    # wait for the helper to finish importing its libraries
    assert time.perf_counter() - start < 1.0
    assert process.proc.returncode is not None


@pytest.mark.skipif(not hasattr(__import__("signal"), "SIGSTOP"), reason="needs SIGSTOP")
def test_a_hung_figure_process_is_ended_and_the_figure_drawn_here(tmp_path, monkeypatch):
    import signal

    import coastmon.report.process as proc
    from coastmon.report.process import FigureProcess, drawn

    monkeypatch.setattr(proc, "FIGURE_TIMEOUT_S", 3.0)
    process = FigureProcess()
    try:
        process.proc.send_signal(signal.SIGSTOP)          # it never answers
        args = _hovmoller_args(tmp_path / "h.png")
        job = process.submit("hovmoller_figure", *args)
        path = drawn(job, lambda: hovmoller_figure(*args))
        # the next figure does not wait again: the process is gone
        later = process.submit("hovmoller_figure", *_hovmoller_args(tmp_path / "k.png"))
        with pytest.raises(proc.ProcessLost):
            later.result(timeout=30)
    finally:
        process.close()
    # check: common practice, no source — a helper that hangs costs a bounded wait, never
    # an output, and is not left behind
    assert path == tmp_path / "h.png"
    _decode(path)
    assert process.proc.returncode is not None
