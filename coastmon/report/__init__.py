"""What people look at: figures (PNG) and the self-contained HTML report.

The names below are loaded on first use (PEP 562), so that importing one submodule (such
as :mod:`coastmon.report.process`, which ``analyze`` needs at start-up) does not import
matplotlib: that import is done on a side thread during the streaming pass, and in the
figure process.
"""

from __future__ import annotations

import importlib

_WHERE = {
    "alongshore_figure": "figures",
    "coast_map_figure": "figures",
    "hovmoller_figure": "figures",
    "map_figure": "figures",
    "ranking_figure": "figures",
    "spinup_figure": "figures",
    "wavelet_figure": "figures",
    "render_report": "html",
    "write_report": "html",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str):
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(importlib.import_module(f"{__name__}.{module}"), name)


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_WHERE))
