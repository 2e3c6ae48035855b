"""Reading NetCDF-4 variables straight from their HDF5 storage, deflated chunks in parallel.

Reading a compressed NetCDF-4 file is mostly decompression, and the HDF5 library lets one
thread of a process decompress at a time (it holds one lock for every call). Most ocean
model output is compressed the way NetCDF-4 does it by default: deflate (zlib), usually
after the byte shuffle. For such variables this module reads the chunks itself: the chunk
index (each chunk's offset and size in the file) comes from HDF5 once, through h5py; then
each chunk is read with a positioned read, inflated with libdeflate (the ``deflate``
package, about twice as fast as zlib here; the standard :mod:`zlib` if it is missing) and
un-shuffled by a compiled kernel, on a pool of threads. None of these steps holds the GIL
or a library lock, so a time block's chunks are decoded on all cores at once.
Uncompressed variables are read the same way: a contiguous one with one positioned read
per run of whole time steps straight into the result (about half the time the library
takes here, which copies through its own buffers).

:class:`ChunkedArray` is an xarray backend array: the backend :class:`Entrypoint` opens a
file with xarray's NetCDF4 backend and gives every eligible variable one of these in place
of the backend's own array (CF decoding, dask chunking and everything downstream are
unchanged). A variable is eligible when it is a numeric array of a NetCDF-4 (HDF5) file,
stored contiguous or chunked, with no filter but deflate and the shuffle (no checksum, no
other compression); any other variable, any selection other than plain slices and
integers, and any variable in more chunks than :data:`MAX_INDEXED_CHUNKS` are read by the
netCDF4 library as before. The values are the file's, bit for bit (tested against the
netCDF4 library and h5py).
"""

from __future__ import annotations

import itertools
import math
import os
import sys
import threading
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from xarray.backends import BackendArray, NetCDF4DataStore, StoreBackendEntrypoint
from xarray.backends.netCDF4_ import NetCDF4BackendEntrypoint
from xarray.core import indexing

from coastmon.compiled import compiled
from coastmon.errors import InputError

try:  # libdeflate: the same inflate, about twice as fast as zlib's
    import deflate as _libdeflate
except ImportError:  # pragma: no cover - the dependency is declared
    _libdeflate = None

FILTER_DEFLATE = 1
"""HDF5 filter identifier of deflate (zlib)."""
FILTER_SHUFFLE = 2
"""HDF5 filter identifier of the byte shuffle."""
ENCODING_KEY = "coastmon_direct_read"
"""Encoding entry set to True on the variables that :class:`Entrypoint` reads itself."""

MAX_INDEXED_CHUNKS = 2**21
"""Most chunks of one variable whose index is kept (three int64 each, 48 MB at most); a
variable stored in more chunks than this (small tiles over a long record) is read by the
netCDF4 library, so that memory does not grow with the record."""

_POOL: ThreadPoolExecutor | None = None
_POOL_LOCK = threading.Lock()
_THREADS: int | None = None


def decode_threads() -> int:
    """Threads that decode chunks: one per core this process may run on, unless set by
    :func:`set_decode_threads`."""
    if _THREADS is not None:
        return _THREADS
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def set_decode_threads(n: int | None) -> None:
    """Decode with ``n`` threads from now on (1 in reader processes: they are the
    parallelism there); None: one per core again."""
    global _THREADS, _POOL
    with _POOL_LOCK:
        _THREADS = None if n is None else max(1, int(n))
        if _POOL is not None:
            _POOL.shutdown(wait=False)
            _POOL = None


def _pool() -> ThreadPoolExecutor:
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(decode_threads(), thread_name_prefix="coastmon-decode")
        return _POOL


def _after_fork() -> None:  # a forked child does not inherit the pool's threads
    global _POOL, _POOL_LOCK
    _POOL, _POOL_LOCK = None, threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork)


def inflate(data: bytes, nbytes: int, use_libdeflate: bool = True) -> bytes:
    """Inflate one zlib stream whose decoded size is ``nbytes`` (raises ValueError if not)."""
    if use_libdeflate and _libdeflate is not None:
        try:
            out = _libdeflate.zlib_decompress(data, nbytes)
        except _libdeflate.DeflateError as exc:
            raise ValueError(f"inflate failed ({exc})") from None
    else:
        try:
            out = zlib.decompress(data, bufsize=nbytes)
        except zlib.error as exc:
            raise ValueError(f"inflate failed ({exc})") from None
    if len(out) != nbytes:
        raise ValueError(f"inflated to {len(out)} bytes, expected {nbytes}")
    return out


@compiled()
def _unshuffle_bytes(src, itemsize, dst):  # pragma: no cover - compiled
    """Undo HDF5's byte shuffle: byte k of element i is at ``src[k * n + i]``."""
    n = src.shape[0] // itemsize
    for k in range(itemsize):
        base = k * n
        for i in range(n):
            dst[i * itemsize + k] = src[base + i]
    # HDF5 leaves the bytes past the last whole element as they are.
    for r in range(n * itemsize, src.shape[0]):
        dst[r] = src[r]
    return 0


@compiled()
def _unshuffle4(src, dst):  # pragma: no cover - compiled
    """The same for 4-byte elements, one whole element per step (so that it vectorises);
    the bytes are put together little-endian-first, as they lie in memory."""
    n = dst.shape[0]
    for i in range(n):
        dst[i] = (np.uint32(src[i]) | (np.uint32(src[n + i]) << np.uint32(8))
                  | (np.uint32(src[2 * n + i]) << np.uint32(16))
                  | (np.uint32(src[3 * n + i]) << np.uint32(24)))
    return 0


@compiled()
def _unshuffle8(src, dst):  # pragma: no cover - compiled
    n = dst.shape[0]
    for i in range(n):
        lo = (np.uint64(src[i]) | (np.uint64(src[n + i]) << np.uint64(8))
              | (np.uint64(src[2 * n + i]) << np.uint64(16))
              | (np.uint64(src[3 * n + i]) << np.uint64(24)))
        hi = (np.uint64(src[4 * n + i]) | (np.uint64(src[5 * n + i]) << np.uint64(8))
              | (np.uint64(src[6 * n + i]) << np.uint64(16))
              | (np.uint64(src[7 * n + i]) << np.uint64(24)))
        dst[i] = lo | (hi << np.uint64(32))
    return 0


_WHOLE = {4: np.dtype("=u4"), 8: np.dtype("=u8")} if sys.byteorder == "little" else {}
"""Element sizes un-shuffled a whole element at a time (the kernels put the bytes together
in little-endian order, i.e. as they lie in memory on such a machine)."""


def unshuffle(data: bytes | np.ndarray, itemsize: int) -> np.ndarray:
    """Bytes of ``data`` with HDF5's shuffle undone, as a uint8 array."""
    src = np.frombuffer(data, dtype=np.uint8)
    dst = np.empty(src.size, dtype=np.uint8)
    whole = _WHOLE.get(itemsize)
    if itemsize <= 1:
        dst[:] = src
    elif whole is not None and src.size % itemsize == 0 and itemsize == 4:
        _unshuffle4(src, dst.view(whole))
    elif whole is not None and src.size % itemsize == 0:
        _unshuffle8(src, dst.view(whole))
    else:
        _unshuffle_bytes(src, itemsize, dst)
    return dst


class ChunkIndex:
    """Where the data of one HDF5 dataset lie in its file, and how they are encoded.

    A contiguous dataset has one ``offset`` (``contiguous`` True; never filtered); a chunked
    one has an offset, stored size and filter mask per chunk, its ``filters`` and the
    decoded size ``nbytes`` of a chunk.
    """

    def __init__(self, path: str, name: str) -> None:
        import h5py

        with h5py.File(path, "r", locking=False) as f:
            dset = f[name]
            dcpl = dset.id.get_create_plist()
            layout = dcpl.get_layout()
            if dset.dtype.kind not in "fiu" or dset.ndim == 0:
                raise ValueError(f"dtype {dset.dtype}")
            self.dtype = dset.dtype
            self.shape = tuple(int(n) for n in dset.shape)
            fill = dset.fillvalue
            self.fill = np.array(0 if fill is None else fill, dtype=self.dtype)
            self.contiguous = layout == h5py.h5d.CONTIGUOUS
            if self.contiguous:
                stored = dset.id.get_storage_size()
                if stored not in (0, math.prod(self.shape) * self.dtype.itemsize):
                    raise ValueError(f"contiguous storage of {stored} bytes")
                start = dset.id.get_offset()
                self.offset = -1 if start is None else int(start)
                return
            if layout != h5py.h5d.CHUNKED or dset.chunks is None:
                raise ValueError("neither contiguous nor chunked")
            self.filters = [int(dcpl.get_filter(k)[0]) for k in range(dcpl.get_nfilters())]
            if any(code not in (FILTER_DEFLATE, FILTER_SHUFFLE) for code in self.filters):
                raise ValueError(f"filters {self.filters}")
            self.chunks = tuple(int(n) for n in dset.chunks)
            grid = tuple(-(-n // c) for n, c in zip(self.shape, self.chunks, strict=True))
            if math.prod(grid) > MAX_INDEXED_CHUNKS:
                raise ValueError(f"{math.prod(grid)} chunks")
            self.offset = np.full(grid, -1, dtype=np.int64)
            self.size = np.zeros(grid, dtype=np.int64)
            self.mask = np.zeros(grid, dtype=np.int64)

            def add(info) -> None:
                at = tuple(int(o) // c for o, c in zip(info.chunk_offset, self.chunks,
                                                        strict=True))
                self.offset[at] = info.byte_offset
                self.size[at] = info.size
                self.mask[at] = info.filter_mask

            if hasattr(dset.id, "chunk_iter"):
                dset.id.chunk_iter(add)
            else:  # pragma: no cover - HDF5 older than 1.12.3
                for k in range(dset.id.get_num_chunks()):
                    add(dset.id.get_chunk_info(k))
        self.nbytes = int(np.prod(self.chunks)) * self.dtype.itemsize


def _read_into(fd: int, buf: np.ndarray, offset: int, what: str) -> np.ndarray:
    """Fill the contiguous array ``buf`` with the bytes of the file from ``offset`` on
    (ValueError naming ``what`` if the file ends first); returns ``buf``."""
    view = memoryview(buf.reshape(-1).view(np.uint8))
    done = 0
    while done < view.nbytes:
        if hasattr(os, "preadv"):
            got = os.preadv(fd, [view[done:]], offset + done)
        else:  # pragma: no cover - systems without preadv: read, then copy
            data = os.pread(fd, view.nbytes - done, offset + done)
            got = len(data)
            view[done:done + got] = data
        if got <= 0:
            raise ValueError(f"the file ends inside {what}")
        done += got
    return buf


class ChunkedArray(BackendArray):
    """A NetCDF-4 variable read from its HDF5 storage, chunks decoded in parallel (see the
    module).

    ``fallback`` is the backend's own array; it serves selections other than slices and
    integers, and the whole variable when its chunks turn out not to be eligible (a filter
    the netCDF4 library did not report). The chunk index is built on first use in each
    process and is not pickled.
    """

    def __init__(self, path: str, name: str, shape, dtype, fallback) -> None:
        self.path = str(path)
        self.name = name
        self.shape = tuple(shape)
        self.dtype = np.dtype(dtype)
        self.fallback = fallback
        self._index: ChunkIndex | None | bool = None
        self._lock = threading.Lock()

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_index"] = None
        del state["_lock"]
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def index(self) -> ChunkIndex | None:
        """The chunk index, or None when the variable is read by the netCDF4 library."""
        with self._lock:
            if self._index is None:
                try:
                    index = ChunkIndex(self.path, self.name)
                    ok = index.shape == self.shape
                except (ValueError, KeyError, OSError, ImportError):  # left to the library
                    ok = False
                self._index = index if ok else False
            return self._index or None

    def __getitem__(self, key):
        simple = isinstance(key, indexing.BasicIndexer) or (
            isinstance(key, indexing.OuterIndexer)
            and all(isinstance(k, (int, np.integer, slice)) for k in key.tuple))
        if not simple or self.index() is None:
            return self.fallback[key]
        return indexing.explicit_indexing_adapter(
            indexing.BasicIndexer(key.tuple), self.shape, indexing.IndexingSupport.BASIC,
            self._getitem)

    def _getitem(self, key: tuple) -> np.ndarray:
        lo, hi, picks = [], [], []
        for k, n in zip(key, self.shape, strict=True):
            if isinstance(k, slice):
                steps = np.arange(*k.indices(n))
                first, last = (int(steps.min()), int(steps.max()) + 1) if steps.size else (0, 0)
                lo.append(first)
                hi.append(last)
                step = k.step or 1
                picks.append(slice(None, None, step) if step > 0 else steps - first)
            else:
                i = int(k) % n if n else int(k)
                lo.append(i)
                hi.append(i + 1)
                picks.append(0)
        box = self.read_box(lo, hi)
        if any(isinstance(p, np.ndarray) for p in picks):  # reversed slices, axis by axis
            for axis, p in enumerate(picks):
                if isinstance(p, np.ndarray):
                    box = box[(slice(None),) * axis + (p,)]
                    picks[axis] = slice(None)
        return box[tuple(picks)]

    def read_box(self, lo: list[int], hi: list[int]) -> np.ndarray:
        """Values of the box ``[lo, hi)`` (one bound per dimension), decoded in parallel."""
        index = self.index()
        out = np.empty([max(b - a, 0) for a, b in zip(lo, hi, strict=True)], dtype=self.dtype)
        if out.size == 0:
            return out
        if index.contiguous:
            return self._read_contiguous(index, lo, hi, out)
        ranges = [range(a // c, (b - 1) // c + 1) for a, b, c in zip(lo, hi, index.chunks,
                                                                         strict=True)]
        todo = list(itertools.product(*ranges))
        fd = os.open(self.path, os.O_RDONLY)
        try:
            if len(todo) == 1 or decode_threads() == 1:
                for at in todo:
                    self._decode(index, fd, at, lo, hi, out)
            else:
                jobs = [_pool().submit(self._decode, index, fd, at, lo, hi, out) for at in todo]
                for job in jobs:
                    job.result()
        finally:
            os.close(fd)
        return out

    def _read_contiguous(self, index: ChunkIndex, lo, hi, out: np.ndarray) -> np.ndarray:
        """Positioned reads of the box from a contiguous dataset, straight into ``out``.

        The box is read in runs, each as long as the trailing dimensions it spans whole
        allow (one run for whole time steps).
        """
        start = index.offset
        if start < 0:  # never written
            out[...] = index.fill
            return out
        shape = index.shape
        axis = len(shape) - 1  # from ``axis`` on the box is one contiguous run per index
        while axis > 0 and lo[axis] == 0 and hi[axis] == shape[axis]:
            axis -= 1
        strides = np.cumprod((1,) + shape[::-1])[::-1][1:] * index.dtype.itemsize
        target = out if out.dtype == index.dtype else np.empty(out.shape, index.dtype)
        fd = os.open(self.path, os.O_RDONLY)
        try:
            for lead in itertools.product(*(range(a, b) for a, b in zip(lo[:axis], hi[:axis],
                                                                        strict=True))):
                first = lead + tuple(lo[axis:])
                where = tuple(i - a for i, a in zip(lead, lo, strict=False))
                try:
                    _read_into(fd, target[where], start + int(np.dot(first, strides)),
                               "the variable")
                except (ValueError, OSError) as exc:
                    raise self._damaged(f"The variable '{self.name}' cannot be read",
                                        exc) from None
        finally:
            os.close(fd)
        if target is not out:
            out[...] = target
        return out

    def _damaged(self, what: str, exc: Exception) -> InputError:
        return InputError(f"{what} ({exc}); the file is damaged or truncated",
                          where=self.path, todo="Check the file with a NetCDF tool, or copy it again")

    def _decode(self, index: ChunkIndex, fd: int, at: tuple, lo, hi, out: np.ndarray) -> None:
        src, dst = [], []
        for a, b, c, k in zip(lo, hi, index.chunks, at, strict=True):
            c0 = k * c
            s0, s1 = max(a, c0), min(b, c0 + c)
            src.append(slice(s0 - c0, s1 - c0))
            dst.append(slice(s0 - a, s1 - a))
        offset = int(index.offset[at])
        if offset < 0:  # never written: HDF5 returns the fill value
            out[tuple(dst)] = index.fill
            return
        try:
            data = _read_into(fd, np.empty(int(index.size[at]), np.uint8), offset, "a chunk")
            skipped = int(index.mask[at])
            for k in reversed(range(len(index.filters))):  # undo the filters, last first
                if skipped >> k & 1:
                    continue
                if index.filters[k] == FILTER_DEFLATE:
                    data = inflate(data, index.nbytes)
                else:
                    data = unshuffle(data, index.dtype.itemsize)
            if len(data) != index.nbytes:
                raise ValueError(f"{len(data)} bytes, expected {index.nbytes}")
        except (ValueError, OSError) as exc:
            raise self._damaged(f"A chunk of the variable '{self.name}' cannot be decoded",
                                exc) from None
        chunk = np.frombuffer(data, dtype=index.dtype).reshape(index.chunks)
        out[tuple(dst)] = chunk[tuple(src)]


class _Store(NetCDF4DataStore):
    """xarray's NetCDF4 store, with eligible variables read by :class:`ChunkedArray`."""

    def open_store_variable(self, name: str, var):
        variable = super().open_store_variable(name, var)
        if eligible(var) and var.group().path == "/":
            lazy = variable._data
            inner = getattr(lazy, "array", None)
            if isinstance(lazy, indexing.LazilyIndexedArray) and inner is not None:
                chunked = ChunkedArray(self._filename, name, inner.shape, inner.dtype, inner)
                variable._data = indexing.LazilyIndexedArray(chunked)
                variable.encoding[ENCODING_KEY] = True
        return variable


def eligible(var) -> bool:
    """Whether a netCDF4 variable may be read by :class:`ChunkedArray`: a numeric array of a
    NetCDF-4 file, contiguous or chunked, with no filter but deflate and the shuffle (the
    file's HDF5 layout and pipeline are checked again on first read)."""
    if not hasattr(os, "pread"):
        return False
    try:
        filters = var.filters() or {}
        chunking = var.chunking()
        kind = np.dtype(var.dtype).kind
    except (AttributeError, TypeError, RuntimeError):
        return False
    others = ("szip", "zstd", "bzip2", "blosc", "fletcher32")
    return (chunking is not None and not any(filters.get(k) for k in others)
            and kind in "fiu" and len(var.shape) > 0)


class Entrypoint(NetCDF4BackendEntrypoint):
    """xarray backend: the NetCDF4 backend with :class:`ChunkedArray` for eligible variables."""

    description = "NetCDF-4 files read from their HDF5 storage, chunks decoded in parallel"

    def open_dataset(self, filename_or_obj, *, mask_and_scale=True, decode_times=True,
                     concat_characters=True, decode_coords=True, drop_variables=None,
                     use_cftime=None, decode_timedelta=None, group=None, mode="r",
                     format="NETCDF4", clobber=True, diskless=False, persist=False,
                     auto_complex=None, lock=None, autoclose=False):
        options = dict(mode=mode, format=format, group=group, clobber=clobber,
                       diskless=diskless, persist=persist, lock=lock, autoclose=autoclose)
        if auto_complex is not None:  # an option of newer xarray versions only
            options["auto_complex"] = auto_complex
        store = _Store.open(str(Path(filename_or_obj)), **options)
        try:
            return StoreBackendEntrypoint().open_dataset(
                store, mask_and_scale=mask_and_scale, decode_times=decode_times,
                concat_characters=concat_characters, decode_coords=decode_coords,
                drop_variables=drop_variables, use_cftime=use_cftime,
                decode_timedelta=decode_timedelta)
        except Exception:
            store.close()
            raise
