"""Grid metrics and operators on the sphere (regular or curvilinear grids)."""

from coastmon.grid.metrics import (
    EARTH_RADIUS_M,
    OMEGA,
    GridMetrics,
    beta_parameter,
    coriolis_parameter,
    haversine_m,
)
from coastmon.grid.operators import (
    divergence,
    geostrophic_velocity,
    gradient,
    okubo_weiss,
    rossby_number,
    strain,
    vorticity,
    vorticity_dual,
)

__all__ = [
    "EARTH_RADIUS_M",
    "OMEGA",
    "GridMetrics",
    "beta_parameter",
    "coriolis_parameter",
    "divergence",
    "geostrophic_velocity",
    "gradient",
    "haversine_m",
    "okubo_weiss",
    "rossby_number",
    "strain",
    "vorticity",
    "vorticity_dual",
]
