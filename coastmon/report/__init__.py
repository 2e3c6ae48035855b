"""What people look at: figures (PNG) and the self-contained HTML report."""

from coastmon.report.figures import (
    alongshore_figure,
    coast_map_figure,
    hovmoller_figure,
    map_figure,
    ranking_figure,
    spinup_figure,
    wavelet_figure,
)
from coastmon.report.html import render_report, write_report

__all__ = [
    "alongshore_figure",
    "coast_map_figure",
    "hovmoller_figure",
    "map_figure",
    "ranking_figure",
    "render_report",
    "spinup_figure",
    "wavelet_figure",
    "write_report",
]
