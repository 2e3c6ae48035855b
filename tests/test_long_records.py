"""Shortcuts that keep long records cheap give the numbers of the full computation.

Issue 21: the analyses of the sampled series must not cost more than they need as the
record grows. Each shortcut is checked here against the straightforward computation it
replaces (written out in the test, as it stood before the shortcut).
"""

from __future__ import annotations

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
