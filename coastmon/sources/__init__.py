"""Find the vorticity sources, measure the eddy energy they feed westward, rank them."""

from coastmon.sources.detect import alongshore_profiles, attribute_to_cape, find_sources
from coastmon.sources.feed import (
    FeedResult,
    GateSet,
    assign_rays,
    gate_set,
    offshore_feed,
    rank_sources,
)
from coastmon.sources.plumes import jet_spacing_km, plume_axes

__all__ = [
    "FeedResult",
    "GateSet",
    "alongshore_profiles",
    "assign_rays",
    "attribute_to_cape",
    "find_sources",
    "gate_set",
    "jet_spacing_km",
    "offshore_feed",
    "plume_axes",
    "rank_sources",
]
