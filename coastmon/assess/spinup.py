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


def spinup_curve(fields: list[np.ndarray], time_days: np.ndarray, threshold: float = 0.9,
                 n_lengths: int = 40, block: int = 64) -> SpinupCurve:
    """Running-mean convergence of one or more (time, points) fields.

    The fields are concatenated along the point axis (e.g. u and v on every frame point).
    Running sums are accumulated block by block over time, so memory stays bounded.
    """
    n_t = fields[0].shape[0]
    t = np.asarray(time_days, dtype=float)
    dt = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    marks = np.unique(np.clip(np.round(np.geomspace(max(2, n_t / 50), n_t, n_lengths)).astype(int),
                              2, n_t))
    n_pts = sum(int(np.prod(f.shape[1:])) for f in fields)
    total = np.zeros(n_pts)
    count = np.zeros(n_pts)
    snapshots = []
    mark_i = 0
    for start in range(0, n_t, block):
        stop = min(start + block, n_t)
        chunk = np.concatenate([np.asarray(f[start:stop], dtype=np.float64).reshape(stop - start, -1)
                                for f in fields], axis=1)
        ok = np.isfinite(chunk)
        vals = np.where(ok, chunk, 0.0)
        csum = np.cumsum(vals, axis=0)
        ccnt = np.cumsum(ok, axis=0)
        while mark_i < marks.size and marks[mark_i] <= stop:
            k = marks[mark_i] - start - 1
            with np.errstate(invalid="ignore", divide="ignore"):
                snapshots.append((total + csum[k]) / (count + ccnt[k]))
            mark_i += 1
        total += csum[-1]
        count += ccnt[-1]
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
