"""Synthetic coasts and flows with planted truth, in invented geography.

``make_scenario(params, out_dir)`` writes a CF-1.8 NetCDF file of surface velocity, sea
surface height and the land/sea mask, and a JSON file with what was planted: the sources,
their capes, birth rates, eddy amplitudes and the offshore energy feed each one carries
across a gate. Variants: :func:`default_params` (three sources of different strength and a
cape that sheds nothing), :func:`straight_coast_params` (control without anchored sources)
and :func:`western_boundary_params` (land to the west); ``[[standing]]`` tables add
standing oscillations (zero planted feed). :mod:`coastmon.scenario.bookkeeping` computes the
planted feed from the planted eddies' own fields; :mod:`coastmon.scenario.rossby` writes an
analytic linear Rossby-wave train with its group-velocity energy flux.
"""

from coastmon.scenario.generate import make_scenario
from coastmon.scenario.params import (
    CapeSpec,
    IslandSpec,
    ScenarioParams,
    SourceSpec,
    StandingSpec,
    default_params,
    straight_coast_params,
    western_boundary_params,
)

__all__ = [
    "CapeSpec",
    "IslandSpec",
    "ScenarioParams",
    "SourceSpec",
    "StandingSpec",
    "default_params",
    "make_scenario",
    "straight_coast_params",
    "western_boundary_params",
]
