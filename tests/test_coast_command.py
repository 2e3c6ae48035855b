"""`coastmon coast` on a file that holds only a land/sea mask of a real coast."""

from __future__ import annotations

import numpy as np
import pyogrio
import xarray as xr
from global_land_mask import globe

from coastmon.cli import main
from coastmon.grid.metrics import haversine_m


def _iberia_mask_file(path):
    lat = np.arange(36.5, 44.0, 0.03)
    lon = np.arange(-11.5, -6.5, 0.03)
    lon2, lat2 = np.meshgrid(lon, lat)
    sea = (~globe.is_land(lat2, lon2)).astype("i1")
    ds = xr.Dataset(
        {"sea": (("lat", "lon"), sea, {"standard_name": "sea_binary_mask", "units": "1",
                                       "long_name": "sea mask (1 = sea)"})},
        coords={"lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
                "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"})},
        attrs={"Conventions": "CF-1.8"},
    )
    ds.to_netcdf(path)
    return path


def test_coast_command_on_a_mask_only_file(tmp_path, capsys):
    src = _iberia_mask_file(tmp_path / "mask.nc")
    out = tmp_path / "coast"
    assert main(["coast", str(src), "--out", str(out)]) == 0
    assert "cape" in capsys.readouterr().out
    layers = {name for name, _ in pyogrio.list_layers(out / "map.gpkg")}
    # check: design.md output contract (layers read back through GDAL/pyogrio)
    assert {"coastline", "capes"} <= layers
    capes = pyogrio.read_dataframe(out / "map.gpkg", layer="capes")
    assert capes.crs.to_epsg() == 4326
    for col in ("cape_id", "curvature_per_km", "scale_km", "protrusion_km"):
        assert col in capes.columns
    assert (out / "capes.csv").is_file()
    assert (out / "figures" / "coast_map.png").stat().st_size > 10_000
    lon = capes.geometry.x.values
    lat = capes.geometry.y.values
    # check: from memory (headland coordinates: Cabo Finisterre 42.88 N 9.27 W,
    # Cabo da Roca 38.78 N 9.50 W, Cabo de Sao Vicente 37.02 N 8.99 W)
    for hlon, hlat in ((-9.27, 42.88), (-9.50, 38.78), (-8.99, 37.02)):
        d_km = haversine_m(lon, lat, hlon, hlat).min() / 1000.0
        assert d_km < 30.0, (hlon, hlat, d_km)
    assert 3 <= len(capes) <= 40
