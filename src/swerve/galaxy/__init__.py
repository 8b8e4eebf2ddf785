"""The Galaxy model: components, compiled force kernels, composite Galaxy, named defaults."""

from .components import (
    Component,
    HernquistBulge,
    MiyamotoNagaiDisk,
    NFWHaloPotentialFlat,
    PointMass,
    negative_density_radius_scaled,
)
from .model import (
    DEFAULT_GALAXY,
    GALAXY_MODELS,
    HALO_FLATTENINGS,
    Galaxy,
    NegativeDensityWarning,
    component_class,
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
    "MiyamotoNagaiDisk",
    "NFWHaloDensityFlat",
    "NFWHaloPotentialFlat",
    "NegativeDensityWarning",
    "Parameter",
    "PointMass",
    "component_class",
    "negative_density_radius_scaled",
]
