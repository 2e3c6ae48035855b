"""Coastline geometry: extraction, curvature and capes, and the along-shore frame."""

from coastmon.geometry.capes import (
    CAPE_COLUMNS,
    capes_layer,
    curvature,
    find_capes,
    smoothed_derivatives,
)
from coastmon.geometry.coastline import (
    Coastline,
    Segment,
    coastline_layer,
    extract_coastline,
    local_projection,
    wrap_longitude,
)
from coastmon.geometry.frame import Frame, GridLocator, bilinear_sampler, build_frame

__all__ = [
    "CAPE_COLUMNS",
    "Coastline",
    "Frame",
    "GridLocator",
    "Segment",
    "bilinear_sampler",
    "build_frame",
    "capes_layer",
    "coastline_layer",
    "curvature",
    "extract_coastline",
    "find_capes",
    "local_projection",
    "smoothed_derivatives",
    "wrap_longitude",
]
