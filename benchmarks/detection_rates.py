"""Receiver-operating table of source detection: found vs. false, against the strength of a
weak source and the record length, from planted-truth scenarios.

Not part of the test suite. Each run builds a small scenario with the generator (two capes
of the invented coast: a strong source at Tasker Head, and a weak source at Cape Orrin
shedding about one eddy a month with its amplitude set so that its planted feed is a given
fraction of the strong one's), runs the streaming pass and the analysis, and compares the
sources found with the generator's own planted births (their cape positions). A straight
coast with births spread uniformly along it (no capes) is the control. Prints one JSON line
per run and a Markdown table at the end.

Usage::

    python benchmarks/detection_rates.py --dir /tmp/coastmon-rates \\
        --fractions 0.33 0.1 0.05 --days 730 1461 --seeds 1 2 [--background 4]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import time
from pathlib import Path

import numpy as np

from coastmon.config import Settings
from coastmon.grid.metrics import haversine_m
from coastmon.pipeline import analyse_series, prepare
from coastmon.scenario import SourceSpec, default_params, make_scenario, straight_coast_params
from coastmon.stream import run_pass

SETTINGS = Settings().replace("stream", progress=False)
MATCH_KM = 40.0
"""A found source within this distance of a planted cape is that source."""


def small_domain(params, seed: int, n_days: int, background: float = 1.0):
    """The small test domain of the end-to-end tests: 33-38 N, 0.1 degree; ``background``
    multiplies the amplitudes of the background Rossby waves and of the white noise."""
    return dataclasses.replace(params, seed=seed, n_days=n_days, lon_min=-42.0, lat_min=33.0,
                               lat_max=38.0, resolution_deg=0.1, compress=False, islands=(),
                               wave_velocity_m_s=params.wave_velocity_m_s * background,
                               noise_velocity_m_s=params.noise_velocity_m_s * background,
                               noise_ssh_m=params.noise_ssh_m * background)


def with_weak_source(fraction: float, seed: int, n_days: int, background: float = 1.0):
    """Strong source at Tasker Head (as in the demo), weak one at Cape Orrin whose planted
    feed (rate x psi0^2; scenario.flow.planted_feed_w_per_m) is ``fraction`` of it."""
    base = default_params()
    strong = next(s for s in base.sources if s.cape == "Tasker Head")
    rate_weak = 12.0
    psi_weak = strong.psi0_m2_s * np.sqrt(fraction * strong.rate_per_year / rate_weak)
    weak = SourceSpec(name="Weak source", cape="Cape Orrin", rate_per_year=rate_weak,
                      psi0_m2_s=float(psi_weak), radius_km=30.0, birth_offset_km=30.0)
    keep = {"Tasker Head", "Cape Orrin"}
    params = dataclasses.replace(base, capes=tuple(c for c in base.capes if c.name in keep),
                                 sources=(strong, weak))
    return small_domain(params, seed, n_days, background)


def run_one(params, where: Path) -> dict:
    t0 = time.time()
    nc, truth_path = make_scenario(params, where / "data")
    truth = json.loads(truth_path.read_text())
    prep = prepare([nc], SETTINGS)
    res = run_pass(prep.ds, prep.metrics, prep.frame, SETTINGS.stream, where / "work")
    products = analyse_series(res.stats, res.series, prep.frame, prep.capes, SETTINGS,
                              prep.ld_km)
    src = products.sources
    planted = [p for p in truth["sources"] if p.get("cape_lat") is not None]
    matched = set()
    result = {"n_found": int(len(src)), "seconds": round(time.time() - t0, 1)}
    for p in planted:
        if len(src):
            d = haversine_m(src["lon"].to_numpy(), src["lat"].to_numpy(),
                            p["cape_lon"], p["cape_lat"]) / 1000.0
            k = int(np.argmin(d))
            hit = bool(d[k] <= MATCH_KM)
        else:
            hit, k = False, -1
        key = "weak" if p["name"] == "Weak source" else "strong"
        result[f"{key}_found"] = hit
        result[f"{key}_rank"] = int(src["rank"].values[k]) if hit else None
        result[f"{key}_feed_w_per_m"] = p.get("realized_feed_w_per_m")
        if hit:
            matched.add(k)
    result["n_false"] = int(len(src) - len(matched))
    if "weak_feed_w_per_m" in result and result.get("strong_feed_w_per_m"):
        result["fraction"] = result["weak_feed_w_per_m"] / result["strong_feed_w_per_m"]
    result["weak_ranked_last"] = bool(result.get("weak_found") and
                                      result["weak_rank"] == len(src))
    return result


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", type=Path, required=True)
    ap.add_argument("--fractions", type=float, nargs="+", default=[0.33, 0.1, 0.05])
    ap.add_argument("--days", type=int, nargs="+", default=[730, 1461])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--no-control", action="store_true")
    ap.add_argument("--background", type=float, default=1.0,
                    help="factor on the background waves and noise (default 1: as the demo)")
    args = ap.parse_args()
    rows = []
    for n_days in args.days:
        for seed in args.seeds:
            cases = [(f, with_weak_source(f, seed, n_days, args.background))
                     for f in args.fractions]
            if not args.no_control:
                control = dataclasses.replace(straight_coast_params(), uniform_lat_min=33.5,
                                              uniform_lat_max=37.5)
                cases.append((0.0, small_domain(control, seed, n_days, args.background)))
            for fraction, params in cases:
                tag = f"f{fraction:g}_d{n_days}_s{seed}"
                r = run_one(params, args.dir / tag)
                r.update({"case": tag, "days": n_days, "seed": seed,
                          "target_fraction": fraction})
                print(json.dumps(r), flush=True)
                rows.append(r)
    print()
    print("| weak / strong feed | record (days) | seeds | strong found | weak found | "
          "weak ranked last | false sources |")
    print("|---|---|---|---|---|---|---|")
    for n_days in args.days:
        for fraction in [*args.fractions, *([] if args.no_control else [0.0])]:
            sel = [r for r in rows if r["days"] == n_days and r["target_fraction"] == fraction]
            if fraction == 0.0:
                print(f"| control (straight coast, no cape) | {n_days} | {len(sel)} | – | – | – | "
                      f"{sum(r['n_false'] for r in sel)} |")
                continue
            print(f"| {np.mean([r['fraction'] for r in sel]):.3f} | {n_days} | {len(sel)} | "
                  f"{sum(r['strong_found'] for r in sel)}/{len(sel)} | "
                  f"{sum(r['weak_found'] for r in sel)}/{len(sel)} | "
                  f"{sum(r['weak_ranked_last'] for r in sel)}/{len(sel)} | "
                  f"{sum(r['n_false'] for r in sel)} |")


if __name__ == "__main__":
    main()
