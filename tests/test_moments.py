"""Mergeable moment accumulators against numpy/scipy on the whole record."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from coastmon.errors import InputError
from coastmon.stream import MomentState, load_state, merge_states, save_state

SHAPE = (24, 3, 4)


def make_record(seed: int, offset: float = 0.0, holes: bool = True):
    """u, v, zeta, ssh (t, y, x) float64 with NaN holes (land point, missing snapshots)."""
    rng = np.random.default_rng(seed)
    u = offset + rng.gamma(2.0, 0.1, SHAPE)  # skewed, so third moments are not ~0
    v = offset - rng.gamma(3.0, 0.1, SHAPE) + 0.5 * u
    zeta = 1e-5 * rng.standard_normal(SHAPE) + 1e-6 * u
    ssh = offset + 0.1 * rng.standard_normal(SHAPE) + 0.2 * v
    if holes:
        u[:, 0, 0] = np.nan  # land
        v[:, 0, 0] = np.nan
        u[rng.random(SHAPE) < 0.1] = np.nan  # missing values
        zeta[rng.random(SHAPE) < 0.05] = np.nan
    return u, v, zeta, ssh


def numpy_reference(u, v, zeta, ssh):
    """Means and central co-moments / n over the jointly valid steps, straight numpy."""
    ok = np.isfinite(u) & np.isfinite(v) & np.isfinite(zeta) & np.isfinite(ssh)
    n = ok.sum(axis=0)
    fields = {"u": u, "v": v, "zeta": zeta, "ssh": ssh}
    with np.errstate(invalid="ignore", divide="ignore"):
        means = {k: np.where(ok, f, 0).sum(0) / n for k, f in fields.items()}
        anom = {k: np.where(ok, f - means[k], 0.0) for k, f in fields.items()}
        cov = {(a, b): (anom[a] * anom[b]).sum(0) / n for a in fields for b in fields}
        third = {
            "uuu": (anom["u"] ** 3).sum(0) / n,
            "uvv": (anom["u"] * anom["v"] ** 2).sum(0) / n,
            "uuv": (anom["u"] ** 2 * anom["v"]).sum(0) / n,
            "vvv": (anom["v"] ** 3).sum(0) / n,
        }
    return n, means, cov, third


def accumulate(u, v, zeta, ssh, cuts, order=None):
    pieces = np.split(np.arange(u.shape[0]), cuts)
    states = [MomentState.from_arrays(u[p], v[p], zeta[p], ssh[p]) for p in pieces if p.size]
    if order is not None:
        states = [states[k] for k in order(len(states))]
    total = states[0].copy()
    for s in states[1:]:
        total.update(s)
    return total


def assert_close(got, expected, rtol):
    assert np.array_equal(np.isnan(got), np.isnan(expected))
    scale = np.nanmax(np.abs(expected))
    np.testing.assert_allclose(got, expected, rtol=0, atol=rtol * scale)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 10_000),
    cuts=st.lists(st.integers(1, SHAPE[0] - 1), min_size=0, max_size=6, unique=True),
)
def test_chunked_accumulation_matches_numpy(seed, cuts):
    u, v, zeta, ssh = make_record(seed)
    state = accumulate(u, v, zeta, ssh, sorted(cuts))
    n, means, cov, third = numpy_reference(u, v, zeta, ssh)
    # check: numpy on the concatenated record as the reference library
    np.testing.assert_array_equal(state.pooled()[0], n)
    for name in ("u", "v", "zeta", "ssh"):
        assert_close(state.mean_of(name), means[name], 1e-10)  # check: numpy (mean)
    for a, b in [("u", "u"), ("u", "v"), ("v", "v"), ("u", "zeta"), ("v", "zeta"),
                 ("zeta", "zeta"), ("ssh", "ssh"), ("u", "ssh"), ("v", "ssh"), ("zeta", "ssh")]:
        assert_close(state.covariance(a, b), cov[(a, b)], 1e-10)  # check: numpy (covariance)
    for name, expected in third.items():
        assert_close(state.third(name), expected, 1e-10)  # check: numpy (third co-moments)
    assert state.n_time == SHAPE[0]


def test_large_offset_keeps_precision_where_naive_formula_fails():
    rng = np.random.default_rng(1)
    nt = 2000
    noise = 0.01 * rng.standard_normal((nt, 2, 2))
    x = 1.0e6 + noise
    zero = np.zeros_like(x)
    state = accumulate(x, x, zero, x, list(range(100, nt, 100)))
    reference = np.var(x - 1.0e6, axis=0)  # x - 1e6 is exact (Sterbenz lemma)
    naive = (x**2).mean(axis=0) - x.mean(axis=0) ** 2
    naive_error = np.max(np.abs(naive - reference) / reference)
    ours_error = np.max(np.abs(state.covariance("u", "u") - reference) / reference)
    # check: Chan, Golub & LeVeque 1983 (textbook one-pass formula loses ~eps*mean^2/var)
    assert naive_error > 1e-3
    # check: Chan, Golub & LeVeque 1983 (pairwise/two-pass updates keep full precision)
    assert ours_error < 1e-8


def test_third_moments_match_scipy():
    u, v, zeta, ssh = make_record(7, holes=False)
    state = accumulate(u, v, zeta, ssh, [5, 11, 12, 20])
    # check: scipy.stats.moment (third central moment, population)
    np.testing.assert_allclose(state.third("uuu"), scipy.stats.moment(u, 3, axis=0), rtol=1e-10)
    np.testing.assert_allclose(state.third("vvv"), scipy.stats.moment(v, 3, axis=0), rtol=1e-10)
    # check: scipy.stats.skew = m3 / m2^1.5 (population)
    skew = state.third("uuu") / state.covariance("u", "u") ** 1.5
    np.testing.assert_allclose(skew, scipy.stats.skew(u, axis=0), rtol=1e-10)


def test_merge_is_associative_and_commutative():
    u, v, zeta, ssh = make_record(3)
    a, b, c = (MomentState.from_arrays(u[s], v[s], zeta[s], ssh[s])
               for s in (slice(0, 5), slice(5, 17), slice(17, None)))
    left = merge_states(merge_states(a, b), c)
    right = merge_states(a, merge_states(b, c))
    swapped = merge_states(merge_states(c, a), b)
    for other in (right, swapped):
        for name in ("n", "mean", "m2", "m3", "ow_core"):
            # check: Chan, Golub & LeVeque 1983 (the pairwise update is exact in real arithmetic)
            np.testing.assert_allclose(getattr(other, name), getattr(left, name),
                                       rtol=1e-12, atol=1e-14 * np.abs(getattr(left, name)).max())
    empty = MomentState.empty(a.shape, has_ssh=True)
    same = merge_states(empty, a)
    np.testing.assert_array_equal(same.m2, a.m2)  # check: common practice, no source (identity)


def test_save_and_load_without_pickle(tmp_path):
    u, v, zeta, ssh = make_record(5)
    times = np.arange("2001-01-01", "2001-01-25", dtype="datetime64[D]")
    state = MomentState.from_arrays(u, v, zeta, ssh, times=times, grid_id="abc")
    path = save_state(state, tmp_path / "state.npz")
    with np.load(path, allow_pickle=False) as data:
        assert all(data[k].dtype != object for k in data.files)
        assert int(data["format_version"]) >= 1
    loaded = load_state(path)
    for name in ("n", "mean", "m2", "m3", "ow_core"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(state, name))
    assert loaded.variables == ("u", "v", "zeta", "ssh")
    assert (loaded.time_start, loaded.time_end) == ("2001-01-01T00:00:00", "2001-01-24T00:00:00")
    assert loaded.grid_id == "abc" and loaded.n_time == 24


def test_load_rejects_other_versions_and_bad_files(tmp_path):
    state = MomentState.empty((2, 2), has_ssh=False)
    path = save_state(state, tmp_path / "state.npz")
    with np.load(path) as data:
        arrays = dict(data)
    arrays["format_version"] = np.array(99)
    np.savez(tmp_path / "future.npz", **arrays)
    with pytest.raises(InputError, match="format version 99"):
        load_state(tmp_path / "future.npz")
    (tmp_path / "junk.npz").write_bytes(b"not a zip file")
    with pytest.raises(InputError, match="cannot be read"):
        load_state(tmp_path / "junk.npz")
    with pytest.raises(InputError, match="does not exist"):
        load_state(tmp_path / "missing.npz")


def test_incompatible_states_refuse_to_merge():
    a = MomentState.empty((2, 3), has_ssh=False)
    with pytest.raises(InputError, match="grid shapes differ"):
        a.update(MomentState.empty((3, 2), has_ssh=False))
    with pytest.raises(InputError, match="variables differ"):
        a.update(MomentState.empty((2, 3), has_ssh=True))
    with pytest.raises(InputError, match="seasonal"):
        a.update(MomentState.empty((2, 3), has_ssh=False, seasonal=True))


def test_seasonal_groups_match_monthly_anomalies():
    rng = np.random.default_rng(11)
    nt = 90
    months = np.repeat(np.arange(1, 13), 8)[:nt]
    rng.shuffle(months)
    u, v, zeta, ssh = (rng.standard_normal((nt, 2, 3)) + months[:, None, None] * k
                       for k in (0.5, -0.3, 1e-6, 0.1))
    halves = [slice(0, 37), slice(37, None)]
    state = MomentState.from_arrays(u[halves[0]], v[halves[0]], zeta[halves[0]], ssh[halves[0]],
                                    months=months[halves[0]], seasonal=True)
    state.update(MomentState.from_arrays(u[halves[1]], v[halves[1]], zeta[halves[1]],
                                         ssh[halves[1]], months=months[halves[1]], seasonal=True))
    clim = np.stack([u[months == m].mean(axis=0) for m in months])
    anomaly = u - clim
    # check: numpy (anomalies about the monthly climatology, then variance)
    np.testing.assert_allclose(state.covariance("u", "u"), (anomaly**2).mean(axis=0), rtol=1e-10)
    # check: numpy (time mean of the whole record)
    np.testing.assert_allclose(state.mean_of("u"), u.mean(axis=0), rtol=1e-12)
