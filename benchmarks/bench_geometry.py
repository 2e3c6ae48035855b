"""Benchmark: a 2000 x 2000 land/sea mask -> coastline and capes (target < 10 s on 2 cores).

Run: ``python benchmarks/bench_geometry.py``. The mask is an invented coast: a meandering
eastern-boundary shore with headlands and bays at several scales, plus offshore islands,
on a regular 0.005 degree grid (about 0.5 km).
"""

from __future__ import annotations

import time

import numpy as np

from coastmon.config import CoastSettings
from coastmon.geometry import build_frame, extract_coastline, find_capes


def invented_mask(n: int = 2000, seed: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Regular lon/lat grid and a mask with a wiggly coast and a few islands."""
    rng = np.random.default_rng(seed)
    lon1 = -30.0 + 0.005 * np.arange(n)
    lat1 = 20.0 + 0.005 * np.arange(n)
    lon, lat = np.meshgrid(lon1, lat1)
    shore = -25.0
    for wavelength, amplitude in [(4.0, 0.6), (1.5, 0.25), (0.6, 0.1), (0.25, 0.04)]:
        phase = rng.uniform(0, 2 * np.pi)
        shore = shore + amplitude * np.sin(2 * np.pi * lat / wavelength + phase)
    mask = (lon < shore).astype(np.int8)
    for _ in range(12):
        clon = rng.uniform(-29.5, -26.5)
        clat = rng.uniform(20.5, 29.5)
        radius = rng.uniform(0.05, 0.25)
        mask[np.hypot((lon - clon) * 0.9, lat - clat) < radius] = 0
    return lon, lat, mask


def main() -> None:
    lon, lat, mask = invented_mask()
    settings = CoastSettings()
    t0 = time.perf_counter()
    coast = extract_coastline(lon, lat, mask, settings)
    t1 = time.perf_counter()
    capes = find_capes(coast, settings)
    t2 = time.perf_counter()
    frame = build_frame(coast, lon, lat, mask, settings)
    t3 = time.perf_counter()
    length = sum(seg.length_km for seg in coast.segments)
    print(f"grid {mask.shape}, {len(coast.segments)} segments, {length:.0f} km of coast, "
          f"{len(capes)} capes, {frame.n_stations} stations, {frame.n_points} points")
    print(f"coastline {t1 - t0:.2f} s, capes {t2 - t1:.2f} s, "
          f"coast + capes {t2 - t0:.2f} s, frame {t3 - t2:.2f} s")


if __name__ == "__main__":
    main()
