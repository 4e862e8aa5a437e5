"""Translation of I-V curves to standard test conditions, and what it is uncertain by.

Pure numpy/scipy, no I/O. Currents in the generator convention, SI units.

- :mod:`~tracer.stc.irradiance`: irradiance from a calibrated reference cell.
- :mod:`~tracer.stc.spectral`: IEC 60904-7 spectral mismatch factor.
- :mod:`~tracer.stc.iec60891`: IEC 60891 procedures 1 and 2.
- :mod:`~tracer.stc.procedure3`: IEC 60891 procedure 3 (interpolation between curves).
- :mod:`~tracer.stc.coefficients`: alpha, beta, Rs, kappa (and procedure 2's a) from sets of curves.
- :mod:`~tracer.stc.diode_model`: De Soto translation of a fitted diode model.
- :mod:`~tracer.stc.curve_figures`: Isc, Voc, Pmax of a translated curve (ASTM E1036 way).
- :mod:`~tracer.stc.translation`: all methods side by side, their spread, GUM budgets.
- :mod:`~tracer.stc.uncertainty`: GUM (JCGM 100:2008) budget objects.
"""
from tracer.stc.coefficients import (
    TemperatureCoefficients,
    TunedCoefficient,
    determine_irradiance_factor_procedure2,
    determine_kappa_procedure1,
    determine_kappa_procedure2,
    determine_procedure1_coefficients,
    determine_procedure2_coefficients,
    determine_series_resistance_procedure1,
    determine_series_resistance_procedure2,
    determine_temperature_coefficients,
)
from tracer.stc.curve_figures import CurveFigures, curve_figures
from tracer.stc.diode_model import translate_diode_model
from tracer.stc.iec60891 import (
    MeasuredCurve,
    Procedure1Coefficients,
    Procedure2Coefficients,
    translate_procedure1,
    translate_procedure2,
)
from tracer.stc.irradiance import effective_irradiance, irradiance_from_reference_cell
from tracer.stc.procedure3 import InterpolationResult, translate_procedure3
from tracer.stc.spectral import SpectralMismatch, reference_spectrum_am15g, spectral_mismatch_factor
from tracer.stc.translation import (
    METHODS,
    MethodTranslation,
    StcTranslation,
    UncertaintyInputs,
    translate_to_stc,
)
from tracer.stc.uncertainty import BudgetEntry, UncertaintyBudget

__all__ = [
    "METHODS", "BudgetEntry", "MethodTranslation", "StcTranslation", "UncertaintyBudget",
    "UncertaintyInputs", "translate_diode_model", "translate_to_stc",
    "CurveFigures", "InterpolationResult", "MeasuredCurve", "Procedure1Coefficients",
    "Procedure2Coefficients", "SpectralMismatch", "TemperatureCoefficients", "TunedCoefficient",
    "curve_figures", "determine_irradiance_factor_procedure2", "determine_kappa_procedure1",
    "determine_kappa_procedure2", "determine_procedure1_coefficients",
    "determine_procedure2_coefficients", "determine_series_resistance_procedure1",
    "determine_series_resistance_procedure2", "determine_temperature_coefficients",
    "effective_irradiance", "irradiance_from_reference_cell", "reference_spectrum_am15g",
    "spectral_mismatch_factor", "translate_procedure1", "translate_procedure2",
    "translate_procedure3",
]
