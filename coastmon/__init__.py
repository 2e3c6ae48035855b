"""coastmon: coastal vorticity sources and the eddy energy they feed offshore.

The Python API mirrors the pipeline stages (see DEVELOPERS.md for the map)::

    from coastmon import Settings
    from coastmon.io.ingest import open_dataset
    from coastmon.pipeline import analyze, prepare, analyse_series

    ds = open_dataset(["run.nc"], Settings().ingest)        # canonical, lazy
    result = analyze(["run.nc"], "results/", Settings())    # the whole job
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

from coastmon.config import Settings, load_settings
from coastmon.errors import CoastmonError

try:
    __version__ = version("coastmon")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.0.0"

__all__ = ["CoastmonError", "Settings", "__version__", "load_settings"]
