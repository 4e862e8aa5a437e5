"""What the single- and double-diode model classes share: checked, immutable parameters."""
from __future__ import annotations

import dataclasses

from tracer.model._checks import check_count, check_scalar_parameter
from tracer.model.thermal import thermal_voltage


class CheckedParameters:
    """Mixin for frozen dataclasses whose fields are model parameters.

    Every field is checked on construction (``ValueError`` naming the parameter, its value
    and the allowed range); ``cells_in_series`` must be a whole number >= 1.
    """

    def __post_init__(self):
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if f.name == "cells_in_series":
                checked = check_count(f.name, value, low=1)
            else:
                checked = check_scalar_parameter(f.name, value)
            object.__setattr__(self, f.name, checked)

    @property
    def thermal_voltage_v(self) -> float:
        """Thermal voltage :math:`V_t = kT/q` at :attr:`temperature_k` [V]."""
        return thermal_voltage(self.temperature_k)

    def parameters(self) -> dict:
        """The constructor arguments as a dict (names as in the constructor)."""
        return dataclasses.asdict(self)

    def replace(self, **changes):
        """A copy with some parameters changed (validated again)."""
        return dataclasses.replace(self, **changes)
