"""Actuator models (one per file) and the discrete bank that runs them all at once."""

from __future__ import annotations

from typing import Any

from .bank import DiscreteBank, continuous_bank, discretize
from .base import ActuatorModel, JointActuator
from .first_order import FirstOrder
from .second_order import SecondOrder

#: Model kinds by the name used in problem files: the class and its parameter keys [unit].
ACTUATOR_MODELS: dict[str, tuple[type[Any], tuple[str, ...]]] = {
    FirstOrder.kind: (FirstOrder, ("corner_hz",)),
    SecondOrder.kind: (SecondOrder, ("natural_hz", "damping_ratio")),
}


def parameter_units() -> dict[str, str]:
    """Unit of every model parameter of every registered kind, by key."""
    return {k: u for cls, _ in ACTUATOR_MODELS.values() for k, u in cls.units.items()}


def make_model(kind: str, **params: float) -> ActuatorModel:
    """Build a model by kind name; an unknown kind raises KeyError listing the known ones."""
    if kind not in ACTUATOR_MODELS:
        raise KeyError(f"unknown actuator model '{kind}'; known: {', '.join(ACTUATOR_MODELS)}")
    cls, _ = ACTUATOR_MODELS[kind]
    model: ActuatorModel = cls(**params)
    return model


__all__ = [
    "ACTUATOR_MODELS",
    "ActuatorModel",
    "DiscreteBank",
    "FirstOrder",
    "JointActuator",
    "SecondOrder",
    "continuous_bank",
    "discretize",
    "make_model",
    "parameter_units",
]
