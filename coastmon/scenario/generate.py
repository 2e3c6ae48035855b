"""Write a synthetic scenario: a CF-1.8 NetCDF file of u, v, ssh, mask and its planted truth.

The flow is the sum of a mean coastal current, weak westward background Rossby waves,
Gaussian eddies shed by the planted sources, optional standing oscillations at capes, and
white noise. Eddies are born at Poisson
times (or periodically), move offshore at a fixed speed with cyclones drifting poleward and
anticyclones equatorward, grow and then decay with age, and are removed when their centre
reaches land or leaves the grid. Nothing is read back from other coastmon stages: the truth
file holds what was planted, and the planted feed is the bookkeeping of the planted eddies'
own energy crossing the gate meridian (:mod:`coastmon.scenario.bookkeeping`).
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass
from datetime import date
from pathlib import Path

import netCDF4
import numpy as np
from numpy.typing import NDArray

from coastmon.errors import OutputError, SettingsError
from coastmon.scenario.bookkeeping import (
    gaussian_eddy_total_energy,
    meridian_west_of,
    source_gate_flux,
)
from coastmon.scenario.flow import (
    amplitude_factor,
    boundary_current,
    coriolis_parameter,
    eddy_track,
    gaussian_eddy,
    rossby_waves,
    standing_oscillation,
)
from coastmon.scenario.geography import (
    KM_PER_DEG,
    alongshore_km,
    coast_lon,
    grid_axes,
    island_centre,
    land_mask,
    lat_at_alongshore_km,
)
from coastmon.scenario.params import ScenarioParams

SECONDS_PER_DAY = 86400.0
SECONDS_PER_YEAR = 365.25 * SECONDS_PER_DAY
_WINDOW_RADII = 4.0
_CHUNK_DAYS = 10
PROFILE_OFFSETS_KM = tuple(range(50, 301, 25))
"""Gate offsets (km offshore of the cape tip) of the planted feed profile in the truth file."""
FEED_FORMULA = (
    "feed = s c <integral over the gate meridian of e dy>, the record mean (daily steps) of "
    "the energy that the source's planted eddies carry across the meridian gate_offset_km "
    "offshore of the cape tip; e = rho0 [(u^2 + v^2)/2 + psi^2/(2 Ld^2)] (kinetic plus "
    "equivalent-barotropic potential energy, psi = g ssh / f, Ld = deformation_radius_km) of "
    "the eddy-band anomalies (periods in eddy_period_days) of the source's own exact eddy "
    "fields on the meridian; c = the eddies' offshore translation speed, s = +1 westward off "
    "an eastern boundary (-1 off a western one); W per m of depth, positive westward")


@dataclass(frozen=True)
class Birth:
    """One planted eddy."""

    source: str
    time_days: float
    lon: float
    lat: float
    alongshore_km: float
    psi0_m2_s: float
    radius_km: float
    cyclone: bool
    end_days: float
    """Time the eddy is removed (on land, off the grid or too weak)."""


def _sea_at(lon: NDArray[np.float64], lat: NDArray[np.float64], params: ScenarioParams) -> NDArray[np.bool_]:
    """True where a point is over sea and inside the grid."""
    inside = ((lon >= params.lon_min) & (lon <= params.lon_max)
              & (lat >= params.lat_min) & (lat <= params.lat_max))
    return inside & (land_mask(lon, lat, params) == 1)


def _birth_point(lat: float, params: ScenarioParams, offset_km: float) -> float:
    return float(coast_lon(lat, params) - params.side * offset_km / (KM_PER_DEG * np.cos(np.radians(lat))))


def _end_days(t0: float, lon_b: float, lat_b: float, radius_km: float, cyclone: bool,
              params: ScenarioParams) -> float:
    """When the eddy's centre first reaches land, leaves the grid (+3 R) or grows too weak."""
    decay_s = params.decay_days * SECONDS_PER_DAY
    growth_s = params.growth_days * SECONDS_PER_DAY
    ages_days = np.arange(0.0, params.n_days - t0 + 1.0)
    ages_s = ages_days * SECONDS_PER_DAY
    north = _north_drift(cyclone, lat_b, params)
    lon, lat = eddy_track(lon_b, lat_b, ages_s, params.offshore_speed_m_s, north, params.side)
    pad = 3.0 * radius_km / KM_PER_DEG
    inside = ((lon >= params.lon_min - pad / np.cos(np.radians(lat))) & (lon <= params.lon_max + pad / np.cos(np.radians(lat)))
              & (lat >= params.lat_min - pad) & (lat <= params.lat_max + pad))
    on_land = land_mask(lon, lat, params) == 0
    grown = ages_s > 3.0 * growth_s
    weak = grown & (amplitude_factor(ages_s, growth_s, decay_s) < params.min_amplitude_fraction)
    stop = ~inside | on_land | weak
    if not stop.any():
        return float(params.n_days + 1)
    return float(t0 + ages_days[np.argmax(stop)])


def _north_drift(cyclone: bool, lat: float, params: ScenarioParams) -> float:
    """Northward drift: cyclones poleward, anticyclones equatorward (either hemisphere)."""
    poleward = np.sign(lat) * params.meridional_drift_m_s
    return float(poleward if cyclone else -poleward)


def _plant_births(params: ScenarioParams, rng: np.random.Generator) -> list[Birth]:
    """Birth times, places and spins of every eddy, in time order per source."""
    births: list[Birth] = []
    t_start, t_end = -params.spinup_days, float(params.n_days)
    capes = {c.name: c for c in params.capes}
    s_lo = float(alongshore_km(params.uniform_lat_min, params))
    s_hi = float(alongshore_km(params.uniform_lat_max, params))
    for spec in params.sources:
        interval = 365.25 / spec.rate_per_year
        if params.birth_process == "periodic":
            times = np.arange(0.0, t_end, interval)
        else:
            n_max = int(np.ceil((t_end - t_start) / interval * 2 + 20))
            times = t_start + np.cumsum(rng.exponential(interval, size=n_max))
            times = times[times < t_end]
        first_cyclone = bool(rng.integers(2))
        for i, t0 in enumerate(times):
            if params.sign_mode == "alternate":
                cyclone = first_cyclone ^ bool(i % 2)
            else:
                cyclone = bool(rng.integers(2))
            if params.birth_placement == "uniform":
                s_km = float(rng.uniform(s_lo, s_hi))
                lat = float(lat_at_alongshore_km(s_km, params))
            else:
                lat = capes[spec.cape].lat
                s_km = float(alongshore_km(lat, params))
            lon = _birth_point(lat, params, spec.birth_offset_km)
            sign = np.sign(lat) if cyclone else -np.sign(lat)
            psi0 = -float(sign) * spec.psi0_m2_s
            births.append(Birth(
                source=spec.name, time_days=float(t0), lon=lon, lat=lat, alongshore_km=s_km,
                psi0_m2_s=psi0, radius_km=spec.radius_km, cyclone=cyclone,
                end_days=_end_days(float(t0), lon, lat, spec.radius_km, cyclone, params),
            ))
    return births


def _background_waves(params: ScenarioParams, rng: np.random.Generator) -> NDArray[np.float64]:
    """Rows (A, k, l, omega, theta) of the background Rossby waves."""
    rows = []
    for _ in range(params.wave_count):
        wavelength_m = rng.uniform(*params.wave_length_km) * 1000.0
        k = 2.0 * np.pi / wavelength_m
        l_wn = k * rng.uniform(-1.0, 1.0)
        amp = params.wave_velocity_m_s / np.hypot(k, l_wn)
        omega = -params.wave_speed_m_s * k
        rows.append((amp, k, l_wn, omega, rng.uniform(0.0, 2.0 * np.pi)))
    return np.array(rows, dtype=float).reshape(-1, 5)


def _check_paths_to_gate(params: ScenarioParams) -> None:
    """Planted feeds assume every eddy reaches its gate over sea; refuse scenarios where not."""
    if params.birth_placement != "capes":
        return
    capes = {c.name: c for c in params.capes}
    for spec in params.sources:
        t_gate = max(params.gate_offset_km - spec.birth_offset_km, 0.0) * 1000.0 / params.offshore_speed_m_s
        ages = np.linspace(0.0, t_gate, 200)
        lat_b = capes[spec.cape].lat
        lon_b = _birth_point(lat_b, params, spec.birth_offset_km)
        for cyclone in (True, False):
            lon, lat = eddy_track(lon_b, lat_b, ages, params.offshore_speed_m_s,
                                  _north_drift(cyclone, lat_b, params), params.side)
            if not _sea_at(lon, lat, params).all():
                raise SettingsError(
                    f"Eddies of source '{spec.name}' meet land or the grid edge before their gate "
                    f"{params.gate_offset_km:g} km offshore, so the planted feed would be wrong",
                    where=f"scenario '{params.name}', source '{spec.name}' at cape '{spec.cape}'",
                    todo="Move the cape or island, widen the grid, or shorten gate_offset_km",
                )


def _truth(params: ScenarioParams, births: list[Birth], waves: NDArray[np.float64],
           lon: NDArray[np.float64], lat: NDArray[np.float64]) -> dict:
    growth_s = params.growth_days * SECONDS_PER_DAY
    decay_s = params.decay_days * SECONDS_PER_DAY
    capes_out = []
    shedding = {s.cape for s in params.sources} if params.birth_placement == "capes" else set()
    for cape in params.capes:
        capes_out.append({
            "name": cape.name, "lon": float(coast_lon(cape.lat, params)), "lat": cape.lat,
            "alongshore_km": float(alongshore_km(cape.lat, params)),
            "protrusion_km": cape.protrusion_km, "halfwidth_km": cape.halfwidth_km,
            "sheds_eddies": cape.name in shedding,
        })
    islands_out = []
    for island in params.islands:
        ilon, ilat = island_centre(island, params)
        islands_out.append({"name": island.name, "lon": ilon, "lat": ilat,
                            "diameter_km": island.diameter_km, "offshore_km": island.offshore_km})
    anchored = params.birth_placement == "capes"
    sources_out = [_source_truth(params, spec, [b for b in births if b.source == spec.name],
                                 growth_s, decay_s) for spec in params.sources]
    total = sum(s["offshore_feed_w_per_m"] for s in sources_out)
    ranked = sorted(sources_out, key=lambda s: -s["offshore_feed_w_per_m"]) if anchored else []
    top = (ranked[0]["offshore_feed_w_per_m"] if ranked else 0.0) or 1.0
    capes_by_name = {c.name: c for c in params.capes}
    standing_out = [{
        "name": o.name, "cape": o.cape, "lon": float(coast_lon(capes_by_name[o.cape].lat, params)),
        "lat": capes_by_name[o.cape].lat, "psi0_m2_s": o.psi0_m2_s,
        "halfwidth_km": o.halfwidth_km, "wavelength_km": o.wavelength_km,
        "period_days": o.period_days, "feed_w_per_m": 0.0,
        "feed_note": "a standing pattern: its energy changes only in place, none crosses a meridian",
    } for o in params.standing]
    truth = {
        "variant": params.variant,
        "name": params.name,
        "coast_name": params.coast_name,
        "synthetic": True,
        "land_side": params.land_side,
        "offshore_direction": "west" if params.side == 1 else "east",
        "grid": {"lon_min": float(lon[0]), "lon_max": float(lon[-1]), "lat_min": float(lat[0]),
                 "lat_max": float(lat[-1]), "resolution_deg": params.resolution_deg,
                 "nx": int(lon.size), "ny": int(lat.size), "n_days": params.n_days,
                 "start_date": params.start_date},
        "alongshore_origin": "arclength of the coast curve from the grid's southern edge, northward",
        "planted_offshore_speed_m_s": params.offshore_speed_m_s,
        "planted_westward_speed_m_s": params.side * params.offshore_speed_m_s,
        "planted_meridional_drift_m_s": params.meridional_drift_m_s,
        "decay_days": params.decay_days,
        "growth_days": params.growth_days,
        "gate_offset_km": params.gate_offset_km,
        "gate_halfwidth_km": params.gate_halfwidth_km,
        "rho0": params.rho0,
        "deformation_radius_km": params.deformation_radius_km,
        "eddy_period_days": list(params.eddy_period_days),
        "feed_formula": FEED_FORMULA,
        "anchored_sources": anchored,
        "sources": sources_out if anchored else [],
        "expected_rank": [s["name"] for s in ranked],
        "relative_feed": {s["name"]: s["offshore_feed_w_per_m"] / top for s in ranked},
        "standing": standing_out,
        "capes": capes_out,
        "islands": islands_out,
        "straight_stretch": params.straight_stretch_name if params.capes else params.coast_name,
        "mean_current_northward_m_s": params.current_northward_m_s,
        "mean_current_width_km": params.current_width_km,
        "background_waves": [
            {"zonal_wavelength_km": 2 * np.pi / k / 1000.0,
             "meridional_wavenumber_per_km": l_wn * 1000.0,
             "streamfunction_amplitude_m2_s": amp,
             "zonal_phase_speed_m_s": omega / k}
            for amp, k, l_wn, omega, _ in waves.tolist()],
        "births": [asdict(b) for b in births],
    }
    if not anchored:
        s_lo = float(alongshore_km(params.uniform_lat_min, params))
        s_hi = float(alongshore_km(params.uniform_lat_max, params))
        truth["unanchored_shedding"] = {
            "lat_min": params.uniform_lat_min, "lat_max": params.uniform_lat_max,
            "alongshore_km_min": s_lo, "alongshore_km_max": s_hi,
            "total_rate_per_year": sum(s.rate_per_year for s in params.sources),
            "total_feed_w_per_m": total,
            "feed_w_per_m_per_km_of_coast": total / (s_hi - s_lo),
            "component_sources": sources_out,
        }
    return truth


def _source_truth(params: ScenarioParams, spec, mine: list[Birth], growth_s: float,
                  decay_s: float) -> dict:
    """The planted feed of one source by bookkeeping (see :mod:`coastmon.scenario.bookkeeping`)."""
    record_s = params.n_days * SECONDS_PER_DAY
    rate = spec.rate_per_year / SECONDS_PER_YEAR
    entry = {"name": spec.name, "birth_rate_per_year": spec.rate_per_year,
             "psi0_m2_s": spec.psi0_m2_s, "radius_km": spec.radius_km,
             "n_births_in_record": sum(0.0 <= b.time_days < params.n_days for b in mine)}
    if params.birth_placement != "capes":
        ke, pe = gaussian_eddy_total_energy(spec.psi0_m2_s, spec.radius_km * 1000.0,
                                            params.deformation_radius_km * 1000.0, params.rho0)
        entry.update({"offshore_feed_w_per_m": float(rate * (ke + pe)),
                      "feed_note": "births spread along the coast: the energy each eddy "
                                   "reaches at full strength times the birth rate"})
        return entry
    cape = next(c for c in params.capes if c.name == spec.cape)
    tip_lon = float(coast_lon(cape.lat, params))
    half_deg = params.gate_halfwidth_km / KM_PER_DEG
    gate_lat = (cape.lat - half_deg, cape.lat + half_deg)

    def flux_at(offset_km: float):
        return source_gate_flux(mine, params, meridian_west_of(tip_lon, cape.lat, offset_km,
                                                               params.side), gate_lat)

    main = flux_at(params.gate_offset_km)
    t_gate_s = (params.gate_offset_km - spec.birth_offset_km) * 1000.0 / params.offshore_speed_m_s
    ke, pe = gaussian_eddy_total_energy(spec.psi0_m2_s * amplitude_factor(t_gate_s, growth_s, decay_s),
                                        spec.radius_km * 1000.0,
                                        params.deformation_radius_km * 1000.0, params.rho0)
    crossing = [b for b in mine if 0.0 <= b.time_days + t_gate_s / SECONDS_PER_DAY < params.n_days
                and b.end_days > b.time_days + t_gate_s / SECONDS_PER_DAY]
    profile = [flux_at(d) for d in PROFILE_OFFSETS_KM]
    lon_b = _birth_point(cape.lat, params, spec.birth_offset_km)
    entry.update({
        "feed_w_per_m": main.band_w_per_m,
        "feed_ke_w_per_m": main.band_ke_w_per_m,
        "feed_pe_w_per_m": main.band_pe_w_per_m,
        "gate_feed_w_per_m": main.band_gate_w_per_m,
        "offshore_feed_w_per_m": params.side * main.band_w_per_m,
        "realized_feed_w_per_m": main.band_w_per_m,      # the same, for scripts that read it
        "crossing_feed_w_per_m": main.crossing_w_per_m,
        "crossing_feed_ke_w_per_m": main.crossing_ke_w_per_m,
        "expected_crossing_feed_w_per_m": params.side * float(rate * (ke + pe)),
        "pressure_work_w_per_m": main.pressure_work_w_per_m,
        "pressure_work_gate_w_per_m": main.pressure_work_gate_w_per_m,
        "advective_flux_w_per_m": main.advective_w_per_m,
        "advective_flux_gate_w_per_m": main.advective_gate_w_per_m,
        "n_gate_crossings_in_record": len(crossing),
        "record_days": record_s / SECONDS_PER_DAY,
        "cape": cape.name, "lon": lon_b, "lat": cape.lat,
        "cape_lon": tip_lon, "cape_lat": cape.lat,
        "alongshore_km": float(alongshore_km(cape.lat, params)),
        "birth_offset_km": spec.birth_offset_km,
        "gate_lon": main.gate_lon, "gate_lat_min": gate_lat[0], "gate_lat_max": gate_lat[1],
        "gate_crossing_days": t_gate_s / SECONDS_PER_DAY,
        "meridional_drift_at_gate_km": params.meridional_drift_m_s * t_gate_s / 1000.0,
        "feed_profile": {
            "offset_km": list(PROFILE_OFFSETS_KM),
            "gate_lon": [f.gate_lon for f in profile],
            "feed_w_per_m": [f.band_w_per_m for f in profile],
            "gate_feed_w_per_m": [f.band_gate_w_per_m for f in profile],
        },
    })
    return entry


def _create_variables(nc: netCDF4.Dataset, params: ScenarioParams, lon: NDArray[np.float64],
                      lat: NDArray[np.float64], mask: NDArray[np.int8]) -> dict:
    from coastmon import __version__

    nc.createDimension("time", params.n_days)
    nc.createDimension("lat", lat.size)
    nc.createDimension("lon", lon.size)
    v_time = nc.createVariable("time", "f8", ("time",))
    v_time.setncatts({"standard_name": "time", "long_name": "time", "axis": "T",
                      "units": f"days since {params.start_date} 00:00:00", "calendar": "standard"})
    v_time[:] = np.arange(params.n_days, dtype=float)
    v_lat = nc.createVariable("lat", "f8", ("lat",))
    v_lat.setncatts({"standard_name": "latitude", "long_name": "latitude", "units": "degrees_north",
                     "axis": "Y"})
    v_lat[:] = lat
    v_lon = nc.createVariable("lon", "f8", ("lon",))
    v_lon.setncatts({"standard_name": "longitude", "long_name": "longitude", "units": "degrees_east",
                     "axis": "X"})
    v_lon[:] = lon
    v_mask = nc.createVariable("mask", "i1", ("lat", "lon"))
    v_mask.setncatts({"standard_name": "sea_binary_mask", "long_name": "sea (1) or land (0)",
                      "units": "1", "flag_values": np.array([0, 1], dtype=np.int8),
                      "flag_meanings": "land sea"})
    v_mask[:] = mask
    chunks = (min(_CHUNK_DAYS, params.n_days), lat.size, lon.size)
    out = {}
    for name, standard_name, long_name, units in (
        ("u", "eastward_sea_water_velocity", "eastward velocity", "m s-1"),
        ("v", "northward_sea_water_velocity", "northward velocity", "m s-1"),
        ("ssh", "sea_surface_height_above_geoid", "sea surface height", "m"),
    ):
        packing = {"zlib": True, "complevel": 1, "shuffle": True,
                   "least_significant_digit": 4} if params.compress else {}
        var = nc.createVariable(name, "f4", ("time", "lat", "lon"), chunksizes=chunks,
                                fill_value=np.float32(np.nan), **packing)
        var.setncatts({"standard_name": standard_name, "long_name": long_name, "units": units,
                       "coverage_content_type": "modelResult"})
        out[name] = var
    nc.setncatts({
        "title": f"Synthetic coastal eddy scenario: {params.coast_name} (invented geography)",
        "Conventions": "CF-1.8",
        "source": "coastmon.scenario planted-truth generator",
        "history": f"generated by coastmon {__version__} make_scenario, variant "
                   f"{params.variant}, seed {params.seed}",
        "comment": ("Synthetic data: the coast, its names and the flow are invented. Surface "
                    "velocity and sea surface height from a mean coastal current, Gaussian eddies "
                    "shed by planted sources, background Rossby waves and white noise; ssh = f psi / g. "
                    f"The planted truth is in {params.name}_truth.json."),
        "references": ("Gaussian eddies: Cushman-Roisin & Beckers 2011; geostrophy and Rossby "
                       "waves: Gill 1982"),
        "scenario_variant": params.variant,
        "scenario_seed": params.seed,
    })
    return out


def _fill_fields(params: ScenarioParams, births: list[Birth], waves: NDArray[np.float64],
                 lon: NDArray[np.float64], lat: NDArray[np.float64], mask: NDArray[np.int8],
                 variables: dict, rng: np.random.Generator) -> None:
    lon2, lat2 = np.meshgrid(lon, lat)
    psi_mean, u_mean, v_mean = boundary_current(lon2, lat2, params)
    f_over_g = coriolis_parameter(lat2) / params.gravity_m_s2
    land = mask == 0
    lon_ref = 0.5 * (lon[0] + lon[-1])
    lat_ref = 0.5 * (lat[0] + lat[-1])
    growth_s = params.growth_days * SECONDS_PER_DAY
    decay_s = params.decay_days * SECONDS_PER_DAY
    res = params.resolution_deg
    ny, nx = lat.size, lon.size
    n = params.n_days
    alive: list[list[tuple[float, float, float, float]]] = [[] for _ in range(n)]
    for b in births:
        steps = np.arange(max(int(np.ceil(b.time_days)), 0), min(int(np.ceil(b.end_days)), n))
        if steps.size == 0:
            continue
        age_s = (steps - b.time_days) * SECONDS_PER_DAY
        clon, clat = eddy_track(b.lon, b.lat, age_s, params.offshore_speed_m_s,
                                _north_drift(b.cyclone, b.lat, params), params.side)
        amp = b.psi0_m2_s * amplitude_factor(age_s, growth_s, decay_s)
        for k, step in enumerate(steps):
            alive[step].append((float(clon[k]), float(clat[k]), float(amp[k]), b.radius_km * 1000.0))
    capes = {c.name: c for c in params.capes}
    standing = [(float(coast_lon(capes[o.cape].lat, params)), capes[o.cape].lat, o)
                for o in params.standing]
    for start in range(0, n, _CHUNK_DAYS):
        stop = min(start + _CHUNK_DAYS, n)
        block = {k: np.empty((stop - start, ny, nx), dtype=np.float32) for k in ("u", "v", "ssh")}
        psi_w, u_w, v_w = rossby_waves(lon2, lat2, np.arange(start, stop) * SECONDS_PER_DAY,
                                       waves, lon_ref, lat_ref)
        for step in range(start, stop):
            psi = psi_mean + psi_w[step - start]
            u = u_mean + u_w[step - start]
            v = v_mean + v_w[step - start]
            for clon, clat, amp, radius_m in alive[step]:
                reach = _WINDOW_RADII * radius_m / 1000.0 / KM_PER_DEG
                reach_lon = reach / np.cos(np.radians(clat))
                i0 = max(int(np.floor((clat - reach - lat[0]) / res)), 0)
                i1 = min(int(np.ceil((clat + reach - lat[0]) / res)) + 1, ny)
                j0 = max(int(np.floor((clon - reach_lon - lon[0]) / res)), 0)
                j1 = min(int(np.ceil((clon + reach_lon - lon[0]) / res)) + 1, nx)
                if i0 >= i1 or j0 >= j1:
                    continue
                pe, ue, ve = gaussian_eddy(lon2[i0:i1, j0:j1], lat2[i0:i1, j0:j1], clon, clat,
                                           amp, radius_m)
                psi[i0:i1, j0:j1] += pe
                u[i0:i1, j0:j1] += ue
                v[i0:i1, j0:j1] += ve
            for tip_lon, tip_lat, o in standing:
                ps, us, vs = standing_oscillation(
                    lon2, lat2, step * SECONDS_PER_DAY, tip_lon, tip_lat, o.psi0_m2_s,
                    o.halfwidth_km * 1000.0, 2.0 * np.pi / (o.wavelength_km * 1000.0),
                    2.0 * np.pi / (o.period_days * SECONDS_PER_DAY))
                psi = psi + ps
                u = u + us
                v = v + vs
            ssh = f_over_g * psi
            if params.noise_velocity_m_s > 0:
                u = u + rng.normal(0.0, params.noise_velocity_m_s, size=u.shape)
                v = v + rng.normal(0.0, params.noise_velocity_m_s, size=v.shape)
            if params.noise_ssh_m > 0:
                ssh = ssh + rng.normal(0.0, params.noise_ssh_m, size=ssh.shape)
            for key, field in (("u", u), ("v", v), ("ssh", ssh)):
                values = field.astype(np.float32)
                values[land] = np.nan
                block[key][step - start] = values
        for key, data in block.items():
            variables[key][start:stop] = data


def make_scenario(params: ScenarioParams, out_dir: str | Path) -> tuple[Path, Path]:
    """Generate a scenario and write ``<name>.nc`` and ``<name>_truth.json`` in ``out_dir``.

    Both files are written under a temporary name and moved into place, so a failed run
    leaves no partial file. The same parameters (including ``seed``) give the same data.

    Parameters
    ----------
    params : ScenarioParams
        The scenario (see :func:`default_params` and the other variants).
    out_dir : str or Path
        Folder to write to; created if missing.

    Returns
    -------
    nc_path, truth_path : Path
        The NetCDF file (CF-1.8: ``u``, ``v``, ``ssh`` on (time, lat, lon), NaN on land, and
        ``mask``) and the JSON file with the planted truth.
    """
    params.validate(f"scenario '{params.name}'")
    try:
        date.fromisoformat(params.start_date)
    except ValueError:
        raise SettingsError(
            f"start_date {params.start_date!r} is not a date", where=f"scenario '{params.name}'",
            todo="Write it as YYYY-MM-DD",
        ) from None
    _check_paths_to_gate(params)
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"Cannot create the output folder ({exc.strerror})", where=str(out_dir),
                          todo="Choose a folder you can write to") from None
    births_rng, waves_rng, noise_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(params.seed).spawn(3))
    lon, lat = grid_axes(params)
    lon2, lat2 = np.meshgrid(lon, lat)
    mask = land_mask(lon2, lat2, params)
    if mask.all() or not mask.any():
        raise SettingsError(
            "The scenario grid holds no coast (all sea or all land)", where=f"scenario '{params.name}'",
            todo="Put coast_lon inside the grid, away from its edges",
        )
    births = _plant_births(params, births_rng)
    waves = _background_waves(params, waves_rng)
    nc_path = out_dir / f"{params.name}.nc"
    truth_path = out_dir / f"{params.name}_truth.json"
    tmp_nc = out_dir / f".{params.name}.nc.tmp-{os.getpid()}"
    tmp_truth = out_dir / f".{params.name}_truth.json.tmp-{os.getpid()}"
    try:
        with netCDF4.Dataset(tmp_nc, "w", format="NETCDF4") as nc:
            variables = _create_variables(nc, params, lon, lat, mask)
            _fill_fields(params, births, waves, lon, lat, mask, variables, noise_rng)
        truth = _truth(params, births, waves, lon, lat)
        truth["parameters"] = params.to_toml()
        tmp_truth.write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
        os.replace(tmp_nc, nc_path)
        os.replace(tmp_truth, truth_path)
    finally:
        tmp_nc.unlink(missing_ok=True)
        tmp_truth.unlink(missing_ok=True)
    return nc_path, truth_path
