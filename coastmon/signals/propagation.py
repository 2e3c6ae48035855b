"""Propagation along a line: wavenumber-frequency spectra, phase speeds, long Rossby waves.

Fields are Hovmöller arrays ``field[time, distance]`` sampled evenly in time (step
``dt``) and along a line (step ``dd``), with distance increasing in the ``+d`` direction.
The caller orients the line: for zonal rays leaving a coast into the interior, ``+d``
points away from the coast (westward off an eastern boundary), so westward propagation
comes out as a positive speed.

Sign convention of the spectrum: a component ``cos(2 pi (k d - f t))`` with ``f > 0``
sits at ``(freq=f, wavenumber=k)``; it travels toward ``+d`` when ``k > 0`` (phase speed
``f / k > 0``) and toward ``-d`` when ``k < 0``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numba
import numpy as np
import scipy.fft
import scipy.special

from coastmon.compiled import compiled
from coastmon.errors import RecordError

OMEGA_EARTH = 7.2921e-5
"""Earth's rotation rate (s-1)."""
EARTH_RADIUS_M = 6.371e6
"""Mean Earth radius (m)."""
FIRST_MODE_SPEED_M_S = 2.5
"""Typical first baroclinic gravity-wave speed of the mid-latitude ocean (m s-1), used
only by :func:`default_deformation_radius_km`."""

PEAK_QUANTILE = 0.999
"""Spectral bins count in the centroid only above this quantile of the background."""

Direction = Literal["dominant", "positive", "negative"]


@dataclass(frozen=True)
class KWSpectrum:
    """Wavenumber-frequency power spectrum of a Hovmöller field.

    Attributes
    ----------
    freq : ndarray, shape (F,)
        Frequencies, cycles per time unit, ``0 .. 1/(2 dt)``.
    wavenumber : ndarray, shape (K,)
        Wavenumbers, cycles per distance unit, ascending; sign as in the module notes.
    power : ndarray, shape (F, K)
        Power per bin, in squared field units; the negative-frequency half is folded
        onto the positive one, and the sum over all bins equals ``variance``.
    variance : float
        Variance of the detrended field (taper-corrected when a taper is used).
    positive_energy, negative_energy : float
        Power with ``f > 0`` travelling toward ``+d`` (``k > 0``) and toward ``-d``
        (``k < 0``). Bins at ``f = 0``, ``k = 0`` or at the Nyquist wavenumber, whose
        direction is undefined, count in neither.
    distance_slice : (int, int)
        Start and stop indices of the distance samples used (the longest run of
        distances with a complete record).
    dt, dd : float
        Time and distance steps of the field.
    """

    freq: np.ndarray
    wavenumber: np.ndarray
    power: np.ndarray
    variance: float
    positive_energy: float
    negative_energy: float
    distance_slice: tuple[int, int]
    dt: float
    dd: float

    @property
    def positive_fraction(self) -> float:
        """Share of the directional energy travelling toward ``+d`` (0-1)."""
        total = self.positive_energy + self.negative_energy
        return float(self.positive_energy / total) if total > 0 else float("nan")

    @property
    def negative_fraction(self) -> float:
        """Share of the directional energy travelling toward ``-d`` (0-1)."""
        total = self.positive_energy + self.negative_energy
        return float(self.negative_energy / total) if total > 0 else float("nan")


@dataclass(frozen=True)
class SpeedEstimate:
    """Dominant phase speed along the line, in distance units per time unit (+ = toward +d).

    Attributes
    ----------
    speed : float
        Radon-transform estimate (the reported value).
    speed_lo, speed_hi : float
        Confidence interval from the spread of estimates over time segments.
    spectral_speed : float
        Independent spectral-centroid estimate (cross-check).
    direction : int
        +1 or -1: the propagation direction analysed.
    n_segments : int
        Number of time segments used for the jackknife.
    level : float
        Confidence level of the interval.
    """

    speed: float
    speed_lo: float
    speed_hi: float
    spectral_speed: float
    direction: int
    n_segments: int
    level: float


def _complete_block(field: np.ndarray) -> tuple[np.ndarray, tuple[int, int]]:
    """Longest run of distance columns with a complete (all finite) record."""
    data = np.asarray(field, dtype=float)
    if data.ndim != 2:
        raise RecordError(
            "A propagation analysis needs a two-dimensional (time, distance) field",
            where=f"array of shape {data.shape}",
            todo="Pass one Hovmöller section at a time",
        )
    complete = np.all(np.isfinite(data), axis=0)
    best, start = (0, 0), None
    for j, ok in enumerate(np.append(complete, False)):
        if ok and start is None:
            start = j
        elif not ok and start is not None:
            if j - start > best[1] - best[0]:
                best = (start, j)
            start = None
    if best[1] - best[0] < 4 or data.shape[0] < 8:
        raise RecordError(
            "A propagation analysis needs at least 8 time steps and 4 neighbouring "
            "distances with a complete record",
            where=f"field of shape {data.shape} with {int(complete.sum())} complete distances",
            todo="Use a longer record or longer rays, or fill gaps before the analysis",
        )
    return data[:, best[0]:best[1]], best



def detrend_time(data: np.ndarray) -> np.ndarray:
    """Remove a least-squares straight line in time (axis 0) at every distance.

    Closed-form normal equations for the line ``a + b t`` (the same result as
    ``scipy.signal.detrend(data, axis=0, type="linear")``, without a general solver).
    """
    data = np.asarray(data, dtype=np.float64)
    n = data.shape[0]
    t = np.arange(n, dtype=np.float64) - 0.5 * (n - 1)
    mean = data.mean(axis=0)
    denom = float(np.sum(t * t))
    slope = (t @ data) / denom if denom > 0 else np.zeros_like(mean)
    return data - mean - np.multiply.outer(t, slope)


def wavenumber_frequency(field: np.ndarray, dt: float, dd: float,
                         taper: bool = True) -> KWSpectrum:
    r"""Wavenumber-frequency spectrum of a Hovmöller field, split by propagation direction.

    The field is detrended (a least-squares line in time removed at each distance),
    optionally multiplied by a 2-D Hann taper ``w``, and transformed:

    .. math::

        X(f, k) = \sum_{n,m} w_{nm} x_{nm}\, e^{-2\pi i (k\, m\,\delta d - f\, n\,\delta t)},
        \qquad
        P(f, k) = \frac{|X|^2}{(N M)^2\, \overline{w^2}},

    folded onto ``f >= 0``. By Parseval's theorem :math:`\sum P = \overline{(w x)^2} /
    \overline{w^2}`, which is exactly the variance of the detrended field without a taper
    and its taper-weighted estimate with one.

    Parameters
    ----------
    field : array_like, shape (time, distance)
        Hovmöller field; distance columns with gaps are dropped (the longest complete
        run of distances is used).
    dt, dd : float
        Time and distance steps.
    taper : bool
        Apply the Hann taper (reduces leakage between neighbouring bins).

    Returns
    -------
    KWSpectrum

    Raises
    ------
    RecordError
        If fewer than 8 times or 4 complete distances remain, or the field is constant.
    """
    data, used = _complete_block(field)
    n_t, n_d = data.shape
    detrended = detrend_time(data)
    if taper:
        from scipy.signal.windows import hann  # only the tapered spectrum needs it

        window = np.outer(hann(n_t, sym=False), hann(n_d, sym=False))
    else:
        window = np.ones_like(detrended)
    spectrum = scipy.fft.fft(scipy.fft.rfft(detrended * window, axis=0), axis=1)
    power = np.abs(spectrum) ** 2 / (n_t * n_d) ** 2 / np.mean(window ** 2)
    fold = np.full(power.shape[0], 2.0)
    fold[0] = 1.0
    if n_t % 2 == 0:
        fold[-1] = 1.0
    power *= fold[:, None]
    wavenumber = -scipy.fft.fftfreq(n_d, dd)
    order = np.argsort(wavenumber, kind="stable")
    wavenumber, power = wavenumber[order], power[:, order]
    freq = scipy.fft.rfftfreq(n_t, dt)
    variance = float(power.sum())
    if not variance > 1e-24 * float(np.mean(data ** 2)):
        raise RecordError(
            "The Hovmöller field has no variability to analyse",
            where=f"field of shape {data.shape}",
            todo="Check that the sampled variable is not constant or all zero",
        )
    positive, negative = _direction_masks(freq, wavenumber, n_d, dd)
    return KWSpectrum(freq=freq, wavenumber=wavenumber, power=power, variance=variance,
                      positive_energy=float(power[positive].sum()),
                      negative_energy=float(power[negative].sum()),
                      distance_slice=used, dt=float(dt), dd=float(dd))


def _direction_masks(freq: np.ndarray, wavenumber: np.ndarray, n_d: int,
                     dd: float) -> tuple[np.ndarray, np.ndarray]:
    directional = np.abs(wavenumber) > 0
    if n_d % 2 == 0:
        directional &= ~np.isclose(np.abs(wavenumber), 0.5 / dd)
    moving = freq[:, None] > 0
    return (moving & directional & (wavenumber > 0)[None, :],
            moving & directional & (wavenumber < 0)[None, :])


def centroid_speed(spectrum: KWSpectrum, direction: int) -> float:
    r"""Phase speed of the power-weighted spectral centroid in one propagation direction.

    .. math::

        c = \frac{\sum P\, f}{\sum P\, k}

    over the spectral peak travelling in ``direction`` (``f > 0`` and
    ``sign(k) = direction``). The peak is the set of bins whose power exceeds the
    ``PEAK_QUANTILE`` (99.9 %) quantile of the background, the background being
    exponentially distributed bin power (chi-square with 2 degrees of freedom) with
    mean ``median / ln 2`` of all directional bins; if no bin exceeds it, every bin of
    that direction counts. Without this selection a broadband background pulls the
    centroid toward the middle of the quadrant. The ratio of the centroid's coordinates
    is used instead of the mean of ``f/k`` because taper leakage spreads a single wave
    over neighbouring bins symmetrically in ``(f, k)``; the centroid of that spread
    stays on the wave, while ``f/k`` averaged over it is biased toward high speeds by
    the bins of small ``|k|``.

    Parameters
    ----------
    spectrum : KWSpectrum
    direction : int
        +1 (toward +d) or -1 (toward -d).

    Returns
    -------
    float
        Speed in distance units per time unit, with the sign of ``direction``; NaN when
        there is no power in that direction.
    """
    return _centroid(spectrum.power, spectrum.freq, spectrum.wavenumber, spectrum.dd,
                     direction)


def _centroid(power: np.ndarray, freq: np.ndarray, wavenumber: np.ndarray, dd: float,
              direction: int) -> float:
    positive, negative = _direction_masks(freq, wavenumber, wavenumber.size, dd)
    background = np.median(power[positive | negative]) / np.log(2.0)
    chosen = positive if direction > 0 else negative
    peak = chosen & (power > -np.log(1.0 - PEAK_QUANTILE) * background)
    weights = np.where(peak if peak.any() else chosen, power, 0.0)
    total_k = np.sum(weights * wavenumber[None, :])
    if total_k == 0:
        return float("nan")
    return float(np.sum(weights * freq[:, None]) / total_k)


@compiled(parallel=True)
def _radon_energies(values, n_t, n_d, cos_t, sin_t, out):  # pragma: no cover - compiled
    """Projection energy of a (n_t, n_d) image (flattened) at each angle, into ``out``.

    Each pixel (t, d) lies at r = d cos(theta) - t sin(theta) from the image's lowest r;
    it is shared linearly between bins floor(r) and floor(r) + 1 (see :func:`radon_speed`).
    """
    for a in numba.prange(cos_t.shape[0]):
        c = cos_t[a]
        s = sin_t[a]
        # r is monotone in d and in t, in floating point too (a product by a constant and
        # a difference are monotone in each argument), so its extremes over the image lie
        # at the corners.
        low_r = np.inf
        high_r = -np.inf
        for t in (0, n_t - 1):
            for d in (0, n_d - 1):
                r = c * float(d) - s * float(t)
                low_r = min(low_r, r)
                high_r = max(high_r, r)
        size = int(high_r - low_r) + 2
        sums_low = np.zeros(size)
        sums_up = np.zeros(size)
        weights_low = np.zeros(size)
        weights_up = np.zeros(size)
        k = 0
        for t in range(n_t):
            for d in range(n_d):
                r = (c * float(d) - s * float(t)) - low_r
                b = int(r)
                up = r - b
                w = 1.0 - up
                x = values[k]
                sums_low[b] += x * w
                sums_up[b + 1] += x * up
                weights_low[b] += w
                weights_up[b + 1] += up
                k += 1
        num = 0.0
        den = 0.0
        for b in range(size):
            p = sums_low[b] + sums_up[b]
            q = weights_low[b] + weights_up[b]
            num += p * p
            den += q * q
        out[a] = num / den


def radon_speed(field: np.ndarray, dt: float, dd: float,
                direction: Direction = "dominant") -> float:
    r"""Phase speed from the Radon transform of the Hovmöller diagram.

    The detrended field is treated as an image with one pixel per sample (``n`` along
    time, ``m`` along distance) and summed along straight lines at angle ``theta``,
    :math:`r = m\cos\theta - n\sin\theta` = const (bins one pixel wide, each sample
    shared linearly between its two nearest bins). The projection energy, normalised by
    the squared sample weights of the lines,

    .. math::

        E(\theta) = \frac{\sum_r p_r^2}{\sum_r w_r^2},

    is the mean squared amplitude of the part of the field that is coherent along the
    lines, so it peaks where the lines follow crests and troughs, with no preference
    for long or short lines. The angle of the maximum (a 1° scan over the allowed
    directions, a 0.1° scan around the best, then a bounded one-dimensional refinement)
    gives :math:`c = \tan\theta\, \delta d/\delta t`.

    Parameters
    ----------
    field : array_like, shape (time, distance)
    dt, dd : float
        Time and distance steps.
    direction : {"dominant", "positive", "negative"}
        Search all angles, or only those travelling toward +d or toward -d.

    Returns
    -------
    float
        Speed in distance units per time unit (+ = toward +d).

    Notes
    -----
    Exact for plane waves and for features that keep their shape. For features whose
    amplitude grows and decays while they move (real eddies), the maximum follows the
    long axis of their elongated blobs in the pixel metric rather than their
    track, which biased the speed by about +5 % in tests with eddies living 1-3 times
    their crossing time of the section. Angles in pixel units make the angular width of
    the peak independent of the record length.
    """
    data, _ = _complete_block(field)
    n_t, n_d = data.shape
    detrended = np.ascontiguousarray(detrend_time(data), dtype=np.float64).ravel()

    def energies(thetas: np.ndarray) -> np.ndarray:
        thetas = np.atleast_1d(np.asarray(thetas, dtype=float))
        out = np.empty(thetas.size)
        _radon_energies(detrended, n_t, n_d, np.cos(thetas), np.sin(thetas), out)
        return out

    def energy(theta: float) -> float:
        return float(energies(np.array([theta]))[0])

    low_deg, high_deg = {"dominant": (-89.5, 89.5), "positive": (0.25, 89.5),
                         "negative": (-89.5, -0.25)}[direction]
    coarse = np.deg2rad(np.arange(low_deg, high_deg + 1e-9, 1.0))
    coarse_energy = energies(coarse)
    best = coarse[int(np.argmax(coarse_energy))]
    fine = np.clip(best + np.deg2rad(np.arange(-1.0, 1.01, 0.1)), coarse[0], coarse[-1])
    fine_energy = energies(fine)
    best = fine[int(np.argmax(fine_energy))]
    step = np.deg2rad(0.1)
    from scipy.optimize import minimize_scalar  # here: 0.05-0.1 s off every start-up
    refined = minimize_scalar(lambda a: -energy(a), method="bounded",
                              bounds=(max(best - step, coarse[0]), min(best + step, coarse[-1])),
                              options={"xatol": 1e-7})
    theta = float(refined.x) if -refined.fun >= fine_energy.max() else float(best)
    return float(np.tan(theta) * dd / dt)


def propagation_speed(field: np.ndarray, dt: float, dd: float,
                      direction: Direction = "dominant", taper: bool = True,
                      n_segments: int = 4, level: float = 0.95) -> SpeedEstimate:
    """Dominant phase speed along the line, by Radon transform with a spectral cross-check.

    The direction is the one carrying more energy in the :func:`wavenumber_frequency`
    spectrum (``direction="dominant"``) or the one requested. The reported ``speed`` is
    :func:`radon_speed` of the whole record searched in that direction;
    ``spectral_speed`` is :func:`centroid_speed` of the same record's spectrum.

    Uncertainty: the record is cut into ``n_segments`` equal time segments and
    :func:`radon_speed` is computed on each; the interval is
    ``speed -/+ t_{(1+level)/2, K-1} * s_K / sqrt(K)``, with ``s_K`` the standard
    deviation of the ``K`` segment estimates (the spread between parts of the record,
    scaled to the whole record).

    Parameters
    ----------
    field : array_like, shape (time, distance)
    dt, dd : float
        Time and distance steps.
    direction : {"dominant", "positive", "negative"}
    taper : bool
        Hann taper in the spectrum.
    n_segments : int
        Number of time segments for the interval (at least 2; each needs 8 steps).
    level : float
        Confidence level of the interval.

    Returns
    -------
    SpeedEstimate

    Raises
    ------
    RecordError
        If the record is too short for the segments, or no energy travels in the
        requested direction.
    """
    data, _ = _complete_block(field)
    spectrum = wavenumber_frequency(data, dt, dd, taper=taper)
    if direction == "dominant":
        sign = 1 if spectrum.positive_energy >= spectrum.negative_energy else -1
    else:
        sign = 1 if direction == "positive" else -1
    spectral = centroid_speed(spectrum, sign)
    if not np.isfinite(spectral):
        raise RecordError(
            "No energy travels in the requested direction along this line",
            where=f"direction {'+d' if sign > 0 else '-d'}, field of shape {data.shape}",
            todo="Use direction='dominant' or check the orientation of the line",
        )
    n_t = data.shape[0]
    segment = n_t // n_segments if n_segments >= 2 else 0
    if segment < 8:
        raise RecordError(
            "The record is too short to estimate the uncertainty of the propagation speed",
            where=f"{n_t} time steps in {n_segments} segments",
            todo="Use a longer record or fewer segments (at least 2 segments of 8 steps)",
        )
    searched: Direction = "positive" if sign > 0 else "negative"
    speed = radon_speed(data, dt, dd, direction=searched)
    parts = np.array([radon_speed(data[i * segment:(i + 1) * segment], dt, dd,
                                  direction=searched) for i in range(n_segments)])
    import scipy.stats  # only the interval needs it (half a second to import)

    half = float(scipy.stats.t.ppf(0.5 * (1.0 + level), n_segments - 1)
                 * np.std(parts, ddof=1) / np.sqrt(n_segments))
    return SpeedEstimate(speed=speed, speed_lo=speed - half, speed_hi=speed + half,
                         spectral_speed=spectral, direction=sign, n_segments=n_segments,
                         level=level)


def beta_parameter(lat_deg: np.ndarray | float) -> np.ndarray | float:
    r"""Meridional gradient of the Coriolis parameter on the sphere.

    .. math:: \beta = \frac{2\Omega\cos\varphi}{a},

    with :math:`\Omega = 7.2921\times10^{-5}` s-1 and :math:`a = 6.371\times10^6` m
    (Gill 1982, §7; Vallis 2017, §2).

    Parameters
    ----------
    lat_deg : float or array_like
        Latitude (degrees north).

    Returns
    -------
    float or ndarray
        beta in m-1 s-1.
    """
    return 2.0 * OMEGA_EARTH * np.cos(np.deg2rad(lat_deg)) / EARTH_RADIUS_M


def long_rossby_speed(beta: np.ndarray | float, ld_m: np.ndarray | float) -> np.ndarray | float:
    r"""Westward phase speed of long baroclinic Rossby waves, as a positive number.

    The long-wave limit of the Rossby-wave dispersion relation gives the zonal phase
    (and group) velocity :math:`c = -\beta L_d^2` (Gill 1982, §12.4; Vallis 2017, §6);
    this function returns the westward speed :math:`\beta L_d^2 > 0`.

    Parameters
    ----------
    beta : float or array_like
        Meridional gradient of the Coriolis parameter (m-1 s-1).
    ld_m : float or array_like
        Deformation radius of the mode (m).

    Returns
    -------
    float or ndarray
        Westward speed (m s-1), positive.
    """
    return np.abs(beta) * np.asarray(ld_m, dtype=float) ** 2


def deformation_radius_wkb(n_buoyancy: np.ndarray, z: np.ndarray,
                           f: np.ndarray | float) -> np.ndarray | float:
    r"""First baroclinic deformation radius from a stratification profile (WKB).

    .. math:: L_d = \frac{1}{|f|\,\pi}\int_{-H}^{0} N(z)\,dz,

    the WKB approximation of the first baroclinic mode over a flat bottom (Gill 1982,
    §6.11; Vallis 2017, §6; Cushman-Roisin & Beckers 2011, §16). For constant ``N`` it
    is exact: :math:`L_d = N H/(\pi |f|)`.

    Parameters
    ----------
    n_buoyancy : array_like, shape (..., nz)
        Buoyancy frequency N (s-1); non-finite values (below the bottom) are ignored.
    z : array_like, shape (nz,)
        Heights or depths of the levels (m), in either order and sign convention.
    f : float or array_like, shape (...)
        Coriolis parameter (s-1).

    Returns
    -------
    float or ndarray
        L_d in metres.
    """
    buoyancy = np.asarray(n_buoyancy, dtype=float)
    levels = np.asarray(z, dtype=float)
    valid = np.isfinite(buoyancy)
    filled = np.where(valid, buoyancy, 0.0)
    layer = np.abs(np.diff(levels))
    both = valid[..., 1:] & valid[..., :-1]
    integral = np.sum(np.where(both, 0.5 * (filled[..., 1:] + filled[..., :-1]) * layer, 0.0),
                      axis=-1)
    return integral / (np.abs(f) * np.pi)


def default_deformation_radius_km(lat_deg: np.ndarray | float) -> np.ndarray | float:
    r"""Rough first baroclinic deformation radius from latitude alone (an approximation).

    .. math::

        L_d \approx \min\left(\frac{c_1}{|f|},\ \sqrt{\frac{c_1}{\beta}}\right),
        \qquad c_1 = 2.5\ \mathrm{m\,s^{-1}},

    i.e. the mid-latitude radius :math:`c_1/|f|` (Gill 1982, §7.5) with a typical
    first-mode gravity-wave speed, capped near the equator by the equatorial radius
    :math:`(c_1/\beta)^{1/2}` (Gill 1982, §11.4). The true ``c_1`` varies from under
    1 m s-1 in weakly stratified high latitudes to about 3 m s-1 in the tropics, so this
    is only an order-of-magnitude default; give ``signals.deformation_radius_km`` or a
    stratification profile (:func:`deformation_radius_wkb`) for quantitative work.

    Parameters
    ----------
    lat_deg : float or array_like
        Latitude (degrees north).

    Returns
    -------
    float or ndarray
        L_d in km.
    """
    f = 2.0 * OMEGA_EARTH * np.abs(np.sin(np.deg2rad(lat_deg)))
    beta = beta_parameter(lat_deg)
    equatorial = np.sqrt(FIRST_MODE_SPEED_M_S / beta)
    with np.errstate(divide="ignore"):
        midlatitude = np.where(f > 0, FIRST_MODE_SPEED_M_S / np.where(f > 0, f, 1.0), np.inf)
    return np.minimum(midlatitude, equatorial) / 1000.0
