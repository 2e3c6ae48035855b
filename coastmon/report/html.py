"""The run report: one self-contained HTML5 page.

The page needs nothing but itself: the style sheet is inline and the figures are embedded
as base64 ``data:`` URIs, so it can be mailed, archived or opened offline. It contains no
script. Sections, in reading order:

1. **Answer** — one or two sentences and the ranked sources table (feed with its 95 %
   interval, persistence, nearest cape and distance, along-shore position, westward
   speed), followed by the run's key facts and the capes table;
2. **Figures** with numbered captions;
3. **Warnings** raised by the run (e.g. a record too short for the mean to settle);
4. **Provenance** — inputs, settings, software versions and timings;
5. **Cautions** — the limits of use.

All text is escaped with :func:`html.escape`; the file is written atomically.
"""

from __future__ import annotations

import base64
import datetime as _dt
import math
import os
from collections.abc import Mapping, Sequence
from html import escape
from importlib import resources
from pathlib import Path
from typing import Any

import pandas as pd

from coastmon.io.atomic import atomic_write_text
from coastmon.io.position import position_text
from coastmon.io.results import CAUTIONS

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_SOURCE_COLUMNS = (
    ("rank", "Rank", "{:d}"),
    ("feed_w_per_m", "Feed (W m⁻¹)", "{:.3g}"),
    ("interval", "95 % interval", None),
    ("structural", "Gate-placement range", None),
    ("gate_status", "Gate", None),
    ("persistence", "Persistence", "{:.2f}"),
    ("cape_id", "Cape", None),
    ("dist_to_cape_km", "To cape (km)", "{:.0f}"),
    ("alongshore_km", "Along-shore (km)", "{:.0f}"),
    ("west_speed_cm_s", "West speed (cm s⁻¹)", "{:.2g}"),
    ("position", "Position", None),
)
_CAPE_COLUMNS = (
    ("cape_id", "Cape", None),
    ("curvature_per_km", "Curvature (km⁻¹)", "{:.3g}"),
    ("scale_km", "Persists to scale (km)", "{:.0f}"),
    ("protrusion_km", "Protrusion (km)", "{:.0f}"),
    ("alongshore_km", "Along-shore (km)", "{:.0f}"),
    ("position", "Position", None),
    ("source_test", "Source test", None),
)
_NUMERIC = {"rank", "feed_w_per_m", "interval", "structural", "persistence", "dist_to_cape_km",
            "alongshore_km", "west_speed_cm_s", "curvature_per_km", "scale_km",
            "protrusion_km"}


def _css() -> str:
    return resources.files("coastmon.report").joinpath("report.css").read_text("utf-8")


def _missing(value: Any) -> bool:
    if value is None:
        return True
    if isinstance(value, float) and math.isnan(value):
        return True
    return isinstance(value, str) and not value.strip()


def _fmt(value: Any, spec: str | None) -> str:
    """Format one table value; missing values become an en dash."""
    if _missing(value):
        return "–"
    if spec is not None:
        try:
            if spec == "{:d}":
                return spec.format(int(value))
            return spec.format(float(value))
        except (TypeError, ValueError):
            return escape(str(value))
    return escape(str(value))


def _position(lon: Any, lat: Any) -> str:
    if _missing(lon) or _missing(lat):
        return "–"
    return position_text(lon, lat, ".2f", "°")


def _cell(row: Mapping[str, Any], key: str, spec: str | None) -> str:
    if key == "interval":
        lo, hi = row.get("feed_lo"), row.get("feed_hi")
        if _missing(lo) or _missing(hi):
            return "–"
        return f"{float(lo):.3g} – {float(hi):.3g}"
    if key == "structural":
        lo, hi = row.get("feed_struct_lo"), row.get("feed_struct_hi")
        if _missing(lo) or _missing(hi):
            return "–"
        return f"{float(lo):.3g} – {float(hi):.3g}"
    if key == "gate_status" and not _missing(row.get(key)):
        return escape(str(row[key]).replace("_", " "))
    if key == "position":
        return _position(row.get("lon"), row.get("lat"))
    if key == "cape_id" and _missing(row.get(key)):
        return "no cape"
    return _fmt(row.get(key), spec)


def _table(frame: pd.DataFrame, columns: Sequence[tuple[str, str, str | None]],
           caption: str, empty: str) -> str:
    if frame is None or len(frame) == 0:
        return f'<p class="none">{escape(empty)}</p>'
    present = set(frame.columns) | {"interval", "position", "structural"}
    cols = [c for c in columns if c[0] in present
            and (c[0] != "position" or {"lon", "lat"} <= set(frame.columns))
            and (c[0] != "interval" or {"feed_lo", "feed_hi"} <= set(frame.columns))
            and (c[0] != "structural"
                 or {"feed_struct_lo", "feed_struct_hi"} <= set(frame.columns))]
    head = "".join(f'<th scope="col"{_num_class(key)}>{escape(label)}</th>'
                   for key, label, _ in cols)
    rows = []
    for record in frame.to_dict("records"):
        cells = "".join(f"<td{_num_class(key)}>{_cell(record, key, spec)}</td>"
                        for key, _, spec in cols)
        rows.append(f"<tr>{cells}</tr>")
    return (f'<div class="table-wrap"><table><caption>{escape(caption)}</caption>'
            f"<thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table></div>")


def _num_class(key: str) -> str:
    return ' class="num"' if key in _NUMERIC else ""


def answer_sentence(sources: pd.DataFrame) -> str:
    """One plain sentence naming the leading source, its feed, interval and cape."""
    if sources is None or len(sources) == 0:
        return ("No localized, persistent coastal vorticity source was found along this coast "
                "with the current settings.")
    table = sources.sort_values("rank")
    top = table.iloc[0]
    n = len(table)
    lead = f"{n} coastal vorticity source{'s' if n != 1 else ''} found. "
    if _missing(top.get("feed_w_per_m")):
        return (f"{lead}No source has a gate in open water west of it, so none has a "
                "westward feed (see the Gate column).")
    feed = f"{float(top['feed_w_per_m']):.3g} W m⁻¹"
    if not (_missing(top.get("feed_lo")) or _missing(top.get("feed_hi"))):
        feed += f" (95 % interval {float(top['feed_lo']):.3g} to {float(top['feed_hi']):.3g})"
    cape = top.get("cape_id")
    if _missing(cape):
        where = "at no cape within reach"
    else:
        dist = top.get("dist_to_cape_km")
        where = f"at cape {cape}"
        if not _missing(dist):
            where += f" ({float(dist):.0f} km away)"
    along = top.get("alongshore_km")
    at = "" if _missing(along) else f", {float(along):.0f} km along the coast"
    return (f"{lead}The largest westward eddy energy feed, {feed}, comes from source "
            f"#{int(top['rank'])} {where}{at}.")


def _facts(summary: Mapping[str, Any]) -> str:
    if not summary:
        return ""
    items = "".join(f"<dt>{escape(str(k))}</dt><dd>{_value(v)}</dd>" for k, v in summary.items())
    return f'<dl class="facts">{items}</dl>'


def _value(value: Any) -> str:
    """Render a provenance or summary value: nested mappings as tables, lists as lines."""
    if isinstance(value, Mapping):
        if not value:
            return "–"
        rows = "".join(f"<tr><td>{escape(str(k))}</td><td>{_value(v)}</td></tr>"
                       for k, v in value.items())
        return f'<table class="prov"><tbody>{rows}</tbody></table>'
    if isinstance(value, list | tuple):
        if not value:
            return "–"
        if all(not isinstance(v, Mapping | list | tuple) for v in value):
            return ", ".join(_value(v) for v in value)
        return "<br>".join(_value(v) for v in value)
    if isinstance(value, float):
        return "–" if math.isnan(value) else escape(f"{value:.6g}")
    if isinstance(value, str) and ("/" in value or "\\" in value) and " " not in value:
        return f"<code>{escape(value)}</code>"
    return escape(str(value))


def _image(png: Path) -> str:
    data = Path(png).read_bytes()
    if not data.startswith(PNG_SIGNATURE):
        raise ValueError(f"figure {png} is not a PNG file")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _figures(figures: Sequence[tuple[str, Path]]) -> str:
    if not figures:
        return '<p class="none">No figures were made for this run.</p>'
    parts = []
    for i, (caption, png) in enumerate(figures, start=1):
        parts.append(
            f'<figure id="figure-{i}"><img src="{_image(png)}" alt="{escape(caption)}">'
            f"<figcaption><strong>Figure {i}.</strong> {escape(caption)}</figcaption></figure>")
    return "".join(parts)


def _warnings(warnings: Sequence[str]) -> str:
    if not warnings:
        return '<p class="none">No warnings.</p>'
    return ('<ul class="warnings">' + "".join(f"<li>{escape(w)}</li>" for w in warnings)
            + "</ul>")


def render_report(
    *,
    title: str,
    summary: Mapping[str, Any],
    sources: pd.DataFrame,
    capes: pd.DataFrame,
    figures: Sequence[tuple[str, Path]],
    provenance: Mapping[str, Any],
    warnings: Sequence[str],
) -> str:
    """The report as an HTML5 string (see :func:`write_report` for the arguments)."""
    from coastmon import __version__

    now = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    sources = pd.DataFrame(sources) if sources is not None else pd.DataFrame()
    if "rank" in sources.columns:
        sources = sources.sort_values("rank")
    capes = pd.DataFrame(capes) if capes is not None else pd.DataFrame()
    body = [
        f"<header><h1>{escape(title)}</h1>",
        f'<p class="meta">Written by coastmon {escape(__version__)} on {escape(now)}</p>',
        '<nav class="toc"><a href="#answer">Answer</a><a href="#figures">Figures</a>'
        '<a href="#warnings">Warnings</a><a href="#provenance">Provenance</a>'
        '<a href="#cautions">Cautions</a></nav></header>',
        '<section id="answer"><h2>Answer</h2>',
        f'<p class="answer">{escape(answer_sentence(sources))}</p>',
        _table(sources, _SOURCE_COLUMNS,
               "Sources ranked by their feed: the net westward flux of eddy-band energy "
               "(kinetic, plus potential where SSH is given) across a meridional gate in open "
               "water west of the source, per metre of depth, minus the coast's background; "
               "with its 95 % interval from a moving-block bootstrap over time and its range "
               "over gate offsets ±50 km and window widths. A source with no gate in open "
               "water west of it has no feed and ranks last (Gate column). Persistence is the "
               "fraction of independent time windows in which the near-shore eddy-band "
               "variance is above the neighbouring coast's on both sides.",
               "No sources to list."),
        _facts(summary),
        "<h3>Capes</h3>",
        _table(capes, _CAPE_COLUMNS,
               "Capes: seaward-convex coastline curvature maxima persisting across smoothing "
               "scales (curvature scale space).", "No capes were found."),
        "</section>",
        f'<section id="figures"><h2>Figures</h2>{_figures(figures)}</section>',
        f'<section id="warnings"><h2>Warnings</h2>{_warnings(warnings)}</section>',
        f'<section id="provenance"><h2>Provenance</h2>{_value(dict(provenance))}</section>',
        f'<section id="cautions" class="cautions"><h2>Cautions</h2><p>{escape(CAUTIONS)}</p>'
        "</section>",
        f"<footer>coastmon {escape(__version__)}</footer>",
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{escape(title)}</title>\n<style>\n{_css()}</style>\n</head>\n"
        f"<body>\n<main>\n{''.join(body)}\n</main>\n</body>\n</html>\n"
    )


def write_report(
    path: str | os.PathLike[str],
    *,
    title: str,
    summary: Mapping[str, Any],
    sources: pd.DataFrame,
    capes: pd.DataFrame,
    figures: Sequence[tuple[str, Path]],
    provenance: Mapping[str, Any],
    warnings: Sequence[str],
) -> Path:
    """Write the self-contained HTML report atomically.

    Parameters
    ----------
    path
        The ``report.html`` to write.
    title
        Page heading.
    summary
        Key facts shown under the answer, label → value (e.g. ``"record"``,
        ``"grid"``, ``"capes found"``).
    sources
        Ranked sources table (the ``sources`` layer's attributes, with ``lon``, ``lat``
        if positions are to be shown).
    capes
        Capes table (``cape_id``, ``curvature_per_km``, ``scale_km``, ``protrusion_km``,
        optionally ``alongshore_km``, ``lon``, ``lat``).
    figures
        ``(caption, PNG path)`` in display order; images are embedded.
    provenance
        Nested mapping of inputs, settings, versions and timings (as in ``run.json``).
    warnings
        Plain-text warnings raised during the run.

    Returns
    -------
    pathlib.Path
        The file written.
    """
    text = render_report(title=title, summary=summary, sources=sources, capes=capes,
                         figures=figures, provenance=provenance, warnings=warnings)
    return atomic_write_text(path, text)
