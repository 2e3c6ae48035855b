"""Wavenumber-frequency spectra, phase speeds and long Rossby waves against outside sources."""

from __future__ import annotations

import gsw
import numpy as np
import pytest
import scipy.signal

from coastmon.errors import RecordError
from coastmon.signals import (
    beta_parameter,
    default_deformation_radius_km,
    deformation_radius_wkb,
    long_rossby_speed,
    propagation_speed,
    radon_speed,
    wavenumber_frequency,
)

DT_DAYS = 1.0
DD_KM = 10.0


def _wave(speed_km_day: float, wavelength_km: float, n_t: int = 400, n_d: int = 60,
          noise: float = 0.0, seed: int = 0) -> np.ndarray:
    """Plane wave cos(2 pi (d - c t) / lambda) on a (time, distance) grid, plus white noise."""
    t = np.arange(n_t)[:, None] * DT_DAYS
    d = np.arange(n_d)[None, :] * DD_KM
    field = np.cos(2 * np.pi * (d - speed_km_day * t) / wavelength_km)
    return field + noise * np.random.default_rng(seed).standard_normal((n_t, n_d))


def _eddies(speed_km_day: float, seed: int) -> np.ndarray:
    """Gaussian eddies of random sign, size and life, all translating at one speed."""
    rng = np.random.default_rng(seed)
    t = np.arange(400)[:, None] * DT_DAYS
    d = np.arange(60)[None, :] * DD_KM
    field = np.zeros((400, 60))
    for _ in range(80):
        born, start = rng.uniform(-150, 400), rng.uniform(-600, 600)
        amplitude = rng.choice([-1.0, 1.0]) * rng.uniform(0.5, 1.5)
        life = rng.uniform(60, 200)
        field += (amplitude * np.exp(-((d - start - speed_km_day * (t - born)) ** 2) / (2 * 40.0 ** 2))
                  * np.exp(-((t - born - life / 2) ** 2) / (2 * (life / 2) ** 2)))
    return field + 0.1 * rng.standard_normal(field.shape)


@pytest.mark.parametrize(("speed", "wavelength"), [(5.0, 230.0), (-3.0, 170.0), (2.0, 300.0), (8.0, 150.0)])
def test_plane_wave_speed_by_both_methods(speed: float, wavelength: float) -> None:
    estimate = propagation_speed(_wave(speed, wavelength, noise=0.3, seed=1), DT_DAYS, DD_KM)
    assert estimate.speed == pytest.approx(speed, rel=0.05)  # check: planted in generator (phase speed of the wave)
    assert estimate.spectral_speed == pytest.approx(speed, rel=0.05)  # check: planted in generator (phase speed of the wave)
    assert estimate.direction == np.sign(speed)  # check: planted in generator (direction of travel)


@pytest.mark.parametrize(("speed", "wavelength", "n_t"), [(0.3, 120.0, 3000), (-12.0, 300.0, 400), (25.0, 400.0, 400)])
def test_reported_speed_over_a_wide_range(speed: float, wavelength: float, n_t: int) -> None:
    estimate = propagation_speed(_wave(speed, wavelength, n_t=n_t, noise=0.3, seed=2), DT_DAYS, DD_KM)
    assert estimate.speed == pytest.approx(speed, rel=0.02)  # check: planted in generator (phase speed of the wave)
    assert estimate.speed_lo <= estimate.speed <= estimate.speed_hi


def test_translating_eddies_speed_and_interval() -> None:
    estimates = [propagation_speed(_eddies(4.0, seed=seed), DT_DAYS, DD_KM) for seed in range(8)]
    reported = np.array([e.speed for e in estimates])
    spectral = np.array([e.spectral_speed for e in estimates])
    covered = sum(e.speed_lo < 4.0 < e.speed_hi for e in estimates)
    assert reported.mean() == pytest.approx(4.0, rel=0.08)  # check: planted in generator (eddy translation speed; Radon bias for growing/decaying eddies documented as ~+5 %)
    assert spectral.mean() == pytest.approx(4.0, rel=0.10)  # check: planted in generator (eddy translation speed)
    assert radon_speed(_eddies(4.0, seed=3), DT_DAYS, DD_KM, direction="negative") < 0  # check: planted in generator (search restricted to -d)
    assert covered >= 5  # check: planted in generator (95 % intervals should mostly cover the truth)


@pytest.mark.parametrize("speed", [4.0, -4.0])
def test_pure_wave_energy_is_in_its_direction(speed: float) -> None:
    spectrum = wavenumber_frequency(_wave(speed, 200.0), DT_DAYS, DD_KM)
    share = spectrum.positive_fraction if speed > 0 else spectrum.negative_fraction
    assert share > 0.95  # check: planted in generator (a single wave travelling one way)


def test_wave_sits_at_its_frequency_and_wavenumber() -> None:
    # 20 cycles in 400 days, 3 wavelengths in 600 km: on the FFT grid, no taper.
    spectrum = wavenumber_frequency(_wave(10.0, 200.0), DT_DAYS, DD_KM, taper=False)
    i, j = np.unravel_index(np.argmax(spectrum.power), spectrum.power.shape)
    assert spectrum.freq[i] == pytest.approx(10.0 / 200.0)  # check: planted in generator (f = c / lambda)
    assert spectrum.wavenumber[j] == pytest.approx(1.0 / 200.0)  # check: planted in generator (k = 1 / lambda, + for travel toward +d)
    assert spectrum.power[i, j] == pytest.approx(0.5, rel=5e-3)  # check: Parseval's theorem (a unit cosine has variance 1/2; the linear detrend removes a little)


def test_spectrum_sums_to_variance() -> None:
    field = np.random.default_rng(4).standard_normal((256, 48)).cumsum(axis=0)
    plain = wavenumber_frequency(field, DT_DAYS, DD_KM, taper=False)
    detrended = scipy.signal.detrend(field, axis=0, type="linear")
    assert plain.power.sum() == pytest.approx(np.var(detrended), rel=1e-10)  # check: Parseval's theorem for the DFT
    noise = np.random.default_rng(5).standard_normal((256, 48))
    tapered = wavenumber_frequency(noise, DT_DAYS, DD_KM, taper=True)
    assert tapered.power.sum() == pytest.approx(1.0, rel=0.05)  # check: Parseval's theorem with window power correction (unit-variance white noise)


def test_gaps_at_the_far_end_are_dropped() -> None:
    field = _wave(5.0, 230.0, n_d=70, noise=0.2, seed=3)
    field[:, 60:] = np.nan
    field[100, 65] = 1.0
    spectrum = wavenumber_frequency(field, DT_DAYS, DD_KM)
    assert spectrum.distance_slice == (0, 60)  # check: planted in generator (complete record only up to index 60)
    assert propagation_speed(field, DT_DAYS, DD_KM).speed == pytest.approx(5.0, rel=0.05)  # check: planted in generator (phase speed of the wave)


def test_short_or_empty_records_are_user_errors() -> None:
    with pytest.raises(RecordError):
        wavenumber_frequency(np.ones((5, 20)), DT_DAYS, DD_KM)
    with pytest.raises(RecordError):
        wavenumber_frequency(np.ones((50, 20)), DT_DAYS, DD_KM)
    with pytest.raises(RecordError):
        propagation_speed(_wave(5.0, 230.0, n_t=24), DT_DAYS, DD_KM)


def test_long_rossby_speed_textbook_value() -> None:
    assert long_rossby_speed(2e-11, 30e3) == pytest.approx(0.018, rel=1e-12)  # check: Gill 1982 §12.4, c = -beta L_d^2 (2e-11 * 3e4^2 = 1.8 cm/s westward)


def test_wkb_radius_for_constant_stratification() -> None:
    depth = np.linspace(0.0, -4000.0, 81)
    radius = deformation_radius_wkb(np.full(depth.size, 5e-3), depth, 1e-4)
    assert radius == pytest.approx(5e-3 * 4000.0 / (np.pi * 1e-4), rel=1e-10)  # check: Gill 1982 §6.11 / Vallis 2017 §6 (constant N flat-bottom first mode, N H / (pi f) = 63.7 km)
    assert radius / 1000.0 == pytest.approx(63.7, abs=0.05)  # check: Gill 1982 §6.11 (arithmetic of N H / (pi f))
    profiles = np.full((2, 81), 5e-3)
    profiles[1, 41:] = np.nan
    both = deformation_radius_wkb(profiles, depth[::-1] * -1.0, np.array([1e-4, -1e-4]))
    np.testing.assert_allclose(both, [63661.98, 31830.99], rtol=1e-6)  # check: Gill 1982 §6.11 (N H / (pi |f|) for H = 4000 m and 2000 m)


def test_beta_matches_derivative_of_gsw_coriolis() -> None:
    lats = np.array([-33.0, -12.0, 0.0, 21.0, 38.0, 60.0])
    step = 0.01
    north, south = lats + step / 2, lats - step / 2
    metres = gsw.distance(np.zeros((2, lats.size)), np.vstack([south, north]), axis=0)[0]
    reference = (gsw.f(north) - gsw.f(south)) / metres
    np.testing.assert_allclose(beta_parameter(lats), reference, rtol=1e-4)  # check: gsw TEOS-10 (f = 2 Omega sin(lat), distance on the sphere)


def test_default_deformation_radius_magnitudes() -> None:
    assert 20.0 < default_deformation_radius_km(35.0) < 60.0  # check: from memory (textbook first baroclinic radius at mid-latitude, a few tens of km)
    assert default_deformation_radius_km(-35.0) == default_deformation_radius_km(35.0)  # check: common practice, no source (depends on |f|)
    equatorial = default_deformation_radius_km(0.0)
    assert 150.0 < equatorial < 500.0  # check: from memory (Gill 1982 §11: equatorial radius (c/beta)^(1/2) of a few hundred km)
    radii = default_deformation_radius_km(np.array([0.0, 5.0, 10.0, 20.0, 40.0, 60.0]))
    assert np.all(np.diff(radii) < 0)  # check: Gill 1982 §7.5 (L_d = c/|f| shrinks poleward)
