"""Ray series kept as the grid points they are interpolated from.

A frame's rays run 600 km offshore from every station, and on a grid that is coarse
beside the station spacing neighbouring stations' rays interpolate from the same grid
points: on the long benchmark record 237 rays of 60 points (14 220 sampled points) draw on
only 5013 grid points. The streaming pass then writes the series of those grid points, as
they are, instead of the interpolated rays (:func:`plan_ray_points` decides, per frame),
and :class:`RayField` computes a ray when it is read, with the pass's own sampling
arithmetic (:func:`coastmon.stream.kernels._sample_stored`): the same float64 sums in the
same order, stored as float32. Where the pass's field is float32 (u, v and SSH as read)
the rays are the ones the pass would have written, bit for bit; a float64 field
(vorticity computed in the pass) is rounded to float32 at the grid points instead of after
interpolation, a difference of float32 rounding.

The grid points' series are stored in tiles of consecutive time steps
(:class:`TiledPoints`): the pass writes each tile, every grid point for a few hundred
steps, with one write, where one file row per grid point would take one small write per
point and tile (on the long benchmark record 75 000 writes per variable, about a third of
a second of system time each).

A read of one station, a block of stations or the whole field gives ordinary float32
numpy arrays, so the per-station analyses index a :class:`RayField` as they index the
memory-mapped ``(time, station, ray)`` files it replaces.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse

from coastmon.io.pages import release
from coastmon.stream import kernels

COMPLETE_BLOCK_BYTES = 16 * 2**20
"""Bytes of grid-point series tested for gaps at once by :meth:`RayField.complete_points`."""
RAY_POINTS_RATIO = 0.75
"""Grid points are stored instead of rays when they number at most this share of the ray
points (below it the pass writes a quarter fewer numbers or better; above it the
savings would not pay for computing the rays on every read)."""


@dataclass(frozen=True)
class RayPlan:
    """Which grid points hold the rays, and the rays' sampling rows on them."""

    points: np.ndarray      # (P,) grid columns (flattened y*x), ascending
    indptr: np.ndarray      # CSR of the ray rows on the P points, as the pass sums them
    cols: np.ndarray
    weights: np.ndarray
    valid: np.ndarray       # (S*R,) whether each ray point is sampled at all
    n_stations: int
    n_ray: int

    @property
    def n_points(self) -> int:
        return int(self.points.size)


def plan_ray_points(sampler, valid: np.ndarray, n_stations: int, n_offsets: int,
                    n_ray: int, ratio: float = RAY_POINTS_RATIO) -> RayPlan | None:
    """The grid points the rays draw on, when storing them saves enough (else None).

    ``sampler`` is the frame's sampling matrix (section rows ``S x O`` first, then the
    ray rows ``S x R``), ``valid`` its row mask. Rows that are not valid keep no entries
    (they are NaN whatever the field).
    """
    first = n_stations * n_offsets
    n_rows = n_stations * n_ray
    if n_rows == 0:
        return None
    rows, cols, weights = kernels.sorted_entries(sampler)
    keep = rows >= first
    rows, cols, weights = rows[keep] - first, cols[keep], weights[keep]
    ray_valid = np.asarray(valid[first:first + n_rows], dtype=np.bool_)
    keep = ray_valid[rows]
    rows, cols, weights = rows[keep], cols[keep], weights[keep]
    points = np.unique(cols)
    if points.size > ratio * n_rows:
        return None
    return RayPlan(points=points, indptr=kernels.row_pointers(rows, n_rows),
                   cols=np.searchsorted(points, cols).astype(np.int64),
                   weights=weights, valid=np.ascontiguousarray(ray_valid),
                   n_stations=int(n_stations), n_ray=int(n_ray))


def sampling_matrix(sampler, valid: np.ndarray, n_sections: int, plan: RayPlan):
    """The pass's sampling matrix and row mask with the rays replaced by ``plan``'s grid
    points: the section rows as they are, then one row per grid point (weight 1)."""
    sampler = scipy.sparse.csr_matrix(sampler)
    n_p = plan.n_points
    pick = scipy.sparse.csr_matrix((np.ones(n_p), (np.arange(n_p), plan.points)),
                                   shape=(n_p, sampler.shape[1]))
    matrix = scipy.sparse.vstack([sampler[:n_sections], pick], format="csr")
    mask = np.concatenate([np.asarray(valid[:n_sections], dtype=np.bool_),
                           np.ones(n_p, dtype=np.bool_)])
    return matrix, mask


def stations_through_gaps(matrix, complete: np.ndarray, n_ray: int) -> np.ndarray:
    """Which stations' rays draw on a grid point that is not finite at every step.

    ``matrix`` and its columns' ``complete`` flags as :meth:`RayField.station_weights`
    and :meth:`RayField.complete_points` give them (``complete`` indexed by ``points``);
    one boolean per station. Elsewhere a ray is the same weighted mean of its grid points
    at every step, so statistics linear in the series may be formed on the grid points.
    """
    touches = np.diff(matrix.indptr) > 0
    gappy = np.zeros(matrix.shape[0], dtype=np.bool_)
    if touches.any():
        rows = np.repeat(np.arange(matrix.shape[0]), np.diff(matrix.indptr))
        gappy[np.unique(rows[~np.asarray(complete, dtype=np.bool_)[matrix.indices]])] = True
    return gappy.reshape(-1, n_ray).any(axis=1)


class TiledPoints:
    """``(P, time)`` float32 grid-point series, stored as tiles of consecutive time steps.

    Tile ``j`` holds steps ``starts[j]:starts[j + 1]`` of all ``P`` grid points,
    point-major, from element ``P * starts[j]`` of the one-dimensional ``flat`` (a memory
    map of the pass's file, or an array). An ordinary ``(P, time)`` array is one tile
    (:meth:`of`). Indexing the first axis (an integer, a slice or an integer array) gives
    those points' whole series as a new ``(k, time)`` array (a second index is applied to
    it); ``np.asarray`` gives all of them.
    """

    def __init__(self, flat: np.ndarray, n_points: int, starts) -> None:
        self.flat = flat
        self.base = flat
        self.n_points = int(n_points)
        self.starts = np.ascontiguousarray(starts, dtype=np.int64)
        if self.starts.size < 2 or self.starts[0] != 0 or np.any(np.diff(self.starts) <= 0) \
                or flat.size < self.n_points * int(self.starts[-1]):
            raise ValueError(f"tiles {self.starts.tolist()} of {self.n_points} points do not "
                             f"fit {flat.size} stored values")
        self.shape = (self.n_points, int(self.starts[-1]))
        self.dtype = np.dtype(np.float32)
        self.ndim = 2

    @classmethod
    def of(cls, points: np.ndarray) -> TiledPoints:
        """An ordinary ``(P, time)`` array as one tile (a copy only if it is not C-ordered
        float32)."""
        points = np.ascontiguousarray(points, dtype=np.float32)
        if points.ndim != 2 or points.shape[1] == 0:
            raise ValueError(f"grid-point series must be (point, time), not {points.shape}")
        return cls(points.reshape(-1), points.shape[0], [0, points.shape[1]])

    def tiles(self):
        """Each tile as ``(t0, t1, block)``, ``block`` the ``(P, t1 - t0)`` view of it."""
        for t0, t1 in zip(self.starts[:-1].tolist(), self.starts[1:].tolist(), strict=True):
            yield t0, t1, self.flat[self.n_points * t0:self.n_points * t1].reshape(
                self.n_points, t1 - t0)

    def rows(self, index, out: np.ndarray | None = None) -> np.ndarray:
        """The ``(k, time)`` series of the grid points ``index`` (a slice or integers),
        into ``out`` when given (float32, at least ``k`` rows)."""
        if isinstance(index, slice):
            index = np.arange(self.n_points)[index]
        index = np.asarray(index)
        if index.dtype == np.bool_:
            if index.shape != (self.n_points,):
                raise IndexError(f"a mask of shape {index.shape} for {self.n_points} points")
            index = np.flatnonzero(index)
        index = index.astype(np.int64, copy=False).ravel()
        if index.size and (index.min() < -self.n_points or index.max() >= self.n_points):
            raise IndexError(f"grid points {index.min()}..{index.max()} are out of range "
                             f"of {self.n_points}")
        index = np.ascontiguousarray(index % max(self.n_points, 1))
        block = np.empty((index.size, self.shape[1]), dtype=np.float32) if out is None \
            else out[:index.size]
        if block.shape != (index.size, self.shape[1]) or block.dtype != np.float32 \
                or (block.size and block.strides[1] != 4):
            raise ValueError(f"cannot gather {index.size} series of {self.shape[1]} steps "
                             f"into a {block.dtype} block of shape {block.shape}")
        kernels._gather_tiles(self.flat, self.n_points, self.starts, index, block)
        return block

    def __getitem__(self, key):
        if not isinstance(key, tuple):
            key = (key,)
        if len(key) > 2:
            raise IndexError(f"too many indices for {self.shape} grid-point series")
        first = key[0]
        if isinstance(first, (int, np.integer)):
            block = self.rows(np.array([first]))[0]
            return block[key[1]] if len(key) == 2 else block
        block = self.rows(first)
        return block[:, key[1]] if len(key) == 2 else block

    def __array__(self, dtype=None, copy=None):
        out = self.rows(slice(None))
        return out if dtype is None else out.astype(dtype, copy=False)


class RayField:
    """``(time, station, ray)`` float32 ray series computed from stored grid points.

    ``points`` is the ``(P, time)`` series of the plan's grid points: the pass's tiles
    (:class:`TiledPoints`, whose memory map :func:`coastmon.io.pages.release` finds through
    ``base``), or an ordinary array.
    Indexing selects stations first and computes only those; the time and ray indices are
    then applied to the computed block, one after the other (orthogonal indexing, as
    xarray asks of the arrays it wraps).
    """

    def __init__(self, points, plan: RayPlan) -> None:
        if not isinstance(points, TiledPoints):
            points = TiledPoints.of(points)
        if points.n_points != plan.n_points:
            raise ValueError(f"{points.n_points} grid-point series for a plan of "
                             f"{plan.n_points} grid points")
        self.points = points
        self.base = points
        self.plan = plan
        self.shape = (int(points.shape[1]), plan.n_stations, plan.n_ray)
        self.dtype = np.dtype(np.float32)
        self.ndim = 3
        self._complete: np.ndarray | None = None

    @property
    def size(self) -> int:
        return int(np.prod(self.shape))

    @property
    def nbytes(self) -> int:
        return 4 * self.size

    def __len__(self) -> int:
        return self.shape[0]

    def __repr__(self) -> str:
        return (f"RayField(shape={self.shape}, from {self.plan.n_points} grid points)")

    def stations(self, stations: np.ndarray) -> np.ndarray:
        """The ``(time, len(stations), ray)`` series of the given stations."""
        stations = np.asarray(stations, dtype=np.int64).ravel()
        p = self.plan
        # Station-major, as the series files are laid out (each station's record
        # contiguous): the (time, station, ray) view of it indexes as theirs does.
        out = np.empty((stations.size, self.shape[0], p.n_ray), dtype=np.float32)
        lines = np.empty((p.n_ray, self.shape[0]), dtype=np.float32)
        for i, s in enumerate(stations):
            if not 0 <= s < p.n_stations:
                raise IndexError(f"station {s} is out of range 0..{p.n_stations - 1}")
            kernels._sample_stored(p.indptr, p.cols, p.weights, p.valid, self.points.flat,
                                   p.n_points, self.points.starts, int(s) * p.n_ray, out[i],
                                   lines)
        return np.swapaxes(out, 0, 1)

    def window(self, station: int, start: int, stop: int) -> np.ndarray:
        """Ray points ``start:stop`` of one station, ``(time, stop - start)`` float32: the
        numbers indexing gives, computing only those points."""
        p = self.plan
        if not (0 <= station < p.n_stations and 0 <= start <= stop <= p.n_ray):
            raise IndexError(f"station {station}, points {start}:{stop} are out of range "
                             f"of a {self.shape} ray field")
        out = np.empty((self.shape[0], stop - start), dtype=np.float32)
        kernels._sample_stored(p.indptr, p.cols, p.weights, p.valid, self.points.flat,
                               p.n_points, self.points.starts,
                               int(station) * p.n_ray + int(start), out,
                               np.empty((stop - start, self.shape[0]), dtype=np.float32))
        return out

    def complete_points(self) -> np.ndarray:
        """``(P,)`` whether each stored grid point is finite at every step (worked out on
        the first call, a block of points at a time, and kept)."""
        if self._complete is None:
            n_p = self.points.n_points
            done = np.ones(n_p, dtype=np.bool_)
            for t0, t1, tile in self.points.tiles():
                step = max(1, COMPLETE_BLOCK_BYTES // max(1, 4 * (t1 - t0)))
                for p0 in range(0, n_p, step):
                    done[p0:p0 + step] &= np.isfinite(tile[p0:p0 + step]).all(axis=1)
                release(self)   # the pages read, so memory does not grow with the record
            self._complete = done
        return self._complete

    def station_weights(self, first: int, stop: int
                        ) -> tuple[scipy.sparse.csr_matrix, np.ndarray]:
        """The rays of stations ``first:stop`` as weights on the grid points they draw on.

        Returns ``(matrix, points)``: ``matrix`` is CSR, ``((stop - first) * n_ray,
        len(points))``, one row per ray point, station-major, each row's weights divided
        by their sum (so that, where every value is finite, the row applied to the points'
        series gives the ray, as the pass computes it, to rounding); rows that are not
        valid, or whose weights sum to zero, are empty. ``points`` are the indices of those
        grid points in the stored series, ascending.
        """
        p = self.plan
        r0, r1 = first * p.n_ray, stop * p.n_ray
        full = scipy.sparse.csr_matrix((p.weights, p.cols, p.indptr),
                                       shape=(p.n_stations * p.n_ray, p.n_points))
        rows = full[r0:r1].tocsr()
        rows.eliminate_zeros()
        points, local = np.unique(rows.indices, return_inverse=True)
        total = np.asarray(rows.sum(axis=1)).ravel()
        keep = p.valid[r0:r1] & (total > 0)
        scale = np.where(keep, 1.0 / np.where(total > 0, total, 1.0), 0.0)
        matrix = scipy.sparse.csr_matrix(
            (rows.data * np.repeat(scale, np.diff(rows.indptr)), local.ravel(), rows.indptr),
            shape=(r1 - r0, points.size))
        matrix.eliminate_zeros()
        return matrix, points

    def __getitem__(self, key):
        if not isinstance(key, tuple):
            key = (key,)
        if any(k is Ellipsis for k in key):
            at = next(i for i, k in enumerate(key) if k is Ellipsis)
            key = key[:at] + (slice(None),) * (3 - len(key) + 1) + key[at + 1:]
        key = key + (slice(None),) * (3 - len(key))
        if len(key) != 3 or any(k is None for k in key):
            raise IndexError(f"unsupported index {key!r} for a {self.shape} ray field")
        k_t, k_s, k_r = key
        picked = np.arange(self.shape[1])[k_s]
        block = self.stations(np.atleast_1d(picked))
        if np.ndim(picked) == 0:
            block = block[:, 0]
        block = block[k_t]
        return block[..., k_r]

    def reshape(self, *shape):
        """Itself when ``shape`` is its own (the last may be ``-1``), as
        :func:`coastmon.io.pages.station_sweep` asks; nothing else is supported."""
        if len(shape) == 1 and isinstance(shape[0], tuple):
            shape = shape[0]
        if len(shape) == 3 and tuple(shape[:2]) == self.shape[:2] \
                and shape[2] in (-1, self.shape[2]):
            return self
        raise ValueError(f"a ray field of shape {self.shape} cannot be reshaped to {shape}")

    def __array__(self, dtype=None, copy=None):
        out = self.stations(np.arange(self.shape[1]))
        return out if dtype is None else out.astype(dtype, copy=False)

    def __array_function__(self, func, types, args, kwargs):
        return NotImplemented

    def __array_ufunc__(self, ufunc, method, *inputs, **kwargs):
        return NotImplemented
