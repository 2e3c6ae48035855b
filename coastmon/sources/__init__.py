"""Find the vorticity sources, measure the eddy energy they feed westward, rank them."""

from coastmon.sources.detect import alongshore_profiles, find_sources, nearest_cape
from coastmon.sources.feed import (
    FeedResult,
    GateSet,
    assign_rays,
    gate_set,
    offshore_feed,
    rank_sources,
)
from coastmon.sources.plumes import jet_spacing_km, mean_zonal_anomaly, plume_axes

__all__ = [
    "FeedResult",
    "GateSet",
    "alongshore_profiles",
    "assign_rays",
    "find_sources",
    "gate_set",
    "jet_spacing_km",
    "mean_zonal_anomaly",
    "nearest_cape",
    "offshore_feed",
    "plume_axes",
    "rank_sources",
]
