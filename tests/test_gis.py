"""GIS layers and atomic writes: read back through GDAL (pyogrio) and the RFC 7946 text."""

from __future__ import annotations

import builtins
import errno
import json
import os

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
from pyproj import Transformer
from shapely.geometry import LineString, Point

from coastmon.errors import OutputError
from coastmon.io import atomic
from coastmon.io.atomic import atomic_path, atomic_write_bytes, atomic_write_text, staging_dir
from coastmon.io.gis import LAYER_COLUMNS, SHAPEFILE_FIELDS, empty_layer, write_layers

# Positions off western Iberia (capes of that coast, approximate, degrees).
SOURCE_LONLAT = [(-9.50, 38.78), (-8.99, 37.02), (-9.42, 39.36)]
CAPE_LONLAT = [(-9.50, 38.78), (-8.99, 37.02)]


def _layers() -> dict[str, gpd.GeoDataFrame]:
    sources = gpd.GeoDataFrame(
        {
            "rank": np.array([1, 2, 3], dtype="int64"),
            "feed_w_per_m": [120.5, 60.25, 25.0],
            "feed_lo": [80.0, 30.0, -5.0],
            "feed_hi": [170.0, 90.0, 50.0],
            "persistence": [0.8, 0.6, 0.5],
            "cape_id": ["C1", "C2", ""],
            "dist_to_cape_km": [5.0, 8.0, 120.0],
            "alongshore_km": [500.0, 780.0, 250.0],
            "west_speed_cm_s": [2.1, 1.8, 2.5],
        },
        geometry=[Point(xy) for xy in SOURCE_LONLAT], crs="EPSG:4326",
    )
    capes = gpd.GeoDataFrame(
        {"cape_id": ["C1", "C2"], "curvature_per_km": [0.021, 0.034], "scale_km": [40.0, 20.0],
         "protrusion_km": [18.0, 9.5], "normal_az_deg": [270.0, 250.0]},
        geometry=[Point(xy) for xy in CAPE_LONLAT], crs="EPSG:4326",
    )
    coast = gpd.GeoDataFrame(
        {"segment_id": [0], "length_km": [412.0]},
        geometry=[LineString([(-8.87, 37.95), (-9.50, 38.78), (-9.42, 39.36), (-8.66, 41.15)])],
        crs="EPSG:4326",
    )
    gates = gpd.GeoDataFrame(
        {"source_rank": [1, 2]},
        geometry=[LineString([(-11.2, 38.3), (-11.2, 39.3)]),
                  LineString([(-10.7, 36.5), (-10.7, 37.5)])], crs="EPSG:4326",
    )
    plumes = gpd.GeoDataFrame(
        {"source_rank": [1], "zonal_extent_km": [640.0]},
        geometry=[LineString([(-9.6, 38.8), (-13.0, 38.6), (-16.9, 38.5)])], crs="EPSG:4326",
    )
    return {"coastline": coast, "capes": capes, "sources": sources, "gates": gates,
            "plume_axes": plumes}


def _coords(gdf: gpd.GeoDataFrame) -> np.ndarray:
    return np.concatenate([np.asarray(g.coords) for g in gdf.geometry])


def test_geopackage_round_trip_through_gdal(tmp_path):
    layers = _layers()
    write_layers(layers, tmp_path, formats=("gpkg",))
    listed = {name: kind for name, kind in pyogrio.list_layers(tmp_path / "map.gpkg")}
    # check: GDAL via pyogrio (layer names and OGR geometry types as stored)
    assert listed == {"coastline": "LineString", "capes": "Point", "sources": "Point",
                      "gates": "LineString", "plume_axes": "LineString"}
    for name, original in layers.items():
        info = pyogrio.read_info(tmp_path / "map.gpkg", layer=name)
        assert info["crs"] == "EPSG:4326"  # check: GDAL via pyogrio (EPSG:4326 contract)
        back = pyogrio.read_dataframe(tmp_path / "map.gpkg", layer=name)
        pd.testing.assert_frame_equal(
            pd.DataFrame(back.drop(columns="geometry")),
            pd.DataFrame(original.drop(columns="geometry")).reset_index(drop=True),
            check_dtype=False,
        )
        # check: GDAL via pyogrio (coordinates stored as doubles, lon then lat)
        np.testing.assert_allclose(_coords(back), _coords(original), rtol=0, atol=1e-12)


def test_projected_input_is_written_in_lon_lat(tmp_path):
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32629", always_xy=True)
    xy = [to_utm.transform(lon, lat) for lon, lat in SOURCE_LONLAT]
    sources = _layers()["sources"].set_geometry([Point(p) for p in xy], crs="EPSG:32629")
    write_layers({"sources": sources}, tmp_path, formats=("gpkg",))
    back = pyogrio.read_dataframe(tmp_path / "map.gpkg", layer="sources")
    # check: pyproj (UTM zone 29N inverse), tolerance from common practice, no source
    np.testing.assert_allclose(_coords(back), np.array(SOURCE_LONLAT), rtol=0, atol=1e-7)


def test_geojson_follows_rfc7946(tmp_path):
    write_layers(_layers(), tmp_path, formats=("geojson",))
    doc = json.loads((tmp_path / "sources.geojson").read_text(encoding="utf-8"))
    assert doc["type"] == "FeatureCollection"
    assert "crs" not in doc  # check: RFC 7946 §4 (no crs member; WGS 84 implied)
    coords = np.array([f["geometry"]["coordinates"] for f in doc["features"]])
    # check: RFC 7946 §3.1.1 (position = [longitude, latitude]); 7 decimals per GDAL RFC7946
    np.testing.assert_allclose(coords, np.array(SOURCE_LONLAT), rtol=0, atol=1e-7)
    assert [f["properties"]["rank"] for f in doc["features"]] == [1, 2, 3]
    line = json.loads((tmp_path / "coastline.geojson").read_text(encoding="utf-8"))
    assert line["features"][0]["geometry"]["type"] == "LineString"  # check: RFC 7946 §3.1.4
    back = pyogrio.read_dataframe(tmp_path / "plume_axes.geojson")
    assert back.crs.to_epsg() == 4326  # check: GDAL via pyogrio (GeoJSON is WGS 84)


def test_shapefile_field_names_and_sidecar(tmp_path):
    layers = _layers()
    write_layers(layers, tmp_path, formats=("shp",))
    folder = tmp_path / "shapefile"
    sidecar = pd.read_csv(folder / "fields.csv", keep_default_na=False)
    for name, original in layers.items():
        info = pyogrio.read_info(folder / f"{name}.shp")
        fields = list(info["fields"])
        # check: ESRI Shapefile Technical Description 1998 (dBASE field names <= 10 chars)
        assert all(len(f) <= 10 for f in fields)
        mapped = sidecar[sidecar["layer"] == name]
        assert list(mapped["shapefile_field"]) == fields
        back = pyogrio.read_dataframe(folder / f"{name}.shp")
        for column, field in zip(mapped["column"], mapped["shapefile_field"], strict=True):
            expected = original[column].to_numpy()
            got = back[field].to_numpy()
            if expected.dtype.kind == "f":
                np.testing.assert_allclose(got, expected)  # check: GDAL via pyogrio
            else:
                # check: from memory (a blank dBASE text field reads back as null in GDAL)
                blank = [v is None or (isinstance(v, float) and np.isnan(v)) for v in got]
                assert [("" if b else str(v)) for v, b in zip(got, blank, strict=True)] == [
                    str(v) for v in expected]
    # the documented examples of the mapping (design.md §5 and docs/data-dictionary.md)
    assert SHAPEFILE_FIELDS["feed_w_per_m"] == "feed_wpm"
    assert SHAPEFILE_FIELDS["dist_to_cape_km"] == "dcape_km"
    assert SHAPEFILE_FIELDS["west_speed_cm_s"] == "wspd_cms"
    assert set(pyogrio.read_info(folder / "sources.shp")["fields"]) >= {
        "feed_wpm", "dcape_km", "wspd_cms", "along_km"}


def test_empty_layers_keep_their_schema(tmp_path):
    layers = {"coastline": _layers()["coastline"], "capes": _layers()["capes"],
              "sources": empty_layer("sources"), "gates": empty_layer("gates")}
    write_layers(layers, tmp_path, formats=("gpkg", "csv", "shp"))
    info = pyogrio.read_info(tmp_path / "map.gpkg", layer="sources")
    # check: GDAL via pyogrio (an empty layer still declares its geometry type and fields)
    assert info["features"] == 0
    assert info["geometry_type"] == "Point"
    assert list(info["fields"]) == list(LAYER_COLUMNS["sources"])
    assert pyogrio.read_info(tmp_path / "map.gpkg", layer="gates")["geometry_type"] == "LineString"
    table = pd.read_csv(tmp_path / "sources.csv")
    assert len(table) == 0
    assert list(table.columns) == [*LAYER_COLUMNS["sources"], "lon", "lat"]
    assert pyogrio.read_info(tmp_path / "shapefile" / "sources.shp")["features"] == 0


def test_csv_tables_have_lon_lat_and_no_geometry(tmp_path):
    write_layers(_layers(), tmp_path, formats=("csv",))
    table = pd.read_csv(tmp_path / "sources.csv", keep_default_na=False)
    assert "geometry" not in table.columns
    # check: the positions planted in the layer above
    np.testing.assert_allclose(table[["lon", "lat"]].to_numpy(), np.array(SOURCE_LONLAT))
    assert list(table["cape_id"]) == ["C1", "C2", ""]
    capes = pd.read_csv(tmp_path / "capes.csv")
    np.testing.assert_allclose(capes[["lon", "lat"]].to_numpy(), np.array(CAPE_LONLAT))
    assert not (tmp_path / "coastline.csv").exists()


def test_contract_columns_are_required(tmp_path):
    broken = _layers()["sources"].drop(columns=["feed_lo"])
    with pytest.raises(ValueError, match="feed_lo"):
        write_layers({"sources": broken}, tmp_path)
    assert not (tmp_path / "map.gpkg").exists()


# ---------------------------------------------------------------- atomic writes


def _leftovers(folder):
    return [p.name for p in folder.iterdir() if p.name.startswith(".")]


def test_atomic_write_replaces_and_leaves_no_temporaries(tmp_path):
    target = tmp_path / "run.json"
    atomic_write_text(target, "first")
    atomic_write_bytes(target, b"second")
    assert target.read_bytes() == b"second"
    assert _leftovers(tmp_path) == []


def test_failed_write_keeps_the_old_file(tmp_path):
    target = tmp_path / "results.nc"
    target.write_text("old complete file")
    with pytest.raises(RuntimeError), atomic_path(target) as tmp:
        tmp.write_text("half")
        raise RuntimeError("computation failed")
    assert target.read_text() == "old complete file"
    assert _leftovers(tmp_path) == []


def test_permission_denied_becomes_output_error(tmp_path, monkeypatch):
    def refuse(src, dst):
        raise PermissionError(errno.EACCES, "Permission denied", str(dst))

    monkeypatch.setattr(os, "replace", refuse)
    with pytest.raises(OutputError, match="permission was denied") as info:
        atomic_write_text(tmp_path / "a.txt", "x")
    assert "Where:" in str(info.value)
    assert _leftovers(tmp_path) == []


def test_disk_full_becomes_output_error(tmp_path, monkeypatch):
    real_open = builtins.open

    class FullDisk:
        def __init__(self, fh):
            self.fh = fh

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.fh.close()

        def write(self, data):
            raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(atomic, "open", lambda p, m: FullDisk(real_open(p, m)), raising=False)
    with pytest.raises(OutputError, match="disk is full"):
        atomic_write_bytes(tmp_path / "big.bin", b"123")
    assert not (tmp_path / "big.bin").exists()
    assert _leftovers(tmp_path) == []


def test_staging_publishes_and_keeps_user_files(tmp_path):
    out = tmp_path / "out"
    with staging_dir(out) as stage:
        (stage / "sources.csv").write_text("stale")
    (out / "notes.txt").write_text("mine")
    with staging_dir(out) as stage:
        assert stage.parent == tmp_path and stage.name.startswith(".out.partial-")
        (stage / "sources.csv").write_text("fresh")
        (stage / "figures").mkdir()
        (stage / "figures" / "map.png").write_bytes(b"png")
    assert (out / "notes.txt").read_text() == "mine"
    assert (out / "sources.csv").read_text() == "fresh"
    assert (out / "figures" / "map.png").read_bytes() == b"png"
    assert _leftovers(tmp_path) == []


def test_interrupted_run_leaves_nothing(tmp_path):
    out = tmp_path / "new_out"
    with pytest.raises(KeyboardInterrupt), staging_dir(out) as stage:
        (stage / "map.gpkg").write_bytes(b"partial")
        raise KeyboardInterrupt
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []


def test_output_folder_that_is_a_file(tmp_path):
    target = tmp_path / "out"
    target.write_text("a file")
    with pytest.raises(OutputError, match="existing file"), staging_dir(target):
        pass


def test_unwritable_parent_becomes_output_error(tmp_path, monkeypatch):
    def refuse(*args, **kwargs):
        raise PermissionError(errno.EROFS, "Read-only file system")

    monkeypatch.setattr(atomic.tempfile, "mkdtemp", refuse)
    with pytest.raises(OutputError, match="read-only"), staging_dir(tmp_path / "out"):
        pass
    assert not (tmp_path / "out").exists()
