"""Diode-model parameter extraction and figures of merit from measured I-V curves.

Pure numerics (numpy/scipy); no file access here (:mod:`tracer.fit.csvio` reads CSV files
and is imported only by those who need it).

Public API::

    from tracer.fit import fit_curve, FitResult, figures_from_data, DataFigures, FitError

    res = fit_curve(voltage_v, current_a, model="auto", temperature_k=298.15,
                    cells_in_series=60)          # current in the generator convention
    res.parameters, res.uncertainty, res.rmse_a, res.figures, res.to_model()

    figures_from_data(voltage_v, current_a)      # Isc, Voc, MPP, FF from the points alone
"""
from tracer.fit.data_figures import DataFigures, figures_from_data
from tracer.fit.errors import FitError
from tracer.fit.extraction import fit_curve
from tracer.fit.result import FitResult

__all__ = ["fit_curve", "FitResult", "figures_from_data", "DataFigures", "FitError"]
