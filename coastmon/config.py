"""Run settings: dataclasses with every default in one place, and strict TOML loading.

A settings file is TOML with one table per section, named like the dataclass fields of
:class:`Settings`::

    [ingest]
    depth_m = 300.0

    [coast]
    station_spacing_km = 10.0

Unknown sections or keys are rejected with a suggestion of the nearest valid name; values
are checked for type. Command-line options override file values.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from coastmon.errors import SettingsError


@dataclass(frozen=True)
class IngestSettings:
    """How to find and prepare the variables of the input files."""

    u_var: str | None = None
    """Name of the eastward (or grid-x) velocity variable; found by CF standard_name if unset."""
    v_var: str | None = None
    """Name of the northward (or grid-y) velocity variable."""
    ssh_var: str | None = None
    """Name of the sea surface height variable (used for geostrophic velocity if no u, v)."""
    mask_var: str | None = None
    """Name of a land/sea mask variable; otherwise from CF standard_name or missing values."""
    angle_var: str | None = None
    """Grid rotation angle (radians, grid x-axis anticlockwise from east) for grid-relative u, v."""
    bathymetry_var: str | None = None
    """Bathymetry (positive-down depth, m); needed only for ``coast.boundary = 'isobath'``."""
    depth_m: float | None = None
    """Depth to analyse (m, positive down); None = the level nearest the surface."""
    depth_method: Literal["nearest", "linear"] = "nearest"
    """How to reach ``depth_m``: the nearest level or linear interpolation between levels."""
    time_chunk: int | None = None
    """Time steps per dask chunk; None = sized from available memory."""
    equator_band_deg: float = 3.0
    """Geostrophic velocity from SSH is masked within this many degrees of the equator."""
    ssh_smooth_km: float = 0.0
    """Gaussian smoothing (sigma, km) of SSH before geostrophic velocity; 0 = none. Noisy
    gridded SSH is differentiated twice (velocity, vorticity), so grid-scale noise grows."""


@dataclass(frozen=True)
class CoastSettings:
    """Coastline extraction, cape detection and the along-shore frame."""

    boundary: Literal["mask", "isobath"] = "mask"
    """Use the land/sea mask as the boundary, or an isobath of the bathymetry."""
    isobath_m: float = 200.0
    """Depth of the isobath used when ``boundary = 'isobath'``."""
    resample_km: float = 2.0
    """Arclength spacing of the resampled coastline."""
    scales_km: tuple[float, ...] = (10.0, 20.0, 40.0, 80.0)
    """Gaussian smoothing scales (sigma, along arclength) for curvature scale space."""
    min_scale_km: float = 20.0
    """A cape must persist up to at least this smoothing scale."""
    min_protrusion_km: float = 5.0
    """A cape must stand at least this far seaward of the smoothed baseline."""
    min_segment_km: float = 50.0
    """Coast segments (and islands) shorter than this are ignored."""
    station_spacing_km: float = 10.0
    """Spacing of along-shore stations."""
    offsets_km: tuple[float, ...] = (0.0, 10.0, 20.0, 30.0, 40.0, 60.0, 80.0)
    """Offshore distances of the cross-shore sample points at each station."""
    ray_length_km: float = 600.0
    """Length of the zonal rays into the interior."""
    ray_spacing_km: float = 10.0
    """Point spacing along the zonal rays."""
    ray_every: int = 1
    """Start a zonal ray at every n-th station."""
    cape_catalogue: str | None = None
    """CSV file of named capes (columns id, lon, lat); a cape found within the matching
    tolerance of a catalogue cape takes its id instead of its position code."""


@dataclass(frozen=True)
class StreamSettings:
    """The one streaming pass over the (time, y, x) data."""

    scheduler: str | None = None
    """None = local threads; or the address of a dask.distributed scheduler."""
    seasonal: bool = False
    """Anomalies about a monthly climatology instead of the overall time mean."""
    progress: bool = True
    """Show a progress bar on the terminal."""
    ow_threshold: float = 0.2
    """Eddy cores are where Okubo-Weiss W < -ow_threshold * sigma_W (sigma_W per snapshot)."""
    read_processes: int | None = None
    """Processes that read (decompress) the input's chunks in parallel; None = one per
    core, up to 4, when the input is compressed and at least 1 GiB decoded (else 0);
    0 = one reader thread (always so where processes are not supported: not POSIX)."""


@dataclass(frozen=True)
class SignalSettings:
    """Wavelet and propagation analysis."""

    omega0: float = 6.0
    """Morlet wavelet non-dimensional frequency."""
    dj: float = 0.125
    """Scale resolution of the wavelet transform (sub-octaves per octave = 1/dj)."""
    significance: float = 0.95
    """Confidence level for red-noise wavelet significance."""
    eddy_period_days: tuple[float, float] = (10.0, 120.0)
    """Band of periods that counts as eddy shedding."""
    deformation_radius_km: float | None = None
    """First baroclinic deformation radius; None = estimate from latitude (see docs)."""


@dataclass(frozen=True)
class SourceSettings:
    """Finding, measuring and ranking sources."""

    nearshore_km: float = 30.0
    """Offsets up to this distance count as near-shore for source detection."""
    gate_offset_km: float = 150.0
    """Distance offshore (along the zonal rays) of the gate across which the feed is measured."""
    gate_halfwidth_km: float = 90.0
    """Half-length of each gate, across the rays, centred on the source (along-shore reach of
    the source's rays; each ray belongs to the gate of at most one source, the nearest).
    Wide enough to hold an eddy of radius ~L_d that drifts meridionally by about its radius
    on its way to the gate (60 km lost about 10 % of the demo's planted flux)."""
    gate_window_km: float = 75.0
    """Half-length of the window along each westward ray, centred on the gate point, over
    which the eddy energy and its speed are averaged (independent of ``gate_offset_km``)."""
    max_cape_distance_km: float = 50.0
    """A source farther than this from every cape is reported unanchored."""
    min_persistence: float = 0.5
    """Fraction of independent windows (one longest eddy period each) in which a source's
    eddy-band activity must be in the upper quarter of the coast's spread about the local
    background (a quarter of the windows under the null)."""
    max_speed_cm_s: float = 100.0
    """Propagation speeds beyond this are taken as "not measurable" on that ray."""
    rho0: float = 1025.0
    """Reference density of sea water (kg m-3)."""
    n_bootstrap: int = 200
    """Moving-block bootstrap resamples for the feed interval."""
    seed: int = 0
    """Random seed for the bootstrap."""


@dataclass(frozen=True)
class MonitorSettings:
    """Shedding events logged by ``coastmon update`` (see docs/monitoring.md)."""

    event_threshold_sd: float = 2.0
    """An event is where the near-shore vorticity anomaly at a source exceeds this many
    standard deviations of that station's own record."""
    event_min_days: float = 3.0
    """Shortest event (days above the threshold without a break)."""
    probe_km: float = 100.0
    """Distance along the source's zonal ray at which the offshore arrival is timed."""
    min_lag_correlation: float = 0.3
    """Smallest lagged correlation accepted to measure the offshore speed from the lag."""


@dataclass(frozen=True)
class OutputSettings:
    """What to write."""

    gis: tuple[str, ...] = ("gpkg", "csv")
    """GIS formats: any of gpkg, geojson, shp, csv."""
    figures: bool = True
    report: bool = True


@dataclass(frozen=True)
class Settings:
    """All settings of a run. ``Settings()`` holds every default."""

    ingest: IngestSettings = field(default_factory=IngestSettings)
    coast: CoastSettings = field(default_factory=CoastSettings)
    stream: StreamSettings = field(default_factory=StreamSettings)
    signals: SignalSettings = field(default_factory=SignalSettings)
    sources: SourceSettings = field(default_factory=SourceSettings)
    monitor: MonitorSettings = field(default_factory=MonitorSettings)
    output: OutputSettings = field(default_factory=OutputSettings)

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """Plain nested dict (for run.json and for writing TOML)."""
        return {f.name: dataclasses.asdict(getattr(self, f.name)) for f in dataclasses.fields(self)}

    def replace(self, section: str, **values: Any) -> Settings:
        """A copy with some values of one section changed (values are validated)."""
        current = getattr(self, section)
        checked = {k: coerce_setting(type(current), k, v, f"[{section}] {k}") for k, v in values.items()}
        new = dataclasses.replace(self, **{section: dataclasses.replace(current, **checked)})
        validate(new)
        return new


def _suggest(name: str, options: list[str]) -> str:
    close = difflib.get_close_matches(name, options, n=1, cutoff=0.5)
    if close:
        return f"Did you mean '{close[0]}'?"
    return "Valid names are: " + ", ".join(sorted(options)) + "."


def coerce_setting(cls: type, key: str, value: Any, where: str) -> Any:
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    if key not in names:
        raise SettingsError(
            f"Unknown setting '{key}'", where=where, todo=_suggest(key, names)
        )
    return _check_type(hints[key], value, where)


def _check_type(tp: Any, value: Any, where: str) -> Any:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (typing.Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        errors = []
        for arg in args:
            if arg is type(None):
                continue
            try:
                return _check_type(arg, value, where)
            except SettingsError as exc:
                errors.append(exc)
        raise errors[0]
    if origin is Literal:
        if value not in args:
            raise SettingsError(
                f"Invalid value {value!r}",
                where=where,
                todo="Use one of: " + ", ".join(repr(a) for a in args),
            )
        return value
    if origin is tuple:
        if not isinstance(value, list | tuple):
            raise SettingsError(
                f"Expected a list, got {value!r}", where=where, todo="Write it as [a, b, ...]"
            )
        if len(args) == 2 and args[1] is Ellipsis:
            return tuple(_check_type(args[0], v, where) for v in value)
        if len(value) != len(args):
            raise SettingsError(
                f"Expected {len(args)} values, got {len(value)}", where=where,
                todo="Give exactly that many values",
            )
        return tuple(_check_type(a, v, where) for a, v in zip(args, value, strict=True))
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise SettingsError(f"Expected a number, got {value!r}", where=where,
                                todo="Give a number such as 10.0")
        if not math.isfinite(value):
            raise SettingsError(f"Expected a finite number, got {value!r}", where=where,
                                todo="Give an ordinary number such as 10.0 (not inf or nan)")
        return float(value)
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise SettingsError(f"Expected a whole number, got {value!r}", where=where,
                                todo="Give a whole number such as 10")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            raise SettingsError(f"Expected true or false, got {value!r}", where=where,
                                todo="Write true or false (TOML booleans)")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise SettingsError(f"Expected text, got {value!r}", where=where,
                                todo='Quote the value, e.g. "name"')
        return value
    return value


def settings_from_dict(data: dict[str, Any], where: str = "settings") -> Settings:
    """Build validated :class:`Settings` from a nested dict (as parsed from TOML)."""
    sections = {f.name: f for f in dataclasses.fields(Settings)}
    built: dict[str, Any] = {}
    for name, table in data.items():
        if name not in sections:
            raise SettingsError(
                f"Unknown settings section [{name}]", where=where,
                todo=_suggest(name, list(sections)),
            )
        if not isinstance(table, dict):
            raise SettingsError(
                f"Section [{name}] must be a table of key = value lines", where=where,
                todo=f"Write it as [{name}] followed by key = value lines",
            )
        cls = typing.get_type_hints(Settings)[name]
        values = {k: coerce_setting(cls, k, v, f"{where}, [{name}] {k}") for k, v in table.items()}
        built[name] = cls(**values)
    settings = Settings(**built)
    validate(settings, where)
    return settings


def read_toml(path: str | Path, what: str, missing_todo: str, format_hint: str) -> dict:
    """Parse a TOML file, turning a missing or malformed file into a SettingsError."""
    path = Path(path)
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingsError(f"The {what} does not exist", where=str(path),
                            todo=missing_todo) from None
    except IsADirectoryError:
        raise SettingsError(f"The {what} is a folder, not a file", where=str(path),
                            todo=f"{missing_todo}: it must name a TOML file") from None
    except OSError as exc:
        raise SettingsError(f"The {what} cannot be read ({exc.strerror or exc})",
                            where=str(path), todo=f"{missing_todo} and its permissions") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SettingsError(f"The {what} is not valid TOML ({exc})", where=str(path),
                            todo=f"Fix the line named above; {format_hint}") from None


def load_settings(path: str | Path) -> Settings:
    """Read and validate a TOML settings file."""
    data = read_toml(path, "settings file", "Check the path given to --settings",
                     "see docs/user-guide.md for the format")
    return settings_from_dict(data, where=str(path))


MAX_BOOTSTRAP = 100_000
"""Most bootstrap resamples accepted: the resampled feeds are held in memory (sources x
resamples x stations), and 10**5 already resolves a 95 % interval far beyond its
sampling error (1000 to 10000 are usual)."""
READ_PROCESSES_LIMIT = 64
"""Most reader processes accepted: each holds a chunk in shared memory and its libraries
(about 150 MB), so thousands exhaust any machine's memory; no disk feeds more."""


def validate(settings: Settings, where: str = "settings") -> None:
    """Cross-field checks that a type check cannot express (``where``: the settings file,
    or the options, named in the message)."""
    c = settings.coast
    checks = [
        (c.resample_km > 0, "coast.resample_km must be positive"),
        (len(c.scales_km) >= 2 and all(s > 0 for s in c.scales_km),
         "coast.scales_km needs at least two positive scales"),
        (list(c.scales_km) == sorted(c.scales_km), "coast.scales_km must be in increasing order"),
        (c.station_spacing_km >= c.resample_km,
         "coast.station_spacing_km must be at least coast.resample_km"),
        (len(c.offsets_km) >= 2 and list(c.offsets_km) == sorted(c.offsets_km)
         and c.offsets_km[0] >= 0, "coast.offsets_km must be increasing, from 0 or more"),
        (c.ray_length_km > c.ray_spacing_km > 0,
         "coast.ray_length_km must exceed coast.ray_spacing_km > 0"),
        (c.ray_every >= 1, "coast.ray_every must be at least 1"),
        (settings.signals.omega0 > 0 and 0 < settings.signals.dj <= 1,
         "signals.omega0 must be positive and 0 < signals.dj <= 1"),
        (0 < settings.signals.significance < 1, "signals.significance must be in (0, 1)"),
        (settings.signals.eddy_period_days[0] < settings.signals.eddy_period_days[1],
         "signals.eddy_period_days must be (shortest, longest)"),
        (settings.signals.eddy_period_days[0] > 0,
         "signals.eddy_period_days must be positive (shortest > 0)"),
        (20 <= settings.sources.n_bootstrap <= MAX_BOOTSTRAP,
         f"sources.n_bootstrap must be from 20 to {MAX_BOOTSTRAP}"),
        (settings.sources.gate_window_km > 0, "sources.gate_window_km must be positive"),
        (0 <= settings.sources.min_persistence <= 1, "sources.min_persistence must be in [0, 1]"),
        (settings.monitor.event_threshold_sd > 0 and settings.monitor.event_min_days >= 0
         and settings.monitor.probe_km > 0 and 0 < settings.monitor.min_lag_correlation < 1,
         "monitor.event_threshold_sd and monitor.probe_km must be positive, "
         "monitor.event_min_days at least 0 and monitor.min_lag_correlation in (0, 1)"),
        (set(settings.output.gis) <= {"gpkg", "geojson", "shp", "csv"},
         "output.gis may contain only gpkg, geojson, shp, csv"),
        (settings.ingest.time_chunk is None or settings.ingest.time_chunk >= 1,
         "ingest.time_chunk must be at least 1"),
        (settings.stream.read_processes is None
         or 0 <= settings.stream.read_processes <= READ_PROCESSES_LIMIT,
         f"stream.read_processes must be from 0 to {READ_PROCESSES_LIMIT}"),
        (settings.ingest.depth_m is None or settings.ingest.depth_m >= 0,
         "ingest.depth_m (--depth) must be 0 or more: metres, positive down"),
        (settings.ingest.u_var is None or settings.ingest.u_var != settings.ingest.v_var,
         "ingest.u_var and ingest.v_var (--u-var, --v-var) name the same variable"),
        (settings.ingest.ssh_smooth_km >= 0,
         "ingest.ssh_smooth_km (--ssh-smooth) must be 0 or more"),
    ]
    for ok, message in checks:
        if not ok:
            raise SettingsError(message, where=where,
                                todo="Correct the value (defaults are listed in docs/user-guide.md)")
