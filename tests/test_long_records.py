"""Shortcuts that keep long records cheap give the numbers of the full computation.

Issue 21: the analyses of the sampled series must not cost more than they need as the
record grows. Each shortcut is checked here against the straightforward computation it
replaces (written out in the test, as it stood before the shortcut).
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import scipy.fft

from coastmon.signals.propagation import detrend_time
from coastmon.sources.feed import PAD_FACTOR, along_derivative, directional_components


def _full_directional_components(field, dt_days, dd_km, band_days):
    """The directional split transforming every frequency and every distance back
    (the computation before issue 21)."""
    data = detrend_time(field)
    n_t, n_d = data.shape
    n_pad = PAD_FACTOR * n_d
    spec = scipy.fft.fft(scipy.fft.rfft(data, axis=0), n=n_pad, axis=1)
    freq = scipy.fft.rfftfreq(n_t, dt_days)
    kappa = scipy.fft.fftfreq(n_pad, dd_km)
    in_band = (freq >= 1.0 / band_days[1]) & (freq <= 1.0 / band_days[0]) & (freq > 0)
    directional = ~np.isclose(np.abs(kappa), 0.5 / dd_km) & (kappa != 0)
    d_t = 2j * np.pi * freq[:, None] / 86400.0

    def back(part):
        return scipy.fft.irfft(scipy.fft.ifft(part, axis=1), n=n_t, axis=0)[:, :n_d]

    out = {}
    for name, side in (("plus", kappa < 0), ("minus", kappa > 0)):
        part = np.where(in_band[:, None] & (directional & side)[None, :], spec, 0.0)
        q = back(part)
        out[name] = (q, back(part * d_t), along_derivative(q, dd_km * 1000.0))
    return out


@pytest.mark.parametrize("columns", [None, (0, 60), (10, 33), (0, 3), (1, 4), (55, 60),
                                     (57, 60), (30, 31)])
def test_directional_split_on_a_window_equals_the_full_split(columns):
    rng = np.random.default_rng(21)
    field = rng.standard_normal((1500, 60)).cumsum(axis=0)
    full = _full_directional_components(field, 1.0, 10.0, (10.0, 120.0))
    part = directional_components(field, 1.0, 10.0, (10.0, 120.0), columns=columns)
    a, b = columns or (0, 60)
    for name in ("plus", "minus"):
        for got, want in zip(part[name], full[name], strict=True):
            assert got.shape == (1500, b - a)
            # check: the full two-dimensional transform (common practice, no source):
            # the same transforms on fewer rows and columns, equal to rounding
            np.testing.assert_allclose(got, want[:, a:b], rtol=1e-12,
                                       atol=1e-12 * np.abs(want).max())


@pytest.mark.parametrize("n_t", [1500, 1501, 730])
def test_band_samples_keep_the_time_means_of_products(n_t):
    from coastmon.sources.feed import band_sample_count

    rng = np.random.default_rng(n_t)
    field = rng.standard_normal((n_t, 40)).cumsum(axis=0)
    n_s = band_sample_count(n_t, 1.0, 10.0)
    assert n_s < n_t / 2
    full = _full_directional_components(field, 1.0, 10.0, (10.0, 120.0))
    part = directional_components(field, 1.0, 10.0, (10.0, 120.0), columns=(5, 25),
                                  n_out=n_s)
    for name in ("plus", "minus"):
        for i in range(3):
            for j in range(i, 3):
                want = (full[name][i][:, 5:25] * full[name][j][:, 5:25]).mean(axis=0)
                got = (part[name][i] * part[name][j]).mean(axis=0)
                scale = np.sqrt((full[name][i] ** 2).mean() * (full[name][j] ** 2).mean())
                # check: sampling theorem and Parseval's theorem (Bracewell, The Fourier
                # Transform and Its Applications, ch. 10 and 6): a product of two parts of
                # highest harmonic K has degree 2K; over N > 4K equally spaced samples
                # (above its Nyquist rate) its mean is its constant term, the mean over
                # every step
                np.testing.assert_allclose(got, want, rtol=0, atol=1e-11 * scale)
    with pytest.raises(ValueError):
        directional_components(field, 1.0, 10.0, (10.0, 120.0), n_out=n_s // 4)


def test_bootstrap_block_of_band_samples_lasts_as_long_as_on_every_step():
    from coastmon.sources.feed import band_sample_count, bootstrap_block

    rng = np.random.default_rng(12)
    n_t = 3000
    field = rng.standard_normal((n_t, 30)).cumsum(axis=0)
    n_s = band_sample_count(n_t, 1.0, 10.0)
    ratio = n_t / n_s
    every = directional_components(field, 1.0, 10.0, (10.0, 120.0), columns=(5, 25))
    sparse = directional_components(field, 1.0, 10.0, (10.0, 120.0), columns=(5, 25),
                                    n_out=n_s)
    energy_every = every["plus"][0] ** 2 + every["minus"][0] ** 2
    energy_sparse = sparse["plus"][0] ** 2 + sparse["minus"][0] ** 2
    days_every = bootstrap_block(energy_every)
    days_sparse = bootstrap_block(energy_sparse, ratio) * ratio
    assert days_every > 10                       # set by the decorrelation, not the floor
    # check: common practice, no source — the same signal sampled more sparsely is
    # resampled in blocks of the same duration, to within one sample
    assert abs(days_sparse - days_every) <= ratio


@pytest.mark.parametrize("n", [731, 1460])   # 2n = 1462 = 2·17·43, 2920 = 2^3·5·73
def test_decorrelation_lag_is_that_of_the_direct_autocorrelation(n):
    from coastmon.sources.feed import decorrelation_lag

    rng = np.random.default_rng(n)
    phi = 0.9
    x = np.empty((n, 12))
    x[0] = rng.standard_normal(12)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + rng.standard_normal(12)
    x[:, 3] = 0.0                                 # a column that does not vary is left out
    # The direct autocorrelation of each varying column (numpy.correlate, no transforms),
    # normalised by its lag-0 value, averaged over the columns; the first lag below 1/e,
    # interpolated linearly.
    a = x[:, np.abs(x).sum(axis=0) > 0] - x[:, np.abs(x).sum(axis=0) > 0].mean(axis=0)
    acf = np.mean([np.correlate(c, c, "full")[n - 1:] / (c @ c) for c in a.T], axis=0)
    i = int(np.flatnonzero(acf < np.exp(-1))[0])
    direct = i - 1 + (acf[i - 1] - np.exp(-1)) / (acf[i - 1] - acf[i])
    # check: numpy.correlate (the autocorrelation by its definition) — the transform-based
    # lag equals it to rounding, whatever the padded length
    assert decorrelation_lag(x) == pytest.approx(direct, rel=1e-12)
    # check: Box & Jenkins (AR(1) autocorrelation phi^k): e-folding lag -1/ln(phi) = 9.5
    # samples; a 731-step sample estimate lies within a quarter of it
    assert decorrelation_lag(x) == pytest.approx(-1.0 / np.log(phi), rel=0.25)


def _numpy_time_mean_error(values, block=256):
    """Time mean and standard error with numpy sums per block (before issue 21)."""
    shape = values.shape[1:]
    n, s1, s2, lag, n_lag, s_a, s_b = (np.zeros(shape) for _ in range(7))
    prev = None
    for start in range(0, values.shape[0], block):
        part = np.asarray(values[start:start + block], dtype=np.float64)
        part_l = part if prev is None else np.concatenate([prev[None], part], axis=0)
        ok = np.isfinite(part)
        x = np.where(ok, part, 0.0)
        n += ok.sum(axis=0)
        s1 += x.sum(axis=0)
        s2 += (x * x).sum(axis=0)
        a, b = part_l[:-1], part_l[1:]
        both = np.isfinite(a) & np.isfinite(b)
        a0, b0 = np.where(both, a, 0.0), np.where(both, b, 0.0)
        lag += (a0 * b0).sum(axis=0)
        s_a += a0.sum(axis=0)
        s_b += b0.sum(axis=0)
        n_lag += both.sum(axis=0)
        prev = part[-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = s1 / n
        var = np.maximum(s2 / n - mean**2, 0.0)
        cov = lag / n_lag - (s_a / n_lag) * (s_b / n_lag)
        r1 = np.clip(np.where(var > 0, cov / var, 0.0), 0.0, 0.99)
        n_eff = np.maximum(n * (1.0 - r1) / (1.0 + r1), 1.0)
        se = np.sqrt(var * n / np.maximum(n - 1, 1) / n_eff)
    few = n < 3
    return np.where(few, np.nan, mean), np.where(few, np.nan, se)


def test_compiled_time_mean_error_equals_numpy_sums():
    from coastmon.sources.plumes import time_mean_error

    rng = np.random.default_rng(5)
    values = (0.1 + rng.standard_normal((1000, 12, 9)).cumsum(axis=0) * 0.01).astype(np.float32)
    values[rng.random(values.shape) < 0.05] = np.nan       # scattered gaps
    values[:, 3, 4] = np.nan                                # never valid
    values[:998, 5, 5] = np.nan                             # too few steps
    values[:, 7, 2] = 0.25                                  # constant
    stored = np.swapaxes(np.ascontiguousarray(np.swapaxes(values, 0, 1)), 0, 1)  # as the pass stores
    got = time_mean_error(stored)
    want = _numpy_time_mean_error(values, block=64)
    for g, w in zip(got, want, strict=True):
        assert np.array_equal(np.isnan(g), np.isnan(w))
        # check: common practice, no source (the same sums in another order)
        np.testing.assert_allclose(g, w, rtol=1e-10, atol=1e-14)


def test_band_activity_on_threads_equals_each_station_alone():
    from coastmon.config import Settings
    from coastmon.signals import cwt_morlet, scale_average
    from coastmon.sources.detect import band_activity

    settings = Settings()
    s = settings.signals
    x = np.random.default_rng(8).standard_normal((9, 900)).cumsum(axis=1)
    full, windows, period = band_activity(x, 1.0, settings)
    for i in range(x.shape[0]):
        wt = cwt_morlet(x[i:i + 1], 1.0, dj=s.dj, omega0=s.omega0,
                        period_band=s.eddy_period_days)
        averaged = scale_average(wt, s.eddy_period_days)
        # check: common practice, no source (the same transform of one station alone)
        np.testing.assert_allclose(full[i], averaged.mean(), rtol=1e-12)
        assert np.isfinite(windows[:, i]).all() and period[i] > 0


def test_block_bootstrap_by_counts_equals_the_loop_over_resamples():
    from coastmon.sources.feed import block_bootstrap_means

    series = np.random.default_rng(2).standard_normal((700, 5, 3))
    for block in (1, 7, 64, 700):
        got = block_bootstrap_means(series, block, 50, np.random.default_rng(9))
        # the loop over resamples (before issue 21), with the same draws
        rng = np.random.default_rng(9)
        n_blocks = int(np.ceil(700 / block))
        csum = np.concatenate([np.zeros((1, 5, 3)), np.cumsum(series, axis=0)])
        starts = rng.integers(0, 700 - block + 1, size=(50, n_blocks))
        want = np.stack([(csum[s + block] - csum[s]).sum(axis=0) / (n_blocks * block)
                         for s in starts])
        # check: Künsch 1989 (moving-block bootstrap), the same sums in another order
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-14)


def test_nearshore_anomaly_by_station_blocks_equals_all_at_once(monkeypatch):
    import warnings

    from coastmon.sources import detect

    rng = np.random.default_rng(4)
    section = rng.standard_normal((300, 11, 7)).astype(np.float32)
    section[rng.random(section.shape) < 0.1] = np.nan
    section[:, 4, :] = np.nan                                  # a station never valid
    offsets = np.array([0.0, 10, 20, 30, 40, 60, 80])
    near = offsets <= 30.0
    sub = section[:, :, near].astype(np.float64)               # all stations at once
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        want = np.nanmean(sub - np.nanmean(sub, axis=0, keepdims=True), axis=2)
    monkeypatch.setattr(detect, "ANOMALY_BUDGET_BYTES", 16 * 300 * 4 * 3)  # 3 stations
    got = detect.nearshore_anomaly(section, offsets, 30.0)
    # check: common practice, no source (the same means, a block of stations at a time;
    # numpy may add the time steps in another order for a narrower block: last-bit changes)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-15)


def test_nearshore_anomaly_of_stations_without_gaps_takes_the_plain_means():
    import warnings

    from coastmon.sources import detect

    rng = np.random.default_rng(5)
    section = rng.standard_normal((400, 9, 7)).astype(np.float32)
    section[rng.random(400) < 0.2, 2, 1] = np.nan               # gaps at one station
    section[:, 6, 0] = np.nan                                   # one offset never valid
    offsets = np.array([0.0, 10, 20, 30, 40, 60, 80])
    got = detect.nearshore_anomaly(section, offsets, 30.0)
    for s in range(9):                                          # station by station
        sub = section[:, s:s + 1, :4].astype(np.float64)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            want = np.nanmean(sub - np.nanmean(sub, axis=0, keepdims=True), axis=2)
        # check: common practice, no source (numpy.nanmean: without NaN, the same sums
        # divided by the same counts as numpy.mean)
        np.testing.assert_array_equal(got[:, s:s + 1], want)


def test_along_derivative_has_the_fourth_order_response_in_any_memory_order():
    dd_m = 10_000.0
    j = np.arange(40)
    k = 2.0 * np.pi / (10 * dd_m)                     # a wavelength of ten steps
    t = np.arange(7)[:, None]
    q = np.sin(k * dd_m * j[None, :] + 0.3 * t)       # (time, distance)
    got = along_derivative(q, dd_m)
    exact = k * np.cos(k * dd_m * j[None, :] + 0.3 * t)
    ratio = (8.0 * np.sin(k * dd_m) - np.sin(2.0 * k * dd_m)) / (6.0 * k * dd_m)
    # check: Fornberg 1988, Math. Comp. 51:699 (the fourth-order centred difference's
    # response to a sine, 0.995 at ten points per wavelength)
    assert ratio == pytest.approx(0.995, abs=1e-4)
    np.testing.assert_allclose(got[:, 2:-2], ratio * exact[:, 2:-2], rtol=0, atol=1e-12 * k)
    # ends: numpy.gradient's one-sided and centred differences (numpy's own function)
    np.testing.assert_allclose(got[:, [0, 1, -2, -1]],
                               np.gradient(q, dd_m, axis=1)[:, [0, 1, -2, -1]], rtol=1e-14)
    fortran = np.asfortranarray(q)
    np.testing.assert_array_equal(along_derivative(fortran, dd_m), got)
    np.testing.assert_array_equal(along_derivative(np.asfortranarray(q.T).T[:, 3:30], dd_m),
                                  along_derivative(q[:, 3:30].copy(), dd_m))


def test_gate_products_kernel_gives_the_array_expressions():
    from coastmon.sources.feed import _add_gate_products

    rng = np.random.default_rng(8)
    fields = [[np.asfortranarray(rng.standard_normal((300, 12))) for _ in range(3)]
              for _ in range(3)]                                  # u, v, p: q, q_t, q_d
    out = np.zeros((3, 12, 300))
    for q, q_t, q_d in fields:
        _add_gate_products(q, q_t, q_d, out)
    # check: common practice, no source (the products as array expressions, summed over
    # the fields in the same order: the same numbers)
    want = np.stack([sum(f[0] ** 2 for f in fields), sum(-f[1] * f[2] for f in fields),
                     sum(f[2] ** 2 for f in fields)])
    np.testing.assert_array_equal(out, want.transpose(0, 2, 1))


@pytest.mark.parametrize("n_t", [1500, 730])
def test_window_means_from_harmonics_are_the_means_of_the_series(n_t):
    from coastmon.sources import feed

    rng = np.random.default_rng(n_t)
    band = (10.0, 120.0)
    fields = [rng.standard_normal((n_t, 40)).cumsum(axis=0) for _ in range(3)]
    rows = feed.band_harmonics(n_t, 1.0, band)
    spectra = [feed._band_rows(f, rows) for f in fields]
    windows = [np.arange(12, 20), np.arange(3, 31), np.arange(36, 40), np.arange(0, 6)]
    got = feed._window_means_from_harmonics(spectra, windows, n_t, 1.0, 10.0, band)
    # the series at every step and their products, window by window (as the gate
    # measured every configuration before)
    for i, w in enumerate(windows):
        parts = [feed.directional_components(f, 1.0, 10.0, band) for f in fields]
        for j, name in enumerate(("plus", "minus")):
            q = [p[name][0][:, w] for p in parts]
            q_t = [p[name][1][:, w] for p in parts]
            q_d = [p[name][2][:, w] for p in parts]
            want = [np.mean(0.5 * sum(x ** 2 for x in q)),
                    np.mean(sum(-a * b for a, b in zip(q_t, q_d, strict=True))),
                    np.mean(sum(x ** 2 for x in q_d))]
            # check: Parseval's theorem (Bracewell, The Fourier Transform and Its
            # Applications, ch. 6) — the time mean of a product of two band-limited
            # series is the sum over their harmonics
            np.testing.assert_allclose(got[i, 3 * j:3 * j + 3], want, rtol=1e-9,
                                       err_msg=f"window {i}, {name}")


def test_alongshore_current_by_station_blocks_equals_all_at_once(monkeypatch):
    import warnings

    import pandas as pd
    import xarray as xr

    from coastmon.sources import detect

    rng = np.random.default_rng(8)
    u = rng.standard_normal((200, 9, 5)).astype(np.float32)
    v = rng.standard_normal((200, 9, 5)).astype(np.float32)
    v[rng.random(v.shape) < 0.3] = np.nan
    offsets = np.array([0.0, 10, 20, 40, 80])
    series = xr.Dataset({"section_u": (("time", "station", "offset"), u),
                         "section_v": (("time", "station", "offset"), v)},
                        coords={"offset_km": ("offset", offsets)})
    # a coast running north along 10 W: along-shore flow is v
    frame = type("Frame", (), {"stations": pd.DataFrame({
        "segment_id": np.zeros(9, int), "alongshore_km": np.arange(9) * 10.0,
        "lon": np.full(9, -10.0), "lat": 30.0 + np.arange(9) * 0.09})})()
    whole = detect.alongshore_current(series, frame, 20.0)
    monkeypatch.setattr(detect, "ANOMALY_BUDGET_BYTES", 16 * 200 * 3 * 2)  # 2 stations
    blocks = detect.alongshore_current(series, frame, 20.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        want = np.nanmean(v[:, :, :3].astype(np.float64), axis=2)
    # check: common practice, no source — on a meridional coast the along-shore current is
    # the near-shore mean of v, whichever block of stations it is formed in
    np.testing.assert_allclose(whole, want, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(blocks, whole, rtol=1e-12, atol=1e-15)
    # gaps at one station only: the others take plain means, the same numbers
    v = rng.standard_normal((200, 9, 5)).astype(np.float32)
    v[rng.random(200) < 0.3, 4, 1] = np.nan
    series["section_v"] = (("time", "station", "offset"), v)
    got = detect.alongshore_current(series, frame, 20.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        want = np.nanmean(v[:, :, :3].astype(np.float64), axis=2)
    # check: common practice, no source (numpy.nanmean, station by station)
    for s in range(9):
        np.testing.assert_array_equal(got[:, s], want[:, s], err_msg=str(s))


def test_analyses_run_with_one_blas_thread_and_restore_it():
    from threadpoolctl import threadpool_info

    from coastmon import pipeline
    from coastmon.threads import one_blas_thread

    def blas_threads():
        return [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]

    np.ones((4, 4)) @ np.ones(4)                     # the BLAS library is loaded
    before = blas_threads()
    seen = one_blas_thread(blas_threads)()
    # check: threadpoolctl documentation (threadpool_limits sets the library's thread
    # count inside the block and restores it after)
    assert seen and all(n == 1 for n in seen)
    assert blas_threads() == before
    # the analyses of the series (the threaded part of analyze and update) are wrapped
    assert pipeline.analyse_series.__wrapped__ is not None


@pytest.mark.parametrize("n_t", [8, 1500, 1501])
def test_trend_is_removed_in_spectral_space(n_t):
    from coastmon.sources.feed import _band_rows

    rng = np.random.default_rng(n_t)
    field = rng.standard_normal((n_t, 5)) + np.outer(np.arange(n_t), rng.standard_normal(5))
    rows = np.arange(1, n_t // 2 + 1)
    # check: scipy.signal.detrend (a general-purpose reference library) followed by the
    # transform; the ramp's harmonics n/(w - 1) are the geometric series sum of t w^t
    import scipy.signal

    want = scipy.fft.rfft(scipy.signal.detrend(field, axis=0, type="linear"), axis=0)[rows].T
    np.testing.assert_allclose(_band_rows(field, rows), want, rtol=1e-10,
                               atol=1e-10 * np.abs(want).max())
    with pytest.raises(ValueError):
        _band_rows(field, np.arange(0, 3))


def test_modules_imported_in_the_background_are_loaded_after_and_failures_left_silent():
    import subprocess
    import sys

    # check: common practice, no source — in a fresh interpreter, a module imported on the
    # side thread is in sys.modules once the thread ends, and a module that cannot be
    # imported stops the thread quietly (the real import later reports it)
    code = ("import sys; from coastmon.threads import import_in_background; "
            "t = import_in_background('colorsys', 'no_such_module_here', 'this'); t.join(); "
            "print('colorsys' in sys.modules, 'this' in sys.modules)")
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["True", "False"] and "Traceback" not in run.stderr


def test_numpy_gets_ordinary_pages_unless_the_user_chose():
    import subprocess
    import sys

    # check: numpy documentation (NUMPY_MADVISE_HUGEPAGE: numpy asks for huge pages unless
    # it is 0; read when numpy is imported) — in a fresh interpreter the switch is off
    # after small_pages, a process started then inherits it, and restoring puts it back;
    # a value the user set is left alone
    code = (
        "import os, subprocess, sys\n"
        "try:\n"
        "    from numpy._core.multiarray import _set_madvise_hugepage as switch\n"
        "except ImportError:\n"
        "    from numpy.core.multiarray import _set_madvise_hugepage as switch\n"
        "from coastmon.threads import small_pages\n"
        "switch(True)\n"
        "restore = small_pages()\n"
        "now = switch(False); switch(now)\n"
        "child = subprocess.run([sys.executable, '-c', 'import os; "
        "print(os.environ.get(\"NUMPY_MADVISE_HUGEPAGE\"))'], capture_output=True, text=True)"
        ".stdout.strip()\n"
        "restore()\n"
        "after = switch(True)\n"
        "print(now, child, after, os.environ.get('NUMPY_MADVISE_HUGEPAGE'))\n")
    env = {k: v for k, v in os.environ.items() if k != "NUMPY_MADVISE_HUGEPAGE"}
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, env=env)
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["False", "0", "True", "None"]
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120, env={**env, "NUMPY_MADVISE_HUGEPAGE": "1"})
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["True", "1", "True", "1"]
