"""End-of-sweep analysis: the one function the sweep engine calls after every sweep.

::

    from tracer.analysis import analyze_sweep, AnalysisSettings, SweepContext

    result = analyze_sweep(voltage_v, current_a, dark=False, temperature_c=25.3,
                           irradiance_w_m2=None, area_cm2=1.0, cells_in_series=1,
                           settings=AnalysisSettings(...), context=SweepContext(...))
    result.to_dict()          # JSON-safe (NaN/inf become None)

``current_a`` is in the **generator** convention (Isc > 0 under light): convert the SMU's
load-convention readings with :func:`tracer.conventions.generator_current` first.
:func:`analyze_sweep` never raises for a bad curve or missing evidence: whatever fails is
written into the result (``errors``, ``fit_errors``, ``stc_error``, verdict reason
``analysis-failed``) and the run goes on.

What it does, in order:

1. irradiance: the ``irradiance_w_m2`` argument; else the mean of
   ``context.irradiance_readings_w_m2``; else the reference cell's readings
   (``context.reference_isc_readings_a`` with ``settings.reference_cell``, IEC 60904-1 practice);
   multiplied by ``settings.spectral_mismatch_factor`` (IEC 60904-7).
2. figures from the points (``tracer.fit.figures_from_data``), efficiency Pmax/(G*A) when
   G and the area are known;
3. a fit per ``settings.models`` (``"single"``, ``"double"``, ``"auto"``) with parameter
   uncertainties and model figures;
4. STC translation by ``settings.stc_methods`` (``tracer.stc.translate_to_stc``: IEC 60891
   procedures 1/2/3 and the De Soto diode-model translation), side by side with their
   spread and a GUM budget of STC Pmax and efficiency (light curves only);
5. the keep/re-measure verdict (``tracer.quality.assess_sweep``).

Settings (:class:`AnalysisSettings`, frozen; :meth:`AnalysisSettings.from_mapping` builds
one from a protocol's ``analysis:`` mapping and a bench profile's fields, refusing unknown keys):

==============================  =============================================================
``models``                      fits to run, any of "single", "double", "auto"
``stc_methods``                 translation methods, any of "procedure1", "procedure2",
                                "procedure3", "diode_model"; the first that works is primary
``target_irradiance_w_m2``      translation target G (1000)
``target_temperature_c``        translation target T (25)
``procedure1``                  :class:`~tracer.stc.Procedure1Coefficients` or None
``procedure2``                  :class:`~tracer.stc.Procedure2Coefficients` or None
``alpha_isc_a_per_k``           Isc temperature coefficient [A/K] for the diode-model
                                translation (else procedure 1's alpha, else
                                ``alpha_isc_rel_per_k`` x Isc)
``alpha_isc_rel_per_k``         relative Isc temperature coefficient [1/K]
``spectral_mismatch_factor``    IEC 60904-7 SMM of this device on this bench (1.0)
``reference_cell``              :class:`ReferenceCell` (calibration Isc, its uncertainty,
                                temperature coefficient) or None
``uncertainty``                 :class:`~tracer.stc.UncertaintyInputs` (standard
                                uncertainties; the reference cell's calibration uncertainty
                                is taken from ``reference_cell`` when not given here)
``usual_series_resistance_ohm`` what this bench's contacts normally give (contact check)
``quality``                     :class:`~tracer.quality.QualityThresholds` (instability class...)
==============================  =============================================================

Per-sweep evidence (:class:`SweepContext`, frozen; every field optional):

==========================================  ================================================
``direction``                               "forward" (toward +V) or "reverse"
``irradiance_readings_w_m2``                irradiance readings taken during the sweep
``reference_isc_readings_a``                reference-cell Isc readings (if G is not given)
``reference_temperature_c``                 reference-cell temperature for those readings
``temperature_readings_c``                  stage/device temperature readings
``stage_setpoint_c``                        the temperature the stage was asked to hold
``compliance_flags``                        the SMU's compliance flag per point
``paired_sweep``                            :class:`PairedSweep`: opposite-direction sweep
``four_wire``                               sensing mode (recorded in the result)
``open_circuit_two_wire_voltage_v``         open-circuit voltage read two-wire ...
``open_circuit_four_wire_voltage_v``        ... and four-wire, for the sense-contact check
``companion_curves``                        :class:`~tracer.stc.MeasuredCurve` at other
                                            (G, T) of the same device, for procedure 3
==========================================  ================================================
"""
from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from tracer.fit import FitError, figures_from_data, fit_curve
from tracer.quality import QualityThresholds, QualityVerdict, SweepEvidence, assess_sweep
from tracer.stc import (
    METHODS,
    MeasuredCurve,
    Procedure1Coefficients,
    Procedure2Coefficients,
    StcTranslation,
    UncertaintyInputs,
    irradiance_from_reference_cell,
    translate_to_stc,
)

__all__ = ["ReferenceCell", "AnalysisSettings", "PairedSweep", "SweepContext",
           "AnalysisResult", "analyze_sweep", "FIT_MODELS"]

FIT_MODELS = ("single", "double", "auto")
_ZERO_C_K = 273.15


def _json(value: Any) -> Any:
    """JSON-safe copy: NaN -> None, inf -> None, numpy scalars -> Python, tuples -> lists."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): _json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_json(v) for v in value]
    if value is None or isinstance(value, str):
        return value
    return str(value)


@dataclass(frozen=True)
class ReferenceCell:
    """A calibrated reference cell (IEC 60904-2 device)."""

    calibration_isc_a: float
    calibration_uncertainty_rel: float = 0.0      # standard uncertainty, relative
    temperature_coefficient_per_k: float = 0.0    # relative Isc change per K
    calibration_irradiance_w_m2: float = 1000.0
    calibration_temperature_c: float = 25.0

    def __post_init__(self):
        if not (math.isfinite(self.calibration_isc_a) and self.calibration_isc_a > 0):
            raise ValueError(f"reference_cell.calibration_isc_a must be > 0 A, got {self.calibration_isc_a!r}")
        if not (math.isfinite(self.calibration_uncertainty_rel) and self.calibration_uncertainty_rel >= 0):
            raise ValueError("reference_cell.calibration_uncertainty_rel must be >= 0")


@dataclass(frozen=True)
class AnalysisSettings:
    """How sweeps are analysed; see the module docstring."""

    models: tuple[str, ...] = ("single",)
    stc_methods: tuple[str, ...] = ("procedure1", "procedure2", "diode_model")
    target_irradiance_w_m2: float = 1000.0
    target_temperature_c: float = 25.0
    procedure1: Procedure1Coefficients | None = None
    procedure2: Procedure2Coefficients | None = None
    alpha_isc_a_per_k: float | None = None
    alpha_isc_rel_per_k: float | None = None
    spectral_mismatch_factor: float = 1.0
    reference_cell: ReferenceCell | None = None
    uncertainty: UncertaintyInputs = UncertaintyInputs()
    usual_series_resistance_ohm: float | None = None
    quality: QualityThresholds = QualityThresholds()

    def __post_init__(self):
        object.__setattr__(self, "models", tuple(self.models))
        object.__setattr__(self, "stc_methods", tuple(self.stc_methods))
        bad = [m for m in self.models if m not in FIT_MODELS]
        if bad:
            raise ValueError(f"models: unknown {', '.join(map(str, bad))}; allowed {', '.join(FIT_MODELS)}")
        bad = [m for m in self.stc_methods if m not in METHODS]
        if bad:
            raise ValueError(f"stc_methods: unknown {', '.join(map(str, bad))}; allowed {', '.join(METHODS)}")
        for name in ("target_irradiance_w_m2", "spectral_mismatch_factor"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be a number > 0, got {value!r}")
        if not (isinstance(self.target_temperature_c, (int, float))
                and math.isfinite(self.target_temperature_c)):
            raise ValueError("target_temperature_c must be a finite number")

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any] | None) -> "AnalysisSettings":
        """Settings from plain data (a protocol's ``analysis:`` block, bench fields).

        Keys are the field names; ``procedure1``, ``procedure2``, ``reference_cell``,
        ``uncertainty`` and ``quality`` are mappings of their classes' field names. An
        unknown key or a bad value raises ``ValueError`` naming it.
        """
        mapping = dict(mapping or {})
        fields = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(mapping) - fields)
        if unknown:
            raise ValueError(f"analysis settings: unknown key(s) {', '.join(unknown)}; "
                             f"allowed: {', '.join(sorted(fields))}")
        nested = {"procedure1": Procedure1Coefficients, "procedure2": Procedure2Coefficients,
                  "reference_cell": ReferenceCell, "uncertainty": UncertaintyInputs,
                  "quality": QualityThresholds}
        kwargs: dict[str, Any] = {}
        for key, value in mapping.items():
            if key in nested and isinstance(value, Mapping):
                sub = nested[key]
                allowed = {f.name for f in dataclasses.fields(sub)}
                extra = sorted(set(value) - allowed)
                if extra:
                    raise ValueError(f"analysis settings: {key}: unknown key(s) {', '.join(extra)}; "
                                     f"allowed: {', '.join(sorted(allowed))}")
                try:
                    value = sub(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in value.items()})
                except (TypeError, ValueError) as exc:
                    raise ValueError(f"analysis settings: {key}: {exc}") from None
            elif key in ("models", "stc_methods"):
                value = (value,) if isinstance(value, str) else tuple(value)
            kwargs[key] = value
        try:
            return cls(**kwargs)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"analysis settings: {exc}") from None


@dataclass(frozen=True)
class PairedSweep:
    """The opposite-direction sweep of a pair (generator convention)."""

    voltage_v: np.ndarray
    current_a: np.ndarray
    direction: str | None = None


@dataclass(frozen=True)
class SweepContext:
    """Per-sweep evidence from the engine; see the module docstring."""

    direction: str | None = None
    irradiance_readings_w_m2: Sequence[float] | None = None
    reference_isc_readings_a: Sequence[float] | None = None
    reference_temperature_c: float | None = None
    temperature_readings_c: Sequence[float] | None = None
    stage_setpoint_c: float | None = None
    compliance_flags: Sequence[bool] | None = None
    paired_sweep: PairedSweep | None = None
    four_wire: bool | None = None
    open_circuit_two_wire_voltage_v: float | None = None
    open_circuit_four_wire_voltage_v: float | None = None
    companion_curves: tuple[MeasuredCurve, ...] = ()


@dataclass(frozen=True)
class AnalysisResult:
    """Everything known about one sweep after analysis."""

    dark: bool
    points: int
    conditions: dict
    data_figures: dict | None
    efficiency: float | None
    fits: dict
    fit_errors: dict
    stc: StcTranslation | None
    stc_error: str | None
    verdict: QualityVerdict
    errors: tuple[str, ...]
    elapsed_s: float

    def fit(self, model: str):
        """The :class:`tracer.fit.FitResult` of a requested model, or None."""
        return self.fits.get(model)

    def to_dict(self) -> dict:
        return _json({
            "dark": self.dark,
            "points": self.points,
            "conditions": self.conditions,
            "data_figures": self.data_figures,
            "efficiency": self.efficiency,
            "fits": {k: v.to_dict() for k, v in self.fits.items()},
            "fit_errors": self.fit_errors,
            "stc": None if self.stc is None else self.stc.to_dict(),
            "stc_error": self.stc_error,
            "verdict": self.verdict.to_dict(),
            "errors": list(self.errors),
            "elapsed_s": self.elapsed_s,
        })


def _finite_or_none(x) -> float | None:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def _readings(x) -> np.ndarray | None:
    if x is None:
        return None
    try:
        a = np.asarray(list(x) if not isinstance(x, np.ndarray) else x, dtype=float).ravel()
    except (TypeError, ValueError):
        return None
    a = a[np.isfinite(a)]
    return a if a.size else None


def _irradiance(irradiance_w_m2, settings: AnalysisSettings, context: SweepContext,
                errors: list[str]) -> tuple[float | None, str]:
    g = _finite_or_none(irradiance_w_m2)
    if g is not None and g > 0:
        return g, "given"
    if irradiance_w_m2 is not None:
        errors.append(f"irradiance {irradiance_w_m2!r} is not a positive number; ignored")
    readings = _readings(context.irradiance_readings_w_m2)
    if readings is not None and float(np.mean(readings)) > 0:
        return float(np.mean(readings)), "mean of readings during the sweep"
    ref = _readings(context.reference_isc_readings_a)
    if ref is not None and settings.reference_cell is not None:
        rc = settings.reference_cell
        t_rc = _finite_or_none(context.reference_temperature_c)
        try:
            g = irradiance_from_reference_cell(
                float(np.mean(ref)), calibration_isc_a=rc.calibration_isc_a,
                reference_temperature_c=rc.calibration_temperature_c if t_rc is None else t_rc,
                alpha_rel_per_k=rc.temperature_coefficient_per_k,
                calibration_irradiance_w_m2=rc.calibration_irradiance_w_m2,
                calibration_temperature_c=rc.calibration_temperature_c)
            if g > 0:
                return float(g), "reference cell"
        except ValueError as exc:
            errors.append(f"irradiance from the reference cell failed: {exc}")
    return None, "unknown"


def analyze_sweep(voltage_v, current_a, *, dark: bool, temperature_c, irradiance_w_m2=None,
                  area_cm2=None, cells_in_series: int = 1,
                  settings: AnalysisSettings = AnalysisSettings(),
                  context: SweepContext = SweepContext()) -> AnalysisResult:
    """Analyse one finished sweep; never raises for bad data (see the module docstring)."""
    start = time.perf_counter()
    errors: list[str] = []
    try:
        with np.errstate(all="ignore"):   # junk input overflows harmlessly; results say so
            return _analyze(voltage_v, current_a, bool(dark), temperature_c, irradiance_w_m2,
                            area_cm2, cells_in_series, settings, context, errors, start)
    except Exception as exc:  # last resort: the run must go on
        message = f"analysis failed unexpectedly: {type(exc).__name__}: {exc}"
        errors.append(message)
        verdict = assess_sweep(SweepEvidence(np.zeros(0), np.zeros(0), dark=bool(dark),
                                             analysis_errors=(message,)))
        return AnalysisResult(bool(dark), 0, {}, None, None, {}, {}, None, message, verdict,
                              tuple(errors), time.perf_counter() - start)


def _analyze(voltage_v, current_a, dark, temperature_c, irradiance_w_m2, area_cm2,
             cells_in_series, settings, context, errors, start) -> AnalysisResult:
    if not isinstance(settings, AnalysisSettings):
        errors.append("settings is not an AnalysisSettings; defaults used")
        settings = AnalysisSettings()
    if not isinstance(context, SweepContext):
        errors.append("context is not a SweepContext; ignored")
        context = SweepContext()
    try:
        v = np.asarray(voltage_v, dtype=float).ravel()
        i = np.asarray(current_a, dtype=float).ravel()
    except (TypeError, ValueError):
        v = i = np.zeros(0)
        errors.append("the points are not numbers")
    if v.size != i.size:
        errors.append(f"voltage and current differ in length ({v.size} vs {i.size})")
        n = min(v.size, i.size)
        v, i = v[:n], i[:n]
    finite = np.isfinite(v) & np.isfinite(i)
    if not np.all(finite):
        errors.append(f"{int(np.count_nonzero(~finite))} non-finite point(s) left out")
    points = int(v.size)
    vf, if_ = v[finite], i[finite]

    t_c = _finite_or_none(temperature_c)
    temperature_source = "given"
    if t_c is None:
        temps = _readings(context.temperature_readings_c)
        if temps is not None:
            t_c, temperature_source = float(np.mean(temps)), "mean of readings during the sweep"
        else:
            temperature_source = "unknown (fits at 25 C)"
            errors.append("device temperature unknown: fits use 25 C, no STC translation")
    try:
        ns = int(cells_in_series)
        if ns < 1:
            raise ValueError
    except (TypeError, ValueError):
        errors.append(f"cells_in_series {cells_in_series!r} is not a positive integer; 1 used")
        ns = 1
    area = _finite_or_none(area_cm2)
    if area is not None and area <= 0:
        errors.append(f"area {area_cm2!r} cm2 is not positive; ignored")
        area = None

    g_read, g_source = (None, "dark") if dark else _irradiance(irradiance_w_m2, settings, context, errors)
    g_eff = None if g_read is None else g_read * settings.spectral_mismatch_factor
    conditions = {"irradiance_w_m2": g_read, "irradiance_source": g_source,
                  "spectral_mismatch_factor": settings.spectral_mismatch_factor,
                  "effective_irradiance_w_m2": g_eff, "temperature_c": t_c,
                  "temperature_source": temperature_source, "cells_in_series": ns,
                  "area_cm2": area, "four_wire": context.four_wire,
                  "direction": context.direction}

    # figures from the points
    data_figs = None
    efficiency = None
    if not dark:
        try:
            data_figs = figures_from_data(vf, if_)
        except (FitError, ValueError, np.linalg.LinAlgError) as exc:
            errors.append(f"figures from the points: {exc}")
        if data_figs is not None and g_eff is not None and area is not None:
            efficiency = data_figs.pmax_w / (g_eff * area * 1e-4)

    # fits
    fits: dict = {}
    fit_errors: dict = {}
    temperature_k = (25.0 if t_c is None else t_c) + _ZERO_C_K
    for model in settings.models:
        try:
            fits[model] = fit_curve(vf, if_, model=model, temperature_k=temperature_k,
                                    cells_in_series=ns, dark=dark)
        except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            fit_errors[model] = str(exc) or type(exc).__name__
    for model, message in fit_errors.items():
        errors.append(f"fit ({model}) failed: {message}")
    chosen_fit = fits.get("auto") or next((fits[m] for m in settings.models if m in fits), None)

    # STC translation
    stc = None
    stc_error = None
    if dark:
        stc_error = "dark curve: no translation"
    elif g_eff is None:
        stc_error = "irradiance unknown: no translation"
    elif t_c is None:
        stc_error = "temperature unknown: no translation"
    elif not settings.stc_methods:
        stc_error = "no translation method configured"
    else:
        alpha = settings.alpha_isc_a_per_k
        if alpha is None and settings.procedure1 is not None:
            alpha = settings.procedure1.alpha_a_per_k
        if alpha is None and settings.alpha_isc_rel_per_k is not None and data_figs is not None:
            alpha = settings.alpha_isc_rel_per_k * data_figs.isc_a * settings.target_irradiance_w_m2 / g_eff
        unc = settings.uncertainty
        if unc.reference_cell_calibration_rel == 0.0 and settings.reference_cell is not None:
            unc = dataclasses.replace(
                unc, reference_cell_calibration_rel=settings.reference_cell.calibration_uncertainty_rel)
        model_obj = None
        if chosen_fit is not None:
            try:
                model_obj = chosen_fit.to_model()
            except ValueError as exc:
                errors.append(f"fitted model unusable for translation: {exc}")
        try:
            stc = translate_to_stc(
                vf, if_, irradiance_w_m2=g_eff, temperature_c=t_c, methods=settings.stc_methods,
                procedure1=settings.procedure1, procedure2=settings.procedure2,
                companion_curves=tuple(context.companion_curves or ()), diode_model=model_obj,
                alpha_isc_a_per_k=alpha, target_irradiance_w_m2=settings.target_irradiance_w_m2,
                target_temperature_c=settings.target_temperature_c, area_cm2=area,
                uncertainty=unc)
            if stc.primary is None:
                stc_error = "; ".join(f"{m.method}: {m.error}" for m in stc.methods) or "no method ran"
        except (ValueError, TypeError, ArithmeticError, np.linalg.LinAlgError) as exc:
            stc_error = str(exc) or type(exc).__name__
    if stc_error and not dark and "no translation method" not in stc_error:
        errors.append(f"STC translation: {stc_error}")

    # verdict
    paired = context.paired_sweep
    pv = pi = None
    if paired is not None:
        try:
            pv = np.asarray(paired.voltage_v, dtype=float).ravel()
            pi = np.asarray(paired.current_a, dtype=float).ravel()
        except (TypeError, ValueError):
            errors.append("paired sweep is not numeric; hysteresis not checked")
    compliance = None
    if context.compliance_flags is not None:
        try:
            compliance = [bool(x) for x in context.compliance_flags]
        except TypeError:
            errors.append("compliance flags are not a sequence; not checked")
    analysis_errors = []
    if points == 0 or vf.size < 5:
        analysis_errors.append(f"too few usable points ({vf.size}) to analyse the curve")
    elif settings.models and not fits:
        analysis_errors.append("no diode model could be fitted: " + "; ".join(fit_errors.values()))
    evidence = SweepEvidence(
        voltage_v=vf, current_a=if_, dark=dark, direction=context.direction,
        figures=data_figs,
        series_resistance_ohm=None if chosen_fit is None
        else chosen_fit.parameters.get("series_resistance_ohm"),
        shunt_resistance_ohm=None if chosen_fit is None
        else chosen_fit.parameters.get("shunt_resistance_ohm"),
        residuals_a=None if chosen_fit is None else chosen_fit.residuals_a,
        irradiance_readings_w_m2=_readings(context.irradiance_readings_w_m2),
        temperature_readings_c=_readings(context.temperature_readings_c),
        target_temperature_c=_finite_or_none(context.stage_setpoint_c),
        compliance_flags=compliance,
        paired_voltage_v=pv, paired_current_a=pi,
        paired_direction=None if paired is None else paired.direction,
        usual_series_resistance_ohm=settings.usual_series_resistance_ohm,
        open_circuit_two_wire_voltage_v=_finite_or_none(context.open_circuit_two_wire_voltage_v),
        open_circuit_four_wire_voltage_v=_finite_or_none(context.open_circuit_four_wire_voltage_v),
        analysis_errors=tuple(analysis_errors))
    verdict = assess_sweep(evidence, settings.quality)

    return AnalysisResult(
        dark=dark, points=points, conditions=conditions,
        data_figures=None if data_figs is None else data_figs.to_dict(),
        efficiency=efficiency, fits=fits, fit_errors=fit_errors, stc=stc, stc_error=stc_error,
        verdict=verdict, errors=tuple(errors), elapsed_s=time.perf_counter() - start)

