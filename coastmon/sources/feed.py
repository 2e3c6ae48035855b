r"""Westward eddy-energy feed of each source, with a moving-block bootstrap interval.

Definition
----------
The feed of a source is the net *westward* flux of eddy energy in the eddy band across a
*meridional* gate in open water west of the source, per metre of depth:

.. math::

    F = \rho_0 \sum_{\mathrm{rays}} \left(E^-_r c^-_r - E^+_r c^+_r\right) |\Delta y_r|
        \; - \; B \sum_{\mathrm{rays}} |\Delta y_r| ,

* the rays are the *westward* zonal rays (``ray_dir = -1``) of the stations within
  ``gate_halfwidth_km`` along shore of the source, each ray in the gate of at most one
  source (the nearest; :func:`assign_rays`); eastward rays never enter a feed;
* :math:`E^\mp_r` is the eddy-band energy per unit mass travelling west (−) or east (+),
  averaged over the window of ray points within ``gate_window_km`` of the gate point at
  ``gate_offset_km`` (:func:`directional_components`, :func:`eddy_energy_per_mass`);
* :math:`c^\mp_r > 0` the speed of that energy, west or east (:func:`least_squares_speed`);
* :math:`|\Delta y_r|` the meridional extent of the gate that ray represents
  (:func:`meridional_extents_m`), since a zonal flux crosses only the meridional projection;
* :math:`B` the background: the median flux density of the same estimator over the
  westward rays of the coast that belong to no source gate.

Energy is kinetic plus potential where SSH is given, kinetic only otherwise (column
``energy_kind``). Energy carried at a speed: for long Rossby waves and coherent eddies the
group (energy) velocity equals the phase velocity (Gill 1982, §12.4); for linear Rossby
waves of zonal wavenumber k the ratio is :math:`c_g/c_p = (1-k^2L_d^2)/(1+k^2L_d^2)`
(from :math:`\omega = -\beta k/(k^2+L_d^{-2})`, Vallis 2017 §6.4), so the feed overstates the
flux of short linear waves; docs/methods.md says where it holds.

A gate that cannot be placed in open water west of the source is reported in
``gate_status`` with a NaN feed: ``no_open_water_west`` (no station of the source has a
westward ray: land to the west, as on a western-boundary coast or the east side of an
island), ``gate_on_land`` (westward rays exist but none reaches the whole gate window at
sea: land or the domain edge cuts them), ``no_speed`` (no measurable speed).

Uncertainty: moving-block bootstrap over time (Künsch 1989). Every part of the estimate
is a ratio of time means of per-ray series (the directional energies and the two sums of
the least-squares speed), so each resample re-estimates the directional split and the
speeds; a resampled speed beyond ``max_speed_cm_s`` is not measurable and that ray is left
out of that resample. Structural spread: the feed for gate offsets ±50 km and windows of
half and one and a half times ``gate_window_km``.
"""

from __future__ import annotations

import functools
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.fft
import scipy.sparse
import xarray as xr

from coastmon.compiled import compiled
from coastmon.config import Settings
from coastmon.io.pages import release
from coastmon.signals.propagation import OMEGA_EARTH

G = 9.80665
"""Standard gravity (m s-2)."""
EARTH_RADIUS_M = 6.371e6
"""Mean Earth radius (m), for meridional arcs."""
GATE_THREADS = 4
"""Most threads measuring the gate rays at once (one per core up to this)."""
STRUCTURAL_OFFSETS_KM = (-50.0, 0.0, 50.0)
"""Gate offsets tried for the structural spread, relative to ``gate_offset_km``."""
STRUCTURAL_WINDOWS = (0.5, 1.0, 1.5)
"""Window half-lengths tried for the structural spread, as factors of ``gate_window_km``."""
PAD_FACTOR = 2
"""Length of the zero-padded line in the directional split, as a multiple of the line."""
N_SERIES = 6
"""Per-ray series: energy, speed numerator and denominator, for west then east."""
TIME_BLOCK = 1024
"""Time steps of a ray's band-passed parts reduced to gate series at once."""
FORWARD_BLOCK_BYTES = 2**19
"""Detrended series transformed in time at once per ray (:func:`_band_rows`)."""
FORWARD_MIN_LINES = 8
"""Fewest series transformed at once (:func:`_band_rows`), however long the record: fewer
make many small transforms whose call overhead dominates."""
BOOTSTRAP_COLUMNS = 96
"""Series resampled at once by :func:`block_bootstrap_means` (bounds its cumulative sums)."""


# --------------------------------------------------------------------------- physics
def potential_energy_velocity(ssh_anomaly: np.ndarray, c1_m_s: float) -> np.ndarray:
    r"""Velocity scale whose half square is the eddy potential energy per unit mass.

    .. math:: p = \frac{g\,\eta'}{c_1},\qquad \tfrac12 p^2 = \frac{g^2\eta'^2}{2c_1^2},
              \qquad c_1 = |f|\,L_d .

    For a 1.5-layer (reduced-gravity) ocean, the upper layer of depth H over a deep layer
    at rest, the interface moves by :math:`h' = (g/g')\eta'` and the available potential
    energy per unit area is :math:`\tfrac12\rho_0 g' h'^2 = \tfrac12\rho_0 g^2\eta'^2/g'`
    (Gill 1982, §6.2; Cushman-Roisin & Beckers 2011, §12.2). Per metre of the layer's
    depth, with :math:`g'H = c_1^2 = f^2L_d^2`, this is :math:`\tfrac12\rho_0 g^2\eta'^2/c_1^2`,
    the potential part of the quasi-geostrophic energy
    :math:`\tfrac12(|\nabla\psi|^2 + \psi^2/L_d^2)` with :math:`\psi = g\eta'/f`
    (Vallis 2017, §5.4). For an eddy of radius R the ratio to the kinetic energy is about
    :math:`R^2/L_d^2`.

    Parameters
    ----------
    ssh_anomaly : array_like
        Sea-surface height anomaly (m).
    c1_m_s : float
        First baroclinic gravity-wave speed :math:`|f| L_d` (m s-1).

    Returns
    -------
    ndarray
        :math:`g\eta'/c_1` (m s-1).
    """
    return G * np.asarray(ssh_anomaly, dtype=np.float64) / c1_m_s


def eddy_energy_per_mass(u: np.ndarray, v: np.ndarray, p: np.ndarray | None = None
                         ) -> np.ndarray:
    r"""Eddy energy per unit mass, kinetic plus (where given) potential.

    .. math:: e = \tfrac12\left(u'^2 + v'^2 + p^2\right)

    with ``p`` from :func:`potential_energy_velocity` (omitted without SSH: kinetic only).
    Times :math:`\rho_0` it is the energy per cubic metre of the equivalent layer
    (J m-3), the surface values standing for the layer (equivalent-barotropic
    assumption, Gill 1982 §6.11).

    Returns
    -------
    ndarray
        m2 s-2, same shape as ``u``.
    """
    e = np.asarray(u, dtype=np.float64) ** 2 + np.asarray(v, dtype=np.float64) ** 2
    if p is not None:
        e = e + np.asarray(p, dtype=np.float64) ** 2
    return 0.5 * e


def band_sample_count(n_t: int, dt_days: float, shortest_days: float) -> int:
    r"""Fewest equally spaced samples of a record that carry the products of its
    band-limited parts without loss.

    A part holding only the record's Fourier harmonics :math:`1 \le m \le K`, with
    :math:`K = \lfloor n_t \Delta t / P_{min} \rfloor` the harmonic of the shortest period
    :math:`P_{min}`, is a trigonometric polynomial of degree K; the product of two (an
    energy, a term of the least-squares speed) is one of degree 2K. Sampled at N > 4K
    equally spaced times it is sampled above its Nyquist rate, so the N samples determine
    it (sampling theorem) and its mean over them is its mean over every step (Parseval's
    theorem; Bracewell, *The Fourier Transform and Its Applications*): the time means are
    those of all :math:`n_t` steps to rounding, and the series keep their slow
    fluctuations, which the bootstrap resamples. (N > 2K would keep the means but fold the
    products' fast fluctuations onto slow ones; with it the feed intervals of the long
    benchmark record came out 7–12 % narrower, partly through a block length rounded to
    whole samples, see :func:`bootstrap_block`.) The count is rounded up to a
    fast transform length and is never more than ``n_t``.

    Parameters
    ----------
    n_t : int
        Steps of the record.
    dt_days : float
        Time step (days).
    shortest_days : float
        Shortest period kept in the band (days).

    Returns
    -------
    int
        The number of samples, ``4 K + 2 <= N <= n_t``.
    """
    k_max = int(np.floor(n_t * dt_days / shortest_days + 1e-9))
    need = scipy.fft.next_fast_len(4 * k_max + 2, real=True)
    return int(min(n_t, need))


def directional_components(field: np.ndarray, dt_days: float, dd_km: float,
                           band_days: tuple[float, float],
                           columns: tuple[int, int] | None = None,
                           n_out: int | None = None
                           ) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    r"""Band-limited parts of a Hovmöller field travelling toward +d and toward −d.

    The field (time, distance) is detrended in time (a least-squares line at each
    distance), transformed in time and distance, and split in the wavenumber–frequency
    plane: bins with frequency inside ``band_days`` (periods, days) and wavenumber
    :math:`k > 0` travel toward +d, those with :math:`k < 0` toward −d (a component
    :math:`\cos 2\pi(kd - ft)`, f > 0). The zero wavenumber (in-phase pulsation of the
    whole line), the Nyquist wavenumber, and every frequency outside the band count in
    neither. The line is padded with zeros (``PAD_FACTOR``) so that a field whose two ends
    differ does not wrap onto itself. Each part is transformed back; its time derivative
    is computed in spectral space (exact for a band-limited signal), its derivative along
    the line by :func:`along_derivative`. Two-dimensional filtering of this kind is
    the usual way of separating westward and eastward signals (Polito & Cornillon 1997,
    JGR 102:3215). A standing wave :math:`\cos kd \cos 2\pi ft` splits into two equal
    parts.

    Only the frequencies inside the band are transformed along the line and back (the
    others are zero in both parts), and only the distances ``columns`` (plus the two on
    each side that the derivative along the line needs) are transformed back in time: the
    same numbers as transforming everything, at a fraction of the cost when the band is
    narrow or the window short.

    Parameters
    ----------
    field : ndarray, shape (time, distance)
        Complete (finite) field.
    dt_days, dd_km : float
        Time and distance steps.
    band_days : (float, float)
        Shortest and longest period kept (days).
    columns : (int, int), optional
        The distances ``start:stop`` to return (default: all).
    n_out : int, optional
        Return the parts at ``n_out`` equally spaced times over the record instead of at
        every step (the band-limited signal evaluated there, exactly; default: every step).
        With ``n_out >= band_sample_count(...)`` time means of products of the parts are
        those of the full series (:func:`band_sample_count`).

    Returns
    -------
    dict
        ``{"plus": (q, q_t, q_d), "minus": (q, q_t, q_d)}``: each part and its
        derivatives in time (per second) and distance (per metre), shape
        ``(n_out, stop - start)``.
    """
    field = np.asarray(field)
    n_t = field.shape[0]
    return split_harmonics(_band_rows(field, band_harmonics(n_t, dt_days, band_days)), n_t,
                           dt_days, dd_km, band_days, columns, n_out)


def band_harmonics(n_t: int, dt_days: float, band_days: tuple[float, float]) -> np.ndarray:
    """The harmonics m of an ``n_t``-step record whose periods ``n_t dt / m`` lie in
    ``band_days`` (shortest, longest), the mean (m = 0) never among them."""
    freq = scipy.fft.rfftfreq(n_t, dt_days)                  # cycles per day
    return np.flatnonzero((freq >= 1.0 / band_days[1]) & (freq <= 1.0 / band_days[0])
                          & (freq > 0))


def split_harmonics(harmonics: np.ndarray, n_t: int, dt_days: float, dd_km: float,
                    band_days: tuple[float, float], columns: tuple[int, int] | None = None,
                    n_out: int | None = None
                    ) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """:func:`directional_components` from the band's time harmonics of the detrended
    field, ``(distance, harmonic)`` as :func:`_band_rows` gives them for
    :func:`band_harmonics`; the transform is linear, so the harmonics of a weighted sum
    of series may be given as the weighted sum of theirs."""
    n_d = harmonics.shape[0]
    start, stop = (0, n_d) if columns is None else (max(0, columns[0]), min(n_d, columns[1]))
    lo, hi = _stencil_span(n_d, start, stop)
    rows = band_harmonics(n_t, dt_days, band_days)
    d_t = _time_derivative_factors(n_t, dt_days, rows)[:, None]
    n_out = n_t if n_out is None else int(n_out)
    if rows.size and 2 * rows[-1] >= n_out:
        raise ValueError(f"{n_out} samples cannot hold harmonic {rows[-1]} of the band")

    # Split along the line (both sides at once, :func:`_side_operators`), then back in
    # time: the band's harmonics placed in a spectrum of n_out samples (the same
    # trigonometric polynomial, evaluated at n_out equally spaced times), both sides and
    # their time derivatives in one transform with time last.
    sides = _side_operators(n_d, lo, hi) @ harmonics         # (2 (hi - lo), harmonic)
    full = np.zeros((4, hi - lo, n_out // 2 + 1), dtype=np.complex128)
    for j in range(2):                                       # plus, minus
        line = sides[j * (hi - lo):(j + 1) * (hi - lo)]
        full[2 * j][:, rows] = line
        full[2 * j + 1][:, rows] = line * d_t.T
    series = scipy.fft.irfft(full, n=n_out, axis=2, overwrite_x=True)
    series *= n_out / n_t
    out = {}
    keep = slice(start - lo, stop - lo)
    for j, name in enumerate(("plus", "minus")):
        q = series[2 * j].T                                   # (time, distance) views
        q_d = along_derivative(q, dd_km * 1000.0)
        out[name] = (q[:, keep], series[2 * j + 1].T[:, keep], q_d[:, keep])
    return out


def _stencil_span(n_d: int, start: int, stop: int) -> tuple[int, int]:
    """The points ``lo:hi`` of a line of ``n_d`` that :func:`along_derivative`'s
    fourth-order stencil reads for points ``start:stop`` (two on each side)."""
    return max(0, start - 2), min(n_d, stop + 2)


def _time_derivative_factors(n_t: int, dt_days: float, rows: np.ndarray) -> np.ndarray:
    r""":math:`2\pi i f_m` (s⁻¹) of harmonics ``rows`` of an ``n_t``-step record: the
    time derivative's factor on each."""
    return 2j * np.pi * scipy.fft.rfftfreq(n_t, dt_days)[rows] / 86400.0


@functools.lru_cache(maxsize=256)
def _side_operators(n_d: int, lo: int, hi: int) -> np.ndarray:
    r"""The split along a line of ``n_d`` points as one matrix, ``(2 (hi - lo), n_d)``:
    rows ``0:hi-lo`` give points ``lo:hi`` of the part travelling toward +d, the next
    ``hi - lo`` those of the part toward −d.

    The line is padded with zeros to ``PAD_FACTOR n_d`` points, transformed, every
    wavenumber but those of one sign set to zero (the zero and the Nyquist wavenumber
    always), and transformed back; each step is linear, so the whole is the matrix these
    steps make of the identity's columns. Applied to the band's harmonics of every point
    (a matrix product, a fifth of the time of the transforms on the long benchmark
    record) it gives the transforms' numbers to rounding. Kept for the run lengths and
    windows met (a few).
    """
    n_pad = PAD_FACTOR * n_d
    index = np.rint(scipy.fft.fftfreq(n_pad) * n_pad)        # numpy sign: k = -index
    nyquist = (n_pad % 2 == 0) & (np.abs(index) == n_pad // 2)
    directional = (index != 0) & ~nyquist
    basis = scipy.fft.fft(np.eye(n_d), n=n_pad, axis=0)      # (n_pad, n_d)
    parts = [scipy.fft.ifft(np.where((directional & side)[:, None], basis, 0.0),
                            axis=0)[lo:hi] for side in (index < 0, index > 0)]
    operator = np.concatenate(parts)
    operator.flags.writeable = False
    return operator


def _band_rows(field: np.ndarray, rows: np.ndarray) -> np.ndarray:
    r"""Harmonics ``rows`` of the time transform of each distance of a detrended field,
    ``(distance, len(rows))``.

    Each distance is transformed with the time axis last (contiguous rows, about a quarter
    faster on long records), a few distances at a time, so that the float64 copies stay
    within :data:`FORWARD_BLOCK_BYTES` (or :data:`FORWARD_MIN_LINES` lines of the record)
    however long the record. The least-squares line of
    :func:`coastmon.signals.propagation.detrend_time` is removed in spectral space: for
    harmonic :math:`m \ge 1` of n steps the constant has no component and the centred ramp
    :math:`t - (n-1)/2` has :math:`\sum_t t\,w^t = n/(w - 1)`, :math:`w = e^{-2\pi i m/n}`
    (geometric series, since :math:`w^n = 1`), so only the slope is computed in time. The
    same numbers as detrending first, to rounding, without the passes over the series that
    subtracting the line takes. (Two threads transforming rays side by side were once no
    faster than one on long records; the cause was the BLAS library's spinning threads,
    see :mod:`coastmon.threads`.)
    """
    n_t, n_d = field.shape
    rows = np.asarray(rows)
    if rows.size and rows.min() < 1:
        raise ValueError("the band's harmonics start at 1 (the mean is not in the band)")
    t = np.arange(n_t, dtype=np.float64) - 0.5 * (n_t - 1)
    denom = float(t @ t)
    ramp = n_t / (np.exp(-2j * np.pi * rows / n_t) - 1.0)   # the ramp's harmonics
    out = np.empty((n_d, rows.size), dtype=np.complex128)
    group = max(FORWARD_MIN_LINES, FORWARD_BLOCK_BYTES // (8 * max(n_t, 1)))
    for d0 in range(0, n_d, group):
        lines = np.array(field[:, d0:d0 + group].T, dtype=np.float64, order="C")
        slope = (lines @ t) / denom if denom > 0 else np.zeros(lines.shape[0])
        spec = scipy.fft.rfft(lines, axis=1, overwrite_x=True)[:, rows]
        out[d0:d0 + group] = spec - slope[:, None] * ramp[None, :]
    return out


def along_derivative(q: np.ndarray, dd_m: float) -> np.ndarray:
    r"""Derivative along the line (axis 1) by fourth-order centred differences.

    .. math:: q_d \approx \frac{8(q_{j+1}-q_{j-1}) - (q_{j+2}-q_{j-2})}{12\,\delta d}

    (second-order one-sided and centred differences in the two points at each end). For
    a wave of wavenumber k the ratio to the exact derivative is
    :math:`(8\sin k\delta d - \sin 2k\delta d)/(6k\delta d)`: 0.995 for a wavelength of
    10 steps, 0.93 for 5 (Fornberg 1988, Math. Comp. 51:699). Finite differences, unlike
    a spectral derivative, are not thrown off where the two ends of the line differ.
    On a piece of a longer line, the values two or more columns inside the piece's ends
    are those of the whole line.
    """
    if q.shape[1] < 5:
        return np.gradient(q, dd_m, axis=1)
    q = np.asarray(q, dtype=np.float64)
    out = np.empty_like(q)          # the layout of q, so the kernel reads it in order
    _fourth_order_differences(q, float(dd_m), out)
    return out


@compiled()
def _fourth_order_differences(q, dd_m, out):  # pragma: no cover - compiled
    """The differences of :func:`along_derivative` along axis 1 of ``q`` into ``out``
    (at least five columns), one pass and no temporaries; the same operations in the
    same order as the array expressions ``(8 (q[j+1] - q[j-1]) - (q[j+2] - q[j-2])) /
    (12 dd)``, so the same numbers. Column by column, each column in order: the lines
    the gate measures come as columns of a Fortran-ordered array."""
    n_t, n_d = q.shape
    two = 2.0 * dd_m
    twelve = 12.0 * dd_m
    for t in range(n_t):
        out[t, 0] = (q[t, 1] - q[t, 0]) / dd_m      # as numpy.gradient's ends
        out[t, 1] = (q[t, 2] - q[t, 0]) / two
        out[t, n_d - 2] = (q[t, n_d - 1] - q[t, n_d - 3]) / two
        out[t, n_d - 1] = (q[t, n_d - 1] - q[t, n_d - 2]) / dd_m
    for j in range(2, n_d - 2):
        for t in range(n_t):
            out[t, j] = (8.0 * (q[t, j + 1] - q[t, j - 1]) - (q[t, j + 2] - q[t, j - 2])) / twelve


def least_squares_speed(numerator: float | np.ndarray, denominator: float | np.ndarray
                        ) -> float | np.ndarray:
    r"""Speed of a pattern from the least-squares fit of :math:`q_t + c\,q_d = 0`.

    .. math:: c = \frac{-\langle q_t\, q_d\rangle}{\langle q_d^2\rangle}

    (``numerator`` = :math:`-\sum q_t q_d`, ``denominator`` = :math:`\sum q_d^2`, summed
    over the window and the variables). Exact for any field that translates without
    change of shape, :math:`q(d - ct)`; for features that grow and decay as they move,
    :math:`q = a(t)\,\phi(d - ct)`, the extra term :math:`a a' \phi\phi_d` averages to zero
    over features at random positions, so the estimate stays unbiased (a Radon fit follows
    the long axis of the blobs instead). In spectral terms
    :math:`c = \sum P\,\omega\kappa / \sum P\,\kappa^2`. Common practice (the gradient
    constraint of optical flow), no single source.

    Returns
    -------
    float or ndarray
        Speed toward +d (m s-1); NaN where the denominator is zero.
    """
    num = np.asarray(numerator, dtype=np.float64)
    den = np.asarray(denominator, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


def meridional_extents_m(lat_deg: np.ndarray) -> np.ndarray:
    r"""Meridional length of gate each point represents (a zonal flux crosses only it).

    Points are taken in order of latitude; each represents half the meridional arc
    :math:`a\,|\Delta\varphi|` to each neighbour, and the end points as much again on their
    outer side (so a gate of n evenly spaced points has length n Δy). Points at the same
    latitude share one strip instead of adding up. A single point gets NaN.

    Parameters
    ----------
    lat_deg : array_like, shape (n,)

    Returns
    -------
    ndarray, shape (n,)
        |Δy| in metres, in the order of ``lat_deg``.
    """
    lat = np.asarray(lat_deg, dtype=np.float64)
    if lat.size < 2:
        return np.full(lat.size, np.nan)
    order = np.argsort(lat, kind="stable")
    gaps = EARTH_RADIUS_M * np.radians(np.diff(lat[order]))
    ext = np.zeros(lat.size)
    ext[:-1] += 0.5 * gaps
    ext[1:] += 0.5 * gaps
    ext[0] += 0.5 * gaps[0]
    ext[-1] += 0.5 * gaps[-1]
    out = np.empty(lat.size)
    out[order] = ext
    return out


def block_bootstrap_means(series: np.ndarray, block: int, n_boot: int,
                          rng: np.random.Generator) -> np.ndarray:
    """Time means of moving-block bootstrap resamples (Künsch 1989).

    Each resample joins ``ceil(n / block)`` blocks of ``block`` consecutive steps starting
    at uniformly drawn times; its mean over all joined steps is returned.

    Parameters
    ----------
    series : ndarray, shape (time, ...)
    block : int
    n_boot : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n_boot, ...)
    """
    n_t = series.shape[0]
    block = int(min(max(block, 1), n_t))
    n_blocks = int(np.ceil(n_t / block))
    n_starts = n_t - block + 1
    starts = rng.integers(0, n_starts, size=(n_boot, n_blocks))
    # Each resample's sum is the sum of its blocks' sums: the number of times each start
    # is drawn times that block's sum, one matrix product for all resamples; a few
    # columns at a time, so the cumulative sums stay small however long the record.
    counts = scipy.sparse.csr_matrix(
        (np.ones(starts.size), (np.repeat(np.arange(n_boot), n_blocks), starts.ravel())),
        shape=(n_boot, n_starts))
    flat = series.reshape(n_t, -1)
    out = np.empty((n_boot, flat.shape[1]))
    for c0 in range(0, flat.shape[1], BOOTSTRAP_COLUMNS):
        part = flat[:, c0:c0 + BOOTSTRAP_COLUMNS]
        csum = np.concatenate([np.zeros((1, part.shape[1])), np.cumsum(part, axis=0)])
        out[:, c0:c0 + part.shape[1]] = counts @ (csum[block:] - csum[:n_starts])
    out /= n_blocks * block
    return out.reshape((n_boot,) + series.shape[1:])


def decorrelation_lag(x: np.ndarray) -> float:
    """e-folding lag (in samples) of the mean autocorrelation of the columns of ``x``.

    Where the mean autocorrelation first falls below 1/e, interpolated linearly between
    that lag and the one before (so a series sampled sparsely gives the lag in between
    its samples); the record length when it never does, 1 when no column varies. Used
    for the bootstrap block length; common practice (e.g. Bretherton et al. 1999 for
    effective sample size).
    """
    x = np.asarray(x, dtype=float)
    x = x - x.mean(axis=0)
    n = x.shape[0]
    var = (x**2).sum(axis=0)
    ok = var > 0
    if not ok.any():
        return 1.0
    # One series per row (contiguous), padded to a fast length of at least 2n - 1, which
    # is all the linear autocorrelation needs (lags up to n - 1 do not wrap around). On a
    # 9346-sample series this took 0.07 s where transforming the columns at length 2n
    # (often a slow length) took 0.7-1.4 s; the result is the same to rounding.
    lines = np.ascontiguousarray((x[:, ok] / np.sqrt(var[ok])).T)
    n_fft = scipy.fft.next_fast_len(2 * n - 1, real=True)
    spec = scipy.fft.rfft(lines, n=n_fft, axis=-1)
    acf = scipy.fft.irfft(np.abs(spec) ** 2, n=n_fft, axis=-1)[:, :n].mean(axis=0)
    below = np.flatnonzero(acf < np.exp(-1))
    if not below.size:
        return float(n)
    i = int(below[0])
    if i == 0:
        return 0.0
    return i - 1 + float((acf[i - 1] - np.exp(-1)) / (acf[i - 1] - acf[i]))


def bootstrap_block(energy: np.ndarray, ratio: float = 1.0) -> int:
    """Block length (in samples of ``energy``) of the feed's moving-block bootstrap.

    Twice the e-folding lag of the energy series (:func:`decorrelation_lag`) in record
    steps, rounded up to a whole step, at least ten record steps and at most a quarter of
    the record. ``ratio`` is the number of record steps per sample of ``energy`` (1 when
    the series has one sample per step): a series sampled more sparsely
    (:func:`band_sample_count`) has its lag converted to record steps and rounded up as
    for the full series, and the block converted back to samples, so it lasts as long as
    the full series' block. The block duration matters: on the long benchmark record a
    block of 37 instead of 34 days narrowed the feed intervals by 9 %, while the sparse
    series with the same 34-day block gave the full series' widths to 1 %.
    """
    n = energy.shape[0]
    lag = float(np.ceil(decorrelation_lag(energy) * ratio - 1e-9))
    block = min(max(2 * lag, 10), max(int(n * ratio) // 4, 1))
    return int(max(1, round(block / ratio)))


def net_flux_density(means: np.ndarray, max_speed_m_s: float) -> np.ndarray:
    r"""Net westward energy flux density per unit mass, :math:`E^-c^- - E^+c^+`, per ray.

    ``means[..., :]`` holds the time means of the six per-ray series (west energy,
    west speed numerator, west speed denominator, then the same for east). A speed that
    is not measurable (zero denominator, or beyond ``max_speed_m_s``) makes the ray's
    flux NaN (left out, never clipped).

    Returns
    -------
    ndarray
        m3 s-3 (times ρ0: W m-2 per metre of depth), NaN where not measurable.
    """
    c_w = least_squares_speed(means[..., 1], means[..., 2])
    c_e = -least_squares_speed(means[..., 4], means[..., 5])
    ok = (np.abs(c_w) <= max_speed_m_s) & (np.abs(c_e) <= max_speed_m_s)
    return np.where(ok, means[..., 0] * c_w - means[..., 3] * c_e, np.nan)


# --------------------------------------------------------------------------- rays
@dataclass
class GateSet:
    """Per-ray gate quantities for every westward ray that reaches the gate window at sea.

    ``series`` and ``means`` hold, per ray, the energy per unit mass and the two sums of
    the least-squares speed, for the westward then the eastward part (six series); the
    nominal gate is configuration 0 of ``configs``. The series are sampled every
    ``step_days`` (:func:`band_sample_count` samples over the record, often fewer than the
    record's steps); their time means are those of the series at every step.
    """

    station: np.ndarray          # (g,) station indices
    lat: np.ndarray              # (g,) gate point latitude (the station's)
    lon: np.ndarray              # (g,) gate point longitude (nominal gate)
    series: np.ndarray           # (time, g, 6) nominal-gate series
    means: np.ndarray            # (n_cfg, g, 6) time means per configuration (NaN: no gate)
    configs: list[tuple[float, float]]  # (offset_km, window_half_km)
    kflux: np.ndarray            # (g,) westward <u'k'> per unit mass at the gate, m3 s-3
    pwork: np.ndarray            # (g,) westward <u'p'>/rho0, m3 s-3 (NaN without SSH)
    ssh_var: np.ndarray          # (g,) SSH variance in the window, m2 (NaN without SSH)
    has_ssh: bool
    step_days: float = 1.0       # time between two samples of ``series``
    record_step_days: float = 1.0  # time step of the record itself


def structural_configs(settings: Settings) -> list[tuple[float, float]]:
    """Gate (offset, window half-length) pairs: the nominal one first, then the spread."""
    src = settings.sources
    out = [(src.gate_offset_km, src.gate_window_km)]
    for do in STRUCTURAL_OFFSETS_KM:
        for fw in STRUCTURAL_WINDOWS:
            cfg = (src.gate_offset_km + do, src.gate_window_km * fw)
            if cfg not in out and cfg[0] > 0:
                out.append(cfg)
    return out


def _window(ray_km: np.ndarray, offset_km: float, half_km: float) -> np.ndarray:
    return np.flatnonzero(np.abs(ray_km - offset_km) <= half_km + 1e-9)


def _run_containing(ok: np.ndarray, idx: np.ndarray) -> tuple[int, int] | None:
    """The run of True in ``ok`` that contains all of ``idx`` (start, stop), or None."""
    if idx.size == 0 or not ok[idx].all():
        return None
    lo, hi = int(idx[0]), int(idx[-1]) + 1
    if not ok[lo:hi].all():
        return None
    while lo > 0 and ok[lo - 1]:
        lo -= 1
    while hi < ok.size and ok[hi]:
        hi += 1
    return lo, hi


def gate_set(series: xr.Dataset, frame, settings: Settings, dt_days: float,
             ld_km: float) -> GateSet:
    """Measure the gate quantities on every westward ray (see the module docstring).

    On each westward ray the band-limited westward and eastward parts of u, v (and of
    :func:`potential_energy_velocity` of SSH) are computed over the longest run of sea
    points that holds the whole window (:func:`directional_components`), then reduced to
    per-ray time series over the window of each gate configuration. The parts are
    evaluated at :func:`band_sample_count` times over the record, which keeps every time
    mean exact and makes the work after the transforms independent of the record's step.
    Rays on all cores.
    """
    src = settings.sources
    band = tuple(float(b) for b in settings.signals.eddy_period_days)
    ray_km = np.asarray(series["ray_km"].values, dtype=float)
    configs = structural_configs(settings)
    n_t = series.sizes["time"]
    n_s = band_sample_count(n_t, dt_days, band[0])
    step = dt_days * n_t / n_s
    has_ssh = "ray_ssh" in series
    if ray_km.size < 4:
        return _empty_gates(n_s, configs, has_ssh, step, dt_days)
    dd_km = float(np.median(np.diff(ray_km)))
    windows = [_window(ray_km, o, max(w, 2 * dd_km)) for o, w in configs]
    gate_i = int(np.argmin(np.abs(ray_km - src.gate_offset_km)))
    ru, rv = series["ray_u"].data, series["ray_v"].data   # arrays or RayFields
    rh = series["ray_ssh"].data if has_ssh else None
    direction = frame.stations["ray_dir"].values
    ray_lat, ray_lon = frame.ray_lat, frame.ray_lon
    st_lat = frame.stations["lat"].values
    omega_f = 2.0 * OMEGA_EARTH

    in_band = band_harmonics(n_t, dt_days, band)
    harmonics = _StoredHarmonics.of(ru, rv, rh, in_band)
    # Time means of products from the harmonics equal those of the n_s samples when the
    # products' harmonics (up to twice the band's highest) fold onto no others.
    parseval = bool(in_band.size) and 4 * int(in_band[-1]) < min(n_s, n_t)

    def one_ray(s: int):
        """Series and means of station ``s``'s westward ray, or None without a gate."""
        if direction[s] != -1:
            return None
        ok = np.isfinite(ray_lon[s])
        linear = harmonics is not None and harmonics.covers(s)
        u = v = h = None
        if linear:   # rays finite at every step wherever they are sampled
            ok &= harmonics.sampled(s)
        else:
            # As stored (float32, station by station): the transforms convert each line to
            # float64 as they read it, so no float64 copy of the whole ray is made here.
            u, v = ru[:, s, :], rv[:, s, :]
            ok &= np.isfinite(u).all(axis=0) & np.isfinite(v).all(axis=0)
            if has_ssh:
                h = np.asarray(rh[:, s, :], dtype=np.float64)
                ok &= np.isfinite(h).all(axis=0)
        runs = [_run_containing(ok, w) for w in windows]
        if runs[0] is None:
            return None
        lo = min(r[0] for r in runs if r is not None)
        hi = max(r[1] for r in runs if r is not None)
        c1 = omega_f * abs(np.sin(np.radians(st_lat[s]))) * ld_km * 1000.0
        used = [k for k, run in enumerate(runs) if run is not None and run[0] >= lo
                and run[1] <= hi]
        if linear:
            spectra = harmonics.ray(s, lo, hi)
            if has_ssh:   # the energy velocity is proportional to the SSH anomaly
                spectra[2] = spectra[2] * potential_energy_velocity(1.0, c1)
            w0, w1 = int(windows[0][0]), int(windows[0][-1]) + 1
            at = windows[0] - w0
            uw = np.asarray(ru.window(s, w0, w1)[:, at], dtype=np.float64)
            vw = np.asarray(rv.window(s, w0, w1)[:, at], dtype=np.float64)
            hw = np.asarray(rh.window(s, w0, w1)[:, at], dtype=np.float64) if has_ssh \
                else None
        else:
            fields = [u[:, lo:hi], v[:, lo:hi]]
            if has_ssh:
                fields.append(potential_energy_velocity(h[:, lo:hi] - h[:, lo:hi].mean(axis=0),
                                                        c1))
            spectra = [_band_rows(f, in_band) for f in fields]
            uw = np.asarray(u[:, windows[0]], dtype=np.float64)
            vw = np.asarray(v[:, windows[0]], dtype=np.float64)
            hw = h[:, windows[0]] if has_ssh else None
        # Series only where they are needed: the nominal gate's, for the bootstrap. The
        # other configurations' time means from the harmonics (Parseval's theorem),
        # where the samples' means are those of every step; else from series as well.
        means = np.full((len(configs), N_SERIES), np.nan)
        spectral = [k for k in used if k != 0] if parseval else []
        if spectral:
            means[spectral] = _window_means_from_harmonics(
                spectra, [windows[k] - lo for k in spectral], n_t, dt_days, dd_km, band)
        timed = [k for k in used if k not in spectral]
        first = min(int(windows[k][0]) for k in timed) - lo
        last = max(int(windows[k][-1]) for k in timed) - lo + 1
        parts = [split_harmonics(f, n_t, dt_days, dd_km, band, columns=(first, last),
                                 n_out=n_s) for f in spectra]
        # The three products, summed over the fields in one compiled pass, then their
        # window means as one matrix product with the windows' averaging weights. A block
        # of steps at a time, so that the products stay in the processor's caches on long
        # records.
        weights = np.zeros((last - first, len(timed)))
        for i, k in enumerate(timed):
            weights[windows[k] - lo - first, i] = 1.0 / windows[k].size
        stacks = np.empty((len(configs), n_s, N_SERIES))
        products = np.empty((3, last - first, min(n_s, TIME_BLOCK)))
        for t0 in range(0, n_s, TIME_BLOCK):
            t1 = min(n_s, t0 + TIME_BLOCK)
            block = products[:, :, :t1 - t0]                  # (3, distance, time)
            for j, name in enumerate(("plus", "minus")):  # +d is west along a westward ray
                block[...] = 0.0
                for p in parts:                               # summed over the fields
                    q, q_t, q_d = p[name]
                    _add_gate_products(q[t0:t1], q_t[t0:t1], q_d[t0:t1], block)
                block[0] *= 0.5
                stacks[timed, t0:t1, 3 * j:3 * j + 3] = (weights.T @ block).transpose(1, 2, 0)
        for k in timed:
            means[k] = stacks[k].mean(axis=0)
        nominal = stacks[0]
        ua = uw - uw.mean(axis=0)
        va = vw - vw.mean(axis=0)
        kflux = float(np.mean(-ua * 0.5 * (ua**2 + va**2)))
        pwork = ssh_var = np.nan
        if has_ssh:
            ha = hw - hw.mean(axis=0)
            pwork = float(np.mean(-ua * G * ha))
            ssh_var = float(np.mean(ha**2))
        return (s, ray_lat[s, gate_i], ray_lon[s, gate_i], nominal, means, kflux, pwork,
                ssh_var)

    # Rays on all cores (the FFTs release the GIL), in blocks whose series pages are
    # released after each, so they do not pile up in memory.
    # Each ray's series goes straight into its column (no second copy of them all).
    rows = []
    nominal = np.empty((n_s, int((direction == -1).sum()), N_SERIES))
    workers = max(1, min(os.cpu_count() or 1, GATE_THREADS))
    block = 8 * workers
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for b0 in range(0, ru.shape[1], block):
            b1 = min(ru.shape[1], b0 + block)
            if harmonics is not None:
                harmonics.load(b0, b1, direction[b0:b1] == -1, pool)
            for r in pool.map(one_ray, range(b0, b1)):
                if r is not None:
                    nominal[:, len(rows)] = r[3]
                    rows.append(r[:3] + (None,) + r[4:])
            release(ru, rv, rh)
    if not rows:
        return _empty_gates(n_s, configs, has_ssh, step, dt_days)
    cols = list(zip(*rows, strict=True))
    return GateSet(
        station=np.asarray(cols[0], dtype=int),
        lat=np.asarray(cols[1], dtype=float),
        lon=np.asarray(cols[2], dtype=float),
        series=nominal[:, :len(rows)],
        means=np.stack(cols[4], axis=1),
        configs=configs,
        kflux=np.asarray(cols[5], dtype=float),
        pwork=np.asarray(cols[6], dtype=float),
        ssh_var=np.asarray(cols[7], dtype=float),
        has_ssh=has_ssh,
        step_days=step,
        record_step_days=dt_days,
    )


class _StoredHarmonics:
    """The band's time harmonics of rays kept as their grid points
    (:class:`~coastmon.stream.rays.RayField`), a block of stations at a time.

    A ray point is a weighted mean of grid points and the band's harmonics of a detrended
    series (:func:`_band_rows`) are linear in the series, so each grid point is
    transformed once for all the rays through it, and a ray's harmonics are the weighted
    sums of its grid points' (:meth:`~coastmon.stream.rays.RayField.station_weights`): on
    the long benchmark record 5013 grid points are transformed instead of 14 220 ray
    points. This holds where every grid point a ray draws on is finite at every step (the
    pass's weights are then the same at every step); a station whose ray meets a gap is
    measured from its ray as read (:meth:`covers`). The harmonics differ from those of
    the rays as read by the rays' float32 rounding: the grid points' series are
    transformed as stored, not rounded again after interpolation.
    """

    def __init__(self, fields: list, rows: np.ndarray) -> None:
        self.fields = fields
        self.rows = rows
        self.n_ray = int(fields[0].shape[2])
        self.complete = np.logical_and.reduce([f.complete_points() for f in fields])
        self.first = 0
        self.linear = np.zeros(0, dtype=bool)
        self.matrix = None
        self._buffer = np.empty((0, len(fields), rows.size), dtype=np.complex128)
        self.spectra = self._buffer

    @classmethod
    def of(cls, ru, rv, rh, rows: np.ndarray) -> _StoredHarmonics | None:
        """For ray fields that are all kept as the same grid points, else None."""
        from coastmon.stream.rays import RayField

        fields = [ru, rv] + ([rh] if rh is not None else [])
        if not all(isinstance(f, RayField) and f.plan is fields[0].plan for f in fields):
            return None
        return cls(fields, rows)

    def load(self, first: int, stop: int, wanted: np.ndarray, pool) -> None:
        """Transform the grid points of stations ``first:stop`` where ``wanted``, on the
        threads of ``pool``."""
        from coastmon.stream.rays import stations_through_gaps

        matrix, points = self.fields[0].station_weights(first, stop)
        self.first, self.matrix = first, matrix
        self.linear = np.asarray(wanted, dtype=bool) & ~stations_through_gaps(
            matrix, self.complete[points], self.n_ray)
        per_row = np.repeat(self.linear, self.n_ray)
        needed = np.unique(matrix[np.flatnonzero(per_row)].indices) if per_row.any() \
            else np.zeros(0, dtype=np.int64)
        # (point, field, harmonic): the fields side by side, so that one product with
        # a ray's weights gives all its fields. One buffer for every block (on long
        # records a block's harmonics pass the C library's heap limit, and a new array
        # would be fresh memory each time); the points no loaded ray uses stay unset.
        if self._buffer.shape[0] < points.size:
            self._buffer = np.empty((points.size, len(self.fields), self.rows.size),
                                    dtype=np.complex128)
        self.spectra = self._buffer[:points.size]
        size = max(4 * FORWARD_MIN_LINES,
                   FORWARD_BLOCK_BYTES // (4 * max(1, self.fields[0].shape[0])))

        def transform(start: int) -> None:
            idx = needed[start:start + size]
            for k, field in enumerate(self.fields):
                series = np.asarray(field.points[points[idx]])       # (point, time)
                self.spectra[idx, k] = _band_rows(series.T, self.rows)

        list(pool.map(transform, range(0, needed.size, size)))

    def covers(self, station: int) -> bool:
        """Whether the station's ray harmonics come from its grid points (loaded)."""
        return bool(self.linear[station - self.first])

    def sampled(self, station: int) -> np.ndarray:
        """``(n_ray,)`` the station's ray points that draw on any grid point."""
        i = (station - self.first) * self.n_ray
        return np.diff(self.matrix.indptr[i:i + self.n_ray + 1]) > 0

    def ray(self, station: int, lo: int, hi: int) -> list[np.ndarray]:
        """Each field's ``(hi - lo, harmonic)`` on ray points ``lo:hi`` of the station."""
        i = (station - self.first) * self.n_ray
        n_p, n_f, n_h = self.spectra.shape
        out = (self.matrix[i + lo:i + hi] @ self.spectra.reshape(n_p, n_f * n_h))
        out = out.reshape(hi - lo, n_f, n_h)
        return [out[:, k] for k in range(n_f)]


def band_product_mean(a: np.ndarray, b: np.ndarray, n_t: int) -> np.ndarray:
    r"""Time mean over an ``n_t``-step record of the product of two real series given by
    their harmonics in a band (last axis, as :func:`_band_rows` gives them), the series
    being :math:`x_t = \frac{2}{n}\sum_m \mathrm{Re}(X_m e^{2\pi i m t/n})`:

    .. math:: \overline{ab} = \frac{2}{n^2} \sum_m \mathrm{Re}(A_m B_m^*)

    (Parseval's theorem; Bracewell, *The Fourier Transform and Its Applications*), for
    harmonics :math:`0 < m` whose sums :math:`m + m'` stay below ``n_t`` (no product
    term folds onto the mean).
    """
    # Re(A B*) = Re A Re B + Im A Im B: one dot product of the arrays' float64 views.
    a = np.ascontiguousarray(a, dtype=np.complex128).view(np.float64)
    b = np.ascontiguousarray(b, dtype=np.complex128).view(np.float64)
    return 2.0 / n_t**2 * np.einsum("...i,...i->...", a, b)


def _window_means_from_harmonics(spectra: list[np.ndarray], windows: list[np.ndarray],
                                 n_t: int, dt_days: float, dd_km: float,
                                 band_days: tuple[float, float]) -> np.ndarray:
    """The gate's six time means over each window, ``(window, 6)``, from the band's
    harmonics of the fields on a run of the ray (:func:`split_harmonics`' parts, the time
    derivative and :func:`along_derivative` taken on the harmonics, which they act on
    linearly with the same coefficients; :func:`band_product_mean`)."""
    n_d = spectra[0].shape[0]
    start = min(int(w[0]) for w in windows)
    stop = max(int(w[-1]) for w in windows) + 1
    lo, hi = _stencil_span(n_d, start, stop)
    d_t = _time_derivative_factors(n_t, dt_days, band_harmonics(n_t, dt_days, band_days))
    keep = slice(start - lo, stop - lo)
    terms = np.zeros((6, stop - start))     # per distance: energy, speed sums, west, east
    for spec in spectra:
        sides = _side_operators(n_d, lo, hi) @ spec
        for j in range(2):                                   # plus (west), minus
            q = sides[j * (hi - lo):(j + 1) * (hi - lo)]     # (distance, harmonic)
            # along the line, real and imaginary parts alike (real coefficients)
            q_d = along_derivative(q.view(np.float64).T, dd_km * 1000.0).T
            q_d = q_d.view(np.complex128)[keep]
            q = q[keep]
            terms[3 * j] += 0.5 * band_product_mean(q, q, n_t)
            terms[3 * j + 1] += -band_product_mean(q * d_t, q_d, n_t)
            terms[3 * j + 2] += band_product_mean(q_d, q_d, n_t)
    weights = np.zeros((stop - start, len(windows)))
    for i, w in enumerate(windows):
        weights[np.asarray(w) - start, i] = 1.0 / len(w)
    return (terms @ weights).T


@compiled()
def _add_gate_products(q, q_t, q_d, out):  # pragma: no cover - compiled
    """Add one field's terms of the gate's three products to ``out`` (3, distance, time):
    :math:`q^2`, :math:`-q_t q_d` and :math:`q_d^2` of the (time, distance) parts (the
    energy before its factor ½, and the two sums of :func:`least_squares_speed`). One pass,
    no temporaries, time innermost: the parts are Fortran-ordered (time runs along memory),
    so reads and writes both go in memory order. The same operations as the array
    expressions ``x ** 2`` and ``-a * b``."""
    n_t, n_d = q.shape
    for j in range(n_d):
        for t in range(n_t):
            a = q[t, j]
            b = q_d[t, j]
            out[0, j, t] += a * a
            out[1, j, t] += -q_t[t, j] * b
            out[2, j, t] += b * b


def _empty_gates(n_s: int, configs: list[tuple[float, float]], has_ssh: bool,
                 step_days: float, dt_days: float) -> GateSet:
    e = np.zeros(0)
    return GateSet(np.zeros(0, int), e, e, np.zeros((n_s, 0, N_SERIES)),
                   np.zeros((len(configs), 0, N_SERIES)), configs, e, e, e, has_ssh,
                   step_days, dt_days)


# --------------------------------------------------------------------------- gates
def assign_rays(sources: pd.DataFrame, stations: pd.DataFrame, reach_km: float
                ) -> np.ndarray:
    """The source whose gate each station's ray belongs to (-1: none).

    A station belongs to the source owning the nearest along-shore member on its own coast
    segment (``members_km`` when the sources table has it, else ``[alongshore_km]``),
    provided that member is within ``reach_km``; so gates never share a ray. On a closed
    ring (an island: ``ring_length_km`` of the stations) distances go the shorter way
    round.

    Returns
    -------
    ndarray of int, shape (n_stations,)
        Row position in ``sources``, or -1.
    """
    seg = stations["segment_id"].to_numpy()
    along = stations["alongshore_km"].to_numpy(float)
    ring = stations["ring_length_km"].to_numpy(float) if "ring_length_km" in stations \
        else np.full(len(stations), np.nan)
    best = np.full(len(stations), np.inf)
    owner = np.full(len(stations), -1)
    has_members = "members_km" in sources.columns
    for j, (_, row) in enumerate(sources.iterrows()):
        members = row["members_km"] if has_members else None
        if members is None or (np.ndim(members) == 0 and pd.isna(members)) \
                or len(np.atleast_1d(members)) == 0:
            members = [row["alongshore_km"]]
        members = np.asarray(members, dtype=float)
        gap = np.abs(along[:, None] - members[None, :])
        gap = np.where(np.isfinite(ring)[:, None],
                       np.minimum(gap, np.nan_to_num(ring)[:, None] - gap), gap)
        dist = np.min(gap, axis=1)
        dist = np.where(seg == row["segment_id"], dist, np.inf)
        take = (dist <= reach_km) & (dist < best)
        best[take] = dist[take]
        owner[take] = j
    return owner


@dataclass
class FeedResult:
    table: pd.DataFrame            # one row per source: feed, interval, speed, gate info
    gates: list[dict]              # gate geometry per source (lon, lat arrays)
    bootstrap_feeds: np.ndarray    # (n_boot, n_sources) for rank stability
    background_w_per_m2: float     # rho0 B: background flux per metre of gate and of depth


def _median_background(flux: np.ndarray, quiet: np.ndarray) -> np.ndarray:
    """Median over the quiet rays (last axis) of a flux density; 0 with fewer than 3."""
    f = np.where(np.isfinite(flux[..., quiet]), flux[..., quiet], np.nan)
    n = np.isfinite(f).sum(axis=-1)
    med = np.zeros(f.shape[:-1])
    enough = n >= 3
    if enough.any():
        med[enough] = np.nanmedian(f[enough], axis=-1)
    return med


def _gate_feed(flux: np.ndarray, dy: np.ndarray, bg: np.ndarray) -> np.ndarray:
    """ρ0-free gate feed: mean measured flux density minus background, times the gate length.

    Rays with no measurable speed are left out; the gate's mean over the others stands for
    the whole gate length. NaN when no ray of the gate is measurable.
    """
    ok = np.isfinite(flux)
    w = np.where(ok, dy, 0.0)
    tot = w.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(tot > 0, np.sum(np.where(ok, flux, 0.0) * w, axis=-1)
                        / np.where(tot > 0, tot, 1.0), np.nan)
    return (mean - bg) * dy.sum()


def _empty_row() -> dict:
    return {"feed_w_per_m": np.nan, "feed_lo": np.nan, "feed_hi": np.nan,
            "feed_struct_lo": np.nan, "feed_struct_hi": np.nan,
            "west_speed_cm_s": np.nan, "west_speed_sd_cm_s": np.nan,
            "east_speed_cm_s": np.nan, "west_share": np.nan, "bg_w_per_m": np.nan,
            "kflux_w_per_m": np.nan, "pwork_w_per_m": np.nan, "pwork_rot_w_per_m": np.nan,
            "gate_n_rays": 0, "gate_status": "", "energy_kind": ""}


def offshore_feed(sources: pd.DataFrame, gates: GateSet, frame, settings: Settings
                  ) -> FeedResult:
    """Feed, intervals, speeds, cross-checks and gate status of each source."""
    src = settings.sources
    rho0 = src.rho0
    vmax = src.max_speed_cm_s / 100.0
    n_src = len(sources)
    st = frame.stations
    kind = "kinetic+potential" if gates.has_ssh else "kinetic only"
    owner = assign_rays(sources, st, src.gate_halfwidth_km) if n_src else \
        np.full(len(st), -1)
    ray_owner = owner[gates.station] if gates.station.size else np.zeros(0, int)
    quiet = np.flatnonzero(ray_owner < 0)
    flux = net_flux_density(gates.means, vmax)              # (n_cfg, g)
    bg = _median_background(flux, quiet)                    # (n_cfg,)

    rng = np.random.default_rng(src.seed)
    n_boot = src.n_bootstrap
    if gates.station.size:
        block = bootstrap_block(gates.series[:, :, 0] + gates.series[:, :, 3],
                                gates.step_days / gates.record_step_days)
        boot_means = block_bootstrap_means(gates.series, block, n_boot, rng)  # (b, g, 6)
        boot_flux = net_flux_density(boot_means, vmax)
        boot_bg = _median_background(boot_flux, quiet)
    rows, geoms = [], []
    boot_feeds = np.full((n_boot, n_src), np.nan)
    direction = st["ray_dir"].to_numpy()
    for j in range(n_src):
        row = _empty_row()
        row["energy_kind"] = kind
        own_stations = np.flatnonzero(owner == j)
        m = np.flatnonzero(ray_owner == j)
        if not (direction[own_stations] == -1).any():
            row["gate_status"] = "no_open_water_west"
        elif m.size == 0:
            row["gate_status"] = "gate_on_land"
        else:
            dy = meridional_extents_m(gates.lat[m])
            if m.size == 1:
                dy = np.array([settings.coast.station_spacing_km * 1000.0])
            feeds = rho0 * np.array([_gate_feed(flux[k, m], dy, bg[k])
                                     for k in range(len(gates.configs))])
            row["gate_n_rays"] = int(np.isfinite(flux[0, m]).sum())
            if not np.isfinite(feeds[0]):
                row["gate_status"] = "no_speed"
            else:
                row["gate_status"] = "ok"
                fb = rho0 * _gate_feed(boot_flux[:, m], dy, boot_bg)
                boot_feeds[:, j] = fb
                good = fb[np.isfinite(fb)]
                mean = gates.means[0, m]
                sums = mean.sum(axis=0)
                c_w = least_squares_speed(sums[1], sums[2])
                c_e = -least_squares_speed(sums[4], sums[5])
                bsum = boot_means[:, m].sum(axis=1)
                c_wb = least_squares_speed(bsum[:, 1], bsum[:, 2])
                row.update({
                    "feed_w_per_m": float(feeds[0]),
                    "feed_lo": float(np.percentile(good, 2.5)) if good.size else np.nan,
                    "feed_hi": float(np.percentile(good, 97.5)) if good.size else np.nan,
                    "feed_struct_lo": float(np.nanmin(feeds)),
                    "feed_struct_hi": float(np.nanmax(feeds)),
                    "west_speed_cm_s": 100.0 * float(c_w),
                    "west_speed_sd_cm_s": 100.0 * float(np.nanstd(c_wb, ddof=1)),
                    "east_speed_cm_s": 100.0 * float(c_e),
                    "west_share": float(sums[0] / (sums[0] + sums[3]))
                    if sums[0] + sums[3] > 0 else np.nan,
                    "bg_w_per_m": float(rho0 * bg[0] * dy.sum()),
                    "kflux_w_per_m": float(rho0 * np.sum(gates.kflux[m] * dy)),
                })
                if gates.has_ssh:
                    row["pwork_w_per_m"] = float(rho0 * np.sum(gates.pwork[m] * dy))
                    row["pwork_rot_w_per_m"] = float(
                        rotational_pressure_work(gates.ssh_var[m], gates.lat[m], rho0))
            geoms.append({"lon": gates.lon[m][np.argsort(gates.lat[m])],
                          "lat": np.sort(gates.lat[m])})
            rows.append(row)
            continue
        rows.append(row)
        geoms.append({})
    table = pd.DataFrame(rows, columns=list(_empty_row())) if rows else \
        pd.DataFrame({k: pd.Series(dtype=type(v) if not isinstance(v, str) else object)
                      for k, v in _empty_row().items()})
    return FeedResult(table, geoms, boot_feeds, float(rho0 * bg[0]) if bg.size else np.nan)


def rotational_pressure_work(ssh_var_m2: np.ndarray, lat_deg: np.ndarray, rho0: float
                             ) -> float:
    r"""Westward geostrophic pressure work across a gate that is purely rotational.

    With geostrophic :math:`u' = -(g/f)\,\partial_y\eta'` and :math:`p' = \rho_0 g\eta'`,

    .. math:: -\langle u'p'\rangle = \frac{\rho_0 g^2}{2f}\,\partial_y\langle\eta'^2\rangle,
              \qquad
              -\int \langle u'p'\rangle\,dy = \frac{\rho_0 g^2}{2f}
              \left(\langle\eta'^2\rangle_N - \langle\eta'^2\rangle_S\right),

    a flux that only circulates around the maxima of SSH variance (it has no divergence
    on the f-plane; Marshall & Shutts 1981, JPO 11:1677) yet does not vanish across an
    open gate. Its size beside ``pwork_w_per_m`` shows how much of the measured pressure
    work is rotational.

    Parameters
    ----------
    ssh_var_m2, lat_deg : array_like, shape (n,)
        SSH variance and latitude of the gate's rays.
    rho0 : float

    Returns
    -------
    float
        W per metre of depth (NaN with fewer than two rays).
    """
    lat = np.asarray(lat_deg, dtype=float)
    var = np.asarray(ssh_var_m2, dtype=float)
    if lat.size < 2:
        return float("nan")
    i_s, i_n = int(np.argmin(lat)), int(np.argmax(lat))
    f = 2.0 * OMEGA_EARTH * np.sin(np.radians(0.5 * (lat[i_s] + lat[i_n])))
    return float(rho0 * G**2 / (2.0 * f) * (var[i_n] - var[i_s]))


def rank_sources(sources: pd.DataFrame, feed: FeedResult
                 ) -> tuple[pd.DataFrame, pd.DataFrame, np.ndarray]:
    """Join feeds to the sources, rank by feed (1 = largest), and measure rank stability.

    Sources without a feed (NaN: no gate west of them) rank last. Rank stability of a
    source is the fraction of bootstrap resamples in which it keeps its rank (a short
    record gives unstable ranks). Returns the ranked table, the gates (in rank order) and
    the bootstrap feeds with columns in rank order, shape (n_boot, n_sources).
    """
    table = pd.concat([sources.reset_index(drop=True), feed.table.reset_index(drop=True)], axis=1)
    order = np.argsort(-np.nan_to_num(table["feed_w_per_m"].values, nan=-np.inf), kind="stable")
    rank = np.empty(len(table), int)
    rank[order] = np.arange(1, len(table) + 1)
    table.insert(0, "rank", rank)
    stability = np.full(len(table), np.nan)
    if feed.bootstrap_feeds.size and len(table) > 0:
        b = np.nan_to_num(feed.bootstrap_feeds, nan=-np.inf)
        ranks_b = np.argsort(np.argsort(-b, axis=1, kind="stable"), axis=1) + 1
        stability = (ranks_b == rank[None, :]).mean(axis=0)
    table["rank_stability"] = stability
    table = table.sort_values("rank").reset_index(drop=True)
    gate_order = [feed.gates[i] for i in np.argsort(rank)] if feed.gates else []
    gates_df = pd.DataFrame({"rank": table["rank"].values,
                             "lon": [g.get("lon") for g in gate_order],
                             "lat": [g.get("lat") for g in gate_order]}) if len(table) else \
        pd.DataFrame({"rank": pd.Series(dtype=int), "lon": [], "lat": []})
    boot = feed.bootstrap_feeds[:, np.argsort(rank)] if feed.bootstrap_feeds.size else \
        np.zeros((0, len(table)))
    return table, gates_df, boot
