"""Build a corpus of small good and bad input files in a temporary folder.

Nothing here is shipped: the test files call these builders with pytest's ``tmp_path``.
The good record is a 40 x 40 grid, 360 daily steps, off an invented meridional coast with
one cape bump (land to the east), a southward coastal jet and Gaussian eddies shed at the
cape tip that drift westward. Every bad case is a small edit of that record (or a file
that is not a record at all), so each one isolates a single fault.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import xarray as xr

NT, NY, NX = 360, 40, 40
LON = np.linspace(-20.0, -16.1, NX)
LAT = np.linspace(30.0, 33.9, NY)
KM_PER_DEG = 111.195
"""Kilometres per degree of latitude on a sphere of radius 6371 km."""


def coast_lon(lat: np.ndarray) -> np.ndarray:
    """Longitude of the invented coast: a straight meridional shore with one cape bump."""
    return -17.2 - 0.5 * np.exp(-0.5 * ((lat - 32.0) / 0.3) ** 2)


def land_mask() -> np.ndarray:
    """(NY, NX) bool, True on land (east of the coast)."""
    lon2, lat2 = np.meshgrid(LON, LAT)
    return lon2 > coast_lon(lat2)


def flow(nt: int = NT) -> tuple[np.ndarray, np.ndarray]:
    """u, v (nt, NY, NX) in m s-1, NaN on land.

    A southward jet hugging the coast plus Gaussian eddies of alternating sign born every
    20 days at the cape tip and drifting west at 4 km/day (velocities from a Gaussian
    streamfunction, u = -dpsi/dy, v = dpsi/dx, in local km).
    """
    lon2, lat2 = np.meshgrid(LON, LAT)
    x_km = (lon2 - LON[0]) * KM_PER_DEG * np.cos(np.radians(32.0))
    y_km = (lat2 - LAT[0]) * KM_PER_DEG
    dist_km = (coast_lon(lat2) - lon2) * KM_PER_DEG * np.cos(np.radians(32.0))
    jet = -0.25 * np.exp(-np.clip(dist_km, 0.0, None) / 30.0)
    tip_x = (coast_lon(32.0) - LON[0]) * KM_PER_DEG * np.cos(np.radians(32.0)) - 25.0
    tip_y = (32.0 - LAT[0]) * KM_PER_DEG
    rng = np.random.default_rng(12)
    u = np.zeros((nt, NY, NX))
    v = np.broadcast_to(jet, (nt, NY, NX)).copy()
    radius = 30.0
    for birth in np.arange(-200.0, nt, 20.0):
        age = np.arange(nt) - birth
        alive = (age >= 0) & (age < 120)
        if not alive.any():
            continue
        sign = 1.0 if int(birth // 20) % 2 == 0 else -1.0
        amp = sign * 0.3 * 30.0e3 * (1.0 + 0.2 * rng.standard_normal())
        cx = tip_x - 4.0 * age[alive]
        cy = tip_y + 1.5 * age[alive] * sign
        dx = x_km[None] - cx[:, None, None]
        dy = y_km[None] - cy[:, None, None]
        psi = amp * np.exp(-(dx**2 + dy**2) / (2 * radius**2))
        u[alive] += psi * dy / radius**2 / 1.0e3
        v[alive] -= psi * dx / radius**2 / 1.0e3
    land = land_mask()
    u[:, land] = np.nan
    v[:, land] = np.nan
    return u.astype(np.float32), v.astype(np.float32)


def dataset(u: np.ndarray, v: np.ndarray, time: np.ndarray | None = None,
            lat: np.ndarray = LAT, lon: np.ndarray = LON, u_units: str = "m s-1",
            names: tuple[str, str] = ("u", "v")) -> xr.Dataset:
    """A CF dataset of u, v on (time, lat, lon) with the given values."""
    nt = u.shape[0]
    time = np.arange(nt, dtype=float) if time is None else np.asarray(time, dtype=float)
    return xr.Dataset(
        {names[0]: (("time", "lat", "lon"), u,
                    {"standard_name": "eastward_sea_water_velocity", "units": u_units}),
         names[1]: (("time", "lat", "lon"), v,
                    {"standard_name": "northward_sea_water_velocity", "units": "m s-1"})},
        coords={"time": ("time", time, {"units": "days since 2001-01-01",
                                        "standard_name": "time"}),
                "lat": ("lat", np.asarray(lat, float),
                        {"units": "degrees_north", "standard_name": "latitude"}),
                "lon": ("lon", np.asarray(lon, float),
                        {"units": "degrees_east", "standard_name": "longitude"})},
    )


def write(ds: xr.Dataset, path: Path) -> Path:
    ds.to_netcdf(path, engine="netcdf4")
    return path


def good_file(folder: Path, name: str = "good.nc", nt: int = NT) -> Path:
    """The good record (nt daily steps)."""
    u, v = flow(nt)
    return write(dataset(u, v), folder / name)


def sha256_tree(paths: list[Path]) -> dict[str, str]:
    """sha256 of every file under the given files or folders (missing paths map to '')."""
    out: dict[str, str] = {}
    for p in paths:
        p = Path(p)
        files = sorted(f for f in p.rglob("*") if f.is_file()) if p.is_dir() else [p]
        for f in files:
            out[str(f)] = hashlib.sha256(f.read_bytes()).hexdigest() if f.exists() else ""
    return out


def build_corpus(folder: Path) -> dict[str, list[Path]]:
    """Write every bad input into ``folder``; returns {case name: input paths}."""
    folder.mkdir(parents=True, exist_ok=True)
    u, v = flow(NT)
    good = write(dataset(u, v), folder / "good.nc")
    cases: dict[str, list[Path]] = {}

    cases["missing_file"] = [folder / "nowhere.nc"]

    empty = folder / "empty.nc"
    empty.write_bytes(b"")
    cases["zero_size"] = [empty]

    text = folder / "notes.nc"
    text.write_text("time,u,v\n0,0.1,0.2\n1,0.1,0.3\n", encoding="utf-8")
    cases["text_file"] = [text]

    data = good.read_bytes()
    cut = folder / "cut_in_half.nc"
    cut.write_bytes(data[: len(data) // 2])
    cases["truncated"] = [cut]

    temp = xr.Dataset({"temp": (("time", "lat", "lon"), np.full((4, NY, NX), 15.0),
                                {"standard_name": "sea_water_temperature", "units": "degC"})},
                      coords=dataset(u[:4], v[:4]).coords)
    cases["no_velocity"] = [write(temp, folder / "temperature_only.nc")]

    nocoords = dataset(u[:10], v[:10]).rename({"lat": "j", "lon": "i"})
    nocoords = nocoords.drop_vars(["j", "i"])
    cases["no_latlon"] = [write(nocoords, folder / "no_latlon.nc")]

    nan = np.full((10, NY, NX), np.nan, np.float32)
    cases["all_missing"] = [write(dataset(nan, nan), folder / "all_missing.nc")]

    shapes = dataset(u[:10], v[:10])
    shapes = shapes.drop_vars("v").assign(
        v=(("time", "lat_short", "lon"), v[:10, :25],
           {"standard_name": "northward_sea_water_velocity", "units": "m s-1"}))
    cases["mismatched_shapes"] = [write(shapes, folder / "mismatched_shapes.nc")]

    cases["lat_out_of_range"] = [write(dataset(u[:10], v[:10], lat=np.linspace(80, 119, NY)),
                                       folder / "lat_out_of_range.nc")]

    cases["unknown_units"] = [write(dataset(u[:10], v[:10], u_units="leagues per watch"),
                                    folder / "unknown_units.nc")]

    cases["single_step"] = [write(dataset(u[:1], v[:1]), folder / "single_step.nc")]

    rep_t = np.arange(NT, dtype=float)
    rep_t[150] = rep_t[149]
    cases["time_repeats"] = [write(dataset(u, v, time=rep_t), folder / "time_repeats.nc")]

    back_t = np.arange(NT, dtype=float)
    back_t[[100, 101]] = back_t[[101, 100]]
    cases["time_backwards"] = [write(dataset(u, v, time=back_t), folder / "time_backwards.nc")]

    land = xr.Dataset({"u": dataset(u[:10], v[:10])["u"].fillna(0.0),
                       "v": dataset(u[:10], v[:10])["v"].fillna(0.0),
                       "mask": (("lat", "lon"), np.zeros((NY, NX), np.int8),
                                {"standard_name": "sea_binary_mask"})})
    cases["all_land"] = [write(land, folder / "all_land.nc")]

    sea_u = np.nan_to_num(u[:10], nan=0.1) + 0.05
    sea_v = np.nan_to_num(v[:10], nan=-0.1) + 0.05
    cases["all_sea"] = [write(dataset(sea_u, sea_v), folder / "all_sea.nc")]

    short = 60
    cases["record_too_short"] = [write(dataset(u[:short], v[:short]),
                                       folder / "sixty_days.nc")]

    huge = u[:10].copy()
    huge[0, 5, 5] = 1.0e6
    cases["absurd_first_step"] = [write(dataset(huge, v[:10]), folder / "absurd.nc")]

    inf_later = u.copy()
    inf_later[250, 7, 3] = np.inf
    cases["inf_later_step"] = [write(dataset(inf_later, v), folder / "inf_later.nc")]

    cases["damaged_chunk"] = [damaged_chunk_file(folder, u, v)]

    return cases


def damaged_chunk_file(folder: Path, u: np.ndarray, v: np.ndarray) -> Path:
    """The good record deflated in 10-step chunks, with bytes of u's chunk of steps 200-209
    overwritten (a disk or transfer fault in the middle of the record)."""
    import h5py

    path = folder / "damaged_chunk.nc"
    enc = {name: {"zlib": True, "complevel": 1, "chunksizes": (10, NY, NX)} for name in "uv"}
    dataset(u, v).to_netcdf(path, engine="netcdf4", encoding=enc)
    with h5py.File(path, "r") as f:
        info = f["u"].id.get_chunk_info_by_coord((200, 0, 0))
    with path.open("r+b") as fh:
        fh.seek(info.byte_offset + info.size // 2)
        fh.write(b"\x5a" * 64)
    return path


def holes_file(folder: Path) -> Path:
    """The good record with missing values at sea.

    A fixed 2 x 2 hole (missing at every step: a tiny island of no data, too short to count
    as coast) and, at every fifth step, a 6 x 6 patch of missing values that moves (a gap
    such as cloud over a satellite map).
    """
    u, v = flow(NT)
    u[:, 10:12, 8:10] = np.nan
    v[:, 10:12, 8:10] = np.nan
    for k in range(2, NT, 5):
        j0 = 15 + (k // 5) % 10
        u[k, j0:j0 + 6, 4:10] = np.nan
        v[k, j0:j0 + 6, 4:10] = np.nan
    return write(dataset(u, v), folder / "with_holes.nc")


def zarr_store(folder: Path, nt: int = NT) -> Path:
    """The good record as a Zarr store (a folder)."""
    u, v = flow(nt)
    path = folder / "good.zarr"
    dataset(u, v).to_zarr(path, mode="w", consolidated=True, zarr_format=2)
    return path
