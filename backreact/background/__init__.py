"""The expansion history: inflation, reheating, radiation, matter, Lambda, spectator."""

from .friedmann import (
    ExpansionModel,
    History,
    ThermalArrays,
    expansion_history,
    model_from_config,
    today_node,
)
from .inflation import EpsilonProfile, InflatonPotential, PlateauPotential, QuadraticPotential
from .thermal import ThermalTable, thermal_table

__all__ = [
    "EpsilonProfile",
    "ExpansionModel",
    "History",
    "InflatonPotential",
    "PlateauPotential",
    "QuadraticPotential",
    "ThermalArrays",
    "ThermalTable",
    "expansion_history",
    "model_from_config",
    "thermal_table",
    "today_node",
]
