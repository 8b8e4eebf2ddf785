"""The Galaxy model: components, compiled force kernels, composite Galaxy, named defaults."""

from .components import (
    Component,
    HernquistBulge,
    MiyamotoNagaiDisk,
    NFWHaloPotentialFlat,
    PlummerBulge,
    PointMass,
    negative_density_radius_scaled,
)
from .lmc import LMC, LMC_PARAMETERS, LMCTrack, lmc_orbit, lmc_summary
from .model import (
    DEFAULT_GALAXY,
    GALAXY_MODELS,
    HALO_FLATTENINGS,
    Galaxy,
    NegativeDensityWarning,
    component_class,
    parameter_source,
)
from .nfw_density import NFWHaloDensityFlat
from .params import Parameter

__all__ = [
    "Component",
    "DEFAULT_GALAXY",
    "GALAXY_MODELS",
    "Galaxy",
    "HALO_FLATTENINGS",
    "HernquistBulge",
    "LMC",
    "LMC_PARAMETERS",
    "LMCTrack",
    "MiyamotoNagaiDisk",
    "NFWHaloDensityFlat",
    "NFWHaloPotentialFlat",
    "NegativeDensityWarning",
    "Parameter",
    "PlummerBulge",
    "PointMass",
    "component_class",
    "lmc_orbit",
    "lmc_summary",
    "negative_density_radius_scaled",
    "parameter_source",
]
