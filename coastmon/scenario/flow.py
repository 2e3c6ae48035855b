"""Analytic flow pieces of a scenario: Gaussian eddies, a coastal current, Rossby waves.

Every piece is defined by a streamfunction :math:`\\psi` (m2 s-1) and its non-divergent
velocity on the sphere,

.. math:: u = -\\frac{1}{a}\\frac{\\partial\\psi}{\\partial\\phi}, \\qquad
          v = \\frac{1}{a\\cos\\phi}\\frac{\\partial\\psi}{\\partial\\lambda},

so that sea surface height in geostrophic balance is :math:`\\eta = f\\psi/g`
(Gill 1982, section 7.6; Vallis 2017, section 2.8.4), up to the small
:math:`\\beta\\psi/f` term of a latitude-dependent f. Functions are pure: arrays in,
arrays out, angles in degrees, lengths in metres, times in seconds.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from coastmon.scenario.geography import (
    EARTH_RADIUS_M,
    coast_lon,
    coast_lon_slope,
    offshore_distance_km,
)
from coastmon.scenario.params import ScenarioParams

OMEGA_EARTH = 7.2921e-5
"""Rotation rate of the Earth (rad s-1)."""


def coriolis_parameter(lat: ArrayLike) -> NDArray[np.float64]:
    """Coriolis parameter f = 2 Omega sin(lat) (s-1) (Gill 1982, eq. 4.5.7)."""
    return 2.0 * OMEGA_EARTH * np.sin(np.radians(np.asarray(lat, dtype=float)))


def gaussian_eddy(
    lon: ArrayLike, lat: ArrayLike, lon0: float, lat0: float, psi0_m2_s: float, radius_m: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Streamfunction and velocity of a Gaussian eddy centred at (lon0, lat0).

    .. math:: \\psi = \\psi_0 \\exp(-r^2/R^2), \\quad u = -\\partial_y\\psi = \\frac{2y}{R^2}\\psi,
              \\quad v = \\partial_x\\psi = -\\frac{2x}{R^2}\\psi

    with :math:`x = a\\cos\\phi_0\\,(\\lambda-\\lambda_0)`, :math:`y = a(\\phi-\\phi_0)` on the
    plane tangent at the centre and :math:`v` scaled by :math:`\\cos\\phi_0/\\cos\\phi` so the
    flow is non-divergent on the sphere. The relative vorticity is
    :math:`\\nabla^2\\psi = \\psi_0 (4r^2/R^4 - 4/R^2) e^{-r^2/R^2}`: with :math:`\\psi_0 > 0`
    the core spins clockwise (anticyclone in the northern hemisphere). Gaussian eddies as in
    Cushman-Roisin & Beckers (2011), chapter 16.

    Parameters
    ----------
    lon, lat : array_like
        Points (degrees), broadcast together.
    lon0, lat0 : float
        Centre (degrees).
    psi0_m2_s : float
        Signed amplitude (m2 s-1).
    radius_m : float
        Gaussian radius R (m).

    Returns
    -------
    psi, u, v : ndarray
        Streamfunction (m2 s-1) and eastward, northward velocity (m s-1).
    """
    lon, lat = np.broadcast_arrays(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    cos0 = np.cos(np.radians(lat0))
    x = EARTH_RADIUS_M * cos0 * np.radians(lon - lon0)
    y = EARTH_RADIUS_M * np.radians(lat - lat0)
    psi = psi0_m2_s * np.exp(-(x**2 + y**2) / radius_m**2)
    u = 2.0 * y / radius_m**2 * psi
    v = -2.0 * x / radius_m**2 * psi * (cos0 / np.cos(np.radians(lat)))
    return psi, u, v


def amplitude_factor(age_s: ArrayLike, growth_s: float, decay_s: float) -> NDArray[np.float64]:
    """Amplitude of an eddy of age t relative to full strength: (1 - e^{-t/T_g}) e^{-t/T_d}."""
    age = np.asarray(age_s, dtype=float)
    return np.where(age >= 0.0, -np.expm1(-np.maximum(age, 0.0) / growth_s) * np.exp(-age / decay_s), 0.0)


def standing_oscillation(
    lon: ArrayLike, lat: ArrayLike, time_s: float, lon0: float, lat0: float, psi0_m2_s: float,
    halfwidth_m: float, wavenumber_per_m: float, omega_per_s: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """A pattern pulsating in place: :math:`\\psi = \\psi_0 e^{-y^2/W^2}\\cos(kx)\\cos(\\omega t)`.

    x, y are on the plane tangent at (lon0, lat0) and v is scaled by
    :math:`\\cos\\phi_0/\\cos\\phi` as in :func:`gaussian_eddy`. Since
    :math:`\\cos(kx)\\cos(\\omega t) = \\tfrac12[\\cos(kx-\\omega t) + \\cos(kx+\\omega t)]`
    it is two equal waves running west and east: its energy density only changes in place
    and no energy crosses any meridian (zero planted feed).
    """
    lon, lat = np.broadcast_arrays(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    cos0 = np.cos(np.radians(lat0))
    x = EARTH_RADIUS_M * cos0 * np.radians(lon - lon0)
    y = EARTH_RADIUS_M * np.radians(lat - lat0)
    envelope = psi0_m2_s * np.exp(-(y**2) / halfwidth_m**2) * np.cos(omega_per_s * time_s)
    psi = envelope * np.cos(wavenumber_per_m * x)
    u = 2.0 * y / halfwidth_m**2 * psi
    v = -wavenumber_per_m * envelope * np.sin(wavenumber_per_m * x) * (cos0 / np.cos(np.radians(lat)))
    return psi, u, v


def eddy_track(
    lon_b: float, lat_b: float, age_s: ArrayLike, offshore_speed_m_s: float,
    north_drift_m_s: float, side: int,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Centre of an eddy born at (lon_b, lat_b) after ``age_s`` seconds.

    The centre moves at ``offshore_speed_m_s`` along the local parallel (westward when
    ``side = +1``) and at ``north_drift_m_s`` northward. With
    :math:`d\\phi/dt = w/a` and :math:`d\\lambda/dt = -s c/(a\\cos\\phi)`,

    .. math:: \\lambda(t) = \\lambda_b - s\\frac{c}{w}\\left[G(\\phi) - G(\\phi_b)\\right],
              \\quad G(\\phi) = \\ln(\\sec\\phi + \\tan\\phi),

    and :math:`\\lambda = \\lambda_b - s c t/(a\\cos\\phi_b)` when w = 0.
    """
    age = np.asarray(age_s, dtype=float)
    lat = lat_b + np.degrees(north_drift_m_s * age / EARTH_RADIUS_M)
    if north_drift_m_s == 0.0:
        dlon = offshore_speed_m_s * age / (EARTH_RADIUS_M * np.cos(np.radians(lat_b)))
    else:
        phi, phi_b = np.radians(lat), np.radians(lat_b)
        gd = np.log(1.0 / np.cos(phi) + np.tan(phi)) - np.log(1.0 / np.cos(phi_b) + np.tan(phi_b))
        dlon = offshore_speed_m_s / north_drift_m_s * gd
    return lon_b - side * np.degrees(dlon), lat


def boundary_current(
    lon: ArrayLike, lat: ArrayLike, params: ScenarioParams,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Mean coastal current that follows the coast and decays offshore.

    .. math:: \\psi = -s V L (1 - e^{-d/L}), \\qquad d = \\text{offshore distance (m)},

    so the speed along the lines of constant d is :math:`V e^{-d/L}`, with v = V at the coast
    for a meridional coast (V = ``current_northward_m_s``, L = ``current_width_km``). The
    velocity is the analytic gradient, :math:`u = -\\psi'(d)\\partial_y d`,
    :math:`v = \\psi'(d)\\partial_x d`. Land points (d < 0) get the values at d = 0.
    """
    lon, lat = np.broadcast_arrays(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    s = params.side
    width_m = params.current_width_km * 1000.0
    d_m = np.maximum(offshore_distance_km(lon, lat, params), 0.0) * 1000.0
    decay = np.exp(-d_m / width_m)
    psi = -s * params.current_northward_m_s * width_m * (1.0 - decay)
    dpsi_dd = -s * params.current_northward_m_s * decay
    phi = np.radians(lat)
    ddx = -float(s)
    ddy = s * (coast_lon_slope(lat, params) * np.cos(phi)
               - (coast_lon(lat, params) - lon) * np.sin(phi) * np.radians(1.0))
    return psi, -dpsi_dd * ddy, dpsi_dd * ddx


def rossby_waves(
    lon: ArrayLike, lat: ArrayLike, time_s: ArrayLike, waves: NDArray[np.float64],
    lon_ref: float, lat_ref: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Sum of plane waves :math:`\\psi = \\sum_j A_j\\cos(k_j x + l_j y - \\omega_j t + \\theta_j)`.

    ``waves`` has one row (A, k, l, omega, theta) per wave, in m2 s-1, m-1, m-1, s-1, rad;
    x, y are on the plane tangent at (lon_ref, lat_ref) and v is scaled by
    :math:`\\cos\\phi_{ref}/\\cos\\phi` as in :func:`gaussian_eddy`. A westward phase speed c
    means :math:`\\omega = -c k` (long Rossby waves, Gill 1982, section 12.4). ``time_s`` may be
    a scalar or a 1-D array of times; the outputs then have a leading time axis.
    """
    lon, lat = np.broadcast_arrays(np.asarray(lon, dtype=float), np.asarray(lat, dtype=float))
    times = np.asarray(time_s, dtype=float)
    t = times.reshape(times.shape + (1,) * lon.ndim)
    cos_ref = np.cos(np.radians(lat_ref))
    x = EARTH_RADIUS_M * cos_ref * np.radians(lon - lon_ref)
    y = EARTH_RADIUS_M * np.radians(lat - lat_ref)
    shape = times.shape + lon.shape
    psi = np.zeros(shape)
    u = np.zeros(shape)
    v = np.zeros(shape)
    for amp, k, l_wn, omega, theta in waves:
        space = k * x + l_wn * y + theta
        cos_s, sin_s = np.cos(space), np.sin(space)
        cos_t, sin_t = np.cos(omega * t), np.sin(omega * t)
        cos_p = cos_s * cos_t + sin_s * sin_t
        sin_p = sin_s * cos_t - cos_s * sin_t
        psi += amp * cos_p
        u += amp * l_wn * sin_p
        v -= amp * k * sin_p
    return psi, u, v * (cos_ref / np.cos(np.radians(lat)))
