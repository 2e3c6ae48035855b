"""Decoding deflated NetCDF-4 chunks in parallel threads (coastmon.io.chunks).

Every value is checked bit for bit against what the reference libraries read from the same
file: netCDF4-python (the netCDF-C library over HDF5) and h5py (the HDF5 library).
"""

from __future__ import annotations

import os
import pickle
import shutil
import zlib

import h5py
import netCDF4
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from coastmon.config import IngestSettings, StreamSettings
from coastmon.errors import InputError
from coastmon.io import chunks
from coastmon.io.ingest import open_dataset
from coastmon.stream import readers
from coastmon.stream.pass_ import _input_arrays, _local_plan

SHAPE = (11, 17, 13)
CHUNKS = (3, 7, 5)  # edge chunks on every axis


def write_nc(path, dtype="f4", shuffle=True, endian="native", chunksizes=CHUNKS,
             fletcher32=False, complevel=4, written=None, layout="deflate"):
    """One variable ``q`` (time, y, x) with NaN/fill holes: deflated in chunks (``layout``
    "deflate"), chunked without compression ("chunked") or "contiguous" (fixed time axis)."""
    rng = np.random.default_rng(3)
    if endian == "big":
        dtype = np.dtype(dtype).newbyteorder(">")
    data = (rng.standard_normal(SHAPE) * 50).astype(dtype)
    if np.dtype(dtype).kind == "f":
        data[2, 3:9, 4] = np.nan
    options = {"zlib": True, "complevel": complevel, "shuffle": shuffle,
               "chunksizes": chunksizes, "fletcher32": fletcher32}
    if layout == "chunked":
        options.update(zlib=False, shuffle=False)
    elif layout == "contiguous":
        options = {"contiguous": True}
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("time", SHAPE[0] if layout == "contiguous" else None)
        nc.createDimension("y", SHAPE[1])
        nc.createDimension("x", SHAPE[2])
        var = nc.createVariable("q", dtype, ("time", "y", "x"), endian=endian, **options)
        steps = range(SHAPE[0]) if written is None else written
        for t in steps:
            var[t] = data[t]
    return data


def reference(path):
    with netCDF4.Dataset(path) as nc:
        var = nc["q"]
        var.set_auto_maskandscale(False)
        return np.asarray(var[:])


def direct(path) -> chunks.ChunkedArray:
    with netCDF4.Dataset(path) as nc:
        var = nc["q"]
        return chunks.ChunkedArray(str(path), "q", var.shape, var.dtype, fallback=None)


def same_bits(a, b):
    a, b = np.asarray(a), np.asarray(b)
    return a.shape == b.shape and a.dtype.itemsize == b.dtype.itemsize and np.array_equal(
        a.astype(a.dtype.newbyteorder("=")).view(f"u{a.dtype.itemsize}"),
        b.astype(b.dtype.newbyteorder("=")).view(f"u{b.dtype.itemsize}"))


@pytest.mark.parametrize("dtype,shuffle,endian,layout", [
    ("f4", True, "native", "deflate"), ("f4", False, "native", "deflate"),
    ("f8", True, "native", "deflate"), ("i2", True, "native", "deflate"),
    ("i4", True, "big", "deflate"), ("f4", True, "big", "deflate"),
    ("u1", True, "native", "deflate"), ("f4", False, "native", "chunked"),
    ("f4", False, "native", "contiguous"), ("i2", False, "big", "contiguous"),
    ("f8", False, "native", "contiguous"),
])
def test_whole_variable_matches_the_netcdf_library(tmp_path, dtype, shuffle, endian, layout):
    # check: netCDF4-python (netCDF-C over HDF5) reads the same bits from the same file
    path = tmp_path / "q.nc"
    write_nc(path, dtype=dtype, shuffle=shuffle, endian=endian, layout=layout)
    arr = direct(path)
    assert arr.index() is not None
    assert arr.index().contiguous == (layout == "contiguous")
    ref = reference(path)
    assert same_bits(arr.read_box([0, 0, 0], list(SHAPE)), ref)
    assert same_bits(arr.read_box([2, 5, 3], [9, 6, 11]), ref[2:9, 5:6, 3:11])
    assert same_bits(arr.read_box([4, 0, 0], [7, SHAPE[1], SHAPE[2]]), ref[4:7])


@pytest.fixture(scope="module")
def shuffled_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("chunks") / "q.nc"
    write_nc(path)
    return path, reference(path)


@pytest.fixture(scope="module")
def contiguous_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("contiguous") / "q.nc"
    write_nc(path, layout="contiguous")
    return path, reference(path)


def _axis_key(draw, n):
    if draw(st.booleans()):
        return draw(st.integers(-n, n - 1))
    start = draw(st.none() | st.integers(-n - 2, n + 2))
    stop = draw(st.none() | st.integers(-n - 2, n + 2))
    step = draw(st.none() | st.sampled_from([1, 2, 3, -1, -2]))
    key = slice(start, stop, step)
    # xarray itself fails on an empty reversed slice (with any backend); not ours to test.
    assume((step or 1) > 0 or len(range(*key.indices(n))) > 0)
    return key


@st.composite
def selections(draw):
    return tuple(_axis_key(draw, n) for n in SHAPE)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(key=selections(), contiguous=st.booleans())
def test_any_selection_matches_numpy_on_the_library_read(shuffled_file, contiguous_file, key,
                                                          contiguous):
    # check: numpy's basic indexing of the netCDF4 library's read of the whole variable
    path, ref = contiguous_file if contiguous else shuffled_file
    ds = xr.open_dataset(path, engine=chunks.Entrypoint, mask_and_scale=False)
    try:
        assert ds["q"].encoding.get(chunks.ENCODING_KEY) is True
        got = ds["q"][key].values
    finally:
        ds.close()
    assert same_bits(got, ref[key])


def test_index_arrays_are_read_by_the_library(shuffled_file):
    # check: numpy's outer indexing of the netCDF4 library's read of the whole variable
    path, ref = shuffled_file
    ds = xr.open_dataset(path, engine=chunks.Entrypoint, mask_and_scale=False)
    try:
        got = ds["q"].isel(time=[0, 4, 9], x=[1, 2, 12]).values
    finally:
        ds.close()
    assert same_bits(got, ref[[0, 4, 9]][:, :, [1, 2, 12]])


def test_one_decode_thread_reads_the_same(shuffled_file):
    # check: netCDF4-python's read of the same file
    path, ref = shuffled_file
    chunks.set_decode_threads(1)
    try:
        assert chunks.decode_threads() == 1
        got = direct(path).read_box([0, 0, 0], list(SHAPE))
    finally:
        chunks.set_decode_threads(None)
    assert chunks.decode_threads() >= 1
    assert same_bits(got, ref)


def test_a_variable_in_too_many_chunks_is_left_to_the_library(shuffled_file, monkeypatch):
    # check: netCDF4-python's read of the same file (the index would grow with the record)
    path, ref = shuffled_file
    monkeypatch.setattr(chunks, "MAX_INDEXED_CHUNKS", 10)
    ds = xr.open_dataset(path, engine=chunks.Entrypoint, mask_and_scale=False)
    try:
        backend = ds["q"].variable._data
        while not isinstance(backend, chunks.ChunkedArray):  # xarray's lazy wrappers
            backend = backend.array
        assert same_bits(ds["q"][1:7].values, ref[1:7])
        assert backend.index() is None  # 4 x 3 x 3 = 36 chunks > 10
    finally:
        ds.close()


def test_unwritten_chunks_read_as_the_fill_value(tmp_path):
    # check: netCDF4-python returns the fill value where HDF5 never stored a chunk
    path = tmp_path / "holes.nc"
    write_nc(path, written=[0, 1, 2, 9, 10])  # chunks of steps 3-5 and 6-8 never written
    with h5py.File(path, "r") as f:
        stored = f["q"].id.get_num_chunks()
    assert stored < np.prod([-(-n // c) for n, c in zip(SHAPE, CHUNKS, strict=True)])
    got = direct(path).read_box([0, 0, 0], list(SHAPE))
    assert same_bits(got, reference(path))


def test_a_contiguous_variable_never_written_reads_as_the_fill_value(tmp_path):
    # check: netCDF4-python returns the fill value where HDF5 allocated no storage
    path = tmp_path / "empty.nc"
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("t", 6)
        nc.createDimension("x", 5)
        nc.createVariable("q", "f4", ("t", "x"), contiguous=True, fill_value=-9.5)
    with netCDF4.Dataset(path) as nc:
        var = nc["q"]
        var.set_auto_maskandscale(False)
        want = np.asarray(var[:])
        arr = chunks.ChunkedArray(str(path), "q", var.shape, var.dtype, fallback=None)
    assert arr.index() is not None and arr.index().offset < 0
    assert same_bits(arr.read_box([1, 0], [4, 5]), want[1:4])


def test_a_chunk_stored_with_a_filter_skipped(tmp_path):
    # check: h5py (the HDF5 library) decodes a chunk whose filter mask skips deflate
    path = tmp_path / "mask.h5"
    rng = np.random.default_rng(5)
    data = rng.standard_normal((4, 6)).astype("<f4")
    with h5py.File(path, "w") as f:
        dset = f.create_dataset("q", shape=(8, 6), chunks=(4, 6), dtype="<f4", shuffle=True,
                                compression="gzip", compression_opts=1)
        dset[:4] = data
        shuffled = np.frombuffer(data.tobytes(), np.uint8).reshape(-1, 4).T.tobytes()
        dset.id.write_direct_chunk((4, 0), shuffled, filter_mask=0b10)  # deflate skipped
    with h5py.File(path, "r") as f:
        want = f["q"][:]
    arr = chunks.ChunkedArray(str(path), "q", (8, 6), "<f4", fallback=None)
    assert arr.index() is not None
    assert same_bits(arr.read_box([0, 0], [8, 6]), want)
    assert same_bits(arr.read_box([0, 0], [8, 6])[4:], data)


def test_other_pipelines_are_left_to_the_netcdf_library(tmp_path):
    # check: netCDF4-python reads the checksummed file; coastmon does not decode it itself
    path = tmp_path / "sum.nc"
    write_nc(path, fletcher32=True)
    ds = xr.open_dataset(path, engine=chunks.Entrypoint, mask_and_scale=False)
    try:
        assert chunks.ENCODING_KEY not in ds["q"].encoding
        assert same_bits(ds["q"].values, reference(path))
    finally:
        ds.close()


def test_libdeflate_and_zlib_inflate_alike():
    # check: the standard library's zlib compresses; both inflaters restore its input
    raw = np.random.default_rng(1).standard_normal(5000).astype("f4").tobytes()
    packed = zlib.compress(raw, 6)
    assert chunks.inflate(packed, len(raw)) == raw
    assert chunks.inflate(packed, len(raw), use_libdeflate=False) == raw
    with pytest.raises(ValueError):
        chunks.inflate(packed, len(raw) + 4)


@pytest.mark.parametrize("itemsize", [2, 3, 4, 8])
def test_unshuffle_inverts_the_byte_shuffle(itemsize):
    # check: common practice, no source (HDF5 shuffle: byte k of every element, then k + 1)
    rng = np.random.default_rng(itemsize)
    n = 37
    rest = itemsize - 1  # HDF5 leaves bytes past the last whole element as they are
    raw = rng.integers(0, 256, n * itemsize + rest, dtype=np.uint8)
    body = raw[:n * itemsize].reshape(n, itemsize).T.ravel()
    shuffled = np.concatenate([body, raw[n * itemsize:]])
    assert np.array_equal(chunks.unshuffle(shuffled.tobytes(), itemsize), raw)


def test_the_index_is_rebuilt_after_pickling(shuffled_file):
    path, ref = shuffled_file
    arr = direct(path)
    arr.index()
    copy = pickle.loads(pickle.dumps(arr))
    assert copy._index is None
    assert same_bits(copy.read_box([2, 0, 0], [9, 17, 13]), ref[2:9])


def test_a_damaged_chunk_is_one_clear_error(tmp_path):
    path = tmp_path / "q.nc"
    write_nc(path)
    bad = tmp_path / "bad.nc"
    shutil.copy(path, bad)
    index = chunks.ChunkIndex(str(path), "q")
    at = int(index.offset[1, 1, 1]) + 2
    with bad.open("r+b") as fh:
        fh.seek(at)
        fh.write(b"\xff" * 16)
    arr = direct(bad)
    with pytest.raises(InputError) as err:
        arr.read_box([0, 0, 0], list(SHAPE))
    text = str(err.value)
    assert "'q'" in text and "damaged" in text and str(bad) in text


def test_ingest_decodes_deflated_inputs_itself(tmp_path, monkeypatch):
    # check: the netCDF4 library's read, CF-decoded by xarray, gives the same values
    rng = np.random.default_rng(9)
    nt, ny, nx = 12, 20, 24
    lon, lat = np.meshgrid(np.linspace(-12, -8, nx), np.linspace(36, 41, ny))
    u = (0.4 * rng.standard_normal((nt, ny, nx))).astype("f4")
    v = (0.3 * rng.standard_normal((nt, ny, nx))).astype("f4")
    u[:, :3, :4] = np.nan
    ds = xr.Dataset({"u": (("time", "y", "x"), u, {"units": "m s-1"}),
                     "v": (("time", "y", "x"), v, {"units": "m s-1"})},
                    coords={"time": np.arange(nt) * 86400.0, "lon": (("y", "x"), lon),
                            "lat": (("y", "x"), lat)})
    ds.time.attrs["units"] = "seconds since 2001-01-01"
    packed = {"dtype": "i2", "scale_factor": 1e-4, "_FillValue": -32767, "zlib": True,
              "chunksizes": (2, ny, nx)}
    ds.to_netcdf(tmp_path / "in.nc", encoding={"u": packed, "v": packed})
    ingest = IngestSettings(u_var="u", v_var="v")
    out = open_dataset([tmp_path / "in.nc"], ingest)
    assert out.attrs["compressed_input"] == 1 and out.attrs["direct_read"] == 1
    with monkeypatch.context() as m:  # the same files, every variable read by the library
        m.setattr(chunks, "eligible", lambda var: False)
        ref = open_dataset([tmp_path / "in.nc"], ingest)
    assert ref.attrs["direct_read"] == 0
    for name in ("u", "v"):
        assert same_bits(out[name].values, ref[name].values)
        assert np.isnan(out[name].values[:, :3, :4]).all()


def test_no_reader_processes_for_inputs_decoded_in_threads(tmp_path, monkeypatch):
    # check: common practice, no source (processes only where one library lock serialises)
    monkeypatch.setattr(readers, "MIN_PROCESS_READ_BYTES", 0)
    monkeypatch.setattr(os, "cpu_count", lambda: 4)
    out = xr.Dataset({"u": (("time", "y", "x"), np.zeros((8, 3, 4), "f4"))})
    arrays = _input_arrays(out, ["u"])
    out.attrs.update(compressed_input=1, direct_read=0)
    assert _local_plan(out, StreamSettings(), arrays, 4).n_readers > 0
    out.attrs.update(direct_read=1)
    assert _local_plan(out, StreamSettings(), arrays, 4).n_readers == 0
    assert _local_plan(out, StreamSettings(read_processes=2), arrays, 4).n_readers == 2


def test_a_contiguous_variable_cut_short_is_one_clear_error(tmp_path):
    path = tmp_path / "q.nc"
    write_nc(path, layout="contiguous")
    index = chunks.ChunkIndex(str(path), "q")
    cut = tmp_path / "cut.nc"
    cut.write_bytes(path.read_bytes()[:int(index.offset) + 4 * 17 * 13 * 5 + 7])
    arr = chunks.ChunkedArray(str(cut), "q", SHAPE, "f4", fallback=None)
    arr._index = index  # the index as read before the file was cut
    assert arr.read_box([0, 0, 0], [5, 17, 13]).shape == (5, 17, 13)
    with pytest.raises(InputError) as err:
        arr.read_box([0, 0, 0], [7, 17, 13])
    assert "'q'" in str(err.value) and "truncated" in str(err.value) and str(cut) in str(err.value)
