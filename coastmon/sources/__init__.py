"""Find the vorticity sources, measure the eddy energy they feed offshore, rank them."""

from coastmon.sources.detect import alongshore_profiles, attribute_to_cape, find_sources
from coastmon.sources.feed import (
    FeedResult,
    GateSet,
    gate_set,
    gate_stations,
    offshore_feed,
    rank_sources,
)
from coastmon.sources.plumes import jet_spacing_km, plume_axes

__all__ = [
    "FeedResult",
    "GateSet",
    "alongshore_profiles",
    "attribute_to_cape",
    "find_sources",
    "gate_set",
    "gate_stations",
    "jet_spacing_km",
    "offshore_feed",
    "plume_axes",
    "rank_sources",
]
