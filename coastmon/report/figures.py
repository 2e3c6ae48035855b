"""Figures of a run, as PNG files.

Every function draws one figure with matplotlib's object-oriented API (no pyplot state,
safe in threads), writes it atomically to ``path`` and returns ``path``. Conventions:

- axes carry labels with units; no figure titles (captions live in the report), panel
  letters ``(a)``, ``(b)`` on multi-panel figures;
- colour maps are perceptually uniform and readable with colour-vision deficiency:
  ``cividis`` for fields of one sign, ``RdBu_r`` centred on zero for signed fields;
  markers and lines use the Okabe–Ito palette, with white halos over shading;
- maps are drawn in longitude/latitude with the aspect ratio 1/cos(mean latitude), so a
  kilometre is as long east–west as north–south at the centre of the map;
- colour limits come from the 2nd–98th percentiles of the data (the colour bar is
  extended where values lie outside), so one extreme cell does not wash out the map.
"""

from __future__ import annotations

import functools
import os
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import ParamSpec, TypeVar

import geopandas as gpd
import matplotlib as mpl
import numpy as np
import pandas as pd
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.colors import LogNorm, Normalize, TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, LogFormatter

from coastmon.io.atomic import atomic_path
from coastmon.io.position import lat_text, lon_text

P = ParamSpec("P")
R = TypeVar("R")

DPI = 130
"""Resolution of every figure (dots per inch)."""

# Okabe & Ito colour-blind-safe palette
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREEN = "#009E73"
BLUE = "#0072B2"
VERMILION = "#D55E00"
PURPLE = "#CC79A7"
LAND = "0.78"
SEQUENTIAL = "cividis"
DIVERGING = "RdBu_r"

_HALO = [patheffects.withStroke(linewidth=2.6, foreground="white")]
_RC = {
    "font.size": 9,
    "axes.labelsize": 9,
    "axes.titlesize": 9,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
}
_KM_PER_DAY_PER_M_S = 86.4


def _styled(func: Callable[P, R]) -> Callable[P, R]:
    """Draw the whole figure under the project's font sizes and spine settings."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        with mpl.rc_context(_RC):
            return func(*args, **kwargs)

    return wrapper


def _figure(width: float, height: float) -> Figure:
    return Figure(figsize=(width, height), dpi=DPI, layout="constrained")


def _legend_corner(mask2d: np.ndarray | None) -> str:
    """The lower corner of the map on its open-sea side, so the legend hides no coast.

    The x axis is taken west to east (as the maps draw it); the side whose outer third holds
    more sea gets the legend.
    """
    if mask2d is None:
        return "lower left"
    m = np.asarray(mask2d, dtype=float)
    third = max(m.shape[1] // 3, 1)
    west, east = np.nanmean(m[:, :third]), np.nanmean(m[:, -third:])
    return "lower left" if west >= east else "lower right"


def _save(fig: Figure, path: str | os.PathLike[str]) -> Path:
    final = Path(path)
    engine = fig.get_layout_engine()
    if engine is not None:
        # Lay the figure out once and fix it: with an engine attached, savefig would draw
        # twice (a layout pass without rendering, then the picture), laying out each time.
        engine.execute(fig)
        fig.set_layout_engine("none")
    with atomic_path(final) as tmp:
        fig.savefig(tmp, format="png", dpi=DPI, facecolor="white")
    return final


def _map_size(lon2d: np.ndarray, lat2d: np.ndarray, extra_in: float) -> tuple[float, float]:
    """Figure size (inches) that fits a latitude-corrected map plus ``extra_in`` of margin."""
    lon_span = float(np.nanmax(lon2d) - np.nanmin(lon2d))
    lat_span = float(np.nanmax(lat2d) - np.nanmin(lat2d))
    coslat = max(np.cos(np.deg2rad(float(np.nanmean(lat2d)))), 0.05)
    ratio = (lon_span * coslat) / lat_span if lat_span > 0 else 1.0
    height = 5.4
    width = height * ratio + extra_in
    if width > 10.0:
        width = 10.0
        height = max((width - extra_in) / ratio, 3.0)
    return max(width, 4.0), height + 0.6


def _panel_letter(ax: Axes, index: int) -> None:
    ax.text(0.01, 0.98, f"({chr(ord('a') + index)})", transform=ax.transAxes, ha="left",
            va="top", fontweight="bold", fontsize=9, path_effects=_HALO, zorder=10)


def _lon_text(x: float, _pos: object = None) -> str:
    return lon_text(round(x, 9), "g", "°")


def _lat_text(y: float, _pos: object = None) -> str:
    return lat_text(round(y, 9), "g", "°")


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


class _PlainLogFormatter(LogFormatter):
    """matplotlib's choice of which logarithmic ticks to label (minor ones too when the
    scale spans few decades), written as plain numbers: ``0.1``, ``2``, ``10``, and
    ``10⁻⁵`` beyond a thousandth or ten thousand.

    matplotlib's own labels for a logarithmic scale are mathtext, whose parser costs about
    a tenth of a second per new label.
    """

    def __call__(self, x: float, pos: object = None) -> str:
        if not super().__call__(x, pos) or not np.isfinite(x) or x <= 0:
            return ""
        if 1e-3 <= x < 1e4:
            return f"{x:g}"
        exponent = float(np.log10(x))
        if abs(exponent - round(exponent)) < 1e-6:
            return "10" + str(int(round(exponent))).translate(_SUPERSCRIPT)
        mantissa, power = f"{x:.0e}".split("e")
        return f"{mantissa}×10" + str(int(power)).translate(_SUPERSCRIPT)


def _plain_log_colorbar(bar) -> None:
    """Label a colour bar of a logarithmic norm with :class:`_PlainLogFormatter`."""
    bar.ax.yaxis.set_major_formatter(_PlainLogFormatter(10.0, labelOnlyBase=True))
    bar.ax.yaxis.set_minor_formatter(_PlainLogFormatter(10.0, labelOnlyBase=False))


def _geo_axes(ax: Axes, lat2d: np.ndarray) -> None:
    mean_lat = float(np.nanmean(lat2d))
    ax.set_aspect(1.0 / max(np.cos(np.deg2rad(mean_lat)), 0.05))
    ax.xaxis.set_major_formatter(FuncFormatter(_lon_text))
    ax.yaxis.set_major_formatter(FuncFormatter(_lat_text))
    ax.set_xlabel("longitude")
    ax.set_ylabel("latitude")
    for side in ("top", "right"):
        ax.spines[side].set_visible(True)


def _norm(values: np.ndarray, log: bool = False) -> tuple[Normalize, str, str]:
    """Colour norm, colour map and colour-bar ``extend`` for ``values``.

    Signed data get a zero-centred diverging map; one-signed data a sequential map.
    """
    finite = np.asarray(values, dtype=float)
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return Normalize(0.0, 1.0), SEQUENTIAL, "neither"
    lo, hi = np.percentile(finite, [2.0, 98.0])
    if log:
        positive = finite[finite > 0]
        if positive.size:
            lo, hi = np.percentile(positive, [2.0, 99.5])
            hi = max(hi, lo * 10.0)
            return LogNorm(lo, hi), SEQUENTIAL, "both"
    if lo < 0 < hi:
        bound = max(abs(lo), abs(hi))
        extend = "both" if finite.min() < -bound or finite.max() > bound else "neither"
        return TwoSlopeNorm(0.0, -bound, bound), DIVERGING, extend
    if hi <= lo:
        hi = lo + (abs(lo) if lo else 1.0)
    low_out = finite.min() < lo
    high_out = finite.max() > hi
    extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(
        (bool(low_out), bool(high_out)), "neither")
    if finite.min() >= 0 and lo <= 0.1 * hi:
        lo = 0.0
        extend = "max" if high_out else "neither"
    return Normalize(lo, hi), SEQUENTIAL, extend


def _draw_land(ax: Axes, lon2d: np.ndarray, lat2d: np.ndarray, mask2d: np.ndarray | None
               ) -> None:
    if mask2d is None:
        return
    land = np.where(np.asarray(mask2d) == 0, 1.0, np.nan)
    ax.pcolormesh(lon2d, lat2d, np.ma.masked_invalid(land), cmap=mpl.colors.ListedColormap(
        [LAND]), vmin=0, vmax=1, shading="nearest", zorder=1, rasterized=True)


def _draw_lines(ax: Axes, layer: gpd.GeoDataFrame | None, **style: object) -> None:
    if layer is None or layer.empty:
        return
    for geom in layer.geometry.dropna():
        parts = getattr(geom, "geoms", [geom])
        for part in parts:
            xy = np.asarray(part.coords)
            if xy.size:
                ax.plot(xy[:, 0], xy[:, 1], **style)


def _draw_capes(ax: Axes, capes: gpd.GeoDataFrame | None) -> None:
    if capes is None or capes.empty:
        return
    ax.scatter(capes.geometry.x, capes.geometry.y, marker="^", s=46, facecolor="white",
               edgecolor="black", linewidth=1.0, zorder=6)
    if "cape_id" in capes.columns:
        for x, y, name in zip(capes.geometry.x, capes.geometry.y, capes["cape_id"], strict=True):
            ax.annotate(str(name), (x, y), xytext=(6, -2), textcoords="offset points",
                        fontsize=8, ha="left", va="top", path_effects=_HALO, zorder=7)


def _draw_sources(ax: Axes, sources: gpd.GeoDataFrame | None) -> None:
    if sources is None or sources.empty:
        return
    ax.scatter(sources.geometry.x, sources.geometry.y, marker="o", s=70, facecolor=VERMILION,
               edgecolor="white", linewidth=1.2, zorder=8)
    if "rank" in sources.columns:
        for x, y, rank in zip(sources.geometry.x, sources.geometry.y, sources["rank"],
                              strict=True):
            ax.annotate(str(rank), (x, y), xytext=(-6, 3), textcoords="offset points",
                        fontsize=8, fontweight="bold", ha="right", va="bottom",
                        color=VERMILION, path_effects=_HALO, zorder=9)


def _extent(ax: Axes, lon2d: np.ndarray, lat2d: np.ndarray) -> None:
    ax.set_xlim(float(np.nanmin(lon2d)), float(np.nanmax(lon2d)))
    ax.set_ylim(float(np.nanmin(lat2d)), float(np.nanmax(lat2d)))


@_styled
def map_figure(
    path: str | os.PathLike[str],
    lon2d: np.ndarray,
    lat2d: np.ndarray,
    field2d: np.ndarray,
    field_label: str,
    coastline: gpd.GeoDataFrame | None,
    capes: gpd.GeoDataFrame | None,
    sources: gpd.GeoDataFrame | None = None,
    gates: gpd.GeoDataFrame | None = None,
    plume_axes: gpd.GeoDataFrame | None = None,
    mask2d: np.ndarray | None = None,
) -> Path:
    """Map of a gridded field with the coastline, capes, sources, gates and plume axes.

    Parameters
    ----------
    path
        PNG file to write.
    lon2d, lat2d
        Cell-centre longitude and latitude (degrees), shape ``(ny, nx)``.
    field2d
        The field to shade, already in the units named by ``field_label`` (e.g. mean
        eddy kinetic energy in cm² s⁻²); NaN cells are left blank.
    field_label
        Colour-bar label with units, e.g. ``"mean EKE (cm² s⁻²)"``.
    coastline, capes, sources, gates, plume_axes
        Map layers in longitude/latitude (any may be ``None`` or empty). Capes are drawn
        as white triangles labelled with ``cape_id``; sources as vermilion circles
        labelled with ``rank``; gates as purple lines; plume axes as dashed lines.
    mask2d
        Land/sea mask (1 sea, 0 land); land is shaded grey.
    """
    lon2d = np.asarray(lon2d, dtype=float)
    lat2d = np.asarray(lat2d, dtype=float)
    field = np.ma.masked_invalid(np.asarray(field2d, dtype=float))
    if mask2d is not None:
        field = np.ma.masked_where(np.asarray(mask2d) == 0, field)
    fig = _figure(*_map_size(lon2d, lat2d, 2.2))
    ax = fig.add_subplot()
    norm, cmap, extend = _norm(field.compressed())
    mesh = ax.pcolormesh(lon2d, lat2d, field, cmap=cmap, norm=norm, shading="nearest",
                         zorder=0, rasterized=True)
    _draw_land(ax, lon2d, lat2d, mask2d)
    _draw_lines(ax, coastline, color="black", linewidth=0.9, zorder=3)
    _draw_lines(ax, plume_axes, color="black", linewidth=1.3, linestyle=(0, (4, 2)),
                path_effects=_HALO, zorder=4)
    _draw_lines(ax, gates, color=PURPLE, linewidth=2.2, path_effects=_HALO, zorder=5)
    _draw_capes(ax, capes)
    _draw_sources(ax, sources)
    _geo_axes(ax, lat2d)
    _extent(ax, lon2d, lat2d)
    fig.colorbar(mesh, ax=ax, label=field_label, extend=extend, shrink=0.85, extendfrac=0.04)
    handles = [Patch(facecolor=LAND, edgecolor="none", label="land")] if mask2d is not None else []
    if capes is not None and not capes.empty:
        handles.append(Line2D([], [], marker="^", linestyle="none", markerfacecolor="white",
                              markeredgecolor="black", label="cape (id)"))
    if sources is not None and not sources.empty:
        handles.append(Line2D([], [], marker="o", linestyle="none", markerfacecolor=VERMILION,
                              markeredgecolor="white", markersize=8, label="source (rank)"))
    if gates is not None and not gates.empty:
        handles.append(Line2D([], [], color=PURPLE, linewidth=2.2, label="gate"))
    if plume_axes is not None and not plume_axes.empty:
        handles.append(Line2D([], [], color="black", linestyle=(0, (4, 2)), label="plume axis"))
    if handles:
        ax.legend(handles=handles, loc=_legend_corner(mask2d), framealpha=0.9)
    return _save(fig, path)


@_styled
def coast_map_figure(
    path: str | os.PathLike[str],
    lon2d: np.ndarray,
    lat2d: np.ndarray,
    mask2d: np.ndarray,
    coastline: gpd.GeoDataFrame | None,
    capes: gpd.GeoDataFrame | None,
) -> Path:
    """Map of the land/sea mask with the extracted coastline and the capes found.

    Parameters
    ----------
    path
        PNG file to write.
    lon2d, lat2d
        Cell-centre longitude and latitude (degrees), shape ``(ny, nx)``.
    mask2d
        Land/sea mask, 1 = sea, 0 = land.
    coastline, capes
        The coastline (lines) and capes (points, labelled with ``cape_id``).
    """
    lon2d = np.asarray(lon2d, dtype=float)
    lat2d = np.asarray(lat2d, dtype=float)
    fig = _figure(*_map_size(lon2d, lat2d, 1.0))
    ax = fig.add_subplot()
    ax.set_facecolor("#EAF3FA")
    _draw_land(ax, lon2d, lat2d, mask2d)
    _draw_lines(ax, coastline, color=BLUE, linewidth=1.4, zorder=3)
    _draw_capes(ax, capes)
    _geo_axes(ax, lat2d)
    _extent(ax, lon2d, lat2d)
    handles = [Patch(facecolor=LAND, edgecolor="none", label="land"),
               Patch(facecolor="#EAF3FA", edgecolor="0.6", label="sea"),
               Line2D([], [], color=BLUE, linewidth=1.4, label="coastline")]
    if capes is not None and not capes.empty:
        handles.append(Line2D([], [], marker="^", linestyle="none", markerfacecolor="white",
                              markeredgecolor="black", label="cape (id)"))
    ax.legend(handles=handles, loc=_legend_corner(mask2d), framealpha=0.9)
    return _save(fig, path)


@_styled
def alongshore_figure(
    path: str | os.PathLike[str],
    alongshore_km: np.ndarray,
    panels: Sequence[tuple[str, np.ndarray]],
    capes_km: Sequence[tuple[str, float]] = (),
    sources_km: Sequence[tuple[int, float]] = (),
) -> Path:
    """Stacked along-shore profiles sharing the distance axis.

    Parameters
    ----------
    path
        PNG file to write.
    alongshore_km
        Distance along the coast of each station (km).
    panels
        ``(label with units, values per station)`` for each panel, top to bottom.
    capes_km
        ``(cape_id, distance)`` of each cape: thin grey lines through every panel,
        labelled in the top panel where the label has room (:func:`_apart`).
    sources_km
        ``(rank, distance)`` of each source: dashed vermilion lines, labelled ``#rank``.
    """
    if not panels:
        raise ValueError("alongshore_figure needs at least one panel")
    x = np.asarray(alongshore_km, dtype=float)
    n = len(panels)
    fig = _figure(7.0, 0.9 + 1.7 * n)
    axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    colours = [BLUE, GREEN, ORANGE, PURPLE, SKY]
    for i, (ax, (label, values)) in enumerate(zip(axes, panels, strict=True)):
        ax.plot(x, np.asarray(values, dtype=float), color=colours[i % len(colours)],
                linewidth=1.3)
        ax.set_ylabel(label)
        for _, km in capes_km:
            ax.axvline(km, color="0.55", linewidth=0.8, zorder=0)
        for _, km in sources_km:
            ax.axvline(km, color=VERMILION, linewidth=1.1, linestyle=(0, (4, 2)), zorder=1)
        ax.grid(axis="y", color="0.9", linewidth=0.6)
        ax.margins(x=0)
        if n > 1:
            _panel_letter(ax, i)
    top = axes[0]
    for name, km in _apart(capes_km, x, fig.get_figwidth(), fontsize=7.0):
        top.annotate(str(name), (km, 1.0), xycoords=("data", "axes fraction"),
                     xytext=(0, 2), textcoords="offset points", ha="center", va="bottom",
                     fontsize=7, color="0.3", annotation_clip=False)
    for rank, km in sources_km:
        top.annotate(f"#{rank}", (km, 1.0), xycoords=("data", "axes fraction"),
                     xytext=(0, 11), textcoords="offset points", ha="center", va="bottom",
                     fontsize=7, fontweight="bold", color=VERMILION, annotation_clip=False)
    axes[-1].set_xlabel("distance along the coast (km)")
    handles = []
    if capes_km:
        handles.append(Line2D([], [], color="0.55", linewidth=0.8, label="cape"))
    if sources_km:
        handles.append(Line2D([], [], color=VERMILION, linestyle=(0, (4, 2)), label="source"))
    if handles:
        axes[-1].legend(handles=handles, loc="upper right", framealpha=0.9)
    return _save(fig, path)


def _apart(labels: Sequence[tuple[str, float]], x: np.ndarray, width_in: float,
           fontsize: float) -> list[tuple[str, float]]:
    """The labels ``(text, position)`` that fit side by side along an axis spanning ``x``.

    From west to east along the coast, a label is kept when it does not reach into the
    last one kept (width estimated at 0.6 em per character, the axis at 85 % of the figure
    width); the others are left out, so neighbouring capes do not print over each other.
    """
    finite = x[np.isfinite(x)]
    if not len(labels) or finite.size < 2 or finite.max() <= finite.min():
        return list(labels)
    km_per_pt = (finite.max() - finite.min()) / (0.85 * width_in * 72.0)
    kept: list[tuple[str, float]] = []
    right = -np.inf
    for text, km in sorted(labels, key=lambda item: item[1]):
        half = 0.5 * (0.6 * fontsize * len(str(text)) + 4.0) * km_per_pt
        if km - half >= right:
            kept.append((text, km))
            right = km + half
    return kept


MAX_COLUMNS = 600
"""Most time columns a shaded time–period or time–distance panel draws; longer records
are shown as block means of consecutive steps (a panel is under 900 pixels wide)."""


def _thin_columns(t: np.ndarray, arrays: Sequence[np.ndarray]
                  ) -> tuple[np.ndarray, list[np.ndarray]]:
    """Block means over the last axis so that at most :data:`MAX_COLUMNS` columns remain.

    Drawing cost then stays the same however long the record; the blocks are shorter
    than one pixel of the panel, so the picture does not change.
    """
    k = int(np.ceil(t.size / MAX_COLUMNS))
    if k <= 1:
        return t, list(arrays)
    n = t.size // k * k

    def blocks(a: np.ndarray) -> np.ndarray:
        with np.errstate(invalid="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmean(a[..., :n].reshape(*a.shape[:-1], n // k, k), axis=-1)

    return blocks(t), [blocks(a) for a in arrays]


@_styled
def hovmoller_figure(
    path: str | os.PathLike[str],
    time_days: np.ndarray,
    distance_km: np.ndarray,
    field: np.ndarray,
    label: str,
    speed_m_s: float | None = None,
    rossby_speed_m_s: float | None = None,
) -> Path:
    """Hovmöller diagram (time against distance) along one zonal ray.

    Parameters
    ----------
    path
        PNG file to write.
    time_days
        Time of each row (days since any origin), shape ``(nt,)``.
    distance_km
        Distance west of the coast along the ray (km, positive westward), ``(nd,)``.
        West is drawn on the left.
    field
        Values, shape ``(nt, nd)``, in the units named by ``label``; drawn with a
        diverging map centred on zero.
    label
        Colour-bar label with units, e.g. ``"relative vorticity anomaly (10⁻⁵ s⁻¹)"``.
    speed_m_s, rossby_speed_m_s
        Measured propagation speed and long Rossby wave speed (m s⁻¹, positive
        westward), drawn as slope lines of distance = speed × time.
    """
    d = np.asarray(distance_km, dtype=float)
    t, (rows,) = _thin_columns(np.asarray(time_days, dtype=float),
                               [np.asarray(field, dtype=float).T])
    values = np.ma.masked_invalid(rows.T)
    fig = _figure(6.0, 6.4)
    ax = fig.add_subplot()
    finite = values.compressed()
    bound = float(np.percentile(np.abs(finite), 98.0)) if finite.size else 1.0
    bound = bound if bound > 0 else 1.0
    extend = "both" if finite.size and np.abs(finite).max() > bound else "neither"
    mesh = ax.pcolormesh(-d, t, values, cmap=DIVERGING, norm=TwoSlopeNorm(0.0, -bound, bound),
                         shading="nearest", rasterized=True)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{-v + 0.0:g}"))
    ax.set_xlabel("distance west of the coast (km)")
    ax.set_ylabel("time (days)")
    ax.set_xlim(-d.max(), -d.min())
    ax.set_ylim(t.min(), t.max())
    handles = []
    t0 = t.min() + 0.1 * (t.max() - t.min())
    span = 0.8 * (t.max() - t.min())
    for speed, colour, style, name in (
        (speed_m_s, "black", "-", "measured"),
        (rossby_speed_m_s, GREEN, (0, (5, 2)), "long Rossby wave"),
    ):
        if speed is None or not np.isfinite(speed):
            continue
        tt = np.linspace(t0, t0 + span, 50)
        dd = d.min() + speed * _KM_PER_DAY_PER_M_S * (tt - t0)
        ax.plot(-dd, tt, color=colour, linestyle=style, linewidth=2.0, path_effects=_HALO)
        handles.append(Line2D([], [], color=colour, linestyle=style, linewidth=2.0,
                              label=f"{name}: {100 * speed:.1f} cm s⁻¹ westward"))
    if handles:
        ax.legend(handles=handles, loc="upper right", framealpha=0.9)
    fig.colorbar(mesh, ax=ax, label=label, extend=extend, shrink=0.85, extendfrac=0.04)
    return _save(fig, path)


@_styled
def wavelet_figure(
    path: str | os.PathLike[str],
    time_days: np.ndarray,
    periods_days: np.ndarray,
    power: np.ndarray,
    sig_ratio: np.ndarray,
    coi_days: np.ndarray,
    series: np.ndarray,
    series_label: str = "series",
    power_label: str = "wavelet power / variance",
) -> Path:
    """A time series and its wavelet power spectrum (Torrence & Compo 1998 layout).

    Parameters
    ----------
    path
        PNG file to write.
    time_days
        Time (days), ``(nt,)``.
    periods_days
        Fourier period of each scale (days), ``(ns,)``.
    power
        Wavelet power, ``(ns, nt)``; shaded on a logarithmic colour scale.
    sig_ratio
        Power divided by the red-noise significance level, ``(ns, nt)``; the contour
        ``sig_ratio = 1`` encloses power significant at the chosen confidence level.
    coi_days
        Cone of influence (days) at each time, ``(nt,)``; periods longer than it are
        affected by the record ends and are hatched.
    series
        The analysed series, ``(nt,)``, drawn in panel (a).
    series_label, power_label
        Axis and colour-bar labels with units.
    """
    t_full = np.asarray(time_days, dtype=float)
    p = np.asarray(periods_days, dtype=float)
    t, (power, sig_ratio, coi_days) = _thin_columns(
        t_full, [np.asarray(power, dtype=float), np.asarray(sig_ratio, dtype=float),
                 np.asarray(coi_days, dtype=float)[None, :]])
    coi_days = coi_days[0]
    pw = np.ma.masked_invalid(power)
    fig = _figure(7.0, 5.6)
    grid = fig.add_gridspec(2, 1, height_ratios=(1.0, 2.6))
    ax_s = fig.add_subplot(grid[0])
    ax_w = fig.add_subplot(grid[1], sharex=ax_s)
    ax_s.plot(t_full, np.asarray(series, dtype=float), color=BLUE, linewidth=0.9)
    ax_s.axhline(0.0, color="0.6", linewidth=0.6)
    ax_s.set_ylabel(series_label)
    ax_s.tick_params(labelbottom=False)
    _panel_letter(ax_s, 0)
    norm, _, extend = _norm(pw.compressed(), log=True)
    mesh = ax_w.pcolormesh(t, p, pw, cmap=SEQUENTIAL, norm=norm, shading="nearest",
                           rasterized=True)
    ratio = np.asarray(sig_ratio, dtype=float)
    if np.nanmax(ratio) >= 1.0 and np.nanmin(ratio) < 1.0:
        ax_w.contour(t, p, ratio, levels=[1.0], colors="black", linewidths=1.0)
    coi = np.clip(np.asarray(coi_days, dtype=float), p.min(), p.max())
    ax_w.fill_between(t, coi, p.max(), facecolor="white", alpha=0.35, hatch="xx",
                      edgecolor="0.35", linewidth=0.0)
    ax_w.plot(t, coi, color="0.2", linewidth=0.8)
    ax_w.set_yscale("log", base=2)
    ax_w.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:g}"))
    ax_w.set_ylim(p.max(), p.min())
    ax_w.set_xlim(t.min(), t.max())
    ax_w.set_ylabel("period (days)")
    ax_w.set_xlabel("time (days)")
    _panel_letter(ax_w, 1)
    ax_w.legend(handles=[
        Line2D([], [], color="black", linewidth=1.0, label="significant (red-noise test)"),
        Patch(facecolor="white", edgecolor="0.35", hatch="xx", label="cone of influence"),
    ], loc="lower left", framealpha=0.9)
    bar = fig.colorbar(mesh, ax=ax_w, label=power_label, extend=extend)
    if isinstance(norm, LogNorm):
        _plain_log_colorbar(bar)
    return _save(fig, path)


@_styled
def ranking_figure(path: str | os.PathLike[str], sources: pd.DataFrame) -> Path:
    """Sources ranked by the net westward eddy energy feed, with 95 % intervals.

    Parameters
    ----------
    path
        PNG file to write.
    sources
        Table with ``rank``, ``feed_w_per_m``, ``feed_lo``, ``feed_hi`` and optionally
        ``cape_id``, ``feed_struct_lo``/``feed_struct_hi`` (drawn as a grey band: the range
        over gate placements) and ``gate_status`` (sources without a gate are labelled and
        drawn without a bar); rank 1 is drawn at the top.
    """
    table = pd.DataFrame(sources).sort_values("rank")
    n = len(table)
    fig = _figure(6.0, 1.3 + 0.38 * max(n, 2))
    ax = fig.add_subplot()
    ax.set_xlabel("net westward eddy energy feed (W m⁻¹ per m of depth)")
    if n == 0:
        ax.text(0.5, 0.5, "no sources found", transform=ax.transAxes, ha="center",
                va="center", color="0.3")
        ax.set_yticks([])
        return _save(fig, path)
    feed = table["feed_w_per_m"].to_numpy(float)
    lo = table["feed_lo"].to_numpy(float)
    hi = table["feed_hi"].to_numpy(float)
    y = np.arange(n)
    err = np.vstack([np.clip(feed - lo, 0, None), np.clip(hi - feed, 0, None)])
    handles = [Patch(facecolor=SKY, edgecolor=BLUE, label="estimate"),
               Line2D([], [], color="black", marker="|", label="95 % interval")]
    if {"feed_struct_lo", "feed_struct_hi"} <= set(table.columns):
        s_lo = table["feed_struct_lo"].to_numpy(float)
        s_hi = table["feed_struct_hi"].to_numpy(float)
        ax.barh(y, s_hi - s_lo, left=s_lo, color="0.85", height=0.9, zorder=0)
        handles.append(Patch(facecolor="0.85", label="gate-placement range"))
    has = np.isfinite(feed)
    ax.barh(y[has], feed[has], color=SKY, edgecolor=BLUE, height=0.6)
    ax.errorbar(feed, y, xerr=err, fmt="none", ecolor="black", elinewidth=1.1, capsize=3)
    ax.axvline(0.0, color="0.4", linewidth=0.8)
    capes = table["cape_id"] if "cape_id" in table.columns else pd.Series([""] * n)
    status = table["gate_status"] if "gate_status" in table.columns else pd.Series([""] * n)
    labels = []
    for rank, cape, gate in zip(table["rank"], capes, status, strict=True):
        where = str(cape) if isinstance(cape, str) and cape else "no cape"
        no_gate = f" ({str(gate).replace('_', ' ')})" if gate and gate != "ok" else ""
        labels.append(f"#{rank}  {where}{no_gate}")
    ax.set_yticks(y, labels)
    ax.set_ylim(n - 0.5, -0.5)
    finite_lo = lo[np.isfinite(lo)]
    ax.set_xlim(left=min(0.0, float(finite_lo.min())) if finite_lo.size else 0.0)
    for k in np.flatnonzero(~np.isfinite(feed)):
        ax.text(0.0, k, "  not measurable", va="center", ha="left", color="0.3", fontsize=8)
    ax.grid(axis="x", color="0.9", linewidth=0.6)
    ax.set_axisbelow(True)
    ax.legend(handles=handles, loc="lower right", framealpha=0.9)
    return _save(fig, path)


@_styled
def spinup_figure(
    path: str | os.PathLike[str],
    length_days: np.ndarray,
    correlation: np.ndarray,
    threshold: float = 0.9,
    length_needed_days: float | None = None,
) -> Path:
    """Pattern correlation of the running mean with the full-record mean against length.

    Parameters
    ----------
    path
        PNG file to write.
    length_days
        Averaging lengths (days).
    correlation
        Pattern correlation at each length.
    threshold
        Correlation regarded as settled (dashed line).
    length_needed_days
        Length at which the threshold is reached (dotted line), if it was.
    """
    x = np.asarray(length_days, dtype=float)
    r = np.asarray(correlation, dtype=float)
    fig = _figure(6.0, 3.6)
    ax = fig.add_subplot()
    ax.plot(x, r, color=BLUE, linewidth=1.5, marker="o", markersize=3, label="correlation")
    ax.axhline(threshold, color="0.4", linestyle=(0, (5, 3)), linewidth=1.0,
               label=f"threshold {threshold:g}")
    if length_needed_days is not None and np.isfinite(length_needed_days):
        ax.axvline(length_needed_days, color=VERMILION, linestyle=":", linewidth=1.5,
                   label=f"reached after {length_needed_days:.0f} days")
    ax.set_xlabel("averaging length (days)")
    ax.set_ylabel("pattern correlation with\nthe full-record mean")
    low = float(np.nanmin(r)) if np.isfinite(r).any() else 0.0
    ax.set_ylim(min(low, threshold) - 0.05, 1.02)
    ax.set_xlim(0.0, float(np.nanmax(x)) * 1.02)
    ax.grid(color="0.9", linewidth=0.6)
    ax.legend(loc="lower right", framealpha=0.9)
    return _save(fig, path)
