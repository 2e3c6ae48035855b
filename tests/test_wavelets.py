"""Wavelet transform and significance against Torrence & Compo (1998) and pycwt."""

from __future__ import annotations

import numpy as np
import pycwt
import pytest
import scipy.signal

from coastmon.errors import RecordError, SettingsError
from coastmon.signals import (
    C_DELTA_MORLET6,
    band_power,
    cwt_morlet,
    delta_reconstruction_factor,
    fourier_factor,
    global_significance,
    global_spectrum,
    lag1_autocorrelation,
    reconstruct,
    red_noise_significance,
    red_noise_spectrum,
    scale_average,
    scale_average_significance,
    significant_fraction,
)


def _ar1(alpha: float, shape: tuple[int, ...], seed: int) -> np.ndarray:
    """AR(1) series x_n = alpha x_{n-1} + e_n with unit-variance innovations."""
    innovations = np.random.default_rng(seed).standard_normal(shape)
    return scipy.signal.lfilter([1.0], [1.0, -alpha], innovations, axis=-1)


def test_morlet_constants_match_published_table() -> None:
    assert fourier_factor(6.0) == pytest.approx(1.033, abs=5e-4)  # check: Torrence & Compo 1998, Table 1 and §3h (lambda = 1.03 s for omega0 = 6)
    assert C_DELTA_MORLET6 == 0.776  # check: Torrence & Compo 1998, Table 2
    assert delta_reconstruction_factor(6.0, dj=0.125) == pytest.approx(0.776, rel=0.01)  # check: Torrence & Compo 1998, eq. 13 and Table 2


def test_white_noise_variance_is_preserved() -> None:
    x = np.random.default_rng(11).standard_normal(4096)
    wt = cwt_morlet(x, dt=0.5, s0=0.25)
    n = x.size
    c_delta = wt.dj * wt.dt / (n * np.var(x)) * np.sum(wt.power / wt.scales[:, None])
    assert c_delta == pytest.approx(0.776, rel=0.03)  # check: Torrence & Compo 1998, eq. 14 with C_delta of Table 2
    band_variance = scale_average(wt, (wt.periods[0], wt.periods[-1])).mean()
    assert band_variance == pytest.approx(np.var(x), rel=0.05)  # check: Torrence & Compo 1998, eqs. 14 and 24 (all scales hold all the variance)


def test_reconstruction_recovers_the_series() -> None:
    x = np.random.default_rng(5).standard_normal(1000) + 3.0
    wt = cwt_morlet(x, dt=1.0, s0=0.5)
    error = reconstruct(wt) - (x - x.mean())
    assert np.std(error) < 0.05 * np.std(x)  # check: Torrence & Compo 1998, §3i (eq. 11 reconstructs to within a few percent)


def test_transform_matches_pycwt_for_stacked_series() -> None:
    rng = np.random.default_rng(2)
    x = rng.standard_normal((2, 500)).cumsum(axis=-1)
    x -= x.mean(axis=-1, keepdims=True)
    wt = cwt_morlet(x, dt=0.25, dj=0.125)
    for row in range(2):
        w_ref, scales_ref, freqs_ref, coi_ref, _, _ = pycwt.cwt(
            x[row], 0.25, 0.125, wt.scales[0], wt.scales.size - 1, pycwt.Morlet(6.0))
        np.testing.assert_allclose(wt.scales, scales_ref, rtol=1e-12)  # check: pycwt reference library
        np.testing.assert_allclose(wt.periods, 1.0 / freqs_ref, rtol=1e-12)  # check: pycwt reference library
        np.testing.assert_allclose(wt.coi, coi_ref, rtol=1e-12)  # check: pycwt reference library
        np.testing.assert_allclose(wt.power[row], np.abs(w_ref) ** 2,
                                   rtol=1e-6, atol=1e-9 * wt.power[row].max())  # check: pycwt reference library


def test_band_limited_transform_matches_pycwt_on_its_scales() -> None:
    rng = np.random.default_rng(5)
    x = rng.standard_normal(600).cumsum()
    full = cwt_morlet(x, dt=1.0, dj=0.125)
    band = cwt_morlet(x, dt=1.0, dj=0.125, period_band=(20.0, 90.0))
    keep = (full.periods >= 20.0) & (full.periods <= 90.0)
    assert band.scales.size == keep.sum() > 10
    w_ref, scales_ref, _, _, _, _ = pycwt.cwt(
        x - x.mean(), 1.0, 0.125, full.scales[0], full.scales.size - 1, pycwt.Morlet(6.0))
    np.testing.assert_allclose(band.scales, scales_ref[keep], rtol=1e-12)  # check: pycwt reference library
    np.testing.assert_allclose(band.power, np.abs(w_ref[keep]) ** 2, rtol=1e-6,
                               atol=1e-9 * band.power.max())  # check: pycwt reference library
    np.testing.assert_array_equal(band.coefs, full.coefs[keep])


def test_band_power_is_the_band_of_the_pycwt_transform_reduced() -> None:
    x = np.random.default_rng(8).standard_normal((3, 700)).cumsum(axis=-1)
    averaged, scale_mean, periods = band_power(x, 1.0, (10.0, 120.0), dj=0.125)
    for row in range(3):
        w_ref, scales_ref, freqs_ref, _, _, _ = pycwt.cwt(
            x[row] - x[row].mean(), 1.0, 0.125, 2.0 / fourier_factor(6.0), -1, pycwt.Morlet(6.0))
        keep = (1.0 / freqs_ref >= 10.0) & (1.0 / freqs_ref <= 120.0)
        power = np.abs(w_ref[keep]) ** 2
        np.testing.assert_allclose(periods, 1.0 / freqs_ref[keep], rtol=1e-12)  # check: pycwt reference library
        expected = 0.125 / C_DELTA_MORLET6 * (power / scales_ref[keep][:, None]).sum(axis=0)
        np.testing.assert_allclose(averaged[row], expected, rtol=1e-6,
                                   atol=1e-9 * expected.max())  # check: Torrence & Compo 1998, eq. 24 on pycwt's coefficients
        np.testing.assert_allclose(scale_mean[row], power.mean(axis=-1), rtol=1e-6)  # check: Torrence & Compo 1998, eq. 22 on pycwt's coefficients
    # the same numbers as reducing the whole band-limited transform (no coefficients held)
    wt = cwt_morlet(x, 1.0, dj=0.125, period_band=(10.0, 120.0))
    np.testing.assert_array_equal(averaged, scale_average(wt, (10.0, 120.0)))
    np.testing.assert_array_equal(scale_mean, wt.power.mean(axis=-1))


def test_significance_levels_match_pycwt() -> None:
    x = _ar1(0.72, (1024,), seed=8)
    wt = cwt_morlet(x, dt=1.0)
    alpha = float(lag1_autocorrelation(x))
    variance = float(wt.variance)
    local_ref, _ = pycwt.significance(variance, 1.0, wt.scales, 0, alpha,
                                      significance_level=0.95, wavelet=pycwt.Morlet(6.0))
    local = red_noise_significance(variance, alpha, wt.periods, 1.0, level=0.95)
    np.testing.assert_allclose(local, local_ref, rtol=1e-10)  # check: pycwt reference library (T&C eq. 18)
    n_avg = np.full(wt.scales.size, float(x.size))
    global_ref, _ = pycwt.significance(variance, 1.0, wt.scales, 1, alpha,
                                       significance_level=0.95, dof=n_avg,
                                       wavelet=pycwt.Morlet(6.0))
    np.testing.assert_allclose(global_significance(wt, alpha), global_ref, rtol=1e-10)  # check: pycwt reference library (T&C eq. 23)
    band = (8.0, 32.0)
    inside = wt.scales[(wt.periods >= band[0]) & (wt.periods <= band[1])]
    avg_ref, _ = pycwt.significance(variance, 1.0, wt.scales, 2, alpha,
                                    significance_level=0.95, dof=[inside[0], inside[-1]],
                                    wavelet=pycwt.Morlet(6.0))
    assert float(scale_average_significance(wt, alpha, band)) == pytest.approx(float(avg_ref), rel=1e-10)  # check: pycwt reference library (T&C eqs. 25-28)


def test_red_noise_spectrum_matches_welch_estimate_of_ar1() -> None:
    alpha = 0.6
    x = _ar1(alpha, (2 ** 18,), seed=4)
    freq, psd = scipy.signal.welch(x, fs=1.0, nperseg=512)
    middle = (freq > 0.02) & (freq < 0.45)
    variance = 1.0 / (1.0 - alpha ** 2)
    # A normalised discrete spectrum with mean 1 is a one-sided density 2 * sigma^2 * P.
    expected = 2.0 * variance * red_noise_spectrum(alpha, 1.0 / freq[middle], 1.0)
    np.testing.assert_allclose(psd[middle], expected, rtol=0.12)  # check: Torrence & Compo 1998, eq. 16 (AR(1) spectrum) against scipy.signal.welch


def test_lag1_autocorrelation_recovers_planted_alpha() -> None:
    x = _ar1(0.6, (3, 20000), seed=9)
    np.testing.assert_allclose(lag1_autocorrelation(x), 0.6, atol=0.02)  # check: planted in generator (AR(1) with alpha = 0.6)
    along_first = lag1_autocorrelation(x.T, axis=0)
    np.testing.assert_allclose(along_first, 0.6, atol=0.02)  # check: planted in generator (AR(1) with alpha = 0.6)


def test_sine_peaks_at_its_period() -> None:
    period = 37.0
    t = np.arange(2000)
    x = np.sin(2 * np.pi * t / period) + 0.2 * np.random.default_rng(1).standard_normal(t.size)
    wt = cwt_morlet(x, dt=1.0)
    peak = wt.periods[np.argmax(global_spectrum(wt))]
    assert abs(np.log2(peak / period)) <= wt.dj  # check: Torrence & Compo 1998, §3h (Morlet scale-to-period factor)


def test_local_significance_false_alarm_rate_on_red_noise() -> None:
    alpha = 0.7
    x = _ar1(alpha, (40, 2048), seed=3)
    wt = cwt_morlet(x, dt=1.0)
    sig = red_noise_significance(wt.variance, alpha, wt.periods, 1.0, level=0.95)
    inside = wt.periods[:, None] <= wt.coi[None, :]
    rate = ((wt.power > sig[..., None]) & inside).sum() / (inside.sum() * x.shape[0])
    assert 0.04 < rate < 0.065  # check: Torrence & Compo 1998, §4 (local power ~ red spectrum x chi2_2/2; 5 % exceed the 95 % level)


def test_scale_average_significance_false_alarm_rate() -> None:
    alpha = 0.7
    x = _ar1(alpha, (40, 2048), seed=13)
    wt = cwt_morlet(x, dt=1.0)
    band = (8.0, 32.0)
    sig = scale_average_significance(wt, alpha, band)
    rate = significant_fraction(wt, sig, band).mean()
    assert 0.025 < rate < 0.08  # check: Torrence & Compo 1998, §5b (eqs. 25-28; 5 % of red-noise times exceed the 95 % level)


def test_scale_average_of_sine_is_its_variance() -> None:
    amplitude = 2.0
    t = np.arange(3000)
    x = amplitude * np.sin(2 * np.pi * t / 20.0)
    wt = cwt_morlet(x, dt=1.0)
    averaged = scale_average(wt, (10.0, 40.0))
    interior = wt.coi > 40.0
    assert averaged[interior].mean() == pytest.approx(amplitude ** 2 / 2, rel=0.05)  # check: Torrence & Compo 1998, eq. 24 (band variance); sine variance A^2/2


def test_significant_fraction_of_planted_burst() -> None:
    rng = np.random.default_rng(21)
    t = np.arange(2048)
    burst = (t >= 512) & (t < 1536)
    x = rng.standard_normal(t.size) + 3.0 * np.sin(2 * np.pi * t / 16.0) * burst
    stacked = np.stack([x, np.full(t.size, np.nan)])
    wt = cwt_morlet(stacked, dt=1.0)
    band = (8.0, 32.0)
    sig = scale_average_significance(wt, lag1_autocorrelation(rng.standard_normal(t.size)), band)
    fraction = significant_fraction(wt, sig, band)
    reliable = wt.coi >= wt.periods[wt.periods <= band[1]][-1]
    planted = burst[reliable].mean()
    assert fraction[0] == pytest.approx(planted, abs=0.06)  # check: planted in generator (burst over the middle half)
    assert np.isnan(fraction[1])


def test_user_errors_are_reported() -> None:
    with pytest.raises(RecordError):
        cwt_morlet(np.ones(3), dt=1.0)
    wt = cwt_morlet(np.random.default_rng(0).standard_normal(64), dt=1.0)
    with pytest.raises(RecordError):
        scale_average(wt, (500.0, 900.0))
    with pytest.raises(RecordError):
        significant_fraction(wt, np.float64(1.0), (40.0, 60.0))
    other = cwt_morlet(np.random.default_rng(0).standard_normal(64), dt=1.0, omega0=8.0)
    with pytest.raises(SettingsError):
        scale_average_significance(other, 0.3, (4.0, 16.0))
