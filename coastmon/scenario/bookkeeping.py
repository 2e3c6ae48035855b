"""Planted truth of the offshore feed, by bookkeeping of the planted eddies' own fields.

The feed coastmon estimates is the net westward flux of eddy energy across a meridional
gate west of a source. The generator knows every eddy it planted: its centre, amplitude,
radius and translation velocity at every time. This module evaluates the exact analytic
fields of one source's eddies (:func:`coastmon.scenario.flow.gaussian_eddy`, summed) on
the gate meridian at every time step of the record and integrates the energy that
crosses it. Nothing here uses a measured speed, a wavenumber–frequency split or any
other part of the estimator under test.

Energy (per unit volume; per metre of depth when integrated over an area) is that of the
equivalent-barotropic (1.5-layer, reduced-gravity) quasi-geostrophic model, with the
streamfunction :math:`\\psi = g\\eta/f` of the surface geostrophic flow,

.. math:: e = \\rho_0\\left[\\tfrac12\\left(u^2+v^2\\right) + \\frac{\\psi^2}{2L_d^2}\\right]

(Vallis 2017, section 5.4 and 6.1; Cushman-Roisin & Beckers 2011, chapter 16; Gill 1982,
section 12.4): the second term is the available potential energy
:math:`\\tfrac12\\rho_0 g' h'^2/H` of the interface displacement :math:`h' = -(g/g')\\eta`
per metre of the upper layer :math:`H`, with :math:`L_d^2 = g'H/f^2`.

Every planted eddy moves along its parallel at the same offshore speed ``c`` (westward off
an eastern boundary) while it drifts meridionally and grows or decays. Each source's field
is therefore a pattern that moves zonally at ``c``, so the energy it carries across a
meridian per unit time is exactly the kinematic flux

.. math:: F(t) = s\\,c \\int e(x_g, y, t)\\,dy,

(s = +1 westward off an eastern boundary), the zonal part of the translation velocity
times the energy on the line: the meridional drift carries nothing across a meridian.
The record mean of ``F`` is a power per metre of depth (W m-1), the unit of
``feed_w_per_m``. Integrated over the whole record, ``F`` counts the energy of
each eddy that crosses the meridian: for one eddy of constant amplitude it is exactly the
Gaussian-eddy energy :math:`\\tfrac12\\rho_0\\pi\\psi_0^2(1 + R^2/2L_d^2)`
(:func:`gaussian_eddy_total_energy`), the check in ``tests/test_feed_validation.py``.

The eddy band. coastmon counts only energy in ``signals.eddy_period_days``. The truth
does the same: the exact gate series of u, v and psi are made anomalies about their record
mean, Fourier transformed in time, and only periods within the band are kept; since the
whole pattern moves at ``c``, every frequency band's energy crosses at ``c`` too.

Besides the feed this module integrates two fluxes of the same exact fields across the
gate: the geostrophic pressure work :math:`\\langle u'p'\\rangle` with
:math:`p' = \\rho_0 g \\eta' = \\rho_0 f \\psi'`, and the advective flux
:math:`\\langle u' k'\\rangle` with :math:`k' = \\tfrac12\\rho_0(u'^2+v'^2)`. For a
geostrophic eddy :math:`u p = -\\rho_0 f \\partial_y(\\psi^2/2)`, a nearly rotational flux:
across a whole meridian it integrates to :math:`+\\tfrac12\\rho_0\\beta\\int\\psi^2dy`
(eastward), across a finite gate it picks up the end values
:math:`-[\\rho_0 f\\psi^2/2]`, which are large where eddies pass the gate's ends. These
numbers are planted for comparison with the estimator's direct cross-check.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from coastmon.scenario.flow import amplitude_factor, coriolis_parameter, eddy_track, gaussian_eddy
from coastmon.scenario.geography import EARTH_RADIUS_M, KM_PER_DEG, land_mask
from coastmon.scenario.params import ScenarioParams

SECONDS_PER_DAY = 86400.0
LINE_STEP_DEG = 0.02
"""Latitude step of the gate line on which the exact fields are evaluated (degrees)."""
REACH_RADII = 5.0
"""An eddy is evaluated on the line while its centre is within this many radii of it."""


def energy_density(u: ArrayLike, v: ArrayLike, psi: ArrayLike, ld_m: float,
                   rho0: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Kinetic and potential energy density of a surface geostrophic flow (J m-3).

    .. math:: e_k = \\tfrac12\\rho_0(u^2+v^2), \\qquad e_p = \\rho_0\\frac{\\psi^2}{2L_d^2},

    the quasi-geostrophic energy of the equivalent-barotropic mode (Vallis 2017, section
    5.4; Cushman-Roisin & Beckers 2011, chapter 16), per metre of depth.
    """
    u, v, psi = (np.asarray(a, dtype=float) for a in (u, v, psi))
    return 0.5 * rho0 * (u**2 + v**2), 0.5 * rho0 * psi**2 / ld_m**2


def gaussian_eddy_total_energy(psi0_m2_s: ArrayLike, radius_m: ArrayLike, ld_m: float,
                               rho0: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Kinetic and potential energy of a Gaussian eddy per metre of depth (J m-1).

    For :math:`\\psi = \\psi_0 e^{-r^2/R^2}`:
    :math:`E_k = \\rho_0\\iint\\tfrac12|\\nabla\\psi|^2 dA = \\tfrac12\\rho_0\\pi\\psi_0^2`
    (:math:`|\\nabla\\psi|^2 = 4\\psi_0^2 r^2 R^{-4} e^{-2r^2/R^2}`, whose integral over the
    plane is :math:`\\pi\\psi_0^2`, independent of R) and
    :math:`E_p = \\rho_0\\iint\\psi^2/(2L_d^2)\\,dA = \\rho_0\\pi\\psi_0^2R^2/(4L_d^2)`
    (:math:`\\int_0^\\infty e^{-2r^2/R^2}2\\pi r\\,dr = \\pi R^2/2`), so
    :math:`E_p/E_k = R^2/(2L_d^2)`.
    """
    psi0 = np.asarray(psi0_m2_s, dtype=float)
    radius = np.asarray(radius_m, dtype=float)
    return 0.5 * rho0 * np.pi * psi0**2, rho0 * np.pi * psi0**2 * radius**2 / (4.0 * ld_m**2)


def band_pass(series: NDArray[np.float64], dt_days: float,
              band_days: tuple[float, float]) -> NDArray[np.float64]:
    """Anomaly about the time mean of ``series[time, ...]`` keeping periods within the band.

    A Fourier transform in time over the record; coefficients at periods outside
    ``[band_days[0], band_days[1]]`` (and the mean) are set to zero.
    """
    n = series.shape[0]
    spec = np.fft.rfft(series - series.mean(axis=0), axis=0)
    freq = np.fft.rfftfreq(n, d=dt_days)
    with np.errstate(divide="ignore"):
        period = np.where(freq > 0, 1.0 / np.where(freq > 0, freq, 1.0), np.inf)
    keep = (period >= band_days[0]) & (period <= band_days[1])
    spec[~keep] = 0.0
    return np.fft.irfft(spec, n=n, axis=0)


@dataclass(frozen=True)
class GateFlux:
    """Record-mean fluxes of one source's eddies across one meridian (W per m of depth).

    Positive westward. ``*_gate`` values integrate only over ``gate_lat`` (the estimator's
    gate around the source); the others over the whole meridian inside the grid.
    """

    gate_lon: float
    gate_lat: tuple[float, float]
    crossing_w_per_m: float
    """Energy (kinetic + potential, all periods, no anomaly) crossing per unit time."""
    crossing_ke_w_per_m: float
    band_w_per_m: float
    """Eddy-band anomaly energy (kinetic + potential) crossing per unit time: the feed."""
    band_ke_w_per_m: float
    band_pe_w_per_m: float
    band_gate_w_per_m: float
    pressure_work_w_per_m: float
    pressure_work_gate_w_per_m: float
    advective_w_per_m: float
    advective_gate_w_per_m: float


def source_fields_on_line(births: list, params: ScenarioParams, gate_lon: float,
                           line_lat: NDArray[np.float64], times_days: NDArray[np.float64]
                           ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Exact psi, u, v (time, line) of the given eddies on the meridian ``gate_lon``.

    Each eddy is alive from its birth until ``end_days`` (as in the generated file) and is
    evaluated while its centre is within ``REACH_RADII`` radii of the line.
    """
    growth_s = params.growth_days * SECONDS_PER_DAY
    decay_s = params.decay_days * SECONDS_PER_DAY
    shape = (times_days.size, line_lat.size)
    psi, u, v = np.zeros(shape), np.zeros(shape), np.zeros(shape)
    for b in births:
        alive = (times_days >= b.time_days) & (times_days < np.ceil(b.end_days))
        if not alive.any():
            continue
        steps = np.flatnonzero(alive)
        age_s = (times_days[steps] - b.time_days) * SECONDS_PER_DAY
        poleward = np.sign(b.lat) * params.meridional_drift_m_s
        north = poleward if b.cyclone else -poleward
        clon, clat = eddy_track(b.lon, b.lat, age_s, params.offshore_speed_m_s, north,
                                params.side)
        radius_m = b.radius_km * 1000.0
        dx_km = np.abs(clon - gate_lon) * KM_PER_DEG * np.cos(np.radians(clat))
        near = dx_km <= REACH_RADII * b.radius_km
        if not near.any():
            continue
        steps, age_s, clon, clat = steps[near], age_s[near], clon[near], clat[near]
        amp = b.psi0_m2_s * amplitude_factor(age_s, growth_s, decay_s)
        pe, ue, ve = gaussian_eddy(gate_lon, line_lat[None, :], clon[:, None], clat[:, None],
                                   amp[:, None], radius_m)
        psi[steps] += pe
        u[steps] += ue
        v[steps] += ve
    return psi, u, v


def source_gate_flux(births: list, params: ScenarioParams, gate_lon: float,
                     gate_lat: tuple[float, float]) -> GateFlux:
    """Record-mean westward fluxes of one source's planted eddies across ``gate_lon``.

    See the module docstring for the definitions. ``births`` are the source's
    :class:`coastmon.scenario.generate.Birth` records; the record is the file's daily
    steps ``0 .. n_days-1``.
    """
    times = np.arange(params.n_days, dtype=float)
    line_lat = np.arange(params.lat_min + 0.5 * LINE_STEP_DEG, params.lat_max, LINE_STEP_DEG)
    sea = land_mask(np.full(line_lat.shape, gate_lon), line_lat, params).astype(float)
    dy_m = EARTH_RADIUS_M * np.radians(LINE_STEP_DEG)
    in_gate = ((line_lat >= gate_lat[0]) & (line_lat <= gate_lat[1])).astype(float)
    psi, u, v = source_fields_on_line(births, params, gate_lon, line_lat, times)
    ld_m = params.deformation_radius_km * 1000.0
    rho0 = params.rho0
    west_c = params.side * params.offshore_speed_m_s

    def line_mean(density: NDArray[np.float64], weight: NDArray[np.float64]) -> float:
        """Record mean of the line integral of ``density`` (per m of gate) times ``weight``."""
        return float(np.sum(density.mean(axis=0) * sea * weight) * dy_m)

    ek, ep = energy_density(u, v, psi, ld_m, rho0)
    whole = np.ones_like(line_lat)
    bu, bv, bpsi = (band_pass(a, 1.0, params.eddy_period_days) for a in (u, v, psi))
    bk, bp = energy_density(bu, bv, bpsi, ld_m, rho0)
    au, av, apsi = (a - a.mean(axis=0) for a in (u, v, psi))
    pwork = -rho0 * coriolis_parameter(line_lat)[None, :] * apsi * au
    advect = -0.5 * rho0 * au * (au**2 + av**2)
    return GateFlux(
        gate_lon=float(gate_lon), gate_lat=(float(gate_lat[0]), float(gate_lat[1])),
        crossing_w_per_m=west_c * line_mean(ek + ep, whole),
        crossing_ke_w_per_m=west_c * line_mean(ek, whole),
        band_w_per_m=west_c * line_mean(bk + bp, whole),
        band_ke_w_per_m=west_c * line_mean(bk, whole),
        band_pe_w_per_m=west_c * line_mean(bp, whole),
        band_gate_w_per_m=west_c * line_mean(bk + bp, in_gate),
        pressure_work_w_per_m=line_mean(pwork, whole),
        pressure_work_gate_w_per_m=line_mean(pwork, in_gate),
        advective_w_per_m=line_mean(advect, whole),
        advective_gate_w_per_m=line_mean(advect, in_gate),
    )


def meridian_west_of(lon: float, lat: float, distance_km: float, side: int) -> float:
    """Longitude ``distance_km`` offshore (west for ``side = +1``) of (lon, lat) along its parallel."""
    return float(lon - side * distance_km / (KM_PER_DEG * np.cos(np.radians(lat))))
