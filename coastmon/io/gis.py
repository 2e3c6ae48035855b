"""GIS layers: GeoPackage, GeoJSON, Shapefile and CSV.

The map layers of a run are plain :class:`geopandas.GeoDataFrame` objects, one per layer:

=============  ===============  ==========================================================
layer          geometry         attributes (at least)
=============  ===============  ==========================================================
coastline      LineString       (as produced by the geometry stage)
capes          Point            cape_id, curvature_per_km, scale_km, protrusion_km
sources        Point            rank, feed_w_per_m, feed_lo, feed_hi, persistence, cape_id,
                                dist_to_cape_km, alongshore_km, west_speed_cm_s
gates          LineString       (as produced by the sources stage)
plume_axes     LineString       (as produced by the sources stage)
cape_changes   Point            ``coastmon compare``: place_id, run, verdict, colour, feeds
                                and ratio (see docs/comparing-runs.md)
=============  ===============  ==========================================================

:func:`write_layers` writes them in any of four formats, every file atomically:

- ``gpkg``: one GeoPackage ``map.gpkg`` holding every layer (EPSG:4326);
- ``geojson``: ``<layer>.geojson`` per layer, written as RFC 7946 GeoJSON (WGS 84,
  longitude before latitude, counter-clockwise exterior rings);
- ``shp``: ``shapefile/<layer>.shp`` per layer, with field names shortened to the
  10 characters a dBASE table allows by :data:`SHAPEFILE_FIELDS`; the mapping actually
  used is written beside them as ``shapefile/fields.csv``;
- ``csv``: ``sources.csv`` and ``capes.csv`` (when those layers are given): the attribute
  table plus ``lon`` and ``lat`` columns taken from the point geometry, no geometry column.

Layers without rows are still written, with their columns and geometry type, so that a
run that found no sources produces an empty but well-formed ``sources`` layer.
See ``docs/data-dictionary.md`` for every column and its units.
"""

from __future__ import annotations

import csv
import io
import os
import re
import shutil
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely

from coastmon.errors import OutputError
from coastmon.io.atomic import atomic_path, atomic_write_text, output_error

FORMATS = ("gpkg", "geojson", "shp", "csv")
"""The GIS formats :func:`write_layers` knows."""

GPKG_NAME = "map.gpkg"
CSV_LAYERS = ("sources", "capes")
"""Layers that are also written as CSV tables."""

LAYER_GEOMETRY = {
    "coastline": "LineString",
    "capes": "Point",
    "sources": "Point",
    "gates": "LineString",
    "plume_axes": "LineString",
    "cape_changes": "Point",
}
"""Geometry type of each standard layer (used when a layer has no rows)."""

LAYER_COLUMNS: dict[str, dict[str, str]] = {
    "capes": {
        "cape_id": "object",
        "curvature_per_km": "float64",
        "scale_km": "float64",
        "protrusion_km": "float64",
    },
    "sources": {
        "rank": "int64",
        "feed_w_per_m": "float64",
        "feed_lo": "float64",
        "feed_hi": "float64",
        "persistence": "float64",
        "cape_id": "object",
        "dist_to_cape_km": "float64",
        "alongshore_km": "float64",
        "west_speed_cm_s": "float64",
    },
}
"""Columns (and dtypes) every ``capes`` and ``sources`` layer must have (output contract)."""

SHAPEFILE_FIELDS = {
    "feed_w_per_m": "feed_wpm",
    "feed_lo": "feed_lo",
    "feed_hi": "feed_hi",
    "persistence": "persist",
    "dist_to_cape_km": "dcape_km",
    "west_speed_cm_s": "wspd_cms",
    "curvature_per_km": "curv_pkm",
    "protrusion_km": "protr_km",
    "alongshore_km": "along_km",
    "normal_az_deg": "norm_az",
    "source_test": "src_test",
    "scale_km": "scale_km",
    "length_km": "length_km",
    "zonal_extent_km": "zext_km",
    "jet_spacing_km": "jetsp_km",
    "segment_id": "seg_id",
    "is_island": "island",
    "source_rank": "src_rank",
    "offset_km": "offset_km",
    "halfwidth_km": "halfw_km",
    "west_speed_sd_cm_s": "wspdsd_cms",
    "pwork_w_per_m": "pwork_wpm",
    "pwork_rot_w_per_m": "pwrot_wpm",
    "kflux_w_per_m": "kflux_wpm",
    "feed_struct_lo": "feed_stlo",
    "feed_struct_hi": "feed_sthi",
    "gate_status": "gate_stat",
    "energy_kind": "energy",
    "east_speed_cm_s": "espd_cms",
    "west_share": "west_shr",
    "rank_stability": "rank_stab",
    "localization": "localiz",
    "localization_scale_km": "locsc_km",
    "shedding_period_days": "shed_pd",
}
"""Shapefile field names (at most 10 characters) for the project's longer column names.

Columns of 10 characters or fewer that are not listed keep their name. A longer column that
is not listed is cut to 10 characters (with a numeric ending if that collides); the
``fields.csv`` sidecar always lists the mapping that was used.
"""

_DBF_MAX = 10


def empty_layer(name: str) -> gpd.GeoDataFrame:
    """An empty layer with the contract columns of ``name`` (EPSG:4326).

    Parameters
    ----------
    name
        One of the standard layer names (see :data:`LAYER_GEOMETRY`).
    """
    if name not in LAYER_GEOMETRY:
        raise ValueError(f"unknown standard layer {name!r}; known: {sorted(LAYER_GEOMETRY)}")
    columns = {c: pd.Series([], dtype=t) for c, t in LAYER_COLUMNS.get(name, {}).items()}
    return gpd.GeoDataFrame(columns, geometry=gpd.GeoSeries([], crs="EPSG:4326"),
                            crs="EPSG:4326")


def shapefile_field_names(columns: Iterable[str]) -> dict[str, str]:
    """Map column names to unique dBASE field names of at most 10 characters.

    Uses :data:`SHAPEFILE_FIELDS` first, keeps short names, and cuts any other long name
    to 10 characters, adding ``_2``, ``_3``... (within the 10) if a name would repeat.
    """
    mapping: dict[str, str] = {}
    used: set[str] = set()
    for col in columns:
        base = SHAPEFILE_FIELDS.get(col, col)[:_DBF_MAX]
        name = base
        n = 2
        while name.lower() in used:
            suffix = f"_{n}"
            name = base[: _DBF_MAX - len(suffix)] + suffix
            n += 1
        used.add(name.lower())
        mapping[col] = name
    return mapping


def _prepare(name: str, layer: gpd.GeoDataFrame) -> gpd.GeoDataFrame:
    """Check the layer, bring it to EPSG:4326 and give empty layers their schema."""
    if not isinstance(layer, gpd.GeoDataFrame):
        raise TypeError(f"layer {name!r} must be a geopandas.GeoDataFrame, got {type(layer)}")
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", name):
        raise ValueError(f"layer name {name!r} must be letters, digits and underscores")
    gdf = layer.copy()
    gdf = gdf.set_crs("EPSG:4326") if gdf.crs is None else gdf.to_crs("EPSG:4326")
    for col, dtype in LAYER_COLUMNS.get(name, {}).items():
        if col not in gdf.columns:
            if len(gdf):
                raise ValueError(f"layer {name!r} lacks the contract column {col!r}")
            gdf[col] = pd.Series([], dtype=dtype)
    gdf = gdf.reset_index(drop=True)
    return gdf


def _geometry_type(name: str, gdf: gpd.GeoDataFrame) -> tuple[str, bool]:
    """Geometry type to declare, and whether to promote single parts to multi."""
    types = set(gdf.geometry.dropna().geom_type)
    if not types:
        return LAYER_GEOMETRY.get(name, "Unknown"), False
    if len(types) == 1:
        return types.pop(), False
    singles = {t.removeprefix("Multi") for t in types}
    if len(singles) == 1:
        return "Multi" + singles.pop(), True
    return "Unknown", False


def _write(gdf: gpd.GeoDataFrame, path: Path, name: str, driver: str, **options: str) -> None:
    geometry_type, promote = _geometry_type(name, gdf)
    try:
        pyogrio.write_dataframe(
            gdf, path, layer=name, driver=driver, geometry_type=geometry_type,
            promote_to_multi=promote, **options,
        )
    except (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError) as exc:
        # GDAL reports a full disk or a lost folder without an errno: say what is known
        free = shutil.disk_usage(path.parent).free if path.parent.exists() else 0
        reason = ("the disk is full" if free < (1 << 20) else
                  f"the GIS library reported: {exc}")
        raise OutputError(f"Could not write {path.name}: {reason}", where=str(path.parent),
                          todo="Free some space or choose another output folder") from None


def _table(gdf: gpd.GeoDataFrame) -> pd.DataFrame:
    """Attribute table with lon, lat from the (point) geometry, no geometry column."""
    table = pd.DataFrame(gdf.drop(columns=gdf.geometry.name))
    table = table.drop(columns=[c for c in ("lon", "lat") if c in table.columns])
    points = np.asarray(gdf.geometry.values, dtype=object)
    table["lon"] = shapely.get_x(points).astype("float64")  # NaN for anything but points
    table["lat"] = shapely.get_y(points).astype("float64")
    return table


def write_layers(
    layers: Mapping[str, gpd.GeoDataFrame],
    out_dir: str | os.PathLike[str],
    formats: Iterable[str] = ("gpkg", "csv"),
) -> list[Path]:
    """Write map layers in the requested GIS formats.

    Parameters
    ----------
    layers
        Layer name → GeoDataFrame. Names are written as given (the standard ones are
        ``coastline``, ``capes``, ``sources``, ``gates``, ``plume_axes``). A layer
        without a CRS is taken to be in longitude/latitude degrees (EPSG:4326); others
        are transformed to EPSG:4326. Layers ``capes`` and ``sources`` must carry the
        contract columns (:data:`LAYER_COLUMNS`); when they have no rows, missing
        columns are added.
    out_dir
        Output folder (created if missing).
    formats
        Any of ``"gpkg"``, ``"geojson"``, ``"shp"``, ``"csv"``.

    Returns
    -------
    list of pathlib.Path
        The files written, in writing order.
    """
    formats = tuple(formats)
    unknown = set(formats) - set(FORMATS)
    if unknown:
        raise ValueError(f"unknown GIS formats {sorted(unknown)}; known: {FORMATS}")
    out_dir = Path(out_dir)
    prepared = {name: _prepare(name, gdf) for name, gdf in layers.items()}
    written: list[Path] = []
    if "gpkg" in formats and prepared:
        final = out_dir / GPKG_NAME
        with atomic_path(final) as tmp:
            for name, gdf in prepared.items():
                _write(gdf, tmp, name, "GPKG")
        written.append(final)
    if "geojson" in formats:
        for name, gdf in prepared.items():
            final = out_dir / f"{name}.geojson"
            with atomic_path(final) as tmp:
                _write(gdf, tmp, name, "GeoJSON", layer_options={"RFC7946": "YES"})
            written.append(final)
    if "shp" in formats and prepared:
        written.extend(_write_shapefiles(prepared, out_dir / "shapefile"))
    if "csv" in formats:
        for name in CSV_LAYERS:
            if name in prepared:
                buf = io.StringIO()
                _table(prepared[name]).to_csv(buf, index=False, lineterminator="\n")
                written.append(atomic_write_text(out_dir / f"{name}.csv", buf.getvalue()))
    return written


def _write_shapefiles(prepared: Mapping[str, gpd.GeoDataFrame], folder: Path) -> list[Path]:
    """One Shapefile per layer in ``folder`` plus ``fields.csv`` (layer, column, field)."""
    written: list[Path] = []
    rows: list[tuple[str, str, str]] = []
    for name, gdf in prepared.items():
        attrs = [c for c in gdf.columns if c != gdf.geometry.name]
        mapping = shapefile_field_names(attrs)
        rows.extend((name, col, mapping[col]) for col in attrs)
        renamed = gdf.rename(columns=mapping)
        final = folder / f"{name}.shp"
        try:
            folder.mkdir(parents=True, exist_ok=True)
            tmp_dir = Path(tempfile.mkdtemp(prefix=f".{name}.tmp-", dir=folder))
        except OSError as exc:
            raise output_error(exc, folder, "create the shapefile folder") from None
        try:
            _write(renamed, tmp_dir / f"{name}.shp", name, "ESRI Shapefile", ENCODING="UTF-8")
            for part in sorted(tmp_dir.iterdir()):
                os.replace(part, folder / part.name)
        except OSError as exc:
            raise output_error(exc, final, f"write {final.name}") from None
        finally:
            shutil.rmtree(tmp_dir, ignore_errors=True)
        written.append(final)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(["layer", "column", "shapefile_field"])
    writer.writerows(rows)
    written.append(atomic_write_text(folder / "fields.csv", buf.getvalue()))
    return written

