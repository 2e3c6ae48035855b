"""Continuous Morlet wavelet transform with red-noise significance (Torrence & Compo 1998).

Every function works on many series at once: the time axis is the last axis and any
leading axes (stations, offsets, ...) are carried through. Equation numbers refer to
Torrence, C. and G. P. Compo, 1998: A practical guide to wavelet analysis. *Bulletin of
the American Meteorological Society*, 79, 61-78 (below "T&C").

Conventions
-----------
* The series mean is removed before the transform; ``WaveletTransform.variance`` is the
  population variance (divided by ``n``) of the series about that mean.
* Power is ``|W_n(s)|^2`` in the squared units of the input (not divided by the
  variance); significance levels are returned in the same units.
* A series containing any NaN yields NaN coefficients, variance and fractions: fill or
  drop gaps before calling.
* ``J`` follows T&C: the scales are ``s_j = s0 2^(j dj)`` for ``j = 0 .. J`` (``J + 1``
  scales).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
import scipy.fft

from coastmon.errors import RecordError, SettingsError

C_DELTA_MORLET6 = 0.776
"""Reconstruction factor C_delta of the Morlet wavelet with omega0 = 6 (T&C Table 2)."""
GAMMA_MORLET6 = 2.32
"""Decorrelation factor gamma for time averaging, Morlet omega0 = 6 (T&C Table 2)."""
DJ0_MORLET6 = 0.60
"""Scale decorrelation factor delta j_0 for scale averaging, Morlet omega0 = 6 (T&C Table 2)."""
PSI0_MORLET = np.pi ** -0.25
"""psi_0(0) of the Morlet wavelet, pi^(-1/4) (T&C Table 2)."""


@dataclass(frozen=True)
class WaveletTransform:
    """Result of :func:`cwt_morlet`.

    Attributes
    ----------
    coefs : ndarray, complex, shape (..., n_scales, n)
        Wavelet coefficients W_n(s_j) (T&C eq. 4 evaluated by eq. 6).
    scales : ndarray, shape (n_scales,)
        Wavelet scales s_j, in the time unit of ``dt``.
    periods : ndarray, shape (n_scales,)
        Equivalent Fourier periods, ``fourier_factor(omega0) * scales``.
    coi : ndarray, shape (n,)
        Cone of influence as the longest reliable Fourier period at each time.
    dt, dj, omega0 : float
        Sampling interval, scale resolution, Morlet non-dimensional frequency.
    variance : ndarray, shape (...)
        Population variance of each series about its mean.
    """

    coefs: np.ndarray
    scales: np.ndarray
    periods: np.ndarray
    coi: np.ndarray
    dt: float
    dj: float
    omega0: float
    variance: np.ndarray

    @property
    def power(self) -> np.ndarray:
        """Wavelet power |W_n(s)|^2, shape (..., n_scales, n)."""
        out = np.square(self.coefs.real)
        out += np.square(self.coefs.imag)
        return out

    @property
    def n_times(self) -> int:
        """Number of time steps of the transformed series."""
        return int(self.coefs.shape[-1])


def fourier_factor(omega0: float) -> float:
    """Ratio of the equivalent Fourier period to the scale of a Morlet wavelet.

    ``lambda / s = 4 pi / (omega0 + sqrt(2 + omega0^2))`` (T&C Table 1); 1.033 for
    ``omega0 = 6``.

    Parameters
    ----------
    omega0 : float
        Morlet non-dimensional frequency.

    Returns
    -------
    float
        Fourier period per unit scale.
    """
    return float(4.0 * np.pi / (omega0 + np.sqrt(2.0 + omega0 ** 2)))


def _morlet_hat(scaled_omega: np.ndarray, omega0: float) -> np.ndarray:
    """Fourier transform of the Morlet mother wavelet, pi^(-1/4) H(w) exp(-(w - w0)^2 / 2)."""
    return np.where(scaled_omega > 0.0,
                    PSI0_MORLET * np.exp(-0.5 * (scaled_omega - omega0) ** 2), 0.0)


@functools.lru_cache(maxsize=4)
def _scaled_morlet_hats(n_fft: int, dt: float, scales: tuple[float, ...], omega0: float
                        ) -> np.ndarray:
    """The normalised daughter wavelets in frequency, (scale, n_fft), read-only.

    ``sqrt(2 pi s / dt) psi_hat(s omega)`` (Torrence & Compo 1998, eq. 6), the same for
    every series of a record: kept for the next group of series of the same length.
    """
    omega = 2.0 * np.pi * scipy.fft.fftfreq(n_fft, dt)
    out = np.empty((len(scales), n_fft))
    for j, scale in enumerate(scales):
        out[j] = np.sqrt(2.0 * np.pi * scale / dt) * _morlet_hat(scale * omega, omega0)
    out.flags.writeable = False
    return out


def padded_length(n: int) -> int:
    """Length of the zero-padded series the transforms use: the next power of two at or
    above ``n`` (Torrence & Compo 1998, §3f)."""
    return 1 << max(0, int(n) - 1).bit_length()


def _transform(x, dt: float, dj: float, s0: float | None, J: int | None, omega0: float,
               pad: bool, period_band: tuple[float, float] | None) -> tuple:
    """What every scale's coefficients are made from (see :func:`cwt_morlet`): the record
    length, the scales, each series' variance, the series' FFT and the daughter wavelets."""
    data = np.asarray(x, dtype=float)
    if data.ndim == 0 or data.shape[-1] < 4:
        raise RecordError(
            "A wavelet transform needs a series of at least 4 time steps",
            where=f"series of shape {data.shape}",
            todo="Use a longer record",
        )
    if not (dt > 0 and dj > 0 and (s0 is None or s0 > 0)):
        raise RecordError(
            "The wavelet transform needs a positive time step, scale step and smallest scale",
            where=f"dt={dt}, dj={dj}, s0={s0}",
            todo="Check that the time coordinate increases and the signal settings are positive",
        )
    n = data.shape[-1]
    factor = fourier_factor(omega0)
    if s0 is None:
        s0 = 2.0 * dt / factor
    if J is None:
        J = int(np.floor(np.log2(n * dt / s0) / dj))
    if J < 0:
        raise RecordError(
            "The record is shorter than the smallest wavelet scale",
            where=f"n={n} steps of {dt}, smallest scale {s0}",
            todo="Use a longer record or a smaller smallest scale",
        )
    scales = s0 * 2.0 ** (np.arange(J + 1) * dj)
    if period_band is not None:
        low, high = sorted(float(p) for p in period_band)
        periods = factor * scales
        scales = scales[(periods >= low) & (periods <= high)]

    anomaly = data - data.mean(axis=-1, keepdims=True)
    variance = np.mean(anomaly ** 2, axis=-1)
    n_fft = padded_length(n) if pad else n
    x_hat = scipy.fft.fft(anomaly, n=n_fft, axis=-1, workers=-1)

    psi_hats = _scaled_morlet_hats(n_fft, float(dt), tuple(float(sc) for sc in scales),
                                   float(omega0))
    return n, scales, variance, x_hat, psi_hats


def band_power(x: np.ndarray, dt: float, period_band: tuple[float, float] | None,
               dj: float = 0.125, omega0: float = 6.0
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Scale-averaged power over a band and the time-mean power at each of its scales,
    from the transform of :func:`cwt_morlet` reduced one scale at a time.

    .. math::

        \bar W_n^2 = \frac{\delta j\,\delta t}{C_\delta}\sum_{j} \frac{|W_n(s_j)|^2}{s_j}
        \quad\text{(T\&C eq. 24)},\qquad
        \bar W^2(s_j) = \frac{1}{N}\sum_n |W_n(s_j)|^2 \quad\text{(T\&C eq. 22)},

    over the scales of :func:`cwt_morlet` whose Fourier periods lie in ``period_band``
    (None: all its scales, the global wavelet spectrum of T&C eq. 22 in ``scale_mean``).
    The same numbers as :func:`scale_average` of ``cwt_morlet(..., period_band=...)`` and
    that transform's ``power.mean(axis=-1)`` (each scale's coefficients are the same
    transform, summed in the same order), without holding the coefficients
    (``16 * n_series * n_scales * n`` bytes): the arrays made are one scale's.

    Returns
    -------
    averaged : ndarray, shape (..., n)
    scale_mean : ndarray, shape (..., n_scales)
    periods : ndarray, shape (n_scales,)
        Fourier periods of the scales, in the unit of ``dt``.
    """
    n, scales, _, x_hat, psi_hats = _transform(x, dt, dj, None, None, omega0, True,
                                               period_band)
    periods = fourier_factor(omega0) * scales
    if scales.size == 0:
        low, high = sorted(float(p) for p in period_band)
        raise RecordError(
            "No wavelet scale falls in the requested band of periods",
            where=f"band {low:g}-{high:g} (same time unit as the record's step {dt:g})",
            todo="Widen signals.eddy_period_days or use a longer, finer-sampled record",
        )
    weights = 1.0 / scales
    averaged = np.zeros(x_hat.shape[:-1] + (n,))
    scale_mean = np.empty(x_hat.shape[:-1] + (scales.size,))
    for j in range(scales.size):
        coefs = scipy.fft.ifft(x_hat * psi_hats[j], axis=-1, workers=-1)[..., :n]
        power = np.square(coefs.real)
        power += np.square(coefs.imag)
        scale_mean[..., j] = power.mean(axis=-1)
        power *= weights[j]
        averaged += power
    averaged *= dj * dt / _c_delta(omega0, dj)
    return averaged, scale_mean, periods


def cwt_morlet(
    x: np.ndarray,
    dt: float,
    dj: float = 0.125,
    s0: float | None = None,
    J: int | None = None,
    omega0: float = 6.0,
    pad: bool = True,
    period_band: tuple[float, float] | None = None,
) -> WaveletTransform:
    r"""Continuous Morlet wavelet transform of many series at once, by FFT.

    The transform is the inverse FFT of the product of the series' FFT with the
    normalised, scaled daughter wavelet (T&C eqs. 4-6):

    .. math::

        W_n(s) = \sum_{k} \hat x_k \, \hat\psi^*(s\omega_k)\, e^{i\omega_k n\delta t},
        \qquad
        \hat\psi(s\omega_k) = \left(\frac{2\pi s}{\delta t}\right)^{1/2}
        \pi^{-1/4} H(\omega_k)\, e^{-(s\omega_k-\omega_0)^2/2},

    with :math:`\hat x_k` the discrete Fourier transform divided by ``N`` and
    :math:`\omega_k = 2\pi k/(N\delta t)` (negative for ``k > N/2``). The normalisation
    gives unit energy at every scale, so power at different scales and in different
    series is directly comparable (T&C §3c).

    Parameters
    ----------
    x : array_like, shape (..., n)
        Series; time along the last axis, evenly spaced.
    dt : float
        Sampling interval (any time unit; scales and periods come out in that unit).
    dj : float
        Scale resolution: ``1/dj`` sub-octaves per octave (T&C eq. 9).
    s0 : float, optional
        Smallest scale. Default ``2 dt / fourier_factor(omega0)``, i.e. a Fourier period
        of ``2 dt`` (T&C §3f).
    J : int, optional
        Largest scale index (``J + 1`` scales). Default
        ``floor(log2(n dt / s0) / dj)`` (T&C eq. 10).
    omega0 : float
        Morlet non-dimensional frequency.
    pad : bool
        Zero-pad the series (after removing its mean) to the next power of two at or
        above ``n`` before the FFT, limiting wrap-around at the ends (T&C §3f).
    period_band : (float, float), optional
        Keep only the scales whose Fourier periods lie in this band (inclusive), on the
        same scale grid: each scale's coefficients are computed independently, so they
        equal those of the full transform, at a fraction of the time and memory.

    Returns
    -------
    WaveletTransform

    Notes
    -----
    The cone of influence at each time is the Fourier period whose e-folding time
    ``sqrt(2) s`` (T&C Table 1) equals the distance to the nearer end of the record,
    the record being taken to reach half a sample beyond its first and last samples:
    ``coi_n = fourier_factor * min(n + 1/2, N - n - 1/2) dt / sqrt(2)``.

    With the default ``s0`` (Fourier period ``2 dt``) the scales stop short of the
    Nyquist frequency, so the variance in the top of the band is not represented: for
    white noise eq. 14 then returns about 93 % of the variance. Pass ``s0 = dt / 2`` for
    a transform that preserves (nearly) all the variance of a white series.

    The coefficients take ``16 * n_series * (J + 1) * n`` bytes (about 1 GB for 200
    ten-year daily series); transform large sets of series in groups.

    Raises
    ------
    RecordError
        If the series has fewer than 4 samples or ``dt``, ``dj`` or ``s0`` is not
        positive.
    """
    n, scales, variance, x_hat, psi_hats = _transform(x, dt, dj, s0, J, omega0, pad,
                                                      period_band)
    factor = fourier_factor(omega0)
    coefs = np.empty(x_hat.shape[:-1] + (scales.size, n), dtype=complex)
    for j in range(scales.size):
        coefs[..., j, :] = scipy.fft.ifft(x_hat * psi_hats[j], axis=-1, workers=-1)[..., :n]

    edge = np.minimum(np.arange(n) + 0.5, n - 0.5 - np.arange(n))
    coi = factor * edge * dt / np.sqrt(2.0)
    return WaveletTransform(coefs=coefs, scales=scales, periods=factor * scales, coi=coi,
                            dt=float(dt), dj=float(dj), omega0=float(omega0),
                            variance=variance)


def delta_reconstruction_factor(omega0: float = 6.0, dj: float = 0.125,
                                n: int = 8192) -> float:
    r"""Reconstruction factor C_delta of the Morlet wavelet, computed numerically.

    From the transform of a unit delta function at time 0 (T&C eq. 13):

    .. math::

        W_\delta(s) = \frac{1}{N}\sum_k \hat\psi^*(s\omega_k), \qquad
        C_\delta = \frac{\delta j\, \delta t^{1/2}}{\psi_0(0)}
                   \sum_{j=0}^{J} \frac{\Re\{W_\delta(s_j)\}}{s_j^{1/2}},

    on ``n`` samples with ``dt = 1``, scales from ``s0 = 1/2`` (so that the wavelets cover
    the whole band up to the Nyquist frequency) to the record length. T&C Table 2 gives
    0.776 for ``omega0 = 6``.

    Parameters
    ----------
    omega0 : float
        Morlet non-dimensional frequency.
    dj : float
        Scale resolution.
    n : int
        Number of samples of the delta series.

    Returns
    -------
    float
    """
    omega = 2.0 * np.pi * scipy.fft.fftfreq(n, 1.0)
    s0 = 0.5
    n_scales = int(np.floor(np.log2(n / s0) / dj)) + 1
    scales = s0 * 2.0 ** (np.arange(n_scales) * dj)
    psi_hat = np.sqrt(2.0 * np.pi * scales[:, None]) * _morlet_hat(scales[:, None] * omega,
                                                                    omega0)
    w_delta = psi_hat.sum(axis=1) / n
    return float(dj / PSI0_MORLET * np.sum(w_delta / np.sqrt(scales)))


def _c_delta(omega0: float, dj: float) -> float:
    if omega0 == 6.0:
        return C_DELTA_MORLET6
    return delta_reconstruction_factor(omega0, dj)


def _require_morlet6(omega0: float, what: str) -> None:
    if omega0 != 6.0:
        raise SettingsError(
            f"{what} uses the empirical decorrelation factors of T&C Table 2, which are "
            f"published only for the Morlet wavelet with omega0 = 6",
            where=f"signals.omega0 = {omega0}",
            todo="Set signals.omega0 = 6.0 to use wavelet significance tests",
        )


def reconstruct(wt: WaveletTransform) -> np.ndarray:
    r"""Rebuild the series (about its mean) from its wavelet transform (T&C eq. 11).

    .. math::

        x_n = \frac{\delta j\, \delta t^{1/2}}{C_\delta\, \psi_0(0)}
              \sum_{j=0}^{J} \frac{\Re\{W_n(s_j)\}}{s_j^{1/2}}

    Parameters
    ----------
    wt : WaveletTransform

    Returns
    -------
    ndarray, shape (..., n)
        The reconstructed anomaly; close to the input minus its mean when the scales
        span ``2 dt`` to the record length.
    """
    c_delta = _c_delta(wt.omega0, wt.dj)
    weights = 1.0 / np.sqrt(wt.scales)
    total = np.einsum("...jn,j->...n", wt.coefs.real, weights)
    return wt.dj * np.sqrt(wt.dt) / (c_delta * PSI0_MORLET) * total


def lag1_autocorrelation(x: np.ndarray, axis: int = -1) -> np.ndarray:
    r"""Lag-1 autocorrelation of each series, the AR(1) parameter for red noise.

    .. math::

        \alpha = \frac{\sum_{n=0}^{N-2} (x_n-\bar x)(x_{n+1}-\bar x)}
                      {\sum_{n=0}^{N-1} (x_n-\bar x)^2}

    (the usual sample estimator; T&C §4 estimate alpha from the lag-1 autocorrelation).
    A constant series gives 0.

    Parameters
    ----------
    x : array_like
        Series.
    axis : int
        Time axis.

    Returns
    -------
    ndarray
        alpha for each series (the time axis removed).
    """
    data = np.moveaxis(np.asarray(x, dtype=float), axis, -1)
    anomaly = data - data.mean(axis=-1, keepdims=True)
    numerator = np.sum(anomaly[..., :-1] * anomaly[..., 1:], axis=-1)
    denominator = np.sum(anomaly ** 2, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denominator > 0, numerator / np.where(denominator > 0, denominator, 1),
                        np.where(np.isnan(denominator), np.nan, 0.0))


def red_noise_spectrum(alpha: np.ndarray | float, periods: np.ndarray, dt: float) -> np.ndarray:
    r"""Normalised discrete Fourier spectrum of AR(1) red noise (T&C eq. 16).

    .. math::

        P_k = \frac{1-\alpha^2}{1+\alpha^2-2\alpha\cos(2\pi k/N)},

    evaluated at ``k/N = dt / period``. Its mean over all ``k`` is 1 (unit variance).

    Parameters
    ----------
    alpha : float or array_like, shape (...)
        Lag-1 autocorrelation of each series.
    periods : array_like, shape (n_periods,)
        Fourier periods, in the unit of ``dt``.
    dt : float
        Sampling interval.

    Returns
    -------
    ndarray, shape (..., n_periods)
    """
    a = np.asarray(alpha, dtype=float)[..., None]
    freq = dt / np.asarray(periods, dtype=float)
    return (1.0 - a ** 2) / (1.0 + a ** 2 - 2.0 * a * np.cos(2.0 * np.pi * freq))


def red_noise_significance(
    variance: np.ndarray | float,
    alpha: np.ndarray | float,
    periods: np.ndarray,
    dt: float,
    level: float = 0.95,
    dof: np.ndarray | float = 2,
) -> np.ndarray:
    r"""Wavelet power that red noise exceeds with probability ``1 - level`` (T&C eqs. 16-18).

    .. math::

        \mathrm{sig}(s) = \sigma^2 P_k \,\frac{\chi^2_\nu(p)}{\nu},

    with ``P_k`` from :func:`red_noise_spectrum` at the Fourier period of ``s``,
    ``nu = dof`` (2 for the local complex Morlet power, T&C eq. 18; larger for time
    averages, :func:`global_dof`) and ``chi^2_nu(p)`` the ``p = level`` quantile
    (``scipy.stats.chi2.ppf``).

    Parameters
    ----------
    variance : float or array_like, shape (...)
        Variance of each series (sigma^2).
    alpha : float or array_like, shape (...)
        Lag-1 autocorrelation of each series.
    periods : array_like, shape (n_scales,)
        Fourier periods of the scales.
    dt : float
        Sampling interval.
    level : float
        Confidence level.
    dof : float or array_like, shape (n_scales,)
        Degrees of freedom at each scale.

    Returns
    -------
    ndarray, shape (..., n_scales)
        Power at the significance level, in the units of ``variance``.
    """
    nu = np.asarray(dof, dtype=float)
    spectrum = red_noise_spectrum(alpha, periods, dt)
    import scipy.stats  # half a second to import; only the significance tests need it

    return np.asarray(variance, dtype=float)[..., None] * spectrum * scipy.stats.chi2.ppf(level, nu) / nu


def global_spectrum(wt: WaveletTransform, exclude_coi: bool = False) -> np.ndarray:
    r"""Global (time-averaged) wavelet spectrum (T&C eq. 22).

    .. math::

        \bar W^2(s) = \frac{1}{N}\sum_{n=0}^{N-1} |W_n(s)|^2

    Parameters
    ----------
    wt : WaveletTransform
    exclude_coi : bool
        Average only over times where the scale lies inside the cone of influence.

    Returns
    -------
    ndarray, shape (..., n_scales)
        NaN at scales with no reliable time when ``exclude_coi``.
    """
    power = wt.power
    if not exclude_coi:
        return power.mean(axis=-1)
    inside = wt.periods[:, None] <= wt.coi[None, :]
    counts = inside.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, np.sum(power * inside, axis=-1) / counts, np.nan)


def global_dof(n_avg: np.ndarray | float, scales: np.ndarray, dt: float,
               gamma: float = GAMMA_MORLET6) -> np.ndarray:
    r"""Degrees of freedom of a time-averaged wavelet spectrum (T&C eq. 23).

    .. math::

        \nu = 2\sqrt{1 + \left(\frac{n_a\,\delta t}{\gamma\, s}\right)^2}

    Parameters
    ----------
    n_avg : float or array_like, shape (n_scales,)
        Number of times averaged at each scale.
    scales : array_like, shape (n_scales,)
    dt : float
    gamma : float
        Decorrelation factor (2.32 for Morlet omega0 = 6, T&C Table 2).

    Returns
    -------
    ndarray, shape (n_scales,)
    """
    n_a = np.maximum(np.asarray(n_avg, dtype=float), 1.0)
    return 2.0 * np.sqrt(1.0 + (n_a * dt / (gamma * np.asarray(scales, dtype=float))) ** 2)


def global_significance(wt: WaveletTransform, alpha: np.ndarray | float,
                        level: float = 0.95, exclude_coi: bool = False) -> np.ndarray:
    """Significance level of :func:`global_spectrum` against red noise (T&C eqs. 18, 23).

    Parameters
    ----------
    wt : WaveletTransform
    alpha : float or array_like, shape (...)
        Lag-1 autocorrelation of each series.
    level : float
        Confidence level.
    exclude_coi : bool
        Must match the choice made in :func:`global_spectrum`; the number of averaged
        times is then counted inside the cone of influence.

    Returns
    -------
    ndarray, shape (..., n_scales)
    """
    _require_morlet6(wt.omega0, "The time-averaged significance test")
    if exclude_coi:
        n_avg = np.sum(wt.periods[:, None] <= wt.coi[None, :], axis=-1)
    else:
        n_avg = np.full(wt.scales.size, wt.n_times)
    dof = global_dof(n_avg, wt.scales, wt.dt)
    return red_noise_significance(wt.variance, alpha, wt.periods, wt.dt, level, dof)


def _band(wt: WaveletTransform, period_band: tuple[float, float]) -> np.ndarray:
    low, high = sorted(float(p) for p in period_band)
    selected = np.flatnonzero((wt.periods >= low) & (wt.periods <= high))
    if selected.size == 0:
        raise RecordError(
            "No wavelet scale falls in the requested band of periods",
            where=f"band {low:g}-{high:g}; periods available "
                  f"{wt.periods[0]:.3g}-{wt.periods[-1]:.3g} (same time unit)",
            todo="Widen signals.eddy_period_days or use a longer, finer-sampled record",
        )
    return selected


def scale_average(wt: WaveletTransform, period_band: tuple[float, float]) -> np.ndarray:
    r"""Scale-averaged wavelet power over a band of periods (T&C eq. 24).

    .. math::

        \bar W_n^2 = \frac{\delta j\,\delta t}{C_\delta}
                     \sum_{j=j_1}^{j_2} \frac{|W_n(s_j)|^2}{s_j}

    The result is a time series of the variance in the band; its time mean is the
    band's share of the series variance (T&C eq. 14).

    Parameters
    ----------
    wt : WaveletTransform
    period_band : (float, float)
        Shortest and longest Fourier period, inclusive, in the unit of ``dt``.

    Returns
    -------
    ndarray, shape (..., n)
    """
    selected = _band(wt, period_band)
    c_delta = _c_delta(wt.omega0, wt.dj)
    coefs = wt.coefs[..., selected, :]
    power = np.square(coefs.real)
    power += np.square(coefs.imag)
    return wt.dj * wt.dt / c_delta * np.einsum("...jn,j->...n", power,
                                                 1.0 / wt.scales[selected])


def scale_average_significance(wt: WaveletTransform, alpha: np.ndarray | float,
                               period_band: tuple[float, float],
                               level: float = 0.95) -> np.ndarray:
    r"""Red-noise significance level of :func:`scale_average` (T&C eqs. 25-28).

    .. math::

        S_{avg} = \Big(\sum_{j=j_1}^{j_2} 1/s_j\Big)^{-1}, \quad
        \bar P = S_{avg}\sum_{j=j_1}^{j_2} P_j/s_j, \quad
        \mathrm{sig} = \sigma^2\,\frac{\delta j\,\delta t}{C_\delta S_{avg}}\,\bar P\,
        \frac{\chi^2_\nu(p)}{\nu},

        \nu = \frac{2 n_a S_{avg}}{S_{mid}}\sqrt{1+\left(\frac{n_a\,\delta j}
        {\delta j_0}\right)^2}, \qquad S_{mid} = (s_{j_1}s_{j_2})^{1/2},

    with ``n_a = j2 - j1 + 1`` and ``delta j_0 = 0.60`` (Morlet omega0 = 6, T&C Table 2).

    Parameters
    ----------
    wt : WaveletTransform
    alpha : float or array_like, shape (...)
        Lag-1 autocorrelation of each series.
    period_band : (float, float)
        As for :func:`scale_average`.
    level : float
        Confidence level.

    Returns
    -------
    ndarray, shape (...)
    """
    _require_morlet6(wt.omega0, "The scale-averaged significance test")
    selected = _band(wt, period_band)
    scales = wt.scales[selected]
    n_a = selected.size
    s_avg = 1.0 / np.sum(1.0 / scales)
    s_mid = np.sqrt(scales[0] * scales[-1])
    dof = 2.0 * n_a * s_avg / s_mid * np.sqrt(1.0 + (n_a * wt.dj / DJ0_MORLET6) ** 2)
    spectrum = red_noise_spectrum(alpha, wt.periods[selected], wt.dt)
    p_bar = s_avg * np.sum(spectrum / scales, axis=-1)
    factor = wt.dj * wt.dt / (C_DELTA_MORLET6 * s_avg)
    import scipy.stats  # half a second to import; only the significance tests need it

    return np.asarray(wt.variance) * factor * p_bar * scipy.stats.chi2.ppf(level, dof) / dof


def significant_fraction(wt: WaveletTransform, sig: np.ndarray,
                         period_band: tuple[float, float],
                         exclude_coi: bool = True) -> np.ndarray:
    """Fraction of time the scale-averaged band power exceeds its significance level.

    Used as the persistence of a signal in the band: 1 means significant all the time,
    0 never. Times where the longest selected period lies outside the cone of influence
    are left out when ``exclude_coi`` (the default).

    Parameters
    ----------
    wt : WaveletTransform
    sig : array_like, shape (...)
        Significance level of the scale-averaged power, e.g. from
        :func:`scale_average_significance`.
    period_band : (float, float)
        As for :func:`scale_average`.
    exclude_coi : bool
        Leave out times affected by the record ends.

    Returns
    -------
    ndarray, shape (...)
        NaN for series that contain NaN.

    Raises
    ------
    RecordError
        If no time lies inside the cone of influence for the band.
    """
    averaged = scale_average(wt, period_band)
    if exclude_coi:
        longest = wt.periods[_band(wt, period_band)[-1]]
        reliable = wt.coi >= longest
        if not reliable.any():
            raise RecordError(
                "The record is too short for its middle to be free of edge effects at the "
                "longest period of the band",
                where=f"longest period {longest:.3g}, record of {wt.n_times} steps of {wt.dt:g}",
                todo="Use a record longer than about 2.8 times the longest period, or "
                     "lower the upper end of signals.eddy_period_days",
            )
        averaged = averaged[..., reliable]
    exceed = averaged > np.asarray(sig, dtype=float)[..., None]
    fraction = exceed.mean(axis=-1)
    return np.where(np.isnan(wt.variance), np.nan, fraction)
