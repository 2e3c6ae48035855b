"""False alarms of source detection on random homogeneous red-noise coasts.

Not part of the test suite. Builds coasts of 300 stations 10 km apart whose near-shore
vorticity is red noise (lag-1 autoregressive in time, e-folding 10 days, and along the
coast, e-folding 30 km), optionally with a stretch (stations 120-179, 600 km) whose
variance is multiplied by a factor — stationary extra noise with no events. Runs the
detection (alongshore_profiles, find_sources) on each and prints the share of stations
flagged localized, the share of coasts with any localized station, the share with any
source, and sources per 1000 km of coast.

Works with the current code and, to compare, with an older checkout on PYTHONPATH (where
a station counts as localized when its ``localization`` exceeds 1, the old meaning).

Usage::

    python benchmarks/detection_null.py --days 730 --coasts 20 [--stretch 3]
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd
import xarray as xr
from scipy.signal import lfilter

from coastmon.config import Settings
from coastmon.sources.detect import alongshore_profiles, find_sources

N_STATION, DX_KM, LD_KM = 300, 10.0, 30.0


def red_noise(rng, n_time, n_station, tau_days=10.0, ell_km=30.0, burn=200):
    """Unit-variance red noise (time, station), AR(1) in time and along the coast."""
    rho_t, rho_s = np.exp(-1.0 / tau_days), np.exp(-DX_KM / ell_km)
    e = rng.standard_normal((n_time + burn, n_station + burn))
    e = lfilter([np.sqrt(1 - rho_s**2)], [1, -rho_s], e, axis=1)
    e = lfilter([np.sqrt(1 - rho_t**2)], [1, -rho_t], e, axis=0)
    return e[burn:, burn:]


class Frame:
    """The attributes of geometry.frame.Frame that detection reads."""

    def __init__(self):
        s = np.arange(N_STATION) * DX_KM
        self.stations = pd.DataFrame({"segment_id": np.zeros(N_STATION, int),
                                      "alongshore_km": s, "lon": np.full(N_STATION, -10.0),
                                      "lat": 30.0 + s / 111.2})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=1460)
    ap.add_argument("--coasts", type=int, default=20)
    ap.add_argument("--stretch", type=float, default=1.0)
    ap.add_argument("--seed", type=int, default=123)
    args = ap.parse_args()
    settings, frame = Settings(), Frame()
    no_capes = pd.DataFrame({"cape_id": [], "segment_id": [], "alongshore_km": []})
    rng = np.random.default_rng(args.seed)
    flagged = assessed = any_loc = any_src = n_src = 0
    for _ in range(args.coasts):
        zeta = red_noise(rng, args.days, N_STATION) * 1e-5
        zeta[:, 120:180] *= np.sqrt(args.stretch)
        vel = red_noise(rng, args.days, N_STATION) * 0.05
        dims = ("time", "station", "offset")
        series = xr.Dataset(
            {"section_zeta": (dims, zeta[:, :, None]), "section_u": (dims, vel[:, :, None]),
             "section_v": (dims, vel[:, :, None])},
            coords={"offset_km": ("offset", [0.0]),
                    "time_days": ("time", np.arange(args.days, dtype=float))})
        prof = alongshore_profiles(series, frame, settings, LD_KM)
        ok = np.isfinite(prof["localization"].values)
        loc = (prof["localized"].values > 0) if "localized" in prof else \
            (prof["localization"].values > 1)
        flagged += int((loc & ok).sum())
        assessed += int(ok.sum())
        any_loc += int((loc & ok).any())
        try:
            found = find_sources(prof, frame, no_capes, settings, LD_KM, series=series)
        except TypeError:  # an older checkout without the series argument
            found = find_sources(prof, frame, no_capes, settings, LD_KM)
        any_src += int(len(found) > 0)
        n_src += len(found)
    km = args.coasts * N_STATION * DX_KM / 1000.0
    print(f"days {args.days}, {args.coasts} coasts, stretch x{args.stretch:g}: "
          f"stations localized {flagged / assessed:.3f}; coasts with a localized station "
          f"{any_loc / args.coasts:.2f}; coasts with a source {any_src / args.coasts:.2f}; "
          f"sources per 1000 km {n_src / km:.2f}")


if __name__ == "__main__":
    main()
