"""Helpers shared by the tests: comparing found sources with the planted truth of a
scenario, and a hand-built stand-in for the along-shore frame."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse

from coastmon.grid.metrics import haversine_m


def nearest_source(sources: pd.DataFrame, lon: float, lat: float) -> tuple[int, float]:
    """Row index of the source nearest to (lon, lat) and its distance in km."""
    d = haversine_m(sources["lon"].to_numpy(), sources["lat"].to_numpy(), lon, lat) / 1000.0
    k = int(np.argmin(d))
    return k, float(d[k])


def ranks_of_planted(sources: pd.DataFrame, truth: dict, tol_km: float = 30.0) -> list[int]:
    """Rank found for each planted source, in the planted order.

    Fails when a planted source has no found source within ``tol_km`` of its cape.
    """
    ranks = []
    for name in truth["expected_rank"]:
        planted = next(p for p in truth["sources"] if p["name"] == name)
        k, dist = nearest_source(sources, planted["cape_lon"], planted["cape_lat"])
        # check: planted truth (the cape of each planted source, from the generator)
        assert dist < tol_km, f"{name}: nearest source {dist:.0f} km away"
        ranks.append(int(sources["rank"].iloc[k]))
    return ranks


@dataclass
class StandInFrame:
    """The attributes of geometry.frame.Frame that the pass uses, built by hand."""

    sampler: sparse.csr_matrix
    valid: np.ndarray
    stations: pd.DataFrame
    offsets_km: np.ndarray
    ray_km: np.ndarray

    def split(self, samples):
        s, o, r = len(self.stations), self.offsets_km.size, self.ray_km.size
        lead = samples.shape[:-1]
        return (samples[..., : s * o].reshape(*lead, s, o),
                samples[..., s * o:].reshape(*lead, s, r))
