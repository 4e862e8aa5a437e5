"""The result object of a diode-model fit."""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from tracer.model import DoubleDiode, SingleDiode

SINGLE_KEYS = ("photocurrent_a", "saturation_current_a", "ideality",
               "series_resistance_ohm", "shunt_resistance_ohm")
DOUBLE_KEYS = ("photocurrent_a", "saturation_current_1_a", "saturation_current_2_a",
               "ideality_1", "ideality_2", "series_resistance_ohm", "shunt_resistance_ohm")
FIGURE_KEYS = ("isc_a", "voc_v", "imp_a", "vmp_v", "pmax_w", "ff")


def _json_number(x):
    """A float for JSON; None for NaN and infinities (which strict JSON cannot carry)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class FitResult:
    """Outcome of :func:`tracer.fit.fit_curve`.

    Attributes
    ----------
    model : str
        ``"single"`` or ``"double"``.
    parameters : dict
        Fitted parameters, keys exactly the :class:`tracer.model.SingleDiode` /
        :class:`tracer.model.DoubleDiode` constructor names (without temperature and
        cell count). ``shunt_resistance_ohm`` is ``inf`` when the best fit has no shunt.
    uncertainty : dict
        1-sigma standard uncertainty of each parameter (same keys), from the covariance
        of the least-squares estimate, s^2 (J^T J)^-1, propagated through the internal
        parametrisation (ln I0, n*Ns*Vt, 1/Rsh). ``inf`` where the data do not determine
        a parameter; 0 for a parameter held fixed (the photocurrent of a dark fit).
    rmse_a : float
        RMS of (measured current - model current solved exactly at each measured
        voltage) over all points [A].
    residuals_a : numpy.ndarray
        Measured minus model current at every point, in the input order [A].
    figures : tracer.model.CurveFigures or None
        Isc, Voc, Imp, Vmp, Pmax, FF of the fitted model; None for dark fits.
    selection_reason : str
        How the model was chosen (information criteria for ``model="auto"``).
    elapsed_s : float
        Wall-clock time of the fit itself [s].
    temperature_k, cells_in_series, dark, loss
        The fit's conditions and options.
    rmse_log : float or None
        Dark fits: RMS of ln|I_measured| - ln|I_model| over the points fitted.
    information_criteria : dict
        BIC of each model tried (``{"single": ..., "double": ...}``).
    n_points : int
        Points in the curve; ``n_points_fitted`` of them entered the objective.
    notes : tuple of str
        Warnings for the reader (a parameter stopped at a search limit, parameters the
        data do not determine); empty when there is nothing to say.
    """

    model: str
    parameters: dict
    uncertainty: dict
    rmse_a: float
    residuals_a: np.ndarray = field(repr=False)
    figures: object | None
    selection_reason: str
    elapsed_s: float
    temperature_k: float
    cells_in_series: int
    dark: bool
    loss: str
    rmse_log: float | None = None
    information_criteria: dict = field(default_factory=dict)
    n_points: int = 0
    n_points_fitted: int = 0
    notes: tuple = ()

    def to_model(self) -> SingleDiode | DoubleDiode:
        """The fitted equivalent circuit as a :mod:`tracer.model` object."""
        cls = SingleDiode if self.model == "single" else DoubleDiode
        return cls(**self.parameters, temperature_k=self.temperature_k,
                   cells_in_series=self.cells_in_series)

    def figures_dict(self) -> dict | None:
        """The model figures as a plain dict, or None."""
        if self.figures is None:
            return None
        return {k: float(getattr(self.figures, k)) for k in FIGURE_KEYS}

    def to_dict(self) -> dict:
        """JSON-safe summary: model, each parameter, rmse_a, uncertainty, figures,
        elapsed_s, selection_reason and notes. Infinite or NaN values become None."""
        out = {"model": self.model}
        out.update({k: _json_number(v) for k, v in self.parameters.items()})
        out["rmse_a"] = _json_number(self.rmse_a)
        out["uncertainty"] = {k: _json_number(v) for k, v in self.uncertainty.items()}
        figs = self.figures_dict()
        out["figures"] = None if figs is None else {k: _json_number(v) for k, v in figs.items()}
        out["elapsed_s"] = _json_number(self.elapsed_s)
        out["selection_reason"] = self.selection_reason
        out["notes"] = list(self.notes)
        return out


