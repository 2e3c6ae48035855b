"""Has the run been long enough for the time mean to settle?

Running-mean convergence: the pattern correlation between the mean over the first L days
and the mean over the whole record, as a function of L, computed on the along-shore frame
and the zonal rays (the points the analysis uses). The length needed is the shortest L
after which the correlation stays at or above the threshold (0.9 by default). Centred
(anomaly) pattern correlation, as in common model-assessment practice.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coastmon.compiled import compiled
from coastmon.io.pages import release, station_sweep
from coastmon.stream.rays import RayField, stations_through_gaps

GRID_POINTS_PER_SWEEP = 512
"""Grid points whose running means are summed at once (:func:`_stored_running_means`)."""


@dataclass
class SpinupCurve:
    length_days: np.ndarray
    correlation: np.ndarray
    threshold: float
    length_needed_days: float  # NaN when never reached

    @property
    def settled(self) -> bool:
        return bool(np.isfinite(self.length_needed_days))


def pattern_correlation(a: np.ndarray, b: np.ndarray) -> float:
    """Centred pattern correlation of two fields over their common finite points."""
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < 3:
        return float("nan")
    x = a[ok] - a[ok].mean()
    y = b[ok] - b[ok].mean()
    den = np.sqrt((x * x).sum() * (y * y).sum())
    return float((x * y).sum() / den) if den > 0 else float("nan")


@compiled()
def _running_means(values, marks, out):  # pragma: no cover - compiled
    """Running means of the finite values of (time, station, k) at the step counts
    ``marks`` (increasing), into ``out[mark, station * k]`` (NaN where none is finite).

    Station by station, time in order at each point: the series files are stored station
    by station, so this reads them in file order; each point's sum takes its values in
    time order, as any sweep in time would.
    """
    n_t, n_s, n_k = values.shape
    total = np.zeros(n_k)
    count = np.zeros(n_k)
    for s in range(n_s):
        total[:] = 0.0
        count[:] = 0.0
        m = 0
        for t in range(n_t):
            for k in range(n_k):
                x = np.float64(values[t, s, k])
                if np.isfinite(x):
                    total[k] += x
                    count[k] += 1.0
            while m < marks.size and marks[m] == t + 1:
                for k in range(n_k):
                    out[m, s * n_k + k] = total[k] / count[k] if count[k] > 0.0 else np.nan
                m += 1


def _stored_running_means(field, marks: np.ndarray, out: np.ndarray) -> None:
    """:func:`_running_means` of a :class:`~coastmon.stream.rays.RayField`'s rays into
    ``out`` (mark, station * ray), from the grid points they are kept as.

    A ray point is a weighted mean of grid points, with the same weights at every step
    where those points have no gap, so its running mean is the same weighted mean of
    theirs: the running means are summed once per grid point (5013 on the long benchmark
    record, against 14 220 ray points) and mapped to the rays with the sampling weights.
    Stations whose rays draw on a grid point with a gap are computed from their rays.
    The difference from the rays' own running means is the rays' float32 rounding.
    """
    matrix, points = field.station_weights(0, field.shape[1])
    n_ray = field.shape[2]
    gappy = stations_through_gaps(matrix, field.complete_points()[points], n_ray)
    grid = np.empty((marks.size, points.size))
    series = field.points                                  # (grid point, time) tiles
    step = GRID_POINTS_PER_SWEEP
    buffer = np.empty((min(step, points.size), series.shape[1]), dtype=np.float32)
    for p0 in range(0, points.size, step):
        idx = points[p0:p0 + step]
        block = series.rows(idx, out=buffer)               # one buffer for every block
        _running_means(block.T[:, :, None], marks, grid[:, p0:p0 + idx.size])
        release(field)                                     # the pages read
    out[:] = (matrix @ grid.T).T
    sampled = np.diff(matrix.indptr) > 0
    out[:, ~sampled] = np.nan
    for s in np.flatnonzero(gappy):
        _running_means(field[:, s:s + 1], marks, out[:, s * n_ray:(s + 1) * n_ray])
        release(field)


def spinup_curve(fields: list[np.ndarray], time_days: np.ndarray, threshold: float = 0.9,
                 n_lengths: int = 40) -> SpinupCurve:
    """Running-mean convergence of one or more (time, points...) fields.

    The fields are joined along their point axes (e.g. u and v on every frame point).
    Running sums (float64) are accumulated point by point in one compiled sweep per group
    of stations (the second axis), in the order the series are stored, and the running
    mean is kept at each of the ``n_lengths`` record lengths: memory holds those means
    and one group's pages, whatever the record length.
    """
    n_t = fields[0].shape[0]
    t = np.asarray(time_days, dtype=float)
    dt = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    marks = np.unique(np.clip(np.round(np.geomspace(max(2, n_t / 50), n_t, n_lengths)).astype(int),
                              2, n_t))
    sizes = [int(np.prod(f.shape[1:])) for f in fields]
    starts = np.concatenate([[0], np.cumsum(sizes)])
    means = np.empty((marks.size, starts[-1]))
    for f, a, size in zip(fields, starts[:-1], sizes, strict=True):
        if isinstance(f, RayField):              # rays kept as grid points
            _stored_running_means(f, marks, means[:, a:a + size])
            continue
        for cols, block in station_sweep(f):
            _running_means(block, marks, means[:, a + cols.start:a + cols.stop])
    snapshots = list(means)
    final = means[-1]
    corr = np.array([pattern_correlation(s, final) for s in snapshots])
    lengths = marks[: len(corr)] * dt
    above = corr >= threshold
    needed = float("nan")
    if above.size and above[-1]:
        first_bad = np.flatnonzero(~above)
        idx = first_bad[-1] + 1 if first_bad.size else 0
        # The last mark always correlates perfectly; only call it settled if the curve
        # reached the threshold before the end of the record.
        if idx < above.size - 1:
            needed = float(lengths[idx])
    return SpinupCurve(lengths, corr, threshold, needed)
