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
from coastmon.io.pages import release


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
def _accumulate(values, total, count):  # pragma: no cover - compiled
    """Add the finite values of (steps, points) to the running sums and counts."""
    for t in range(values.shape[0]):
        for p in range(values.shape[1]):
            x = np.float64(values[t, p])
            if np.isfinite(x):
                total[p] += x
                count[p] += 1.0


def spinup_curve(fields: list[np.ndarray], time_days: np.ndarray, threshold: float = 0.9,
                 n_lengths: int = 40, block: int = 256) -> SpinupCurve:
    """Running-mean convergence of one or more (time, points...) fields.

    The fields are joined along their point axes (e.g. u and v on every frame point).
    Running sums (float64) are accumulated one block of time steps at a time, in one
    compiled sweep, and the running mean is taken at each of the ``n_lengths`` record
    lengths, so memory stays bounded whatever the record length.
    """
    n_t = fields[0].shape[0]
    t = np.asarray(time_days, dtype=float)
    dt = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    marks = np.unique(np.clip(np.round(np.geomspace(max(2, n_t / 50), n_t, n_lengths)).astype(int),
                              2, n_t))
    sizes = [int(np.prod(f.shape[1:])) for f in fields]
    starts = np.concatenate([[0], np.cumsum(sizes)])
    total = np.zeros(starts[-1])
    count = np.zeros(starts[-1])
    snapshots = []
    edges = np.union1d(np.append(np.arange(0, n_t, block), n_t), marks)
    for start, stop in zip(edges[:-1], edges[1:], strict=True):
        for f, a, b in zip(fields, starts[:-1], starts[1:], strict=True):
            part = np.ascontiguousarray(f[start:stop]).reshape(stop - start, -1)
            _accumulate(part, total[a:b], count[a:b])
        if stop in marks:
            with np.errstate(invalid="ignore", divide="ignore"):
                snapshots.append(total / count)
        release(*fields)
    with np.errstate(invalid="ignore", divide="ignore"):
        final = total / count
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
