"""Uncertainty budgets in the GUM manner (JCGM 100:2008, "Guide to the expression of
uncertainty in measurement").

A budget lists each input quantity x_i with its standard uncertainty u(x_i) (type A from
statistics, or type B: e.g. a rectangular half-width a gives u = a/sqrt(3), GUM 4.3.7), its
sensitivity coefficient c_i = df/dx_i (GUM 5.1.3; obtained numerically where f has no closed
form, as GUM 5.1.3 Note 2 allows) and its contribution u_i(y) = |c_i| u(x_i). For
uncorrelated inputs the combined standard uncertainty is u_c(y) = sqrt(sum u_i(y)^2)
(GUM eq. 10); the expanded uncertainty U = k u_c (GUM 6.2.1), k = 2 by default
(about 95 % for a normal distribution, GUM 6.3.3).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

__all__ = ["BudgetEntry", "UncertaintyBudget", "central_difference", "rectangular"]

SQRT3 = math.sqrt(3.0)


def rectangular(half_width: float) -> float:
    """Standard uncertainty of a rectangular distribution of the given half-width (GUM 4.3.7)."""
    return abs(float(half_width)) / SQRT3


def central_difference(f: Callable[[float], float], x: float, step: float) -> float:
    """(f(x+h) - f(x-h)) / 2h: a numerical sensitivity coefficient (GUM 5.1.3 Note 2)."""
    if step <= 0.0:
        raise ValueError("step must be > 0")
    return (f(x + step) - f(x - step)) / (2.0 * step)


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class BudgetEntry:
    """One input quantity of a budget."""

    name: str                   # what it is, for a person
    symbol: str
    estimate: float             # value of the input (in ``unit``)
    unit: str
    standard_uncertainty: float  # u(x_i), in ``unit``
    distribution: str           # "normal", "rectangular", ...
    sensitivity: float          # c_i, output unit per ``unit``
    source: str                 # where u(x_i) comes from

    @property
    def contribution(self) -> float:
        """|c_i| u(x_i), in the output's unit."""
        return abs(self.sensitivity) * self.standard_uncertainty

    def to_dict(self) -> dict:
        return {"name": self.name, "symbol": self.symbol, "estimate": _num(self.estimate),
                "unit": self.unit, "standard_uncertainty": _num(self.standard_uncertainty),
                "distribution": self.distribution, "sensitivity": _num(self.sensitivity),
                "contribution": _num(self.contribution), "source": self.source}


@dataclass(frozen=True)
class UncertaintyBudget:
    """Budget of one output quantity with uncorrelated inputs."""

    quantity: str
    unit: str
    value: float
    entries: tuple[BudgetEntry, ...]
    coverage_factor: float = 2.0
    notes: tuple[str, ...] = ()          # inputs left out, and why

    @property
    def combined_standard_uncertainty(self) -> float:
        return math.sqrt(sum(e.contribution ** 2 for e in self.entries))

    @property
    def expanded_uncertainty(self) -> float:
        return self.coverage_factor * self.combined_standard_uncertainty

    @property
    def relative_combined_standard_uncertainty(self) -> float:
        return self.combined_standard_uncertainty / abs(self.value) if self.value else math.nan

    def to_dict(self) -> dict:
        u_c = self.combined_standard_uncertainty
        entries = []
        for e in self.entries:
            d = e.to_dict()
            d["share_of_variance"] = _num(e.contribution ** 2 / u_c ** 2) if u_c > 0 else None
            entries.append(d)
        return {"quantity": self.quantity, "unit": self.unit, "value": _num(self.value),
                "combined_standard_uncertainty": _num(u_c),
                "relative_combined_standard_uncertainty":
                    _num(self.relative_combined_standard_uncertainty),
                "coverage_factor": _num(self.coverage_factor),
                "expanded_uncertainty": _num(self.expanded_uncertainty),
                "method": "JCGM 100:2008, uncorrelated inputs (eq. 10)",
                "contributions": entries, "notes": list(self.notes)}
