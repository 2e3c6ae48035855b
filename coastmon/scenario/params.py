"""Parameters of a planted-truth scenario, their defaults, variants and TOML form.

All the geography is invented: the coast, its capes, the island and every name belong to no
real place. Longitudes and latitudes put the invented coast in what is open ocean in reality.

A scenario file is TOML with top-level keys for the scalar parameters and arrays of tables
for the capes, the islands, the planted sources and standing oscillations (optional)::

    name = "vell_coast"
    seed = 262

    [[capes]]
    name = "Tasker Head"
    lat = 34.5
    protrusion_km = 55.0
    halfwidth_km = 45.0

    [[sources]]
    name = "Tasker Head source"
    cape = "Tasker Head"
    rate_per_year = 10.0
    psi0_m2_s = 11000.0

    [[standing]]
    name = "Tasker pulse"
    cape = "Tasker Head"
    psi0_m2_s = 8000.0

Unknown keys are rejected with a suggestion of the nearest valid name.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from coastmon.config import coerce_setting, read_toml
from coastmon.errors import SettingsError


@dataclass(frozen=True)
class CapeSpec:
    """One cape: a Gaussian bump of the coast line towards the sea."""

    name: str = "Unnamed Cape"
    """Invented name of the cape."""
    lat: float = 35.0
    """Latitude of the cape tip (degrees north)."""
    protrusion_km: float = 30.0
    """How far the tip stands seaward of the straight coast (km)."""
    halfwidth_km: float = 30.0
    """Along-shore e-folding half-width of the Gaussian bump (km); smaller is sharper."""


@dataclass(frozen=True)
class IslandSpec:
    """One round island offshore."""

    name: str = "Unnamed Isle"
    """Invented name of the island."""
    lat: float = 35.0
    """Latitude of the island centre (degrees north)."""
    offshore_km: float = 60.0
    """Distance of the island centre seaward of the local coast (km, zonal)."""
    diameter_km: float = 30.0
    """Island diameter (km)."""


@dataclass(frozen=True)
class SourceSpec:
    """One planted shedding source: Gaussian eddies born near a cape at a Poisson rate."""

    name: str = "Unnamed source"
    """Invented name of the source."""
    cape: str = ""
    """Name of the cape the eddies are born at (ignored when births are spread uniformly)."""
    rate_per_year: float = 8.0
    """Mean number of eddies born per year."""
    psi0_m2_s: float = 9000.0
    """Streamfunction amplitude at full strength (m2 s-1, magnitude; the sign sets the spin)."""
    radius_km: float = 30.0
    """Gaussian radius R of the eddy streamfunction psi0 exp(-r2/R2) (km)."""
    birth_offset_km: float = 30.0
    """Eddies are born this far seaward (zonally) of the cape tip (km)."""


@dataclass(frozen=True)
class StandingSpec:
    """A standing oscillation at a cape: a pattern that pulsates in place and feeds nothing.

    The streamfunction is :math:`\\psi = \\psi_0 e^{-y^2/W^2}\\cos(k x)\\cos(2\\pi t/T)`,
    x and y (m) zonal and meridional distances from the cape tip, k = 2 pi / wavelength:
    the sum of two equal waves travelling west and east, so no energy crosses any meridian.
    """

    name: str = "Unnamed oscillation"
    """Invented name of the oscillation."""
    cape: str = ""
    """Name of the cape it sits at (its latitude and tip longitude)."""
    psi0_m2_s: float = 8000.0
    """Streamfunction amplitude (m2 s-1)."""
    halfwidth_km: float = 40.0
    """Along-shore (meridional) e-folding half-width W (km)."""
    wavelength_km: float = 200.0
    """Zonal wavelength (km)."""
    period_days: float = 45.0
    """Period of the pulsation (days)."""


@dataclass(frozen=True)
class ScenarioParams:
    """Every parameter of a synthetic coastal scenario; ``ScenarioParams()`` is the default.

    The default is an eastern-boundary coast (land to the east) at mid-latitudes, the
    invented "Vell Coast", with four capes of different sharpness, one island, a straight
    stretch, and three planted shedding sources of clearly different offshore energy feed.
    """

    name: str = "vell_coast"
    """Base name of the output files (``<name>.nc`` and ``<name>_truth.json``)."""
    variant: Literal["default", "straight", "western_boundary", "custom"] = "default"
    """Which variant these parameters describe (recorded in the truth file)."""
    coast_name: str = "Vell Coast"
    """Invented name of the coast."""
    seed: int = 262
    """Seed of the random generator; the same seed gives the same file. The default seed was
    picked so that each source's number of gate crossings in the two-year record is within
    5 % of its planted rate (so realized and planted feeds agree closely)."""

    lon_min: float = -46.0
    """Western edge of the grid (degrees east)."""
    lon_max: float = -34.0
    """Eastern edge of the grid (degrees east)."""
    lat_min: float = 30.0
    """Southern edge of the grid (degrees north)."""
    lat_max: float = 40.0
    """Northern edge of the grid (degrees north)."""
    resolution_deg: float = 0.08
    """Grid spacing in both longitude and latitude (degrees)."""
    n_days: int = 730
    """Number of daily time steps."""
    start_date: str = "2001-01-01"
    """Date of the first time step (ISO format, standard calendar)."""
    spinup_days: float = 365.0
    """Eddies are born from this many days before the first step, so the record starts full."""

    land_side: Literal["east", "west"] = "east"
    """Side of the coast the land is on; the sea and the offshore direction are opposite."""
    coast_lon: float = -36.5
    """Longitude of the straight coast at ``coast_ref_lat`` (degrees east)."""
    coast_ref_lat: float = 35.0
    """Latitude where the straight coast passes through ``coast_lon`` (degrees north)."""
    coast_tilt_km_per_deg: float = 6.0
    """Seaward shift of the straight coast per degree of latitude northward (km)."""
    capes: tuple[CapeSpec, ...] = (
        CapeSpec(name="Mirrow Point", lat=31.8, protrusion_km=25.0, halfwidth_km=20.0),
        CapeSpec(name="Tasker Head", lat=34.5, protrusion_km=55.0, halfwidth_km=45.0),
        CapeSpec(name="Cape Orrin", lat=36.4, protrusion_km=40.0, halfwidth_km=30.0),
        CapeSpec(name="Dunmarrow Bluff", lat=38.3, protrusion_km=45.0, halfwidth_km=35.0),
    )
    """Capes of the coast; a cape sheds eddies only if a source names it."""
    islands: tuple[IslandSpec, ...] = (
        IslandSpec(name="Isle Brannoch", lat=33.2, offshore_km=45.0, diameter_km=30.0),
    )
    """Islands offshore (land inside a circle)."""
    straight_stretch_name: str = "Lannic Strand"
    """Invented name of the straight stretch between Mirrow Point and Tasker Head."""

    sources: tuple[SourceSpec, ...] = (
        SourceSpec(name="Tasker Head source", cape="Tasker Head", rate_per_year=10.0,
                   psi0_m2_s=11000.0, radius_km=35.0, birth_offset_km=35.0),
        SourceSpec(name="Cape Orrin source", cape="Cape Orrin", rate_per_year=8.0,
                   psi0_m2_s=8700.0, radius_km=30.0, birth_offset_km=30.0),
        SourceSpec(name="Mirrow Point source", cape="Mirrow Point", rate_per_year=6.0,
                   psi0_m2_s=6350.0, radius_km=27.0, birth_offset_km=27.0),
    )
    """Planted shedding sources."""
    birth_placement: Literal["capes", "uniform"] = "capes"
    """``capes``: each source sheds at its cape; ``uniform``: every birth is placed uniformly
    at random along the coast between ``uniform_lat_min`` and ``uniform_lat_max``."""
    birth_process: Literal["poisson", "periodic"] = "poisson"
    """``poisson``: exponential waiting times; ``periodic``: one birth every 1/rate,
    the first at the first time step (for tests)."""
    sign_mode: Literal["alternate", "random"] = "alternate"
    """Spin of successive eddies of a source: alternating, or random with equal odds."""
    uniform_lat_min: float = 31.0
    """Southern end of the stretch of coast with uniform births (degrees north)."""
    uniform_lat_max: float = 39.0
    """Northern end of the stretch of coast with uniform births (degrees north)."""

    offshore_speed_m_s: float = 0.03
    """Eddy translation speed away from the coast, westward for land to the east (m s-1);
    about the long baroclinic Rossby wave speed at mid-latitudes."""
    meridional_drift_m_s: float = 0.0075
    """Poleward drift of cyclones and equatorward drift of anticyclones (m s-1)."""
    decay_days: float = 180.0
    """E-folding time of the eddy amplitude with age (days)."""
    growth_days: float = 5.0
    """Time scale of the amplitude growth right after birth, 1 - exp(-age/growth) (days)."""
    min_amplitude_fraction: float = 0.01
    """Eddies weaker than this fraction of their full amplitude are removed."""

    current_northward_m_s: float = -0.15
    """Along-shore speed of the mean boundary current at the coast, positive northward (m s-1)."""
    current_width_km: float = 25.0
    """Offshore e-folding width of the mean boundary current (km)."""

    wave_count: int = 3
    """Number of background Rossby waves."""
    wave_velocity_m_s: float = 0.015
    """Velocity amplitude of each background wave (m s-1)."""
    wave_speed_m_s: float = 0.025
    """Westward phase speed of the background waves (m s-1)."""
    wave_length_km: tuple[float, float] = (300.0, 600.0)
    """Range of the zonal wavelengths of the background waves (km)."""

    noise_velocity_m_s: float = 0.005
    """Standard deviation of white noise added to u and v (m s-1)."""
    noise_ssh_m: float = 0.002
    """Standard deviation of white noise added to the sea surface height (m)."""

    rho0: float = 1025.0
    """Reference density of sea water for the planted energy feed (kg m-3)."""
    gravity_m_s2: float = 9.81
    """Gravitational acceleration used for ssh = f psi / g (m s-2)."""
    gate_offset_km: float = 150.0
    """Distance offshore of the cape tip, along its parallel, of the meridian where the
    planted feed is given (km); the same as ``coastmon.config.SourceSettings.gate_offset_km``."""
    gate_halfwidth_km: float = 60.0
    """Half-length of the gate around the cape latitude for the ``gate_feed_w_per_m`` part of
    the truth (km); the same as ``coastmon.config.SourceSettings.gate_halfwidth_km``."""
    deformation_radius_km: float = 30.0
    """Deformation radius L_d of the invented ocean (km): the eddy potential energy of the
    truth is rho0 psi^2 / (2 L_d^2); analyse with ``signals.deformation_radius_km`` equal to
    it (the default estimate from latitude, 2.5 m s-1 / |f|, gives 29.9 km at 35 N)."""
    eddy_period_days: tuple[float, float] = (10.0, 120.0)
    """Band of periods whose energy the planted feed counts (days); the same as
    ``coastmon.config.SignalSettings.eddy_period_days``."""
    standing: tuple[StandingSpec, ...] = ()
    """Standing oscillations (zero planted feed), each at a cape."""
    compress: bool = True
    """Compress the NetCDF variables: values rounded to 1e-4 (0.1 mm s-1, 0.1 mm), then zlib
    level 1; about half the size of the uncompressed file."""

    @property
    def side(self) -> int:
        """+1 when the land is to the east (sea and offshore to the west), -1 otherwise."""
        return 1 if self.land_side == "east" else -1

    @classmethod
    def from_dict(cls, data: dict[str, Any], where: str = "scenario") -> ScenarioParams:
        """Build validated parameters from a nested dict (as parsed from TOML)."""
        nested = {"capes": CapeSpec, "islands": IslandSpec, "sources": SourceSpec,
                  "standing": StandingSpec}
        names = [f.name for f in dataclasses.fields(cls)]
        values: dict[str, Any] = {}
        for key, value in data.items():
            if key in nested:
                if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
                    raise SettingsError(
                        f"'{key}' must be an array of tables", where=f"{where}, {key}",
                        todo=f"Write each entry as a [[{key}]] table of key = value lines",
                    )
                spec = nested[key]
                values[key] = tuple(
                    spec(**{k: coerce_setting(spec, k, v, f"{where}, [[{key}]] #{i + 1} {k}")
                            for k, v in table.items()})
                    for i, table in enumerate(value)
                )
            elif key in names:
                values[key] = coerce_setting(cls, key, value, f"{where}, {key}")
            else:
                coerce_setting(cls, key, value, f"{where}, {key}")
        params = cls(**values)
        params.validate(where)
        return params

    @classmethod
    def from_toml(cls, path: str | Path) -> ScenarioParams:
        """Read and validate a scenario TOML file; unknown keys raise SettingsError."""
        data = read_toml(path, "scenario file", "Check the path, or start from demo/scenario.toml",
                         "demo/scenario.toml shows the format")
        return cls.from_dict(data, where=str(path))

    def to_toml(self) -> str:
        """The parameters as TOML text that :meth:`from_toml` reads back unchanged."""
        lines = ["# Synthetic coastal scenario with planted truth (invented geography).",
                 "# Every key is documented in coastmon/scenario/params.py.", ""]
        nested: dict[str, tuple[Any, ...]] = {}
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name in ("capes", "islands", "sources", "standing"):
                nested[f.name] = value
                if not value:
                    lines.append(f"{f.name} = []")
            else:
                lines.append(f"{f.name} = {_toml_value(value)}")
        for key, specs in nested.items():
            for spec in specs:
                lines += ["", f"[[{key}]]"]
                lines += [f"{g.name} = {_toml_value(getattr(spec, g.name))}"
                          for g in dataclasses.fields(spec)]
        return "\n".join(lines) + "\n"

    def validate(self, where: str = "scenario") -> None:
        """Cross-field checks; raise SettingsError with what to change."""
        cape_names = [c.name for c in self.capes]
        checks = [
            (self.lon_max > self.lon_min and self.lat_max > self.lat_min,
             "lon_max/lat_max must exceed lon_min/lat_min"),
            (self.resolution_deg > 0, "resolution_deg must be positive"),
            (min(abs(self.lat_min), abs(self.lat_max)) >= 5.0 and self.lat_min * self.lat_max > 0,
             "the domain must stay at least 5 degrees from the equator (ssh = f psi / g)"),
            (self.n_days >= 2, "n_days must be at least 2"),
            (self.spinup_days >= 0, "spinup_days must not be negative"),
            (self.lon_min < self.coast_lon < self.lon_max, "coast_lon must lie inside the grid"),
            (len(set(cape_names)) == len(cape_names), "cape names must be unique"),
            (all(c.protrusion_km >= 0 and c.halfwidth_km > 0 for c in self.capes),
             "capes need protrusion_km >= 0 and halfwidth_km > 0"),
            (all(i.offshore_km > i.diameter_km / 2 > 0 for i in self.islands),
             "islands need offshore_km > diameter_km / 2 > 0"),
            (all(s.rate_per_year > 0 and s.psi0_m2_s > 0 and s.radius_km > 0
                 and s.birth_offset_km > 0 for s in self.sources),
             "sources need positive rate_per_year, psi0_m2_s, radius_km, birth_offset_km"),
            (all(o.cape in cape_names and o.psi0_m2_s > 0 and o.halfwidth_km > 0
                 and o.wavelength_km > 0 and o.period_days > 0 for o in self.standing),
             "standing oscillations need one of the capes and positive psi0_m2_s, "
             "halfwidth_km, wavelength_km, period_days"),
            (self.deformation_radius_km > 0, "deformation_radius_km must be positive"),
            (0 < self.eddy_period_days[0] < self.eddy_period_days[1],
             "eddy_period_days must be (shortest, longest), both positive"),
            (self.birth_placement == "uniform" or all(s.cape in cape_names for s in self.sources),
             "every source must name one of the capes (or set birth_placement = \"uniform\")"),
            (self.birth_placement == "capes" or (
                self.uniform_lat_min < self.uniform_lat_max
                and self.lat_min <= self.uniform_lat_min and self.uniform_lat_max <= self.lat_max),
             "uniform_lat_min < uniform_lat_max, both inside the grid"),
            (self.offshore_speed_m_s > 0 and self.meridional_drift_m_s >= 0,
             "offshore_speed_m_s must be positive and meridional_drift_m_s not negative"),
            (self.decay_days > 0 and self.growth_days > 0, "decay_days and growth_days must be positive"),
            (0 < self.min_amplitude_fraction < 1, "min_amplitude_fraction must be in (0, 1)"),
            (self.current_width_km > 0, "current_width_km must be positive"),
            (self.wave_count >= 0 and self.wave_speed_m_s >= 0 and self.wave_velocity_m_s >= 0,
             "wave_count, wave_speed_m_s and wave_velocity_m_s must not be negative"),
            (0 < self.wave_length_km[0] <= self.wave_length_km[1],
             "wave_length_km must be (shortest, longest), both positive"),
            (self.noise_velocity_m_s >= 0 and self.noise_ssh_m >= 0, "noise levels must not be negative"),
            (self.rho0 > 0 and self.gravity_m_s2 > 0 and self.gate_offset_km > 0,
             "rho0, gravity_m_s2 and gate_offset_km must be positive"),
        ]
        for ok, message in checks:
            if not ok:
                raise SettingsError(message, where=where,
                                    todo="Correct the value; defaults are in coastmon/scenario/default.toml")


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, tuple | list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(value)


def default_params() -> ScenarioParams:
    """The default scenario: the invented Vell Coast with three planted sources.

    Sources at Tasker Head, Cape Orrin and Mirrow Point with planted offshore feeds in the
    ratio about 1 : 0.5 : 0.2; Dunmarrow Bluff is a prominent cape that sheds nothing, so
    capes and sources differ; Isle Brannoch lies off the straight Lannic Strand.
    """
    return ScenarioParams()


def straight_coast_params() -> ScenarioParams:
    """Control: the same eddy forcing on a straight coast, births uniform along it.

    The coast has no capes and no island; the three sources keep their rates, amplitudes
    and radii, but each birth is placed uniformly at random along the coast between
    ``uniform_lat_min`` and ``uniform_lat_max``, so there is no anchored, persistent source.
    """
    base = ScenarioParams()
    return dataclasses.replace(
        base, name="vell_coast_straight", variant="straight", capes=(), islands=(),
        sources=tuple(dataclasses.replace(s, cape="") for s in base.sources),
        birth_placement="uniform", coast_tilt_km_per_deg=0.0,
    )


def western_boundary_params() -> ScenarioParams:
    """Mirror image: land to the west, capes point east, eddies move offshore (eastward).

    This variant exercises the geometry and the frame orientation (rays go eastward, into
    the sea); eddies translating eastward are a device of the test, not the physics of a
    western boundary. The mean current flows poleward along the coast.
    """
    base = ScenarioParams()
    return dataclasses.replace(
        base, name="vell_coast_west", variant="western_boundary", land_side="west",
        coast_lon=-43.5, current_northward_m_s=0.25,
    )


__all__ = [
    "CapeSpec",
    "IslandSpec",
    "ScenarioParams",
    "SourceSpec",
    "StandingSpec",
    "default_params",
    "straight_coast_params",
    "western_boundary_params",
]
