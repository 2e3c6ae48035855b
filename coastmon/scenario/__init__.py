"""Synthetic coasts and flows with planted truth, in invented geography.

``make_scenario(params, out_dir)`` writes a CF-1.8 NetCDF file of surface velocity, sea
surface height and the land/sea mask, and a JSON file with what was planted: the sources,
their capes, birth rates, eddy amplitudes and the offshore energy feed each one carries
across a gate. Variants: :func:`default_params` (three sources of different strength and a
cape that sheds nothing), :func:`straight_coast_params` (control without anchored sources)
and :func:`western_boundary_params` (land to the west).
"""

from coastmon.scenario.generate import make_scenario
from coastmon.scenario.params import (
    CapeSpec,
    IslandSpec,
    ScenarioParams,
    SourceSpec,
    default_params,
    straight_coast_params,
    western_boundary_params,
)

__all__ = [
    "CapeSpec",
    "IslandSpec",
    "ScenarioParams",
    "SourceSpec",
    "default_params",
    "make_scenario",
    "straight_coast_params",
    "western_boundary_params",
]
