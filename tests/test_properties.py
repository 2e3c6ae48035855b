"""Property-based tests: random land/sea masks through the geometry, strict settings, and a
scan of the package source for unsafe deserialisation.

Random chunkings through the accumulators are covered in tests/test_moments.py.
"""

from __future__ import annotations

import ast
import dataclasses
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.interpolate import RegularGridInterpolator

import coastmon
from coastmon.config import CoastSettings, Settings, settings_from_dict
from coastmon.errors import GeometryError, SettingsError
from coastmon.geometry import build_frame, extract_coastline, find_capes

FEW = settings(max_examples=8, deadline=None,
               suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
COAST = CoastSettings(ray_length_km=150.0, offsets_km=(0.0, 10.0, 20.0, 40.0))
N = 36
STEP_DEG = 0.1


def _grid(lon0: float, lat0: float) -> tuple[np.ndarray, np.ndarray]:
    lon1 = lon0 + STEP_DEG * np.arange(N)
    lat1 = lat0 + STEP_DEG * np.arange(N)
    return np.meshgrid(lon1, lat1)


@st.composite
def coast_masks(draw):
    """A coast crossing the domain with random bumps, land on a random side, and
    sometimes an island: 1 = sea, 0 = land."""
    lon0 = draw(st.floats(-180.0, 176.0))
    lat0 = draw(st.sampled_from([-55.0, -35.0, -15.0, 12.0, 30.0, 50.0]))
    amps = draw(st.lists(st.floats(-4.0, 4.0), min_size=3, max_size=3))
    phases = draw(st.lists(st.floats(0.0, 2 * np.pi), min_size=3, max_size=3))
    position = draw(st.floats(10.0, 26.0))
    side = draw(st.sampled_from(["east", "west", "north", "south"]))
    t = np.arange(N)
    line = position + sum(a * np.sin(2 * np.pi * (k + 1) * t / N + p)
                          for k, (a, p) in enumerate(zip(amps, phases, strict=True)))
    j, i = np.mgrid[0:N, 0:N]
    across = {"east": i, "west": N - 1 - i, "north": j, "south": N - 1 - j}[side]
    along = j if side in ("east", "west") else i
    land = across > line[along]
    if draw(st.booleans()):
        cj, ci = draw(st.integers(5, N - 6)), draw(st.integers(5, N - 6))
        radius = draw(st.floats(2.0, 5.0))
        land |= np.hypot(j - cj, i - ci) < radius
    lon, lat = _grid(lon0, lat0)
    return lon, lat, (~land).astype(np.int8)


@st.composite
def noise_masks(draw):
    """Blobs from smoothed random noise: any shape the geometry might meet."""
    from scipy.ndimage import gaussian_filter

    seed = draw(st.integers(0, 2**32 - 1))
    sigma = draw(st.floats(1.0, 4.0))
    level = draw(st.floats(-0.5, 0.5))
    field = gaussian_filter(np.random.default_rng(seed).standard_normal((N, N)), sigma)
    field /= field.std()
    lon, lat = _grid(draw(st.floats(-180.0, 176.0)), draw(st.floats(-60.0, 55.0)))
    return lon, lat, (field > level).astype(np.int8)


def _check_frame_invariants(lon, lat, mask, frame) -> None:
    sampler = frame.sampler.tocsr()
    row_sums = np.asarray(sampler.sum(axis=1)).ravel()
    # check: common practice, no source (interpolation weights form a partition of unity)
    np.testing.assert_allclose(row_sums[frame.valid], 1.0, rtol=1e-9)
    assert np.all(np.diff(sampler.indptr)[~frame.valid] == 0)
    sea_cols = mask.reshape(-1) == 1
    assert np.all(sea_cols[sampler.indices[sampler.data != 0]]), "a weight falls on land"
    assert np.all(sampler.data >= 0)

    # Outside reference for "over sea": scipy's bilinear interpolation of the mask.
    sea_fraction = RegularGridInterpolator((lat[:, 0], lon[0, :]), mask.astype(float),
                                           bounds_error=False, fill_value=np.nan)
    cell_km = STEP_DEG * 111.195 * np.cos(np.radians(np.abs(lat).max()))
    beyond = frame.offsets_km >= 0.75 * cell_km
    pts_lat = frame.section_lat[:, beyond]
    pts_lon = frame.section_lon[:, beyond]
    ok = np.isfinite(pts_lat)
    frac = sea_fraction(np.column_stack([pts_lat[ok], pts_lon[ok]]))
    # check: common practice, no source (a point with bilinear sea fraction >= 0.5 is at sea)
    assert np.all(frac >= 0.5 - 1e-9)
    ray_ok = np.isfinite(frame.ray_lat)
    frac_r = sea_fraction(np.column_stack([frame.ray_lat[ray_ok], frame.ray_lon[ray_ok]]))
    # check: common practice, no source (same rule for the ray points)
    assert np.all(frac_r >= 0.5 - 1e-9)

    # Normals point into the sea: most stations keep their first offshore point (on these
    # small, wiggly random coasts, sections in narrow bays are cut where they would cross a
    # neighbour, so "most" is a majority, not all).
    first = np.flatnonzero(beyond)[0]
    kept = np.isfinite(frame.section_lat[:, first])
    # check: common practice, no source
    assert kept.mean() >= 0.5, f"only {kept.mean():.0%} of sections start at sea"


def _geometry(lon, lat, mask):
    """Capes and frame of a mask, the capes checked, or None when the geometry refuses the
    mask with GeometryError (the only error allowed); the refusal must carry a message."""
    try:
        coastline = extract_coastline(lon, lat, mask, COAST)
        capes = find_capes(coastline, COAST)
        frame = build_frame(coastline, lon, lat, mask, COAST)
    except GeometryError as exc:
        assert str(exc)
        return None
    # check: Mokhtarian & Mackworth 1992 with the sea on the right, capes are
    # convex-seaward curvature maxima (positive curvature)
    assert np.all(capes["curvature_per_km"].to_numpy() > 0)
    return capes, frame


@FEW
@given(coast_masks())
def test_random_coasts_give_consistent_geometry(case):
    lon, lat, mask = case
    built = _geometry(lon, lat, mask)
    if built is None:
        return
    capes, frame = built
    assert np.all(np.isfinite(capes[["lon", "lat"]].to_numpy(dtype=float)))
    _check_frame_invariants(lon, lat, mask, frame)


@FEW
@given(noise_masks())
def test_random_blobs_raise_only_geometry_errors(case):
    lon, lat, mask = case
    built = _geometry(lon, lat, mask)
    if built is None:
        return
    _, frame = built
    sampler = frame.sampler.tocsr()
    row_sums = np.asarray(sampler.sum(axis=1)).ravel()
    # check: common practice, no source (interpolation weights form a partition of unity)
    np.testing.assert_allclose(row_sums[frame.valid], 1.0, rtol=1e-9)


@pytest.mark.parametrize("mask_value", [0, 1])
def test_uniform_masks_raise_geometry_error(mask_value):
    lon, lat = _grid(-12.0, 36.0)
    with pytest.raises(GeometryError):
        extract_coastline(lon, lat, np.full((N, N), mask_value, np.int8), COAST)


# --------------------------------------------------------------------------- settings

_SECTIONS = {f.name: {g.name for g in dataclasses.fields(getattr(Settings(), f.name))}
             for f in dataclasses.fields(Settings)}


@settings(max_examples=25, deadline=None)
@given(section=st.sampled_from(sorted(_SECTIONS)),
       key=st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=20))
def test_unknown_setting_keys_are_refused(section, key):
    if key in _SECTIONS[section]:
        return
    with pytest.raises(SettingsError, match=key):
        settings_from_dict({section: {key: 1}})


@settings(max_examples=25, deadline=None)
@given(value=st.one_of(st.text(max_size=5), st.booleans(), st.lists(st.integers(), max_size=2)))
def test_numbers_of_the_wrong_type_are_refused(value):
    with pytest.raises(SettingsError, match="station_spacing_km"):
        settings_from_dict({"coast": {"station_spacing_km": value}})


# --------------------------------------------------------------------------- safety


def unsafe_calls(source: str) -> list[str]:
    """Unsafe constructs in Python source: eval/exec, pickle-like modules, np.load with
    allow_pickle=True, yaml.load without a safe loader, pandas read_pickle."""
    found = []
    risky_modules = {"pickle", "cPickle", "dill", "shelve", "marshal", "cloudpickle", "joblib"}
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [a.name for a in node.names if a.name.split(".")[0] in risky_modules]
        elif isinstance(node, ast.ImportFrom) and node.module:
            if node.module.split(".")[0] in risky_modules:
                found.append(node.module)
        elif isinstance(node, ast.Call):
            func = node.func
            name = func.id if isinstance(func, ast.Name) else (
                func.attr if isinstance(func, ast.Attribute) else "")
            owner = func.value.id if isinstance(func, ast.Attribute) and isinstance(
                func.value, ast.Name) else ""
            keywords = {k.arg: k.value for k in node.keywords}
            if name in ("eval", "exec") and isinstance(func, ast.Name):
                found.append(name)
            if name == "__import__":
                found.append(name)
            if name == "read_pickle":
                found.append("read_pickle")
            pickle_kw = keywords.get("allow_pickle")
            if isinstance(pickle_kw, ast.Constant) and pickle_kw.value is True:
                found.append(f"{owner}.{name}(allow_pickle=True)")
            if owner == "yaml" and name == "load":
                loader = keywords.get("Loader")
                safe = isinstance(loader, ast.Attribute | ast.Name) and "Safe" in ast.unparse(loader)
                if not safe:
                    found.append("yaml.load without SafeLoader")
    return found


@pytest.mark.parametrize("snippet, expected", [
    ("eval('1')", "eval"),
    ("exec(code)", "exec"),
    ("import pickle", "pickle"),
    ("from joblib import load", "joblib"),
    ("np.load(f, allow_pickle=True)", "np.load(allow_pickle=True)"),
    ("yaml.load(text)", "yaml.load without SafeLoader"),
    ("pd.read_pickle(p)", "read_pickle"),
])
def test_scanner_finds_planted_unsafe_calls(snippet, expected):
    assert unsafe_calls(snippet) == [expected]


def test_safe_forms_pass_the_scanner():
    assert unsafe_calls("np.load(f)\nyaml.load(t, Loader=yaml.SafeLoader)\nnp.load(f, "
                        "allow_pickle=False)\nds.eval('a + b')\n") == []


PICKLE_BETWEEN_OWN_PROCESSES = {"stream/readers.py": ["pickle"], "report/process.py": ["pickle"],
                                "report/draw_worker.py": ["pickle"]}
"""The allowed uses: the streaming pass hands its lazy arrays to the reader processes it
starts, and analyze hands figure jobs to the figure process it starts, and each gets the
answers back, over the anonymous pipes to them (no file, no socket)."""


def test_package_never_deserialises_code_or_pickles():
    root = Path(coastmon.__file__).parent
    files = sorted(root.rglob("*.py"))
    assert len(files) > 20
    report = {str(f.relative_to(root)): unsafe_calls(f.read_text(encoding="utf-8"))
              for f in files}
    assert {k: v for k, v in report.items() if v} == PICKLE_BETWEEN_OWN_PROCESSES


def test_pickle_in_the_readers_only_crosses_pipes_to_their_own_processes():
    source = (Path(coastmon.__file__).parent / "stream" / "readers.py").read_text()
    calls = {ast.unparse(node.func) + "(" + ", ".join(ast.unparse(a) for a in node.args) + ")"
             for node in ast.walk(ast.parse(source))
             if isinstance(node, ast.Call) and ast.unparse(node.func).startswith("pickle.")}
    assert calls == {
        "pickle.load(requests)",  # the reader process: its stdin, from the pass
        "pickle.load(self.proc.stdout)",  # the pass: the stdout of the process it started
        "pickle.dumps(answer)", "pickle.dumps(('error', RuntimeError(repr(answer[1]))))",
        "pickle.dump((slot, t0, t1), self.proc.stdin)",
        "pickle.dumps((arrays, self.fds, slot_bytes, self.layout, open_files))",
    }
    assert "requests = sys.stdin.buffer" in source


def test_pickle_in_the_figure_process_only_crosses_pipes_to_it():
    root = Path(coastmon.__file__).parent / "report"

    def calls(name):
        source = (root / name).read_text()
        return source, {ast.unparse(node.func) + "(" + ", ".join(ast.unparse(a)
                                                               for a in node.args) + ")"
                        for node in ast.walk(ast.parse(source))
                        if isinstance(node, ast.Call)
                        and ast.unparse(node.func).startswith("pickle.")}

    # check: common practice, no source (unpickle only what one's own process wrote)
    _, parent = calls("process.py")
    assert parent == {"pickle.dump((name, args, kwargs), self.proc.stdin)",  # its stdin
                      "pickle.load(self.proc.stdout)"}       # the stdout of the child
    source, child = calls("draw_worker.py")
    assert child == {
        "pickle.load(jobs)",               # its stdin, from the process that started it
        "pickle.dumps(answer)", "pickle.loads(data)",   # its own answer, checked
        "pickle.dumps(('error', RuntimeError(f'{type(answer[1]).__name__}: {answer[1]}')))",
    }
    assert "jobs = sys.stdin.buffer" in source
