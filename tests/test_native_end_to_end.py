"""Model-native and observation-like inputs give the same answer end to end.

One small planted-truth scenario (invented geography, two sources) is written by
:mod:`coastmon.scenario.native` as a rotated curvilinear C-grid with SGRID metadata, as
gridded sea surface height alone, and on depth levels (fixed and terrain-following), and
each is run through the pipeline. The references are the planted truth of the generator
(its capes, birth sites, expected rank, the planted decay with depth) and the analysis of
the scenario's own regular-grid file; nothing is read back from the code under test.
The CF Appendix D height formulas themselves are unit-tested in tests/test_native_grids.py.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd
import pyproj
import pytest
from planted import nearest_source, ranks_of_planted
from scipy.interpolate import griddata

from coastmon.cli import main as cli_main
from coastmon.config import Settings
from coastmon.pipeline import analyse_series, prepare
from coastmon.scenario import default_params, make_scenario, native
from coastmon.scenario.geography import grid_axes, offshore_distance_km
from coastmon.stream import run_pass

QUIET = Settings().replace("stream", progress=False)
DECAY_M = 500.0


def _params():
    """Two strongest sources, small domain, 400 days (the wavelet band needs 2.8 x 120 d).

    White SSH noise is lowered from 2 mm to 0.5 mm: geostrophic vorticity is a second
    derivative of SSH, so grid-scale white noise of standard deviation s adds vorticity noise
    of about g s sqrt(20) / (f dx^2) (five-point Laplacian), ~1e-5 s-1 for 2 mm on a 10 km
    grid, as large as the weaker planted eddies; mapped altimetry is smooth at grid scale.
    """
    base = default_params()
    keep = {"Tasker Head", "Cape Orrin"}
    return dataclasses.replace(
        base, seed=7, n_days=400, lon_min=-42.0, lat_min=33.0, lat_max=38.0,
        resolution_deg=0.1, compress=False, noise_ssh_m=0.0005,
        capes=tuple(c for c in base.capes if c.name in keep), islands=(),
        sources=tuple(s for s in base.sources if s.cape in keep),
    )


def _analyse(path: Path, work: Path, settings: Settings = QUIET, sources: bool = True):
    prep = prepare([path], settings)
    res = run_pass(prep.ds, prep.metrics, prep.frame, settings.stream, work)
    products = (analyse_series(res.stats, res.series, prep.frame, prep.capes, settings,
                               prep.ld_km) if sources else None)
    return prep, res, products


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    folder = tmp_path_factory.mktemp("native")
    nc, truth = make_scenario(_params(), folder / "data")
    return folder, nc, json.loads(truth.read_text())


@pytest.fixture(scope="module")
def regular(scenario):
    folder, nc, _ = scenario
    return _analyse(nc, folder / "work_regular")


@pytest.fixture(scope="module")
def cgrid(scenario):
    folder, nc, _ = scenario
    path = native.write_rotated_cgrid(nc, folder / "cgrid.nc", rotation_deg=25.0)
    return path, _analyse(path, folder / "work_cgrid")


@pytest.mark.slow
def test_flow_re_evaluated_on_the_scenario_grid_equals_the_file_to_the_noise(scenario):
    _, nc, truth = scenario
    params, _ = native.scenario_truth(nc)
    lon2, lat2 = np.meshgrid(*grid_axes(params))
    waves = native.background_waves(params)
    with netCDF4.Dataset(nc) as src:
        for day in (0, 200, 399):
            _, u, v = native.planted_flow(params, truth["births"], waves, lon2, lat2, day)
            for name, mine in (("u", u), ("v", v)):
                diff = np.ma.filled(src[name][day].astype(float), np.nan) - mine
                # check: planted truth (generator adds white noise of noise_velocity_m_s only)
                assert np.nanstd(diff) == pytest.approx(params.noise_velocity_m_s, rel=0.05)
                assert abs(np.nanmean(diff)) < 4 * params.noise_velocity_m_s / np.sqrt(
                    np.isfinite(diff).sum())


@pytest.mark.slow
def test_cgrid_file_is_staggered_rotated_and_curvilinear(cgrid):
    path, (prep, _, _) = cgrid
    with netCDF4.Dataset(path) as nc:
        assert nc["u_x"].dimensions == ("time", "yc", "xf")
        assert nc["v_y"].dimensions == ("time", "yf", "xc")
        angle = np.degrees(np.asarray(nc["angle"][:]))
        lon = np.asarray(nc["lon_c"][:])
    # check: construction (x-axis turned 25 degrees at the centre of an equidistant plane)
    assert np.median(angle) == pytest.approx(25.0, abs=0.2)
    # check: from memory (meridian convergence on a 700 km grid near 35 N is a few degrees)
    assert 1.0 < angle.max() - angle.min() < 10.0
    assert np.ptp(lon[:, 0]) > 1.0  # a grid column is not a meridian: curvilinear
    assert prep.ds.attrs["velocity_kind"] == "velocity"


def _on_regular(prep_r, prep_c, stats_c, name: str, params) -> tuple[np.ndarray, np.ndarray]:
    """C-grid statistic interpolated (linear, on a plane) to the regular grid's sea points."""
    lon_r, lat_r = prep_r.ds["lon"].values, prep_r.ds["lat"].values
    lon_c, lat_c = prep_c.ds["lon"].values, prep_c.ds["lat"].values
    plane = pyproj.Transformer.from_crs(
        "EPSG:4326", pyproj.CRS.from_proj4("+proj=aeqd +lat_0=35.5 +lon_0=-38 +R=6371000"),
        always_xy=True)
    xr_, yr_ = plane.transform(lon_r, lat_r)
    xc, yc = plane.transform(lon_c, lat_c)
    values_c = stats_c[name].values
    ok = np.isfinite(values_c)
    # drop the outermost C-grid ring: its centres have one face only
    ok[[0, -1], :] = False
    ok[:, [0, -1]] = False
    mine = griddata((xc[ok], yc[ok]), values_c[ok], (xr_, yr_), method="linear")
    offshore = offshore_distance_km(lon_r, lat_r, params)
    return mine, offshore


@pytest.mark.slow
def test_cgrid_gives_the_same_eddy_statistics_as_the_regular_grid(scenario, regular, cgrid):
    _, nc, _ = scenario
    params, _ = native.scenario_truth(nc)
    prep_r, res_r, _ = regular
    _, (prep_c, res_c, _) = cgrid
    for name, tol in (("eke", 0.08), ("zeta_var", 0.12), ("mean_zeta", 0.12)):
        mine, offshore = _on_regular(prep_r, prep_c, res_c.stats, name, params)
        ref = res_r.stats[name].values
        # common region: sea on both grids, 30 km or more from the coast (the C-grid has
        # walls there, the regular grid does not)
        use = np.isfinite(mine) & np.isfinite(ref) & (offshore >= 30.0)
        assert use.sum() > 1500
        err = np.sqrt(np.mean((mine[use] - ref[use]) ** 2) / np.mean(ref[use] ** 2))
        # check: common practice, no source (second-order schemes at 9-11 km on eddies of
        # radius 30-35 km: a few per cent each, so well under 10 % between two grids)
        assert err < tol, f"{name}: relative rms difference {err:.3f}"


@pytest.mark.slow
def test_cgrid_finds_the_same_sources(scenario, regular, cgrid):
    _, _, truth = scenario
    src_r = regular[2].sources
    src_c = cgrid[1][2].sources
    # check: planted truth (two sources) and the regular-grid analysis of the same flow
    assert len(src_c) == len(src_r) == len(truth["sources"])
    for _, row in src_r.iterrows():
        k, dist = nearest_source(src_c, row["lon"], row["lat"])
        # check: common practice, no source (two grid cells of 10 km)
        assert dist < 20.0
        # check: the regular-grid analysis of the same planted flow
        assert int(src_c["rank"].iloc[k]) == int(row["rank"])
        assert src_c["feed_w_per_m"].iloc[k] == pytest.approx(row["feed_w_per_m"], rel=0.3)


@pytest.mark.slow
def test_ssh_only_input_recovers_the_planted_sources(scenario, tmp_path):
    folder, nc, truth = scenario
    ssh_nc = native.write_ssh_only(nc, folder / "height.nc", var_name="surface_height")
    out = tmp_path / "out"
    code = cli_main(["analyze", str(ssh_nc), "--out", str(out), "--ssh-var", "surface_height",
                     "--no-progress", "--gis", "csv"])
    assert code == 0
    run = json.loads((out / "run.json").read_text())
    assert run["settings"]["ingest"]["ssh_var"] == "surface_height"
    # check: planted truth (cape of each source; ssh = f psi / g, Gill 1982 s. 7.6)
    ranks = ranks_of_planted(pd.read_csv(out / "sources.csv"), truth)
    # check: planted truth (expected rank order written by the generator)
    assert ranks == sorted(ranks) and ranks[0] == 1


@pytest.fixture(scope="module")
def levels(scenario):
    folder, nc, _ = scenario
    z_nc = native.write_z_levels(nc, folder / "zlev.nc", decay_m=DECAY_M, max_days=40)
    s_nc = native.write_s_levels(nc, folder / "slev.nc", decay_m=DECAY_M, max_days=40)
    return folder, z_nc, s_nc


def _eke(path: Path, work: Path, depth: float | None, method: str = "linear") -> np.ndarray:
    settings = QUIET.replace("ingest", depth_m=depth, depth_method=method)
    prep, res, _ = _analyse(path, work, settings, sources=False)
    assert prep.ds.attrs["depth_m"] == (0.0 if depth is None else depth)
    return res.stats["eke"].values


@pytest.mark.slow
def test_z_levels_at_300_m_scale_eke_by_the_planted_decay(levels):
    folder, z_nc, _ = levels
    top = _eke(z_nc, folder / "w_top", None)
    deep = _eke(z_nc, folder / "w_300", 300.0)
    sea = np.isfinite(top) & np.isfinite(deep) & (top > 0)
    ratio = deep[sea] / top[sea]
    # check: planted truth, u(d) = u_s exp(-d / 500 m), so EKE(d) = EKE_s exp(-2 d / 500 m)
    assert np.median(ratio) == pytest.approx(np.exp(-2 * 300.0 / DECAY_M), rel=0.02)
    assert np.percentile(np.abs(ratio / np.exp(-2 * 300.0 / DECAY_M) - 1), 99) < 0.03


@pytest.mark.slow
def test_s_coordinate_at_300_m_matches_the_z_levels(levels):
    folder, z_nc, s_nc = levels
    z_eke = _eke(z_nc, folder / "wz", 300.0)
    s_eke = _eke(s_nc, folder / "ws", 300.0)
    sea = np.isfinite(z_eke) & np.isfinite(s_eke) & (z_eke > 0)
    # check: planted truth (bathymetry >= 500 m, so no column is cut at 300 m)
    assert sea.sum() == np.isfinite(z_eke).sum()
    rel = np.abs(s_eke[sea] / z_eke[sea] - 1)
    # check: linear interpolation of exp(z/D) between levels dz apart errs by at most
    # dz^2 / (8 D^2) (interpolation error bound, e.g. Burden & Faires, Numerical Analysis);
    # dz <= 45 m near 300 m on these levels: 0.1 % on velocity, 0.2 % on EKE
    assert np.median(rel) < 0.003
    assert np.percentile(rel, 99) < 0.005
