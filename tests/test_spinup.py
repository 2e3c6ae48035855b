"""The running-mean convergence curve against numpy."""

from __future__ import annotations

import numpy as np

from coastmon.assess.spinup import spinup_curve


def test_running_means_and_correlations_match_numpy():
    rng = np.random.default_rng(7)
    nt = 300
    pattern = rng.standard_normal((5, 3))
    a = (pattern + 2.0 * rng.standard_normal((nt, 5, 3))).astype(np.float32)
    a[rng.random(a.shape) < 0.05] = np.nan  # missing values are skipped
    b = (np.linspace(-1, 1, 4) + rng.standard_normal((nt, 4))).astype(np.float32)
    days = 2.0 * np.arange(nt)
    # station-major storage, as the pass writes its series: the sweep reads file order
    stored = np.swapaxes(np.ascontiguousarray(np.swapaxes(a, 0, 1)), 0, 1)
    curve = spinup_curve([stored, b], days)
    lengths = np.round(curve.length_days / 2.0).astype(int)
    assert lengths[-1] == nt and np.all(np.diff(lengths) > 0)

    def mean_over(n):
        with np.errstate(invalid="ignore"):
            return np.concatenate([np.nanmean(a[:n].astype(np.float64), axis=0).ravel(),
                                   np.nanmean(b[:n].astype(np.float64), axis=0).ravel()])

    final = mean_over(nt)
    for n, corr in zip(lengths, curve.correlation, strict=True):
        first = mean_over(n)
        ok = np.isfinite(first) & np.isfinite(final)
        # check: numpy.nanmean over the first n steps and numpy.corrcoef (centred pattern
        # correlation)
        assert abs(corr - np.corrcoef(first[ok], final[ok])[0, 1]) < 1e-12, n
    assert abs(curve.correlation[-1] - 1.0) < 1e-12  # the whole record against itself


def test_rays_kept_as_grid_points_give_the_curve_of_the_rays():
    from coastmon.stream import kernels
    from coastmon.stream.rays import RayField, RayPlan

    rng = np.random.default_rng(3)
    nt, n_points, n_stations, n_ray = 400, 7, 3, 4
    trend = np.linspace(0.0, 1.0, nt)
    points = (rng.standard_normal((n_points, 1)) * (1.0 + trend)
              + rng.standard_normal((n_points, nt))).astype(np.float32)
    points[5, 50:150] = np.nan              # a gap: the rays through it are read
    rows, cols, weights = [], [], []
    for r in range(n_stations * n_ray):
        if r == 6:
            continue                        # a ray point that is not sampled
        pick = rng.choice(n_points, size=2, replace=False)
        rows += [r, r]
        cols += list(pick)
        weights += list(rng.random(2) + 0.1)
    order = np.lexsort((cols, rows))
    rows, cols, weights = (np.asarray(x)[order] for x in (rows, cols, weights))
    assert 5 in cols
    valid = np.isin(np.arange(n_stations * n_ray), rows)
    plan = RayPlan(points=np.arange(n_points),
                   indptr=kernels.row_pointers(rows, n_stations * n_ray),
                   cols=cols.astype(np.int64), weights=weights.astype(np.float64), valid=valid,
                   n_stations=n_stations, n_ray=n_ray)
    field = RayField(points, plan)
    rays = np.asarray(field)
    assert np.isnan(rays[:, 1, 2]).all() and not np.isnan(rays).all(axis=0).all()
    days = np.arange(nt, dtype=float)
    stored = spinup_curve([field], days)
    read = spinup_curve([rays], days)
    # check: common practice, no source — a running mean of a weighted mean with fixed
    # weights is the weighted mean of the running means (linearity); the rays as read
    # are rounded to float32 (IEEE 754 single precision, about 1e-7)
    np.testing.assert_allclose(stored.correlation, read.correlation, rtol=0, atol=1e-6)
    np.testing.assert_array_equal(stored.length_days, read.length_days)
