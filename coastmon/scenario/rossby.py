"""Analytic linear Rossby waves off an invented coast, with their exact energy flux.

A steady train of one linear Rossby wave of the equivalent-barotropic (1.5-layer)
quasi-geostrophic equation on a beta-plane,

.. math:: \\partial_t\\left(\\nabla^2\\psi - \\psi/L_d^2\\right) + \\beta\\,\\partial_x\\psi = 0,
          \\qquad \\psi = A\\cos(kx + ly - \\omega t),

with the dispersion relation :math:`\\omega = -\\beta k/(k^2 + l^2 + L_d^{-2})` (Gill 1982,
chapter 12; Vallis 2017, chapter 6; Cushman-Roisin & Beckers 2011, chapter 18), is written
on a longitude/latitude grid beside a straight meridional coast with land to the east, as a
CF-1.8 NetCDF file that ``coastmon analyze`` reads: ``u = -psi_y``, ``v = psi_x`` and
``ssh = f psi / g``. The truth is the energy flux of the wave: its mean energy density
:math:`\\bar e = \\rho_0 A^2(k^2+l^2+L_d^{-2})/4` (kinetic plus potential, per metre of
depth) carried at the group velocity
:math:`c_{gx} = \\beta(k^2 - l^2 - L_d^{-2})/(k^2+l^2+L_d^{-2})^2`. For long waves
(:math:`k^2L_d^2 \\ll 1`) the group and phase velocities agree; for short ones they part,
and for :math:`k^2 > l^2 + L_d^{-2}` the energy runs east while the phase runs west.
:func:`qg_energy_flux_x` gives the same flux by a second route, from the fields themselves.

Everything is pure numpy; x and y are distances on the plane tangent at the reference
latitude, so the beta-plane solution is exact on the plane and the sphere enters only
through the longitude/latitude labels of the grid.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import netCDF4
import numpy as np
from numpy.typing import ArrayLike, NDArray

from coastmon.scenario.flow import OMEGA_EARTH, coriolis_parameter
from coastmon.scenario.geography import EARTH_RADIUS_M

SECONDS_PER_DAY = 86400.0
GRAVITY_M_S2 = 9.81


def beta_at(lat_deg: float) -> float:
    """beta = 2 Omega cos(lat) / a (m-1 s-1) (Gill 1982, section 12.1)."""
    return float(2.0 * OMEGA_EARTH * np.cos(np.radians(lat_deg)) / EARTH_RADIUS_M)


def rossby_frequency(k: ArrayLike, l_wn: ArrayLike, beta: float, ld_m: float) -> NDArray[np.float64]:
    """Frequency of a linear Rossby wave, :math:`\\omega = -\\beta k/(k^2+l^2+L_d^{-2})` (s-1).

    Gill 1982, chapter 12; Vallis 2017, chapter 6. Positive for westward phase (k < 0).
    """
    k, l_wn = np.asarray(k, dtype=float), np.asarray(l_wn, dtype=float)
    return -beta * k / (k**2 + l_wn**2 + ld_m**-2)


def rossby_zonal_wavenumber(omega: float, l_wn: float, beta: float, ld_m: float,
                            branch: Literal["long", "short"]) -> float:
    """Zonal wavenumber k (m-1, negative) of the wave of frequency ``omega`` > 0.

    The dispersion relation is a quadratic in k,
    :math:`\\omega k^2 + \\beta k + \\omega(l^2 + L_d^{-2}) = 0`, with the long-wave root
    (small |k|, energy west) and the short-wave root (large |k|, energy east). Raises
    ValueError above the highest frequency :math:`\\beta/(2\\sqrt{l^2+L_d^{-2}})`.
    """
    disc = beta**2 - 4.0 * omega**2 * (l_wn**2 + ld_m**-2)
    if disc < 0:
        raise ValueError(f"omega = {omega:.3g} s-1 is above the highest Rossby-wave frequency "
                         f"{beta / (2 * np.sqrt(l_wn**2 + ld_m**-2)):.3g} s-1")
    root = np.sqrt(disc)
    return float((-beta + root) / (2 * omega) if branch == "long" else (-beta - root) / (2 * omega))


def rossby_group_velocity(k: float, l_wn: float, beta: float, ld_m: float) -> tuple[float, float]:
    """Group velocity :math:`(\\partial\\omega/\\partial k, \\partial\\omega/\\partial l)` (m s-1).

    .. math:: c_{gx} = \\beta\\frac{k^2 - l^2 - L_d^{-2}}{(k^2+l^2+L_d^{-2})^2}, \\qquad
              c_{gy} = \\frac{2\\beta k l}{(k^2+l^2+L_d^{-2})^2}

    (Gill 1982, chapter 12; Vallis 2017, chapter 6).
    """
    kk = k**2 + l_wn**2 + ld_m**-2
    return float(beta * (k**2 - l_wn**2 - ld_m**-2) / kk**2), float(2 * beta * k * l_wn / kk**2)


def plane_wave_energy(amplitude_m2_s: float, k: float, l_wn: float, ld_m: float,
                      rho0: float) -> tuple[float, float]:
    """Time-mean kinetic and potential energy density of a plane wave (J m-3).

    For :math:`\\psi = A\\cos\\theta`: :math:`\\overline{e_k} = \\rho_0 A^2(k^2+l^2)/4` and
    :math:`\\overline{e_p} = \\rho_0 A^2/(4L_d^2)` (energy of the equivalent-barotropic
    mode, Vallis 2017, section 5.4; mean of cos^2 = 1/2).
    """
    return (rho0 * amplitude_m2_s**2 * (k**2 + l_wn**2) / 4.0,
            rho0 * amplitude_m2_s**2 / (4.0 * ld_m**2))


def qg_energy_flux_x(psi: ArrayLike, psi_xt: ArrayLike, beta: float, rho0: float) -> NDArray[np.float64]:
    """Zonal energy flux density of the quasi-geostrophic equation (W m-2 per m of depth).

    Multiplying the potential-vorticity equation by :math:`-\\psi` gives
    :math:`\\partial_t e + \\nabla\\cdot\\mathbf F = 0` with
    :math:`\\mathbf F = -\\rho_0(\\psi\\nabla\\psi_t + \\tfrac12\\beta\\psi^2\\hat{\\mathbf x})`
    (Vallis 2017, chapter 6; Gill 1982, chapter 12). Its time mean for a plane wave is
    :math:`c_{gx}\\,\\bar e`, the group-velocity flux, reached here without the group
    velocity.
    """
    psi = np.asarray(psi, dtype=float)
    return -rho0 * (psi * np.asarray(psi_xt, dtype=float) + 0.5 * beta * psi**2)


@dataclass(frozen=True)
class RossbyTrain:
    """One linear Rossby wave beside a straight meridional coast (land to the east)."""

    name: str = "rossby_train"
    lat0: float = 8.0
    """Reference latitude of the beta-plane (degrees north)."""
    lat_halfspan: float = 2.0
    """The grid spans lat0 +- this (degrees)."""
    coast_lon: float = -20.0
    """Longitude of the coast (degrees east); land to the east of it."""
    sea_width_km: float = 2600.0
    """Width of the sea west of the coast (km, at lat0)."""
    resolution_deg: float = 0.2
    """Grid spacing (degrees)."""
    n_days: int = 730
    """Daily steps."""
    ld_km: float = 120.0
    """Deformation radius of the mode (km)."""
    period_days: float = 730.0 / 8.0
    """Wave period (days); a whole number of periods in the record avoids spectral leakage."""
    l_per_km: float = 0.0
    """Meridional wavenumber l (rad km-1)."""
    amplitude_m2_s: float = 3000.0
    """Streamfunction amplitude A (m2 s-1)."""
    branch: Literal["long", "short"] = "long"
    """Long-wave root (energy west) or short-wave root (energy east) of the dispersion relation."""
    rho0: float = 1025.0

    @property
    def beta(self) -> float:
        return beta_at(self.lat0)

    @property
    def omega(self) -> float:
        return 2.0 * np.pi / (self.period_days * SECONDS_PER_DAY)

    @property
    def k(self) -> float:
        return rossby_zonal_wavenumber(self.omega, self.l_per_km / 1000.0, self.beta,
                                       self.ld_km * 1000.0, self.branch)

    def truth(self) -> dict:
        """Wavenumbers, speeds, energy and the westward energy flux per metre of gate."""
        ld_m, l_wn = self.ld_km * 1000.0, self.l_per_km / 1000.0
        k = self.k
        cgx, cgy = rossby_group_velocity(k, l_wn, self.beta, ld_m)
        ek, ep = plane_wave_energy(self.amplitude_m2_s, k, l_wn, ld_m, self.rho0)
        return {
            "k_per_m": k, "l_per_m": l_wn, "omega_per_s": self.omega, "beta": self.beta,
            "wavelength_km": 2 * np.pi / abs(k) / 1000.0, "kld": abs(k) * ld_m,
            "phase_speed_west_m_s": -self.omega / k, "group_speed_west_m_s": -cgx,
            "group_speed_north_m_s": cgy,
            "energy_ke_j_m3": ek, "energy_pe_j_m3": ep,
            "westward_flux_w_per_m2": -cgx * (ek + ep),
            "formula": "F = -c_gx (e_k + e_p) per m of gate and per m of depth, "
                       "c_gx = beta (k^2 - l^2 - Ld^-2) / (k^2 + l^2 + Ld^-2)^2, "
                       "e = rho0 A^2 (k^2 + l^2 + Ld^-2) / 4",
        }

    def grid(self) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.int8]]:
        """Longitudes, latitudes (cell centres) and the sea mask (1 sea, 0 land)."""
        width_deg = self.sea_width_km / (EARTH_RADIUS_M / 1000.0 * np.radians(1.0)
                                         * np.cos(np.radians(self.lat0)))
        lon_min = self.coast_lon - width_deg
        lon_max = self.coast_lon + 1.0
        nx = round((lon_max - lon_min) / self.resolution_deg)
        ny = round(2 * self.lat_halfspan / self.resolution_deg)
        lon = lon_min + self.resolution_deg * (np.arange(nx) + 0.5)
        lat = self.lat0 - self.lat_halfspan + self.resolution_deg * (np.arange(ny) + 0.5)
        mask = np.broadcast_to((lon < self.coast_lon)[None, :], (ny, nx)).astype(np.int8)
        return lon, lat, mask

    def fields(self, lon2: NDArray[np.float64], lat2: NDArray[np.float64], t_s: float
               ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """psi, u, v of the wave at time ``t_s`` on the points (tangent-plane x, y)."""
        x = EARTH_RADIUS_M * np.cos(np.radians(self.lat0)) * np.radians(lon2 - self.coast_lon)
        y = EARTH_RADIUS_M * np.radians(lat2 - self.lat0)
        k, l_wn = self.k, self.l_per_km / 1000.0
        phase = k * x + l_wn * y - self.omega * t_s
        psi = self.amplitude_m2_s * np.cos(phase)
        sin = np.sin(phase)
        return psi, self.amplitude_m2_s * l_wn * sin, -self.amplitude_m2_s * k * sin

    def write(self, out_dir: str | Path) -> Path:
        """Write ``<name>.nc`` (CF-1.8) in ``out_dir`` and return its path."""
        lon, lat, mask = self.grid()
        return write_cf_fields(Path(out_dir) / f"{self.name}.nc", lon, lat, mask, self.n_days,
                               self.fields,
                               title="Analytic linear Rossby-wave train beside an invented coast",
                               comment=f"{self.truth()['formula']}; ssh = f psi / g")


FieldFunction = Callable[[NDArray[np.float64], NDArray[np.float64], float],
                         tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]]


def write_cf_fields(path: str | Path, lon: NDArray[np.float64], lat: NDArray[np.float64],
                    mask: NDArray[np.int8], n_days: int, fields: FieldFunction, title: str,
                    comment: str, start_date: str = "2001-01-01") -> Path:
    """Write daily u, v, ssh = f psi/g from ``fields(lon2, lat2, t_s) -> (psi, u, v)``.

    A plain CF-1.8 file on (time, lat, lon), NaN on land, with the ``mask`` variable;
    written under a temporary name and moved into place.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    lon2, lat2 = np.meshgrid(lon, lat)
    f_over_g = coriolis_parameter(lat2) / GRAVITY_M_S2
    land = mask == 0
    try:
        with netCDF4.Dataset(tmp, "w", format="NETCDF4") as nc:
            nc.createDimension("time", n_days)
            nc.createDimension("lat", lat.size)
            nc.createDimension("lon", lon.size)
            v_time = nc.createVariable("time", "f8", ("time",))
            v_time.setncatts({"standard_name": "time", "units": f"days since {start_date} 00:00:00",
                              "calendar": "standard", "axis": "T"})
            v_time[:] = np.arange(n_days, dtype=float)
            for name, values, std, units, axis in (
                    ("lat", lat, "latitude", "degrees_north", "Y"),
                    ("lon", lon, "longitude", "degrees_east", "X")):
                var = nc.createVariable(name, "f8", (name,))
                var.setncatts({"standard_name": std, "units": units, "axis": axis})
                var[:] = values
            v_mask = nc.createVariable("mask", "i1", ("lat", "lon"))
            v_mask.setncatts({"standard_name": "sea_binary_mask", "units": "1",
                              "flag_values": np.array([0, 1], dtype=np.int8),
                              "flag_meanings": "land sea"})
            v_mask[:] = mask
            out = {}
            for name, std, units in (("u", "eastward_sea_water_velocity", "m s-1"),
                                     ("v", "northward_sea_water_velocity", "m s-1"),
                                     ("ssh", "sea_surface_height_above_geoid", "m")):
                var = nc.createVariable(name, "f4", ("time", "lat", "lon"),
                                        chunksizes=(min(10, n_days), lat.size, lon.size),
                                        fill_value=np.float32(np.nan))
                var.setncatts({"standard_name": std, "units": units})
                out[name] = var
            for step in range(n_days):
                psi, u, v = fields(lon2, lat2, step * SECONDS_PER_DAY)
                for name, field in (("u", u), ("v", v), ("ssh", f_over_g * psi)):
                    values = np.asarray(field, dtype=np.float32)
                    values[land] = np.nan
                    out[name][step] = values
            nc.setncatts({"title": title, "Conventions": "CF-1.8",
                          "source": "coastmon.scenario analytic fields (invented geography)",
                          "comment": comment})
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return path
