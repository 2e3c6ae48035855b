"""Mergeable moment accumulators per grid point (float64).

A :class:`MomentState` holds, for every grid point, the count of valid time steps, the
means of u, v, ζ (and ssh), their central co-moments of second order (all pairs) and the
third-order co-moments needed for the eddy-energy advection
:math:`\\langle u'k'\\rangle = \\tfrac12\\langle u'u'u' + u'v'v'\\rangle`,
:math:`\\langle v'k'\\rangle = \\tfrac12\\langle u'u'v' + v'v'v'\\rangle`, and the number of
snapshots in which the point was an Okubo–Weiss eddy core.

Two states built from disjoint sets of time steps combine exactly (up to rounding) by
the pairwise formulas of Chan, Golub & LeVeque (1983) and, for the third order, Pébay
(2008, Sandia report SAND2008-6212). Merging is commutative and associative within
floating-point tolerance, so chunks can be processed in any order, by any worker, and a
state saved yesterday can be merged with today's.

With ``seasonal=True`` the state keeps one set per calendar month (group axis of length
12). The time mean is the Chan merge of the months; the co-moments of the anomalies about
the monthly climatology are the sums of the within-month co-moments.

States are saved to ``.npz`` files of plain arrays (no pickle) with a format version.
A time step counts at a point only where all variables are finite there.
"""

from __future__ import annotations

import hashlib
import os
import zipfile
import zlib
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from coastmon.errors import InputError
from coastmon.stream import kernels

FORMAT_VERSION = 1
"""Version of the saved-state layout; bump when the arrays or their meaning change."""

BASE_VARIABLES = ("u", "v", "zeta")
PAIR_NAMES = {(a, b): int(kernels.PAIR_INDEX[a, b]) for a in range(4) for b in range(4)}
TRIPLE_NAMES = ("uuu", "uvv", "uuv", "vvv")

_ARRAYS = ("n", "mean", "m2", "m3", "ow_core")


def grid_signature(lon: np.ndarray, lat: np.ndarray) -> str:
    """A short fingerprint of a grid (SHA-1 of its float64 lon/lat), to refuse merging across grids."""
    digest = hashlib.sha1()
    for arr in (lon, lat):
        a = np.ascontiguousarray(arr, dtype=np.float64)
        digest.update(str(a.shape).encode())
        digest.update(a.tobytes())
    return digest.hexdigest()[:16]


def time_text(value) -> str:
    """ISO-like text of a time value (numpy datetime64 or cftime), for the state's time range."""
    if isinstance(value, np.datetime64):
        return str(np.datetime_as_string(value, unit="s"))
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return str(value)


@dataclass
class MomentState:
    """Per-point accumulators over a set of time steps.

    Attributes
    ----------
    variables : names of the accumulated variables, ``('u', 'v', 'zeta'[, 'ssh'])``.
    seasonal : one group per calendar month (True) or a single group (False).
    ow_threshold : the Okubo–Weiss threshold factor used for ``ow_core``.
    n : (G, y, x) count of valid time steps.
    mean : (G, nv, y, x) means.
    m2 : (G, nv(nv+1)/2, y, x) sums of products of deviations, packed as
        :data:`coastmon.stream.kernels.PAIR_INDEX`.
    m3 : (G, 4, y, x) sums of triple products of deviations: uuu, uvv, uuv, vvv.
    ow_core : (G, y, x) number of valid snapshots in which the point was an eddy core.
    n_time : number of time steps merged in.
    time_start, time_end : first and last time merged in (text; empty when none).
    grid_id : fingerprint of the grid (:func:`grid_signature`); empty when unknown.
    """

    variables: tuple[str, ...]
    seasonal: bool
    ow_threshold: float
    n: np.ndarray
    mean: np.ndarray
    m2: np.ndarray
    m3: np.ndarray
    ow_core: np.ndarray
    n_time: int = 0
    time_start: str = ""
    time_end: str = ""
    grid_id: str = ""

    @property
    def shape(self) -> tuple[int, int]:
        """Grid shape (y, x)."""
        return self.n.shape[1:]

    @property
    def n_groups(self) -> int:
        return self.n.shape[0]

    @classmethod
    def empty(
        cls,
        shape: tuple[int, int],
        has_ssh: bool,
        seasonal: bool = False,
        ow_threshold: float = 0.2,
        grid_id: str = "",
    ) -> MomentState:
        """A state with no time steps (the identity of :meth:`update`)."""
        variables = BASE_VARIABLES + (("ssh",) if has_ssh else ())
        nv = len(variables)
        groups = 12 if seasonal else 1
        ny, nx = shape
        return cls(
            variables=variables,
            seasonal=seasonal,
            ow_threshold=float(ow_threshold),
            n=np.zeros((groups, ny, nx)),
            mean=np.zeros((groups, nv, ny, nx)),
            m2=np.zeros((groups, nv * (nv + 1) // 2, ny, nx)),
            m3=np.zeros((groups, len(TRIPLE_NAMES), ny, nx)),
            ow_core=np.zeros((groups, ny, nx)),
            grid_id=grid_id,
        )

    @classmethod
    def from_arrays(
        cls,
        u: np.ndarray,
        v: np.ndarray,
        zeta: np.ndarray,
        ssh: np.ndarray | None = None,
        core: np.ndarray | None = None,
        months: np.ndarray | None = None,
        seasonal: bool = False,
        ow_threshold: float = 0.2,
        times: np.ndarray | None = None,
        grid_id: str = "",
    ) -> MomentState:
        """Accumulate a block of ``(t, y, x)`` arrays (two-pass within the block).

        ``core`` (1 = eddy core, 0 = not) defaults to no cores; ``months`` (1–12, one per
        time step) is required when ``seasonal``; ``times`` only sets the time range.
        """
        u = np.asarray(u)
        v = np.asarray(v)
        zeta = np.asarray(zeta, dtype=np.float64)
        if not (u.shape == v.shape == zeta.shape) or u.ndim != 3:
            raise ValueError("u, v and zeta must be (t, y, x) arrays of the same shape")
        if ssh is not None:
            ssh = np.asarray(ssh)
            if ssh.shape != u.shape:
                raise ValueError("ssh must have the shape of u")
        # Eddy cores enter the kernel as W < limit: W = -1 at cores, 0 elsewhere, limit -1/2.
        w = np.zeros(u.shape) if core is None else -np.asarray(core, dtype=np.float64)
        limit = np.full(u.shape[0], -0.5)
        nt = u.shape[0]
        state = cls.empty(u.shape[1:], ssh is not None, seasonal, ow_threshold, grid_id)
        if seasonal:
            if months is None or len(months) != nt:
                raise ValueError("seasonal accumulation needs one month (1-12) per time step")
            groups = np.asarray(months, dtype=np.int64) - 1
        else:
            groups = np.zeros(nt, dtype=np.int64)
        for g in np.unique(groups):
            tindex = np.flatnonzero(groups == g)
            part = kernels.chunk_moments(u, v, zeta, ssh, w, limit, tindex)
            for name, arr in zip(_ARRAYS, part, strict=True):
                getattr(state, name)[g] = arr
        state.n_time = nt
        if times is not None and len(times):
            texts = [time_text(t) for t in (times[0], times[-1])]
            state.time_start, state.time_end = texts
        return state

    def copy(self) -> MomentState:
        """A deep copy."""
        return replace(self, **{name: getattr(self, name).copy() for name in _ARRAYS})

    def check_compatible(self, other: MomentState) -> None:
        """Raise :class:`InputError` unless ``other`` can be merged with this state."""
        problems = []
        if self.shape != other.shape:
            problems.append(f"grid shapes differ ({self.shape} vs {other.shape})")
        if self.grid_id and other.grid_id and self.grid_id != other.grid_id:
            problems.append("the grids' coordinates differ")
        if self.variables != other.variables:
            problems.append(f"variables differ ({self.variables} vs {other.variables})")
        if self.seasonal != other.seasonal:
            problems.append("one is seasonal (monthly groups) and the other is not")
        if self.ow_threshold != other.ow_threshold:
            problems.append(
                f"Okubo-Weiss thresholds differ ({self.ow_threshold} vs {other.ow_threshold})"
            )
        if problems:
            raise InputError(
                "Two sets of accumulated statistics cannot be combined: " + "; ".join(problems),
                where="merging saved statistics",
                todo="Merge only statistics from the same grid, variables and stream settings, "
                "or start a new record",
            )

    def update(self, other: MomentState) -> None:
        """Merge ``other`` into this state in place (Chan et al. 1983; Pébay 2008)."""
        self.check_compatible(other)
        for g in range(self.n_groups):
            if not other.n[g].any() and not other.ow_core[g].any():
                continue
            kernels.merge_moments(
                tuple(getattr(self, name)[g] for name in _ARRAYS),
                tuple(np.ascontiguousarray(getattr(other, name)[g]) for name in _ARRAYS),
            )
        self._extend(other.n_time, other.time_start, other.time_end)
        if not self.grid_id:
            self.grid_id = other.grid_id

    def merge_parts(self, parts: dict[int, tuple], n_time: int, time_start: str = "",
                    time_end: str = "") -> None:
        """Merge one chunk's moments, ``{group: (n, mean, m2, m3, ow)}`` as returned by
        :func:`coastmon.stream.kernels.chunk_fields`, into this state in place.

        The same pairwise formulas as :meth:`update`, without building a state for the chunk.
        """
        for g, part in parts.items():
            kernels.merge_moments(tuple(getattr(self, name)[g] for name in _ARRAYS),
                                  tuple(np.ascontiguousarray(a) for a in part))
        self._extend(n_time, time_start, time_end)

    def _extend(self, n_time: int, time_start: str, time_end: str) -> None:
        self.n_time += n_time
        starts = [t for t in (self.time_start, time_start) if t]
        ends = [t for t in (self.time_end, time_end) if t]
        self.time_start = min(starts) if starts else ""
        self.time_end = max(ends) if ends else ""

    def pooled(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Totals over the groups: ``(n, mean, m2, m3, ow_core)`` on (y, x).

        The mean is the Chan merge of the group means (the time mean). The co-moments are
        the sums of the groups' own co-moments: about the overall mean when not seasonal,
        about the monthly climatology when seasonal.
        """
        if self.n_groups == 1:
            return self.n[0], self.mean[0], self.m2[0], self.m3[0], self.ow_core[0]
        n = self.n.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            weights = np.where(n > 0, self.n / np.maximum(n, 1.0), 0.0)
        mean = (weights[:, None] * self.mean).sum(axis=0)
        return n, mean, self.m2.sum(axis=0), self.m3.sum(axis=0), self.ow_core.sum(axis=0)

    def covariance(self, a: str, b: str) -> np.ndarray:
        """Population covariance :math:`\\langle a'b'\\rangle = M_{ab}/n` (NaN where n = 0)."""
        ia, ib = self.variables.index(a), self.variables.index(b)
        n, _, m2, _, _ = self.pooled()
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, m2[PAIR_NAMES[(ia, ib)]] / n, np.nan)

    def third(self, name: str) -> np.ndarray:
        """Third central co-moment ``'uuu' | 'uvv' | 'uuv' | 'vvv'`` divided by n (NaN where n = 0)."""
        n, _, _, m3, _ = self.pooled()
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(n > 0, m3[TRIPLE_NAMES.index(name)] / n, np.nan)

    def mean_of(self, name: str) -> np.ndarray:
        """Time mean of one variable (NaN where n = 0)."""
        n, mean, _, _, _ = self.pooled()
        return np.where(n > 0, mean[self.variables.index(name)], np.nan)


def merge_states(a: MomentState, b: MomentState) -> MomentState:
    """A new state holding the time steps of both ``a`` and ``b`` (neither is modified)."""
    out = a.copy()
    out.update(b)
    return out


def save_state(state: MomentState, path: str | Path) -> Path:
    """Write a state to an ``.npz`` file of plain arrays (no pickle), atomically."""
    path = Path(path)
    tmp = path.with_name(path.name + ".part")
    arrays = {name: getattr(state, name) for name in _ARRAYS}
    arrays.update(
        format_version=np.array(FORMAT_VERSION, dtype=np.int64),
        variables=np.array(state.variables, dtype=str),
        seasonal=np.array(state.seasonal),
        ow_threshold=np.array(state.ow_threshold, dtype=np.float64),
        n_time=np.array(state.n_time, dtype=np.int64),
        time_range=np.array([state.time_start, state.time_end], dtype=str),
        grid_id=np.array(state.grid_id, dtype=str),
    )
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
    os.replace(tmp, path)
    return path


def load_state(path: str | Path) -> MomentState:
    """Read a state written by :func:`save_state` (no pickle is ever loaded)."""
    path = Path(path)
    try:
        with np.load(path, allow_pickle=False) as data:
            version = int(data["format_version"])
            if version != FORMAT_VERSION:
                raise InputError(
                    f"The saved statistics have format version {version}; this coastmon "
                    f"reads version {FORMAT_VERSION}",
                    where=str(path),
                    todo="Rebuild the statistics with this version of coastmon",
                )
            start, end = (str(t) for t in data["time_range"])
            return MomentState(
                variables=tuple(str(v) for v in data["variables"]),
                seasonal=bool(data["seasonal"]),
                ow_threshold=float(data["ow_threshold"]),
                n_time=int(data["n_time"]),
                time_start=start,
                time_end=end,
                grid_id=str(data["grid_id"]),
                **{name: np.array(data[name], dtype=np.float64) for name in _ARRAYS},
            )
    except FileNotFoundError:
        raise InputError(
            "The saved statistics file does not exist", where=str(path),
            todo="Check the path, or run a full analysis first to create it",
        ) from None
    except (KeyError, ValueError, OSError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
        raise InputError(
            f"The saved statistics file cannot be read ({type(exc).__name__}: {exc})",
            where=str(path),
            todo="The file is damaged or not a coastmon statistics file; rebuild it",
        ) from None
