"""Source detection: false-alarm rates on random red-noise coasts, recurrence, sensitivity,
attribution along the current, coast ends, plume ends and jet spacing.

The synthetic coasts are pure numpy: red noise (lag-1 autoregressive in time and along
the coast) with planted shedding written down by hand, so what "is a source" is known
without the detector.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats
from scipy.signal import lfilter

from coastmon.config import Settings
from coastmon.sources.detect import (
    attribute_to_cape,
    attribution_reach_km,
    band_activity,
    benjamini_hochberg,
    binomial_sf,
    detection_tests,
    find_sources,
    local_background,
    mean_with_error,
    normal_sf,
)

SETTINGS = Settings()
LEVEL = SETTINGS.signals.significance
ALPHA = 1.0 - LEVEL
N_STATION, DX_KM, LD_KM = 300, 10.0, 30.0
S_KM = np.arange(N_STATION) * DX_KM
SEG = np.zeros(N_STATION, int)


def red_noise_coast(rng, n_time, n_station=N_STATION, tau_days=10.0, ell_km=30.0, burn=200):
    """Unit-variance red noise, (time, station): AR(1) in time (e-folding ``tau_days``) and
    along the coast (e-folding ``ell_km``)."""
    rho_t, rho_s = np.exp(-1.0 / tau_days), np.exp(-DX_KM / ell_km)
    e = rng.standard_normal((n_time + burn, n_station + burn))
    e = lfilter([np.sqrt(1 - rho_s**2)], [1, -rho_s], e, axis=1)
    e = lfilter([np.sqrt(1 - rho_t**2)], [1, -rho_t], e, axis=0)
    return e[burn:, burn:]


def fft_band_activity(x, n_window, band=SETTINGS.signals.eddy_period_days):
    """Band variance of (time, station) series by an ideal FFT band-pass: an independent
    route to the eddy-band variance (Parseval), for many cheap null coasts."""
    n = x.shape[0]
    spec = np.fft.rfft(x, axis=0)
    f = np.fft.rfftfreq(n, d=1.0)
    spec[(f < 1.0 / band[1]) | (f > 1.0 / band[0])] = 0.0
    xb = np.fft.irfft(spec, n=n, axis=0)
    edges = np.linspace(0, n, n_window + 1).round().astype(int)
    windows = np.stack([np.mean(xb[a:b] ** 2, axis=0) for a, b in zip(edges[:-1], edges[1:],
                                                                        strict=True)])
    return np.mean(xb**2, axis=0), windows


def is_source(r):
    return r["localized"] & (r["persistence"] >= SETTINGS.sources.min_persistence)


def pulses(n_time, every_days, width_days=6.0, start=0.0, stop=None):
    """A train of Gaussian pulses of alternating sign (eddies of alternating spin passing
    a station), one every ``every_days`` between ``start`` and ``stop``."""
    t = np.arange(n_time, dtype=float)
    out = np.zeros(n_time)
    stop = n_time if stop is None else stop
    for k, t0 in enumerate(np.arange(start, stop, every_days)):
        out += (-1) ** k * np.exp(-0.5 * ((t - t0) / width_days) ** 2)
    return out


def plant(x, centre, amplitude, signal, half=3):
    """Add ``amplitude * signal`` to the stations within ``half`` of ``centre``, tapered."""
    for k in range(-half, half + 1):
        x[:, centre + k] += amplitude * np.exp(-0.5 * (k / (0.6 * half)) ** 2) * signal
    return x


# ----------------------------------------------------------------------------- statistics
def test_normal_and_binomial_tails_match_scipy():
    z = np.array([-2.0, 0.0, 1.2, 1.645, 3.5, 8.0])
    # check: scipy.stats.norm.sf and binom.sf (general reference library)
    np.testing.assert_allclose(normal_sf(z), stats.norm.sf(z), rtol=1e-10)
    assert np.isnan(normal_sf(np.array([np.nan]))[0])
    k = np.array([0, 1, 2, 3, 6])
    np.testing.assert_allclose(binomial_sf(k, 12, 0.05), stats.binom.sf(k - 1, 12, 0.05),
                               rtol=1e-10)


def test_benjamini_hochberg_reproduces_the_papers_example():
    p = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
                  0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.0])
    rejected, q = benjamini_hochberg(p[::-1], 0.05)
    # check: Benjamini & Hochberg 1995, section 4: at q = 0.05 the four smallest are rejected
    assert rejected[::-1].tolist() == [True] * 4 + [False] * 11
    # check: adjusted p-value of the largest is its own p (m p / m)
    assert q[0] == pytest.approx(1.0)


# ------------------------------------------------------------------------ false alarms
def test_station_false_alarm_rate_on_red_noise_coasts_full_chain():
    """Homogeneous red-noise coasts through the wavelet band activity and the tests."""
    rng = np.random.default_rng(20)
    p_all, localized, sources = [], 0, 0
    n_coast = 5
    for _ in range(n_coast):
        x = red_noise_coast(rng, 1460)
        full, win, _ = band_activity(x.T, 1.0, SETTINGS)
        r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
        p_all.append(r["p"][np.isfinite(r["p"])])
        localized += int(r["localized"].any())
        sources += int(is_source(r).any())
    p_all = np.concatenate(p_all)
    rate = float(np.mean(p_all < ALPHA))
    # Stations 30 km apart are correlated; about one independent test per 2 e-folding
    # lengths (6 stations), so n_eff ~ n / 6 for the binomial bound.
    n_eff = p_all.size / 6.0
    # check: binomial sampling bound, nominal + 3 standard errors (common practice, no source)
    assert rate <= ALPHA + 3.0 * np.sqrt(ALPHA * (1 - ALPHA) / n_eff), rate
    # check: Benjamini & Hochberg 1995 — under the complete null, P(any rejection) <= q;
    # with 5 coasts, 2 or more would have probability < 0.03 at q = 0.05 (binomial)
    assert localized <= 1 and sources <= 1


def test_source_reported_rate_is_controlled_on_many_null_coasts():
    """Many null coasts through the tests, with the band variance from an FFT band-pass."""
    rng = np.random.default_rng(7)
    n_coast, n_window = 150, 12
    any_localized = any_source = 0
    station_hits = station_count = 0
    for _ in range(n_coast):
        x = red_noise_coast(rng, 1460, n_station=150)
        full, win = fft_band_activity(x, n_window)
        r = detection_tests(full, win, S_KM[:150], SEG[:150], LD_KM, LEVEL)
        ok = np.isfinite(r["p"])
        station_hits += int(np.sum(r["p"][ok] < ALPHA))
        station_count += int(ok.sum())
        any_localized += int(r["localized"].any())
        any_source += int(is_source(r).any())
    bound = ALPHA + 2.33 * np.sqrt(ALPHA * (1 - ALPHA) / n_coast)
    # check: Benjamini & Hochberg 1995 (FDR = family-wise rate under the complete null),
    # binomial one-sided 99 % bound for 150 coasts
    assert any_localized / n_coast <= bound, any_localized
    assert any_source / n_coast <= any_localized / n_coast
    # check: per-station rate at most nominal + 3 binomial standard errors (n_eff = n / 6)
    assert station_hits / station_count <= ALPHA + 3 * np.sqrt(ALPHA * (1 - ALPHA) * 6 / station_count)


def test_persistence_under_the_null_is_binomial():
    rng = np.random.default_rng(3)
    counts = []
    for _ in range(40):
        x = red_noise_coast(rng, 1460, n_station=150)
        full, win = fft_band_activity(x, 12)
        r = detection_tests(full, win, S_KM[:150], SEG[:150], LD_KM, LEVEL)
        ok = np.isfinite(r["persistence"])
        counts.append(r["persistence"][ok] * r["n_windows"][ok])
    counts = np.concatenate(counts)
    # check: under the null a window is above the larger of two ring medians with
    # probability at most 1/2, so at most Binomial(12, 1/2): mean <= 6 windows, with a
    # sampling tolerance of 3 standard errors for n / 6 effective stations
    se = np.sqrt(12 * 0.25 * 6 / counts.size)
    assert counts.mean() <= 6.0 + 3 * se
    # check: P(recurrent) <= alpha under the null (binomial upper tail), same tolerance
    recurrent = np.mean(binomial_sf(counts, 12, 0.5) <= ALPHA)
    assert recurrent <= ALPHA + 3 * np.sqrt(ALPHA * (1 - ALPHA) * 6 / counts.size)


# ---------------------------------------------------------------------- recurrence
@pytest.mark.parametrize("factor", [2.0, 3.0])
def test_a_noisier_stretch_is_not_a_source(factor):
    rng = np.random.default_rng(int(factor))
    x = red_noise_coast(rng, 1460)
    x[:, 120:180] *= np.sqrt(factor)  # 600 km of stationary extra variance, no events
    full, win, _ = band_activity(x.T, 1.0, SETTINGS)
    r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
    # check: planted truth — no events were planted, so no station may pass as a source
    assert not is_source(r)[100:200].any()
    # check: inside the stretch the local background is the stretch itself: persistence
    # stays at the null level (at most 1/2 on average)
    assert np.nanmean(r["persistence"][130:170]) <= 0.5


def test_one_burst_scores_low_and_regular_shedding_high():
    rng = np.random.default_rng(11)
    n = 1460
    x = red_noise_coast(rng, n)
    burst = pulses(n, 30.0, start=400.0, stop=520.0)   # one season of shedding, then none
    regular = pulses(n, 36.0)                          # about ten eddies a year, all record
    x = plant(x, 80, 3.0, burst)
    x = plant(x, 200, 1.5, regular)
    full, win, _ = band_activity(x.T, 1.0, SETTINGS)
    r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
    # check: planted truth — the burst fills one or two of twelve windows; the t-test
    # over the windows sees one outlier, not a recurrent excess
    assert r["t"][80] < 2.0
    assert not is_source(r)[75:86].any()
    # check: planted truth — regular shedding in every window
    assert r["persistence"][200] >= 0.75
    assert is_source(r)[197:204].any()


def test_weak_regular_shedding_found_beside_a_strong_source():
    """A tenth of the strong source's energy: a pulse train with amplitude 1/sqrt(10).

    The strong source stands about 30 times above the background (the demo's sources stand
    65 to 220 times above theirs), so the weak one is about 3 times above it."""
    rng = np.random.default_rng(5)
    n = 1460
    x = red_noise_coast(rng, n)
    strong = pulses(n, 36.0)
    weak = pulses(n, 40.0, start=13.0)
    x = plant(x, 70, 6.0, strong)
    x = plant(x, 210, 6.0 / np.sqrt(10.0), weak)
    full, win, _ = band_activity(x.T, 1.0, SETTINGS)
    r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
    src = is_source(r)
    # check: planted truth — both planted, nothing else passes away from them
    assert src[66:75].any() and src[205:216].any()
    assert not src[100:180].any()
    # check: planted truth — the weak one has the smaller ratio over its background
    assert np.nanmax(r["ratio"][205:216]) < np.nanmax(r["ratio"][66:75])


# ------------------------------------------------------------------------- coast ends
def test_open_coast_ends_are_not_assessed():
    values = np.ones((1, N_STATION))
    bg = local_background(values, S_KM, SEG, LD_KM)[0]
    # check: geometry of the rings — gap 2 L_d, outer 8 L_d, a third of the ring needed:
    # stations closer than 2 L_d + 2 L_d = 120 km to an end have no background
    end = S_KM < 4 * LD_KM - DX_KM
    assert np.isnan(bg[end]).all() and np.isnan(bg[::-1][end]).all()
    assert np.isfinite(bg[(S_KM >= 4 * LD_KM) & (S_KM <= S_KM[-1] - 4 * LD_KM)]).all()


def test_capes_near_open_coast_ends_are_named_as_untested():
    from types import SimpleNamespace

    import xarray as xr

    from coastmon.sources.detect import untested_capes

    rng = np.random.default_rng(5)
    x = red_noise_coast(rng, 730)
    full, win, _ = band_activity(x.T, 1.0, SETTINGS)
    r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
    profiles = xr.Dataset({"localization_q": ("station", r["q"])})
    frame = SimpleNamespace(stations=pd.DataFrame({"alongshore_km": S_KM, "segment_id": SEG}))
    capes = pd.DataFrame({"cape_id": ["end", "middle", "other end"], "segment_id": [0, 0, 0],
                          "alongshore_km": [40.0, 1500.0, S_KM[-1] - 20.0],
                          "lon": [0.0, 0.0, 0.0], "lat": [0.0, 1.0, 2.0]})
    blind = untested_capes(profiles, frame, capes, 50.0)
    # check: geometry of the rings (as above) — no station within 50 km of a cape 40 km from
    # the end (all closer than 120 km) is tested; the middle of the coast is
    assert list(blind["cape_id"]) == ["end", "other end"]


def test_a_record_of_few_windows_gets_a_low_power_note():
    from coastmon.pipeline import FEW_WINDOWS, few_windows_note

    longest = SETTINGS.signals.eddy_period_days[1]
    # check: arithmetic — 240 daily steps hold 2 windows of 120 days, 730 hold 6
    assert "only 2 windows" in few_windows_note(240, 1.0, SETTINGS)
    assert few_windows_note(int(FEW_WINDOWS * longest), 1.0, SETTINGS) == ""
    assert "only 5 windows" in few_windows_note(int(FEW_WINDOWS * longest) - 1, 1.0, SETTINGS)
    # the table of docs/detection-rates.md starts at 730 days with 120-day windows
    assert FEW_WINDOWS <= 730 // longest


def test_noisy_coast_end_makes_no_source():
    rng = np.random.default_rng(17)
    x = red_noise_coast(rng, 1460)
    x[:, :12] *= 3.0  # the last 120 km before an open boundary: strong, stationary
    x[:, :12] += 2.0 * pulses(1460, 36.0)[:, None]
    full, win, _ = band_activity(x.T, 1.0, SETTINGS)
    r = detection_tests(full, win, S_KM, SEG, LD_KM, LEVEL)
    # check: planted truth — the end is excluded by construction of the rings
    assert not is_source(r)[:20].any()


def test_step_between_quiet_and_noisy_coast_is_not_a_source():
    values = np.where(S_KM < 1500, 1.0, 3.0)[None, :]
    bg = local_background(values, S_KM, SEG, LD_KM)[0]
    # check: analytic — the larger of the two ring medians is the noisy side's level at
    # every station within a ring width of the step, so no station stands above it
    ok = np.isfinite(bg)
    assert np.all(values[0][ok] <= bg[ok])


# ------------------------------------------------------------------------ attribution
def test_reach_is_current_times_half_period_within_bounds():
    # check: analytic — 0.15 m/s for 15 days = 194.4 km, inside [60, 240] km
    assert attribution_reach_km(0.15, 30.0, LD_KM) == pytest.approx(194.4)
    assert attribution_reach_km(0.01, 30.0, LD_KM) == pytest.approx(2 * LD_KM)
    assert attribution_reach_km(0.5, 60.0, LD_KM) == pytest.approx(8 * LD_KM)


def test_source_downstream_of_a_cape_is_tied_to_it_only_with_the_current():
    capes = pd.DataFrame({"cape_id": ["K1", "K2"], "segment_id": [0, 0],
                          "alongshore_km": [1000.0, 1400.0]})
    # Current towards decreasing km: the cape at 1000 km lies upstream of 850 km? No —
    # flow from larger to smaller km, so 1000 -> 850 is downstream: tied.
    cid, dist, why = attribute_to_cape(850.0, 0, capes, -0.15, 0.01, 30.0, LD_KM, 50.0)
    # check: planted geometry — 150 km downstream, reach 194 km
    assert cid == "K1" and dist == pytest.approx(150.0) and "upstream" in why
    # The same place with the current reversed: the cape is downstream, none upstream.
    cid, dist, why = attribute_to_cape(850.0, 0, capes, 0.15, 0.01, 30.0, LD_KM, 50.0)
    assert cid == "" and dist == pytest.approx(150.0) and "upstream" in why
    # No measurable current: only the near tolerance applies.
    cid, _, why = attribute_to_cape(850.0, 0, capes, 0.01, 0.02, 30.0, LD_KM, 50.0)
    assert cid == "" and "direction" in why
    cid, _, _ = attribute_to_cape(1030.0, 0, capes, 0.01, 0.02, 30.0, LD_KM, 50.0)
    assert cid == "K1"


def test_mean_with_error_matches_the_ar1_formula():
    rng = np.random.default_rng(2)
    rho = 0.8
    x = lfilter([1.0], [1, -rho], rng.standard_normal(200_000))
    mean, se = mean_with_error(x)
    # check: von Storch & Zwiers 1999 §6.6 — var(mean) = sigma^2 / n * (1+rho)/(1-rho)
    expect = np.std(x) / np.sqrt(x.size * (1 - rho) / (1 + rho))
    assert se == pytest.approx(expect, rel=0.05)


class _Frame:
    def __init__(self, n):
        self.stations = pd.DataFrame({"segment_id": np.zeros(n, int),
                                      "alongshore_km": np.arange(n) * DX_KM,
                                      "lon": np.full(n, -10.0),
                                      "lat": 30.0 + np.arange(n) * DX_KM / 111.2})


def _profiles(n, peaks, current):
    ratio = np.ones(n)
    for c, a in peaks:
        ratio[c - 2:c + 3] = a * np.array([0.6, 0.9, 1.0, 0.9, 0.6])
    loc = (ratio > 1.2).astype(np.int8)
    return xr.Dataset({
        "localization": ("station", ratio), "localized": ("station", loc),
        "localization_q": ("station", np.where(loc > 0, 0.001, 0.9)),
        "persistence": ("station", np.where(loc > 0, 0.9, 0.05)),
        "recurrence_p": ("station", np.where(loc > 0, 1e-6, 0.6)),
        "zeta_var_ns": ("station", ratio * 1e-11), "band_var_ns": ("station", ratio * 1e-11),
        "shedding_period_days": ("station", np.full(n, 30.0)),
        "alongshore_current_m_s": ("station", np.full(n, current)),
    })


def test_maxima_fed_by_one_cape_make_one_cape_level_source():
    n = 200
    frame = _Frame(n)
    capes = pd.DataFrame({"cape_id": ["K1"], "segment_id": [0], "alongshore_km": [1000.0]})
    # Current towards decreasing km: maxima at 1000 km (the tip), 900 km and 820 km are
    # downstream of the cape; a maximum at 1500 km has no cape upstream within reach.
    prof = _profiles(n, [(100, 6.0), (90, 4.0), (82, 3.0), (150, 5.0)], -0.15)
    found = find_sources(prof, frame, capes, SETTINGS, LD_KM)
    # check: planted geometry — two sources: the cape with three members, one unanchored
    assert len(found) == 2
    cape = found[found["cape_id"] == "K1"].iloc[0]
    assert cape["n_members"] == 3
    assert cape["members_km"] == (820.0, 900.0, 1000.0)
    assert cape["alongshore_km"] == 1000.0  # the strongest member
    alone = found[found["cape_id"] == ""].iloc[0]
    assert alone["alongshore_km"] == 1500.0 and alone["members_km"] == (1500.0,)
    assert "upstream" in alone["attribution"]


# ----------------------------------------------------------------------- plumes and jets
class _RayFrame(_Frame):
    def __init__(self, n, ray_km):
        super().__init__(n)
        lat = self.stations["lat"].to_numpy()
        self.ray_lat = np.repeat(lat[:, None], ray_km.size, axis=1)
        self.ray_lon = -10.0 - ray_km[None, :] / (111.2 * np.cos(np.radians(lat[:, None])))


def test_plume_axis_ends_at_the_e_folding_length_of_a_planted_plume():
    from coastmon.sources.plumes import trace_plume
    ray_km = np.arange(0.0, 600.0, 10.0)
    n = 80
    frame = _RayFrame(n, ray_km)
    y = np.arange(n)[:, None] - 40.0
    length = 205.0
    anomaly = 0.05 * np.exp(-ray_km[None, :] / length) * np.exp(-0.5 * (y / 2.0) ** 2)
    axis = trace_plume(anomaly, frame, 40, ray_km, 1e-6)
    # check: analytic — exp(-x/L) stays above e^-1 of its peak up to x = L = 205 km, so
    # the last ray point kept is 200 km
    assert axis["extent_km"] == pytest.approx(200.0)
    # A plume that stops being significant: a flat anomaly whose standard error grows
    # offshore; |a| < 1.96 SE from 300 km on.
    flat = np.where(np.abs(y) < 1, 0.02, 0.0) * np.ones((1, ray_km.size))
    error = np.where(ray_km[None, :] >= 300.0, 0.02, 0.001) * np.ones((n, 1))
    axis = trace_plume(flat, frame, 40, ray_km, error)
    # check: planted significance — the last significant point is 290 km
    assert axis["extent_km"] == pytest.approx(290.0)
    # A strong coastal-current anomaly in the first 20 km does not end the plume: the end
    # tests start beyond the near-shore band (30 km); the plume decays from 30 km on.
    coastal = np.where(ray_km[None, :] < 25.0, 0.5, 0.0) * np.exp(-0.5 * (y / 2.0) ** 2)
    plume = 0.05 * np.exp(-np.maximum(ray_km[None, :] - 30.0, 0.0) / length) * \
        np.exp(-0.5 * (y / 2.0) ** 2)
    axis = trace_plume(coastal + plume, frame, 40, ray_km, 1e-6, start_km=30.0)
    # check: analytic — e^-1 of the value at 30 km is reached at 30 + 205 km: last kept 230
    assert axis["extent_km"] == pytest.approx(230.0)


def test_time_mean_error_matches_the_ar1_standard_error():
    from coastmon.sources.plumes import time_mean_error
    rng = np.random.default_rng(8)
    rho = 0.7
    x = lfilter([1.0], [1, -rho], rng.standard_normal((60_000, 2, 3)), axis=0)
    x[1000:1010, 0, 0] = np.nan  # gaps are left out
    mean, se = time_mean_error(x)
    sd = np.nanstd(x, axis=0)
    # check: von Storch & Zwiers 1999 §6.6 — SE = sigma / sqrt(n (1-rho)/(1+rho))
    np.testing.assert_allclose(se, sd / np.sqrt(60_000 * (1 - rho) / (1 + rho)), rtol=0.05)
    np.testing.assert_allclose(mean, np.nanmean(x, axis=0), atol=1e-12)


def test_jet_spacing_recovers_a_planted_spacing():
    from coastmon.sources.plumes import jet_spacing_km
    ray_km = np.arange(0.0, 600.0, 10.0)
    n = 120
    frame = _RayFrame(n, ray_km)
    y_km = np.arange(n) * DX_KM
    spacing = 240.0
    anomaly = 0.01 * np.cos(2 * np.pi * y_km / spacing)[:, None] * np.ones((1, ray_km.size))
    found = jet_spacing_km(anomaly, frame, ray_km, 150.0)
    # check: planted spacing, to within one frequency bin of the 1190 km profile
    # (neighbouring wavelengths 1190/4 = 298 km and 1190/6 = 198 km)
    assert found == pytest.approx(1190.0 / 5.0, rel=0.02)
    assert abs(found - spacing) < 0.5 * (298.0 - 198.0) / 2


# ------------------------------------------------------------------------- Okubo–Weiss
def test_okubo_weiss_of_solid_body_rotation_of_the_sphere():
    from coastmon.grid.metrics import EARTH_RADIUS_M, GridMetrics
    from coastmon.grid.operators import okubo_weiss, strain, vorticity

    lon, lat = np.meshgrid(np.arange(-20.0, -10.0, 0.25), np.arange(20.0, 60.0, 0.25))
    speed = 10.0  # U of u = U cos(lat): the whole ocean turning about the polar axis
    u = speed * np.cos(np.radians(lat))
    v = np.zeros_like(u)
    m = GridMetrics.from_lonlat(lon, lat)
    sn, ss = strain(u, v, m)
    zeta = vorticity(u, v, m)
    inner = (slice(1, -1), slice(1, -1))
    # check: analytic — rigid rotation has no strain; zeta = 2 U sin(lat) / a
    # (Batchelor 1967, appendix 2; Vallis 2017 §2.2)
    np.testing.assert_allclose(zeta[inner], 2 * speed * np.sin(np.radians(lat[inner])) / EARTH_RADIUS_M,
                               rtol=1e-3)
    assert np.nanmax(np.abs(ss[inner])) < 1e-3 * np.nanmax(np.abs(zeta[inner]))
    assert np.nanmax(np.abs(sn[inner])) < 1e-3 * np.nanmax(np.abs(zeta[inner]))
    w = okubo_weiss(u, v, m)
    # check: analytic — W / zeta^2 = -1 for solid-body rotation (Okubo 1970; Weiss 1991);
    # without the metric terms it would be -3/4
    np.testing.assert_allclose(w[inner] / zeta[inner] ** 2, -1.0, atol=2e-3)


def test_fused_kernel_has_the_same_metric_terms():
    from coastmon.grid.metrics import GridMetrics
    from coastmon.grid.operators import okubo_weiss
    from coastmon.stream import kernels

    lon, lat = np.meshgrid(np.linspace(-20.0, -10.0, 21), np.linspace(30.0, 50.0, 25))
    u = (10.0 * np.cos(np.radians(lat)))[None].repeat(2, axis=0)
    v = np.zeros_like(u)
    m = GridMetrics.from_lonlat(lon, lat)
    zeta, w, _ = kernels.dual_fields(u, v, m.gx, m.gy, 0.2)
    # check: coastmon.grid.operators.okubo_weiss (numpy reference of the same sums),
    # and W = -zeta^2 for solid-body rotation (analytic)
    np.testing.assert_allclose(w, okubo_weiss(u, v, m), rtol=1e-10)
    np.testing.assert_allclose(w[:, 1:-1, 1:-1] / zeta[:, 1:-1, 1:-1] ** 2, -1.0, atol=2e-3)


# ------------------------------------------------------------------ planted scenario
@pytest.mark.slow
def test_weak_regular_shedding_is_found_and_ranked_last_in_a_scenario(tmp_path):
    """A 4-year daily record: a strong source at one cape and, at another, an eddy a month
    whose planted feed is about a tenth of the strong one's."""
    import dataclasses
    import json

    from planted import nearest_source

    from coastmon.pipeline import analyse_series, prepare
    from coastmon.scenario import SourceSpec, default_params, make_scenario
    from coastmon.stream import run_pass

    base = default_params()
    strong = next(s for s in base.sources if s.cape == "Tasker Head")
    # planted feed = rate x psi0^2 x (same factor): a tenth with 12 eddies a year
    psi_weak = strong.psi0_m2_s * np.sqrt(0.1 * strong.rate_per_year / 12.0)
    weak = SourceSpec(name="Weak source", cape="Cape Orrin", rate_per_year=12.0,
                      psi0_m2_s=float(psi_weak), radius_km=30.0, birth_offset_km=30.0)
    params = dataclasses.replace(
        base, seed=3, n_days=1461, lon_min=-42.0, lat_min=33.0, lat_max=38.0,
        resolution_deg=0.1, compress=False, islands=(),
        capes=tuple(c for c in base.capes if c.name in {"Tasker Head", "Cape Orrin"}),
        sources=(strong, weak))
    settings = SETTINGS.replace("stream", progress=False)
    nc, truth_path = make_scenario(params, tmp_path / "data")
    truth = json.loads(truth_path.read_text())
    prep = prepare([nc], settings)
    res = run_pass(prep.ds, prep.metrics, prep.frame, settings.stream, tmp_path / "work")
    src = analyse_series(res.stats, res.series, prep.frame, prep.capes, settings,
                         prep.ld_km).sources
    planted = {p["name"]: p for p in truth["sources"]}
    # check: planted truth — the independent bookkeeping of what each planted eddy carries
    # across its gate (scenario/bookkeeping.py) gives about a tenth; it is not exactly the
    # tenth of the rate x psi0^2 sizing because eddies of different radius decay and
    # interfere differently on their way to the gate
    ratio = planted["Weak source"]["feed_w_per_m"] / planted[strong.name]["feed_w_per_m"]
    assert 0.07 < ratio < 0.15
    ranks = {}
    for name, p in planted.items():
        k, dist = nearest_source(src, p["cape_lon"], p["cape_lat"])
        # check: planted truth (the generator's birth sites at the capes)
        assert dist < 40.0, f"{name}: nearest source {dist:.0f} km away"
        assert src["cape_id"].values[k] != ""
        ranks[name] = int(src["rank"].values[k])
    # check: planted truth — two sources, the weak one ranked last
    assert len(src) == 2
    assert ranks == {strong.name: 1, "Weak source": 2}
