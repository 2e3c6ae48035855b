"""Stage orchestration: ingest → geometry → one streaming pass → small-data analyses → outputs.

Each stage takes plain objects and returns new ones:

* :func:`prepare` — canonical dataset, grid metrics, coastline, capes, along-shore frame
  (reads only coordinates and the mask);
* :func:`coastmon.stream.run_pass` — the one pass over the (time, y, x) data;
* :func:`analyse_series` — signals, sources, feeds, plumes, spin-up on the small series;
* :func:`write_outputs` — GIS layers, CSV, CF-NetCDF, figures, report, run.json.

:func:`analyze`, :func:`coast` and :func:`demo` chain them for the command line. Outputs
are staged in a hidden sibling folder and moved into place only when everything
succeeded, so a failed or interrupted run leaves no half-written results.
"""

from __future__ import annotations

import errno
import hashlib
import json
import platform
import shutil
import time
import warnings
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask
import dask.local
import geopandas as gpd
import numpy as np
import pandas as pd
import xarray as xr
from shapely.geometry import LineString, Point
from xarray.backends import NetCDF4BackendEntrypoint, ZarrBackendEntrypoint

from coastmon import __version__
from coastmon.assess.spinup import SpinupCurve, spinup_curve
from coastmon.config import Settings
from coastmon.errors import (
    CoastmonError,
    DataWarning,
    GeometryError,
    InputError,
    OutputError,
    RecordError,
)
from coastmon.geometry import (
    build_frame,
    capes_layer,
    coastline_layer,
    extract_coastline,
    find_capes,
)
from coastmon.geometry.capes import apply_catalogue, grid_spacing_km, read_cape_catalogue
from coastmon.grid.metrics import GridMetrics, beta_parameter
from coastmon.io.atomic import atomic_write_text, output_error, staging_dir
from coastmon.io.gis import write_layers
from coastmon.io.ingest import open_dataset
from coastmon.io.owned import owned_dir
from coastmon.io.position import position_text
from coastmon.io.results import CAUTIONS, write_results
from coastmon.report.process import FigureProcess, start_figure_process
from coastmon.signals import (
    band_power,
    default_deformation_radius_km,
    fourier_factor,
    long_rossby_speed,
    wavenumber_frequency,
)
from coastmon.sources import (
    alongshore_profiles,
    find_sources,
    gate_set,
    offshore_feed,
    plume_axes,
    rank_sources,
)
from coastmon.sources.detect import (
    coast_end_km,
    nearshore_anomaly,
    series_per_group,
    time_step_days,
    untested_capes,
)
from coastmon.sources.feed import least_squares_speed, net_flux_density
from coastmon.sources.plumes import time_mean_error
from coastmon.stream import prestart_readers, run_pass
from coastmon.stream.pass_ import closing_spare_readers
from coastmon.stream.readers import close_spares
from coastmon.threads import import_in_background, one_blas_thread


# --------------------------------------------------------------------------- preparation
@dataclass
class Prepared:
    """Everything computed once, before the streaming pass."""

    ds: xr.Dataset
    metrics: GridMetrics
    coastline: Any
    capes: pd.DataFrame
    frame: Any
    ld_km: float
    inputs: list[Path]
    notes: list[str] = field(default_factory=list)


def deformation_radius_km(settings: Settings, frame) -> float:
    """The first baroclinic deformation radius used for along-shore scales (km)."""
    if settings.signals.deformation_radius_km is not None:
        return float(settings.signals.deformation_radius_km)
    return float(default_deformation_radius_km(float(np.nanmedian(frame.stations["lat"]))))


@contextmanager
def geometry_of(path: str | Path) -> Iterator[None]:
    """Name the input file in a :class:`GeometryError` raised from its land/sea mask."""
    try:
        yield
    except GeometryError as exc:
        where = f"{exc.where}, land/sea mask of {path}" if exc.where else f"land/sea mask of {path}"
        raise GeometryError(exc.what, where=where, todo=exc.todo) from None


def open_with_notes(inputs: list[str | Path], settings: Settings) -> tuple[xr.Dataset, list[str]]:
    """:func:`open_dataset`, with its :class:`DataWarning` messages returned as notes for
    the summary and the report (other warnings pass on unchanged)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", DataWarning)
        ds = open_dataset([Path(p) for p in inputs], settings.ingest)
    notes = [str(w.message) for w in caught if issubclass(w.category, DataWarning)]
    for w in caught:
        if not issubclass(w.category, DataWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return ds, notes


def prepare(inputs: list[str | Path], settings: Settings) -> Prepared:
    """Open the inputs lazily and build grid metrics, coastline, capes and frame.

    The coordinates and the mask are read with dask's synchronous scheduler, given as the
    function itself: they are small, and given no scheduler or one by name, dask first
    looks for a dask.distributed client, importing that package (a sixth of a second)
    even when no cluster is used.
    """
    with dask.config.set(scheduler=dask.local.get_sync):
        return _prepare(inputs, settings)


def _prepare(inputs: list[str | Path], settings: Settings) -> Prepared:
    ds, notes = open_with_notes(inputs, settings)
    prestart_readers(ds, settings.stream)  # they import their libraries meanwhile
    try:
        lon = np.asarray(ds["lon"].values, dtype=np.float64)
        lat = np.asarray(ds["lat"].values, dtype=np.float64)
        mask = np.asarray(ds["mask"].values)
        metrics = GridMetrics.from_lonlat(lon, lat)
        bathy = np.asarray(ds["bathymetry"].values) if "bathymetry" in ds else None
        with geometry_of(inputs[0]):
            coastline = extract_coastline(lon, lat, mask, settings.coast, bathymetry=bathy)
            capes = find_capes(coastline, settings.coast)
            frame = build_frame(coastline, lon, lat, mask, settings.coast)
        ld_km = deformation_radius_km(settings, frame)
        capes = catalogue_names(capes, settings, lon, lat, ld_km)
    except BaseException:
        close_spares()  # no pass will take the readers started above
        raise
    return Prepared(ds, metrics, coastline, capes, frame, ld_km, [Path(p) for p in inputs], notes)


def catalogue_names(capes: pd.DataFrame, settings: Settings, lon: np.ndarray, lat: np.ndarray,
                    ld_km: float) -> pd.DataFrame:
    """Capes renamed after the cape catalogue ``coast.cape_catalogue``, when one is given."""
    if not settings.coast.cape_catalogue or len(capes) == 0:
        return capes
    return apply_catalogue(capes, read_cape_catalogue(settings.coast.cape_catalogue),
                           grid_spacing_km(lon, lat), ld_km)


# --------------------------------------------------------------------------- small data
def time_in_days(time: xr.DataArray) -> np.ndarray:
    """Days since the first time step, for standard and model (cftime) calendars."""
    idx = time.to_index()
    delta = pd.to_timedelta(idx - idx[0])
    return np.asarray(delta.total_seconds(), dtype=float) / 86400.0


REPORT_MODULES = ("coastmon.report.build",)
"""Imported on a side thread during the streaming pass (:func:`import_in_background`):
the figures' libraries take a third of a second to import, the pass's main thread
mostly waits on reads meanwhile."""

FEW_WINDOWS = 6
"""Fewest windows of the longest eddy period for the sensitivity measured in
docs/detection-rates.md (two-year records with 120-day windows); fewer gives a note."""


def few_windows_note(n_t: int, dt_days: float, settings: Settings) -> str:
    """A note when the record holds fewer than ``FEW_WINDOWS`` windows of the longest eddy
    period (the test of recurrent shedding then has little power); "" otherwise."""
    longest = float(settings.signals.eddy_period_days[1])
    n_windows = int(n_t * dt_days // max(longest, dt_days))
    if n_windows >= FEW_WINDOWS:
        return ""
    return (f"The record holds only {n_windows} windows of the longest eddy period "
            f"({longest:g} days), so the test of recurrent shedding has little power: a real "
            "but weaker source can go unreported, and which sources pass can change with the "
            "grid or the settings. Read the list as the clearest sources only; a record of "
            f"{FEW_WINDOWS} windows ({FEW_WINDOWS * longest:.0f} days) or more gives the "
            "sensitivity stated in docs/detection-rates.md.")


def check_record_length(n_t: int, dt_days: float, settings: Settings,
                        where: str = "the input files' time axis") -> None:
    """Refuse a record too short for the eddy band, before any work is spent on it.

    Persistence is measured only where the longest eddy period is clear of the record ends,
    i.e. inside the Morlet cone of influence: at the middle of a record of N steps of dt its
    e-folding time is ``lambda/s * N dt / (2 sqrt 2)`` (Torrence & Compo 1998, sec. 3g), so
    N dt must be at least ``2 sqrt(2) / (lambda/s)`` (about 2.74 for omega0 = 6) times the
    longest period of ``signals.eddy_period_days``.
    """
    shortest = float(settings.signals.eddy_period_days[0])
    if shortest < 2.0 * dt_days:
        raise RecordError(
            f"The shortest eddy period, {shortest:g} days, is less than two time steps "
            f"({2.0 * dt_days:g} days): a record sampled every {dt_days:g} days cannot show "
            "periods shorter than twice its step (the Nyquist period)",
            where=f"{where}; signals.eddy_period_days",
            todo=f"Raise the lower end of signals.eddy_period_days to {2.0 * dt_days:g} days "
                 "or more, or give data at a shorter time step")
    longest = float(settings.signals.eddy_period_days[1])
    needed = 2.0 * np.sqrt(2.0) * longest / fourier_factor(settings.signals.omega0)
    length = n_t * dt_days
    if length < needed:
        raise RecordError(
            f"The record is {length:.0f} days long ({n_t} steps, {dt_days:g} d apart), too short "
            f"to measure eddy shedding at periods up to {longest:.0f} days: the middle of the "
            f"record must be clear of edge effects at that period, which needs at least "
            f"{np.ceil(needed):.0f} days",
            where=f"{where}; signals.eddy_period_days",
            todo="Give a longer record (better, several years), or lower the upper end of "
                 "signals.eddy_period_days in a settings file",
        )


@dataclass
class Products:
    """Everything the outputs are made from (all small)."""

    stats: xr.Dataset
    profiles: xr.Dataset
    sources: pd.DataFrame
    gates: pd.DataFrame
    plumes: list[dict]
    jet_spacing_km: float
    spectra: xr.Dataset
    spinup: SpinupCurve
    rossby_speed_cm_s: float
    series: xr.Dataset
    bootstrap_feeds: np.ndarray
    warnings: list[str] = field(default_factory=list)
    untested_capes: list[str] = field(default_factory=list)
    """Ids of the capes where no station could be tested for a source (coast ends)."""


def _analyse(series: xr.Dataset, frame, capes: pd.DataFrame, settings: Settings,
             ld_km: float, dt: float, ray_u_job) -> tuple:
    """Sources, gates, feeds, ranking and plume axes (the steps that depend on each
    other); ``ray_u_job`` gives :func:`time_mean_error` of ``ray_u``."""
    profiles = alongshore_profiles(series, frame, settings, ld_km)
    found = find_sources(profiles, frame, capes, settings, ld_km, series=series)
    gates = gate_set(series, frame, settings, dt, ld_km)
    feed = offshore_feed(found, gates, frame, settings)
    ranked, gates_df, boot = rank_sources(found, feed)
    axes, spacing = plume_axes(series, frame, ranked, settings.sources.gate_offset_km,
                               start_km=settings.sources.nearshore_km,
                               mean_error=ray_u_job.result())
    ranked["zonal_extent_km"] = [a["extent_km"] for a in axes]
    return profiles, found, gates, ranked, gates_df, boot, axes, spacing


@one_blas_thread
def analyse_series(stats: xr.Dataset, series: xr.Dataset, frame, capes: pd.DataFrame,
                   settings: Settings, ld_km: float) -> Products:
    """Signals, sources, feeds, plumes and spin-up from the pass's small outputs."""
    if "time_days" not in series.coords:
        series = series.assign_coords(time_days=("time", time_in_days(series["time"])))
    dt = time_step_days(series)
    check_record_length(series.sizes["time"], dt, settings)
    warnings: list[str] = []
    short = few_windows_note(series.sizes["time"], dt, settings)
    if short:
        warnings.append(short)
    # The two sweeps over whole series that need no source run beside the others.
    fields = [series[name].data for name in ("section_u", "section_v", "ray_u", "ray_v")
              if name in series]
    with ThreadPoolExecutor(max_workers=1) as pool:
        spin_job = pool.submit(spinup_curve, fields, series["time_days"].values)
        ray_u_job = pool.submit(time_mean_error, series["ray_u"].data)
        profiles, found, gates, ranked, gates_df, boot, axes, spacing = _analyse(
            series, frame, capes, settings, ld_km, dt, ray_u_job)
        spin = spin_job.result()
    stability = np.asarray(ranked["rank_stability"].values[:3], dtype=float) if len(ranked) \
        else np.zeros(0)
    stability = stability[np.isfinite(stability)]
    if stability.size and stability.min() < 0.8:
        warnings.append(
            "The ranking is not stable under resampling of the record: some of the top "
            f"sources keep their rank in only {100 * stability.min():.0f} % "
            "of bootstrap resamples. A longer record would settle it."
        )
    unmeasured = int((~np.isfinite(np.asarray(ranked["feed_w_per_m"], dtype=float))).sum()) \
        if len(ranked) else 0
    if unmeasured:
        warnings.append(
            f"The offshore feed of {unmeasured} of {len(ranked)} source(s) could not be "
            "measured: the series at their gates "
            f"({settings.sources.gate_offset_km:g} km offshore) miss more than a tenth of the "
            "time steps, or their rays leave the grid. Their rank is last.")
    lat_mid = float(np.nanmedian(frame.stations["lat"]))
    c_rossby = float(long_rossby_speed(float(beta_parameter(lat_mid)), ld_km * 1000.0))

    if not spin.settled:
        warnings.append(
            "The time mean has not settled: the running mean's pattern correlation with the "
            f"full-record mean reaches {spin.threshold:.1f} only at the end of the record. "
            "Treat the mean-flow diagnostics (plumes, jets) with caution."
        )
    if len(found) == 0:
        warnings.append("No localized, persistent vorticity source was found along this coast.")
    blind = untested_capes(profiles, frame, capes, settings.sources.max_cape_distance_km)
    if len(blind):
        names = ", ".join(f"{c.cape_id} ({position_text(c.lon, c.lat)})"
                          for c in blind.itertuples(index=False))
        reach = coast_end_km(ld_km)
        warnings.append(
            f"{len(blind)} of {len(capes)} cape(s) could not be tested for a source: {names}. "
            f"{'They lie' if len(blind) > 1 else 'It lies'} where the coast on one side is "
            "too short to measure a local "
            f"background (within about {reach:.0f} km of the end of a coastline segment: an "
            "open edge of the domain or a small island), so a source there is neither found "
            "nor ruled out. Extend the domain along the coast to test "
            f"{'them' if len(blind) > 1 else 'it'}.")

    st = frame.stations
    profiles = profiles.assign_coords(
        alongshore_km=("station", st["alongshore_km"].values),
        lon=("station", st["lon"].values),
        lat=("station", st["lat"].values),
    )
    profiles["segment_id"] = ("station", st["segment_id"].values.astype(np.int32),
                              {"long_name": "coast segment id", "units": "1"})
    speed = np.full(len(st), np.nan)
    flux = np.full(len(st), np.nan)
    if gates.station.size:
        nominal = gates.means[0]
        speed[gates.station] = 100.0 * least_squares_speed(nominal[:, 1], nominal[:, 2])
        flux[gates.station] = settings.sources.rho0 * net_flux_density(
            nominal, settings.sources.max_speed_cm_s / 100.0)
    energy = "kinetic plus potential" if gates.has_ssh else "kinetic"
    profiles["gate_west_speed_cm_s"] = ("station", speed, {
        "long_name": "speed of the westward-travelling eddy-band energy at the gate on the "
                     "station's westward ray (least-squares fit)", "units": "cm s-1"})
    profiles["gate_flux_w_per_m2"] = ("station", flux, {
        "long_name": f"net westward eddy-band {energy} energy flux density at the gate on "
                     "the station's westward ray, per metre of depth", "units": "W m-2"})
    spectra = source_spectra(series, frame, ranked, settings, dt)
    if len(ranked):
        spectra = spectra.assign(source_feed_table(ranked))
    return Products(stats, profiles, ranked, gates_df, axes, spacing, spectra, spin,
                    100.0 * c_rossby, series, boot, warnings,
                    [str(c) for c in blind["cape_id"]] if len(blind) else [])


def source_feed_table(ranked: pd.DataFrame) -> dict[str, xr.DataArray]:
    """The feed of each source with its bootstrap and structural intervals, on ``source``
    (the sources in rank order, as ``source_spectra`` lays them out)."""
    names = {"feed_w_per_m": "net westward eddy-band energy flux across the source's gate "
                             "minus the coast's background, per metre of depth",
             "feed_lo": "2.5 % moving-block bootstrap bound of the feed",
             "feed_hi": "97.5 % moving-block bootstrap bound of the feed",
             "feed_struct_lo": "smallest feed over gate offsets +/-50 km and window widths",
             "feed_struct_hi": "largest feed over gate offsets +/-50 km and window widths"}
    return {f"source_{k}": xr.DataArray(ranked[k].to_numpy(float), dims=("source",),
                                        attrs={"long_name": v, "units": "W m-1"})
            for k, v in names.items() if k in ranked.columns}


def source_spectra(series: xr.Dataset, frame, ranked: pd.DataFrame, settings: Settings,
                   dt: float) -> xr.Dataset:
    """Global wavelet spectrum of the near-shore vorticity at each source, and the
    wavenumber–frequency spectrum of vorticity on the top source's ray."""
    s = settings.signals
    zeta = nearshore_anomaly(series["section_zeta"].values, series["offset_km"].values,
                             settings.sources.nearshore_km)
    out = xr.Dataset()
    if len(ranked) == 0:
        return out
    x = np.nan_to_num(zeta[:, ranked["station"].values.astype(int)].T)
    # Sources in groups, so the coefficients stay within a fixed budget however long the
    # record (each source's transform is independent of the others).
    group = series_per_group(x.shape[1])
    spectra = []
    for g0 in range(0, x.shape[0], group):
        _, mean_power, periods = band_power(x[g0:g0 + group], dt, None, dj=s.dj,
                                            omega0=s.omega0)
        spectra.append(mean_power)
    out["source_wavelet_spectrum"] = xr.DataArray(
        np.concatenate(spectra), dims=("source", "period"),
        attrs={"long_name": "time-averaged wavelet power of near-shore relative vorticity",
               "units": "s-2"})
    out = out.assign_coords(period=("period", periods, {"long_name": "Fourier period",
                                                           "units": "days"}),
                            source=("source", ranked["rank"].values.astype(np.int32),
                                    {"long_name": "source rank", "units": "1"}))
    top = int(ranked["station"].values[0])
    ray = np.asarray(series["ray_zeta"].data[:, top, :], dtype=np.float64)
    ok = np.isfinite(ray).all(axis=0)
    if ok.sum() >= 4:
        dd = float(np.median(np.diff(series["ray_km"].values)))
        field_ = ray[:, ok] - ray[:, ok].mean(axis=0)
        kw = wavenumber_frequency(field_, dt, dd)
        out["top_source_kw_power"] = xr.DataArray(
            kw.power, dims=("frequency", "wavenumber"),
            attrs={"long_name": "wavenumber-frequency power of relative vorticity on the "
                                "top source's zonal ray (positive wavenumber: offshore)",
                   "units": "s-2"})
        out = out.assign_coords(
            frequency=("frequency", kw.freq, {"long_name": "frequency", "units": "day-1"}),
            wavenumber=("wavenumber", kw.wavenumber,
                        {"long_name": "wavenumber along the ray", "units": "km-1"}))
    return out


# --------------------------------------------------------------------------- layers
def build_layers(coastline, capes: pd.DataFrame, products: Products, settings: Settings
                 ) -> dict[str, gpd.GeoDataFrame]:
    """The five map layers of the output contract (EPSG:4326)."""
    crs = "EPSG:4326"
    src = products.sources
    keep = ["rank", "feed_w_per_m", "feed_lo", "feed_hi", "persistence", "cape_id",
            "dist_to_cape_km", "alongshore_km", "west_speed_cm_s", "west_speed_sd_cm_s",
            "feed_struct_lo", "feed_struct_hi", "gate_status", "energy_kind", "west_share",
            "east_speed_cm_s", "bg_w_per_m", "kflux_w_per_m",
            "pwork_w_per_m", "pwork_rot_w_per_m", "rank_stability", "zonal_extent_km",
            "segment_id", "localization",
            "localization_scale_km", "shedding_period_days", "localization_q", "n_members",
            "members_km", "attribution", "lon", "lat"]
    table = src[keep].copy() if len(src) else pd.DataFrame({k: [] for k in keep})
    # Along-shore km of the maxima a cape-level source combines, as text for GIS tables.
    table["members_km"] = [";".join(f"{km:.1f}" for km in np.atleast_1d(m) if np.isfinite(km))
                           for m in table["members_km"]]
    sources = gpd.GeoDataFrame(
        table,
        geometry=[Point(x, y) for x, y in zip(src["lon"], src["lat"], strict=True)]
        if len(src) else gpd.GeoSeries([], crs=crs), crs=crs)
    gate_rows, gate_geoms = [], []
    for _, g in products.gates.iterrows():
        if g["lon"] is None or len(g["lon"]) < 2:
            continue
        gate_rows.append({"source_rank": int(g["rank"]),
                          "offset_km": settings.sources.gate_offset_km,
                          "halfwidth_km": settings.sources.gate_halfwidth_km})
        gate_geoms.append(LineString(np.column_stack([g["lon"], g["lat"]])))
    gates = gpd.GeoDataFrame(pd.DataFrame(gate_rows, columns=["source_rank", "offset_km",
                                                              "halfwidth_km"]),
                             geometry=gpd.GeoSeries(gate_geoms, crs=crs), crs=crs)
    plume_rows, plume_geoms = [], []
    for rank, axis in zip(src["rank"].values if len(src) else [], products.plumes, strict=True):
        if axis["lon"].size < 2:
            continue
        plume_rows.append({"source_rank": int(rank), "zonal_extent_km": axis["extent_km"],
                           "jet_spacing_km": products.jet_spacing_km})
        plume_geoms.append(LineString(np.column_stack([axis["lon"], axis["lat"]])))
    plumes = gpd.GeoDataFrame(pd.DataFrame(plume_rows, columns=["source_rank", "zonal_extent_km",
                                                                "jet_spacing_km"]),
                              geometry=gpd.GeoSeries(plume_geoms, crs=crs), crs=crs)
    cape_layer = capes_layer(capes)
    if len(cape_layer):
        # Whether a source could be looked for at the cape (not at coast ends: methods.md §5)
        cape_layer["source_test"] = np.where(
            cape_layer["cape_id"].astype(str).isin(products.untested_capes),
            "untested (coast end)", "tested")
    return {
        "coastline": coastline_layer(coastline),
        "capes": cape_layer,
        "sources": sources,
        "gates": gates,
        "plume_axes": plumes,
    }


# --------------------------------------------------------------------------- provenance
def describe_input(path: Path) -> dict[str, Any]:
    """Path, size and a checksum of the metadata (names, shapes, attributes) of an input."""
    path = Path(path)
    size = sum(f.stat().st_size for f in path.rglob("*") if f.is_file()) if path.is_dir() \
        else path.stat().st_size
    try:
        # Backend classes, not names or guessing: either would import every xarray plugin.
        engine = ZarrBackendEntrypoint if path.is_dir() else NetCDF4BackendEntrypoint
        with xr.open_dataset(path, engine=engine, decode_times=False) as ds:
            meta = {"attrs": {k: str(v) for k, v in ds.attrs.items()},
                    "vars": {k: [list(v.dims), list(v.shape), {a: str(b) for a, b in v.attrs.items()}]
                             for k, v in ds.variables.items()}}
        digest = hashlib.sha256(json.dumps(meta, sort_keys=True).encode()).hexdigest()
    except (OSError, ValueError):
        digest = ""
    return {"path": str(path.resolve()), "size_bytes": int(size), "metadata_sha256": digest}


def versions() -> dict[str, str]:
    import dask
    import matplotlib
    import pyproj
    import pywt
    import scipy
    import shapely

    return {"coastmon": __version__, "python": platform.python_version(),
            "numpy": np.__version__, "scipy": scipy.__version__, "xarray": xr.__version__,
            "dask": dask.__version__, "pandas": pd.__version__, "geopandas": gpd.__version__,
            "shapely": shapely.__version__, "pyproj": pyproj.__version__,
            "pywavelets": pywt.__version__, "matplotlib": matplotlib.__version__}


# --------------------------------------------------------------------------- outputs
def write_outputs(stage: Path, prep: Prepared, products: Products, settings: Settings,
                  provenance: dict[str, Any], series: xr.Dataset | None = None,
                  figure_process: FigureProcess | None = None) -> None:
    """Write every output of the contract into the staging folder.

    ``series`` defaults to the series the products were computed from. With a
    ``figure_process`` (:mod:`coastmon.report.process`), the figures that need no GIS
    layers are drawn there while this process writes the other outputs; nothing is
    written into the staging folder after this returns or raises.
    """
    from coastmon.report.build import start_figures, write_figures_and_report

    series = products.series if series is None else series
    if "time_days" not in series.coords:
        series = series.assign_coords(time_days=("time", time_in_days(series["time"])))
    drawing = settings.output.figures or settings.output.report
    try:
        started = start_figures(stage, prep, products, settings, series,
                                figure_process) if drawing else []
        layers = build_layers(prep.coastline, prep.capes, products, settings)
        write_layers(layers, stage, settings.output.gis)
        ds = prep.ds
        t0, t1 = ds["time"].values[0], ds["time"].values[-1]
        write_results(stage / "results.nc", products.stats, products.profiles,
                      with_feed_bootstrap(products.spectra, products.bootstrap_feeds),
                      attrs={"velocity_kind": ds.attrs.get("velocity_kind", "velocity"),
                             "depth_m": ds.attrs.get("depth_m"),
                             "deformation_radius_km": prep.ld_km,
                             "jet_spacing_km": products.jet_spacing_km,
                             "spinup_length_needed_days": products.spinup.length_needed_days},
                      time_bounds=(str(t0), str(t1)))
        if drawing:
            write_figures_and_report(stage, prep, products, layers, settings, provenance,
                                     series=series, started=started)
    except BaseException:
        if figure_process is not None:
            figure_process.settle()   # no figure lands in a folder being cleaned up
        raise
    atomic_write_text(stage / "run.json", json.dumps(provenance, indent=2, default=str))


def with_feed_bootstrap(spectra: xr.Dataset, boot: np.ndarray) -> xr.Dataset:
    """The spectra plus ``feed_bootstrap(source, bootstrap)``: each source's bootstrap feeds
    (columns of ``boot`` in rank order), kept so that ``coastmon compare`` can form ratio
    intervals from the resamples themselves."""
    boot = np.asarray(boot, dtype=float)
    if "source" not in spectra.dims or boot.ndim != 2 or boot.shape[0] == 0 \
            or boot.shape[1] != spectra.sizes["source"]:
        return spectra
    return spectra.assign(feed_bootstrap=(("source", "bootstrap"), boot.T, {
        "long_name": "westward eddy energy feed of each bootstrap resample of the record",
        "units": "W m-1"}))


def check_out_dir(out: Path, inputs: list[Path]) -> Path:
    """Refuse an output folder that is an input, contains an input, or is a file."""
    out = Path(out).resolve()
    if out.exists() and not out.is_dir():
        raise OutputError("The output path exists and is not a folder", where=str(out),
                          todo="Give --out a folder name (it is created if missing)")
    for p in inputs:
        rp = Path(p).resolve()
        if rp == out or out in rp.parents or rp in out.parents:
            raise OutputError(
                "The output folder is, contains or lies inside an input",
                where=f"--out {out}, input {rp}",
                todo="Write the results to a separate folder so inputs are never touched")
    return out


def pass_error(exc: OSError, work: Path, inputs: list[Path]) -> CoastmonError:
    """A file-system error in the streaming pass: its working folder, or reading an input."""
    if exc.errno in (errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM):
        return output_error(exc, work, "write the working files of the streaming pass (in the "
                            "system temporary folder; set TMPDIR to use another)")
    return InputError(f"Reading the input failed during the streaming pass ({exc})",
                      where=", ".join(str(p) for p in inputs),
                      todo="Check the files with a NetCDF or Zarr tool, or copy them again")


def coverage_notes(ds: xr.Dataset, result) -> list[str]:
    """Notes on the data missing in the record read by the pass (raises when too little
    is left; see :mod:`coastmon.assess.coverage`)."""
    from coastmon.assess.coverage import check_coverage

    return check_coverage(result.valid_steps, result.stats["n_valid"].values,
                          ds["mask"].values, ds["time"].values if "time" in ds.coords else None,
                          json.loads(ds.attrs.get("source_files", "[]")),
                          json.loads(ds.attrs.get("source_steps", "[]")))


@dataclass
class AnalyzeResult:
    out: Path
    products: Products
    timings: dict[str, float]

    def summary_text(self) -> str:
        src = self.products.sources
        lines = [f"coastmon: {len(src)} source(s) found; results in {self.out}"]
        for _, r in src.head(10).iterrows():
            cape = r["cape_id"] or "unanchored"
            feed = (f"feed {r['feed_w_per_m']:.3g} W/m [{r['feed_lo']:.3g}, {r['feed_hi']:.3g}]"
                    if np.isfinite(r["feed_w_per_m"]) else "feed not measurable (see notes)")
            lines.append(
                f"  rank {int(r['rank'])}: {position_text(r['lon'], r['lat'])}  {feed}  "
                f"persistence {r['persistence']:.2f}  cape {cape}")
        for w in self.products.warnings:
            lines.append(f"  note: {w}")
        lines.append(f"  report: {self.out / 'report.html'}")
        return "\n".join(lines)


@closing_spare_readers
def analyze(inputs: list[str | Path], out: str | Path, settings: Settings,
            add_to_stage: Callable[[Path], None] | None = None) -> AnalyzeResult:
    """The whole job: see the module docstring.

    ``add_to_stage`` (used by :func:`demo`) may add files to the staged result before it
    is published, so that they are published with it, as one result.
    """
    timings: dict[str, float] = {}
    t = time.perf_counter()
    inputs = [Path(p) for p in inputs]
    out = check_out_dir(Path(out), inputs)
    # Started first: it imports matplotlib while this process builds the geometry.
    drawer = start_figure_process(settings.output.figures or settings.output.report)
    try:
        products = _analyze(inputs, out, settings, add_to_stage, timings, t, drawer)
    finally:
        if drawer is not None:
            drawer.close()
    return AnalyzeResult(out, products, timings)


def _analyze(inputs: list[Path], out: Path, settings: Settings,
             add_to_stage: Callable[[Path], None] | None, timings: dict[str, float],
             t: float, drawer: FigureProcess | None) -> Products:
    prep = prepare(inputs, settings)
    days = time_in_days(prep.ds["time"])
    check_record_length(days.size, float(np.median(np.diff(days))), settings,
                        where=f"time axis of {', '.join(str(p) for p in inputs)}")
    timings["prepare_s"] = time.perf_counter() - t
    with staging_dir(out) as stage, owned_dir("coastmon-work-") as work:
        t = time.perf_counter()
        import_in_background(*REPORT_MODULES)
        try:
            result = run_pass(prep.ds, prep.metrics, prep.frame, settings.stream, Path(work))
        except OSError as exc:
            raise pass_error(exc, Path(work), inputs) from None
        timings["stream_pass_s"] = time.perf_counter() - t
        t = time.perf_counter()
        notes = prep.notes + coverage_notes(prep.ds, result)
        products = analyse_series(result.stats, result.series, prep.frame, prep.capes,
                                  settings, prep.ld_km)
        products.warnings[:0] = notes
        timings["analyses_s"] = time.perf_counter() - t
        t = time.perf_counter()
        provenance = {
            "coastmon_version": __version__,
            "command": "analyze",
            "inputs": [describe_input(p) for p in inputs],
            "settings": settings.to_dict(),
            "versions": versions(),
            "timings_s": timings,
            "n_time": int(prep.ds.sizes["time"]),
            "grid_shape": list(prep.metrics.shape),
            "deformation_radius_km": prep.ld_km,
        }
        write_outputs(stage, prep, products, settings, provenance, figure_process=drawer)
        timings["outputs_s"] = time.perf_counter() - t
        # Written again so that run.json also carries the time the outputs took.
        atomic_write_text(stage / "run.json", json.dumps(provenance, indent=2, default=str))
        if add_to_stage is not None:
            add_to_stage(stage)
    return products


# --------------------------------------------------------------------------- coast only
@dataclass
class CoastResult:
    out: Path
    capes: pd.DataFrame
    n_segments: int

    def summary_text(self) -> str:
        return (f"coastmon: {self.n_segments} coast segment(s), {len(self.capes)} cape(s); "
                f"map in {self.out / 'map.gpkg'}")


def coast(input_path: str | Path, out: str | Path, settings: Settings) -> CoastResult:
    """Geometry only: coastline and capes from the mask (no time data needed)."""
    from coastmon.report.figures import coast_map_figure

    inputs = [Path(input_path)]
    out = check_out_dir(Path(out), inputs)
    ds = open_dataset(inputs, settings.ingest, need_time=False)
    lon = np.asarray(ds["lon"].values, dtype=np.float64)
    lat = np.asarray(ds["lat"].values, dtype=np.float64)
    mask = np.asarray(ds["mask"].values)
    bathy = np.asarray(ds["bathymetry"].values) if "bathymetry" in ds else None
    with geometry_of(input_path):
        coastline = extract_coastline(lon, lat, mask, settings.coast, bathymetry=bathy)
        capes = find_capes(coastline, settings.coast)
    if len(capes):
        ld_km = (float(settings.signals.deformation_radius_km)
                 if settings.signals.deformation_radius_km is not None
                 else float(default_deformation_radius_km(float(np.median(capes["lat"])))))
        capes = catalogue_names(capes, settings, lon, lat, ld_km)
    layers = {"coastline": coastline_layer(coastline), "capes": capes_layer(capes)}
    with staging_dir(out) as stage:
        formats = tuple(f for f in settings.output.gis if f != "csv") or ("gpkg",)
        write_layers(layers, stage, formats + ("csv",) if "csv" in settings.output.gis else formats)
        (stage / "figures").mkdir(exist_ok=True)
        coast_map_figure(stage / "figures" / "coast_map.png", lon, lat, mask,
                         layers["coastline"], layers["capes"])
        atomic_write_text(stage / "run.json", json.dumps({
            "coastmon_version": __version__, "command": "coast",
            "inputs": [describe_input(p) for p in inputs], "settings": settings.to_dict(),
            "versions": versions()}, indent=2, default=str))
    return CoastResult(out, capes, len(coastline.segments))


# --------------------------------------------------------------------------- demo
def demo(out: str | Path, variant: str = "default", progress: bool = True) -> str:
    """Build the invented scenario, analyse it, and compare with the planted truth."""
    from coastmon.scenario import (
        default_params,
        make_scenario,
        straight_coast_params,
        western_boundary_params,
    )

    params = {"default": default_params, "straight": straight_coast_params,
              "western": western_boundary_params}[variant]()
    params_factory = {"default": "default_params", "straight": "straight_coast_params",
                      "western": "western_boundary_params"}
    out = Path(out).resolve()
    with owned_dir("coastmon-demo-") as data_dir:
        try:
            nc, truth_path = make_scenario(params, data_dir)
        except OSError as exc:
            raise output_error(exc, data_dir, "write the demo's scenario data") from None
        settings = Settings().replace("signals",
                                      deformation_radius_km=params.deformation_radius_km)
        if not progress:
            settings = settings.replace("stream", progress=False)

        def add_demo_files(stage: Path) -> None:
            # The scenario input is a temporary file (it is made again, bit for bit, from
            # the scenario's fixed seed): run.json says so and how to make it again.
            shutil.copy2(truth_path, stage / "planted_truth.json")
            run = json.loads((stage / "run.json").read_text(encoding="utf-8"))
            run["demo"] = {
                "variant": variant,
                "input_kept": False,
                "input_note": "The scenario input was a temporary file and has been removed. "
                              "It is made again, with the same data, from the scenario's fixed seed by "
                              f"'coastmon demo --variant {variant}' or, in Python, by "
                              f"coastmon.scenario.make_scenario(coastmon.scenario."
                              f"{params_factory[variant]}(), FOLDER).",
            }
            atomic_write_text(stage / "run.json", json.dumps(run, indent=2, default=str))

        result = analyze([nc], out, settings, add_to_stage=add_demo_files)
        truth = json.loads(truth_path.read_text(encoding="utf-8"))
    return result.summary_text() + "\n" + truth_comparison(result.products.sources, truth)


def truth_comparison(sources: pd.DataFrame, truth: dict[str, Any], tol_km: float = 60.0) -> str:
    """A few lines comparing the ranking found with the planted one."""
    from coastmon.grid.metrics import haversine_m

    planted = truth.get("sources", [])
    lines = ["planted truth vs found:"]
    if not planted:
        anchored = sources[sources["cape_id"].astype(str) != ""] if len(sources) else sources
        lines.append(f"  no planted source (control); found {len(anchored)} anchored source(s)")
        return "\n".join(lines)
    expected = truth.get("expected_rank", [p.get("name") for p in planted])
    for p in planted:
        lon, lat = p.get("cape_lon", p["lon"]), p.get("cape_lat", p["lat"])
        hit, k, dist = False, -1, float("nan")
        if len(sources):
            d = haversine_m(sources["lon"].values, sources["lat"].values, lon, lat) / 1000
            k = int(np.argmin(d))
            dist = float(d[k])
            hit = dist <= tol_km
        rank = expected.index(p["name"]) + 1 if p.get("name") in expected else "?"
        found = "not found"
        if hit:
            feed, lo, hi = (float(sources[c].values[k]) for c in ("feed_w_per_m", "feed_lo", "feed_hi"))
            inside = lo <= float(p.get("feed_w_per_m", float("nan"))) <= hi
            found = (f"found as rank {int(sources['rank'].values[k])}, {dist:.0f} km from the cape, "
                     f"feed {feed:.3g} W/m [{lo:.3g}, {hi:.3g}], planted feed "
                     f"{'inside' if inside else 'outside'} the interval")
        lines.append(f"  planted rank {rank} ({p.get('cape', '?')}, planted feed "
                     f"{p.get('feed_w_per_m', float('nan')):.3g} W/m): {found}")
    return "\n".join(lines)


__all__ = ["AnalyzeResult", "CAUTIONS", "CoastResult", "Prepared", "Products", "analyse_series",
           "analyze", "build_layers", "coast", "demo", "prepare", "write_outputs"]
