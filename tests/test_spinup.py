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
