"""Missing data in the record: how much is present, and where and when it is not.

The streaming pass counts, for every grid point, the time steps with data (``n_valid``)
and, for every time step, the grid points with data (``valid_steps``). Both are checked
here against the sea points of the land/sea mask:

* a time step is *incomplete* when more than :data:`STEP_GAP_FRACTION` of the sea points
  that have data at some time are missing in it; incomplete steps are reported as a note
  that names their dates and files;
* a sea point is *short* when it has data at fewer than :data:`POINT_SHORT_FRACTION` of
  the time steps (but at some); short points are reported as a note;
* when fewer than :data:`MIN_PRESENT_FRACTION` of all sea samples (points x steps) are
  present, the record is refused (:class:`~coastmon.errors.RecordError`): the along-shore
  series would be mostly gaps and the feeds and their intervals meaningless.

Sea points that never have data (e.g. inside the equator band of geostrophic velocity)
are left out of all three: they are a property of the grid, not a gap in the record.
"""

from __future__ import annotations

import numpy as np

from coastmon.errors import RecordError
from coastmon.stream.moments import time_text

STEP_GAP_FRACTION = 0.01
"""A time step missing more than this share of its sea points is reported."""
POINT_SHORT_FRACTION = 0.5
"""A sea point with data at fewer than this share of the time steps is reported."""
MIN_PRESENT_FRACTION = 0.75
"""Fewest share of the sea samples (points x time steps) that must be present."""
MAX_SPANS = 3
"""Spans of incomplete steps spelled out in a note (the rest are counted)."""


def _date(value) -> str:
    text = time_text(value) if value is not None else ""
    return text.removesuffix("T00:00:00")


def _spans(bad: np.ndarray) -> list[tuple[int, int]]:
    """Runs of consecutive True as (first, last) step indices."""
    idx = np.flatnonzero(bad)
    if idx.size == 0:
        return []
    breaks = np.flatnonzero(np.diff(idx) > 1)
    starts = np.concatenate([[idx[0]], idx[breaks + 1]])
    ends = np.concatenate([idx[breaks], [idx[-1]]])
    return [(int(a), int(b)) for a, b in zip(starts, ends, strict=True)]


def _files_of(steps: np.ndarray, files: list[str], steps_per_file: list[int]) -> list[str]:
    """The input files that hold the given time steps (all files when not known)."""
    if not files:
        return []
    if len(steps_per_file) != len(files):
        return list(files)
    edges = np.cumsum(steps_per_file)
    which = np.unique(np.searchsorted(edges, steps, side="right"))
    return [files[int(k)] for k in which if k < len(files)]


def check_coverage(valid_steps: np.ndarray, n_valid: np.ndarray, mask: np.ndarray,
                   times: np.ndarray | None, files: list[str],
                   steps_per_file: list[int]) -> list[str]:
    """Notes on missing data; raises when too little is left.

    Parameters
    ----------
    valid_steps : (time,) points with data at each step (land never has data).
    n_valid : (y, x) steps with data at each point.
    mask : (y, x) 1 = sea, 0 = land.
    times : (time,) decoded times (for the dates in the notes), or None.
    files, steps_per_file : the input files in time order and their numbers of steps.

    Returns
    -------
    list of str
        One note per kind of gap found (incomplete time steps, short points); empty when
        the record is complete.

    Raises
    ------
    RecordError
        Fewer than :data:`MIN_PRESENT_FRACTION` of the sea samples are present.
    """
    valid_steps = np.asarray(valid_steps, dtype=np.float64)
    n_valid = np.asarray(n_valid)
    nt = valid_steps.size
    wet = (np.asarray(mask) == 1) & (n_valid > 0)
    n_wet = int(wet.sum())
    if nt == 0 or n_wet == 0:
        return []
    missing = 1.0 - np.minimum(valid_steps, n_wet) / n_wet
    present = float(n_valid[wet].sum()) / (n_wet * nt)
    gap = missing > STEP_GAP_FRACTION
    spans = _spans(gap)

    def when(a: int, b: int) -> str:
        if times is None:
            return f"steps {a}-{b}" if b > a else f"step {a}"
        first, last = _date(times[a]), _date(times[b])
        return f"{first} to {last} ({b - a + 1} steps)" if b > a else f"{first} (1 step)"

    described = "; ".join(when(a, b) for a, b in spans[:MAX_SPANS])
    if len(spans) > MAX_SPANS:
        described += f"; and {len(spans) - MAX_SPANS} more spans"
    gap_files = _files_of(np.flatnonzero(gap), files, steps_per_file)
    named = ", ".join(gap_files[:5]) + (f" and {len(gap_files) - 5} more" if len(gap_files) > 5
                                        else "")
    if present < MIN_PRESENT_FRACTION:
        raise RecordError(
            f"Only {100 * present:.0f} % of the data at sea are present (points x time steps; "
            f"at least {100 * MIN_PRESENT_FRACTION:.0f} % are needed): data are missing in "
            f"{int(gap.sum())} of {nt} time steps, {described}",
            where=named or "the input files",
            todo="Check those files (fill values only, a failed copy or download, missing Zarr "
                 "chunk files) and give the complete record, or analyse only the complete part")
    notes = []
    if gap.any():
        notes.append(
            f"Data are missing at sea in {int(gap.sum())} of {nt} time steps, {described}, "
            f"in {named}: up to {100 * float(missing.max()):.0f} % of the sea points in a "
            f"step; {100 * present:.1f} % of all sea data are present. The statistics and "
            "series skip the missing values, so the results there rest on fewer samples; "
            "check those files if the gaps are not expected.")
    short = wet & (n_valid < POINT_SHORT_FRACTION * nt)
    if short.any():
        notes.append(
            f"{int(short.sum())} of {n_wet} sea points have data at fewer than "
            f"{100 * POINT_SHORT_FRACTION:.0f} % of the time steps; their statistics (see "
            "n_valid in results.nc) rest on a shorter record.")
    return notes


__all__ = ["MIN_PRESENT_FRACTION", "POINT_SHORT_FRACTION", "STEP_GAP_FRACTION",
           "check_coverage"]
