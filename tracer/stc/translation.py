"""One curve to STC by every method available, side by side, with a GUM budget.

:func:`translate_to_stc` runs the requested methods on a curve measured at (G1, T1):

- ``"procedure1"`` IEC 60891 procedure 1 (needs :class:`Procedure1Coefficients`),
- ``"procedure2"`` IEC 60891 procedure 2 (needs :class:`Procedure2Coefficients`),
- ``"procedure3"`` IEC 60891 procedure 3 (needs companion curves; the measured curve is
  one of the set),
- ``"diode_model"`` De Soto translation of a fitted diode model (needs the model and
  alpha_isc [A/K]; with T1 = T2 alpha is not needed).

A method that cannot run (missing coefficients, unreachable target, ...) is reported with
``ok=False`` and the reason; the others go on. The first method in the requested order
that succeeds is the *primary* one: its Pmax is the reported STC value.

The methods' spread is a translation uncertainty: half the range of their Pmax taken as a
rectangular half-width (GUM 4.3.7). The budget of STC Pmax (and of the efficiency when the
area is known) lists, as uncorrelated inputs (JCGM 100:2008 eq. 10):

- reference-cell calibration (relative u of G1; sensitivity by re-running the primary
  method with G1 changed by +-0.5 %),
- other irradiance reading terms (relative u of G1, e.g. non-uniformity),
- spectral mismatch factor (relative u of SMM; it scales G1, same sensitivity),
- device temperature reading (u in K; sensitivity by re-running with T1 +- 0.5 K),
- translation method spread (rectangular, sensitivity 1),
- model fit: the model's Pmax against the points' Pmax at the measured conditions, as a
  rectangular half-width scaled to STC (only when a diode model is given),
- current and voltage readings (relative u; Pmax scales with each, sensitivity Pmax),
- for the efficiency also the area (relative u).
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Callable, Sequence

import numpy as np

from tracer.stc.curve_figures import CurveFigures, curve_figures
from tracer.stc.diode_model import (
    BANDGAP_EV,
    BANDGAP_TEMPERATURE_COEFFICIENT_PER_K,
    translate_diode_model,
)
from tracer.stc.iec60891 import (
    MeasuredCurve,
    Procedure1Coefficients,
    Procedure2Coefficients,
    translate_procedure1,
    translate_procedure2,
)
from tracer.stc.procedure3 import translate_procedure3
from tracer.stc.uncertainty import BudgetEntry, UncertaintyBudget, rectangular

__all__ = ["METHODS", "UncertaintyInputs", "MethodTranslation", "StcTranslation",
           "translate_to_stc"]

METHODS = ("procedure1", "procedure2", "procedure3", "diode_model")
G_STEP_REL = 0.005      # relative step of G1 for the numerical sensitivity
T_STEP_K = 0.5          # step of T1 [K]


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if np.isfinite(x) else None


@dataclass(frozen=True)
class UncertaintyInputs:
    """Standard uncertainties (1 sigma) of the inputs; 0 leaves an input out of the budget.

    ``temperature_k`` is absolute [K]; the others relative [1]. A tolerance +-a read from a
    data sheet is entered as a/sqrt(3) (rectangular, GUM 4.3.7).
    """

    reference_cell_calibration_rel: float = 0.0
    irradiance_other_rel: float = 0.0
    mismatch_rel: float = 0.0
    temperature_k: float = 0.0
    current_reading_rel: float = 0.0
    voltage_reading_rel: float = 0.0
    area_rel: float = 0.0
    coverage_factor: float = 2.0

    def __post_init__(self):
        for k, v in self.__dict__.items():
            if not np.isfinite(v) or v < 0.0:
                raise ValueError(f"{k} must be a finite number >= 0, got {v!r}")


@dataclass(frozen=True)
class MethodTranslation:
    """Result of one method."""

    method: str
    ok: bool
    figures: CurveFigures | None = None
    voltage_v: np.ndarray | None = field(default=None, repr=False)
    current_a: np.ndarray | None = field(default=None, repr=False)
    error: str | None = None
    details: dict = field(default_factory=dict)

    def to_dict(self, include_curve: bool = False) -> dict:
        d = {"method": self.method, "ok": self.ok, "error": self.error,
             "figures": None if self.figures is None else
             {k: (_num(v) if not isinstance(v, bool) else v)
              for k, v in self.figures.to_dict().items()},
             "details": self.details}
        if include_curve and self.voltage_v is not None:
            d["voltage_v"] = [float(x) for x in self.voltage_v]
            d["current_a"] = [float(x) for x in self.current_a]
        return d


@dataclass(frozen=True)
class StcTranslation:
    """All methods' results, the primary value, the spread and the budgets."""

    measured_irradiance_w_m2: float
    measured_temperature_c: float
    target_irradiance_w_m2: float
    target_temperature_c: float
    methods: tuple[MethodTranslation, ...]
    primary: str | None
    pmax_w: float | None
    spread: dict
    pmax_budget: UncertaintyBudget | None
    efficiency: float | None = None
    efficiency_budget: UncertaintyBudget | None = None

    def method(self, name: str) -> MethodTranslation | None:
        for m in self.methods:
            if m.method == name:
                return m
        return None

    @property
    def primary_result(self) -> MethodTranslation | None:
        return self.method(self.primary) if self.primary else None

    def to_dict(self, include_curves: bool = False) -> dict:
        return {
            "measured": {"irradiance_w_m2": _num(self.measured_irradiance_w_m2),
                         "temperature_c": _num(self.measured_temperature_c)},
            "target": {"irradiance_w_m2": _num(self.target_irradiance_w_m2),
                       "temperature_c": _num(self.target_temperature_c)},
            "methods": [m.to_dict(include_curves) for m in self.methods],
            "primary": self.primary,
            "pmax_w": _num(self.pmax_w),
            "spread": {k: (v if isinstance(v, int) else _num(v)) for k, v in self.spread.items()},
            "pmax_budget": None if self.pmax_budget is None else self.pmax_budget.to_dict(),
            "efficiency": _num(self.efficiency),
            "efficiency_budget": None if self.efficiency_budget is None
            else self.efficiency_budget.to_dict(),
        }


def _model_curve(model, voltage_v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The translated model's curve from the measured lowest voltage to past its Voc."""
    voc = float(model.voltage(0.0))
    v_lo = min(float(np.min(voltage_v)), 0.0)
    n = int(min(max(voltage_v.size, 50), 2000))
    v = np.linspace(v_lo, 1.02 * voc, n)
    return v, np.asarray(model.current(v), dtype=float)


def translate_to_stc(voltage_v, current_a, *, irradiance_w_m2: float, temperature_c: float,
                     methods: Sequence[str] = ("procedure1", "procedure2", "diode_model"),
                     procedure1: Procedure1Coefficients | None = None,
                     procedure2: Procedure2Coefficients | None = None,
                     companion_curves: Sequence[MeasuredCurve] = (),
                     diode_model=None, alpha_isc_a_per_k: float | None = None,
                     target_irradiance_w_m2: float = 1000.0,
                     target_temperature_c: float = 25.0,
                     area_cm2: float | None = None,
                     uncertainty: UncertaintyInputs = UncertaintyInputs(),
                     bandgap_ev: float = BANDGAP_EV,
                     bandgap_temperature_coefficient_per_k: float =
                     BANDGAP_TEMPERATURE_COEFFICIENT_PER_K) -> StcTranslation:
    """Translate one curve with each requested method; see the module docstring.

    ``irradiance_w_m2`` is the irradiance the device saw (reference-cell reading times the
    mismatch factor). Raises ``ValueError`` only for a curve or conditions that no method
    could use (non-finite or non-positive G, unknown method names).
    """
    unknown = [m for m in methods if m not in METHODS]
    if unknown:
        raise ValueError(f"unknown translation method(s) {', '.join(unknown)}; "
                         f"known: {', '.join(METHODS)}")
    g1, t1 = float(irradiance_w_m2), float(temperature_c)
    if not (np.isfinite(g1) and g1 > 0.0):
        raise ValueError(f"measured irradiance must be finite and > 0 W/m^2, got {irradiance_w_m2!r}")
    if not np.isfinite(t1):
        raise ValueError("measured temperature must be finite")
    g2, t2 = float(target_irradiance_w_m2), float(target_temperature_c)
    measured = MeasuredCurve(voltage_v, current_a, g1, t1)
    v1, i1 = measured.voltage_v, measured.current_a
    measured_figures = curve_figures(v1, i1)
    if alpha_isc_a_per_k is None and procedure1 is not None:
        alpha_isc_a_per_k = procedure1.alpha_a_per_k

    def run(method: str, g_scale: float = 1.0, dt: float = 0.0):
        """(V, I, details) of one method with G1 scaled and T1 shifted (for sensitivities)."""
        g, t = g1 * g_scale, t1 + dt
        if method == "procedure1":
            if procedure1 is None:
                raise ValueError("procedure 1 needs its coefficients (alpha, beta, Rs, kappa)")
            v, i = translate_procedure1(v1, i1, irradiance_w_m2=g, temperature_c=t,
                                        isc_a=measured_figures.isc_a, coefficients=procedure1,
                                        target_irradiance_w_m2=g2, target_temperature_c=t2)
            return v, i, {"coefficients": procedure1.to_dict(), "equations": "IEC 60891 Ed.2 "
                          "procedure 1 as in Sandia PV_LIB pvl_translate_IV_curve_IEC60891_1"}
        if method == "procedure2":
            if procedure2 is None:
                raise ValueError("procedure 2 needs its coefficients (alpha_rel, beta_rel, a, Rs', kappa')")
            v, i = translate_procedure2(v1, i1, irradiance_w_m2=g, temperature_c=t,
                                        voc_v=measured_figures.voc_v, coefficients=procedure2,
                                        target_irradiance_w_m2=g2, target_temperature_c=t2)
            return v, i, {"coefficients": procedure2.to_dict(), "equations": "IEC 60891 Ed.2 "
                          "procedure 2 as in Sandia PV_LIB pvl_translate_IV_curve_IEC60891_2"}
        if method == "procedure3":
            if len(companion_curves) < 1:
                raise ValueError("procedure 3 needs curves at other conditions besides this one")
            curves = [MeasuredCurve(v1, i1, g, t)] + [
                MeasuredCurve(c.voltage_v, c.current_a, c.irradiance_w_m2 * g_scale,
                              c.temperature_c + dt) for c in companion_curves]
            r = translate_procedure3(curves, target_irradiance_w_m2=g2, target_temperature_c=t2)
            details = r.to_dict()
            details["equations"] = ("IEC 60891 procedure 3 in its usual interpolation form "
                                    "(from memory, not confirmed against the standard text)")
            return r.voltage_v, r.current_a, details
        if method == "diode_model":
            if diode_model is None:
                raise ValueError("the diode-model translation needs a fitted model")
            alpha = alpha_isc_a_per_k
            if alpha is None:
                if abs(t - t2) > 1e-9:
                    raise ValueError("the diode-model translation needs alpha_isc [A/K] to change temperature")
                alpha = 0.0
            moved = translate_diode_model(
                diode_model, irradiance_w_m2=g, temperature_c=t, alpha_isc_a_per_k=alpha,
                target_irradiance_w_m2=g2, target_temperature_c=t2, bandgap_ev=bandgap_ev,
                bandgap_temperature_coefficient_per_k=bandgap_temperature_coefficient_per_k)
            v, i = _model_curve(moved, v1)
            params = {k: _num(val) for k, val in moved.parameters().items()}
            return v, i, {"parameters": params, "alpha_isc_a_per_k": _num(alpha),
                          "relations": "De Soto et al. 2006, Solar Energy 80(1):78-88",
                          "_model": moved}
        raise ValueError(f"unknown method {method!r}")

    def figures_of(method, v, i, details) -> CurveFigures:
        model = details.pop("_model", None)
        if model is not None:   # exact figures of the translated model
            f = model.figures()
            return CurveFigures(isc_a=float(f.isc_a), voc_v=float(f.voc_v), imp_a=float(f.imp_a),
                                vmp_v=float(f.vmp_v), pmax_w=float(f.pmax_w), ff=float(f.ff))
        return curve_figures(v, i)

    results: list[MethodTranslation] = []
    for method in methods:
        try:
            v, i, details = run(method)
            figs = figures_of(method, v, i, details)
            if not (np.isfinite(figs.pmax_w) and figs.pmax_w > 0.0):
                raise ValueError("the translated curve delivers no power")
            results.append(MethodTranslation(method, True, figs, v, i, None, details))
        except (ValueError, TypeError, ArithmeticError, np.linalg.LinAlgError) as exc:
            results.append(MethodTranslation(method, False, error=str(exc) or type(exc).__name__))

    good = [r for r in results if r.ok]
    primary = good[0].method if good else None
    pmax = good[0].figures.pmax_w if good else None
    spread = _spread(good)

    pmax_budget = eff = eff_budget = None
    if primary is not None:
        def pmax_of(g_scale: float = 1.0, dt: float = 0.0) -> float:
            v, i, details = run(primary, g_scale, dt)
            return figures_of(primary, v, i, details).pmax_w

        pmax_budget = _pmax_budget(pmax, pmax_of, g1, t1, spread, uncertainty, diode_model,
                                   measured_figures)
        if area_cm2 is not None and np.isfinite(area_cm2) and area_cm2 > 0.0:
            area_m2 = float(area_cm2) * 1e-4
            eff = pmax / (g2 * area_m2)
            eff_budget = _efficiency_budget(pmax_budget, eff, g2, area_m2, uncertainty)
    return StcTranslation(g1, t1, g2, t2, tuple(results), primary, pmax, spread, pmax_budget,
                          eff, eff_budget)


def _spread(good: list[MethodTranslation]) -> dict:
    values = np.array([r.figures.pmax_w for r in good], dtype=float)
    if values.size == 0:
        return {"methods": 0}
    half = 0.5 * float(np.ptp(values))
    out = {"methods": int(values.size), "pmax_min_w": float(values.min()),
           "pmax_max_w": float(values.max()), "pmax_half_range_w": half,
           "pmax_standard_uncertainty_w": rectangular(half),
           "pmax_half_range_rel": half / float(np.mean(values))}
    for key in ("isc_a", "voc_v", "ff"):
        vals = np.array([getattr(r.figures, key) for r in good], dtype=float)
        out[f"{key}_half_range"] = 0.5 * float(np.ptp(vals))
    return out


def _pmax_budget(pmax: float, pmax_of: Callable[..., float], g1: float, t1: float,
                 spread: dict, u: UncertaintyInputs, diode_model,
                 measured_figures: CurveFigures) -> UncertaintyBudget:
    entries: list[BudgetEntry] = []
    notes: list[str] = []
    need_g = u.reference_cell_calibration_rel > 0 or u.irradiance_other_rel > 0 or u.mismatch_rel > 0
    c_g = c_t = None

    def sensitivity(what: str, f: Callable[[float], float], step: float, scale: float):
        try:
            value = (f(step) - f(-step)) / (2.0 * step * scale)
        except (ValueError, TypeError, ArithmeticError, np.linalg.LinAlgError) as exc:
            notes.append(f"{what} left out: its sensitivity could not be computed ({exc})")
            return None
        if not np.isfinite(value):
            notes.append(f"{what} left out: its sensitivity is not finite")
            return None
        return float(value)

    if need_g:   # W per W/m^2
        c_g = sensitivity("irradiance inputs", lambda h: pmax_of(1.0 + h), G_STEP_REL, g1)
    if u.temperature_k > 0:   # W per K
        c_t = sensitivity("temperature reading", lambda h: pmax_of(1.0, h), T_STEP_K, 1.0)
    if c_g is None:
        u = dataclasses.replace(u, reference_cell_calibration_rel=0.0, irradiance_other_rel=0.0,
                                mismatch_rel=0.0)
    if c_t is None:
        u = dataclasses.replace(u, temperature_k=0.0)
    if u.reference_cell_calibration_rel > 0:
        entries.append(BudgetEntry("reference cell calibration", "G1", g1, "W/m^2",
                                   u.reference_cell_calibration_rel * g1, "normal", c_g,
                                   "calibration certificate of the reference cell"))
    if u.irradiance_other_rel > 0:
        entries.append(BudgetEntry("irradiance, other terms (non-uniformity, reading)", "G1", g1,
                                   "W/m^2", u.irradiance_other_rel * g1, "normal", c_g,
                                   "bench characterisation"))
    if u.mismatch_rel > 0:
        entries.append(BudgetEntry("spectral mismatch factor (scales G1)", "SMM*G1", g1, "W/m^2",
                                   u.mismatch_rel * g1, "normal", c_g,
                                   "IEC 60904-7: SMM uncertainty is not zero even when SMM = 1"))
    if u.temperature_k > 0:
        entries.append(BudgetEntry("device temperature reading", "T1", t1, "C", u.temperature_k,
                                   "normal", c_t, "thermometer calibration and contact"))
    if spread.get("methods", 0) >= 2:
        entries.append(BudgetEntry("translation method spread", "dP_method", 0.0, "W",
                                   spread["pmax_standard_uncertainty_w"], "rectangular", 1.0,
                                   "half range of the methods' STC Pmax, GUM 4.3.7"))
    if diode_model is not None and measured_figures.pmax_w > 0:
        try:
            p_model = float(diode_model.figures().pmax_w)
        except (ValueError, ArithmeticError):
            p_model = float("nan")
        if np.isfinite(p_model):
            half = abs(p_model - measured_figures.pmax_w) * pmax / measured_figures.pmax_w
            entries.append(BudgetEntry("model fit (model vs points at measured conditions)",
                                       "dP_fit", 0.0, "W", rectangular(half), "rectangular", 1.0,
                                       "|Pmax_model - Pmax_points| scaled to STC, GUM 4.3.7"))
    if u.current_reading_rel > 0:
        entries.append(BudgetEntry("current reading", "I", 1.0, "1", u.current_reading_rel,
                                   "normal", pmax, "SMU accuracy specification"))
    if u.voltage_reading_rel > 0:
        entries.append(BudgetEntry("voltage reading", "V", 1.0, "1", u.voltage_reading_rel,
                                   "normal", pmax, "SMU accuracy specification"))
    return UncertaintyBudget("pmax_stc_w", "W", pmax, tuple(entries), u.coverage_factor,
                             tuple(notes))


def _efficiency_budget(pmax_budget: UncertaintyBudget, eff: float, g2: float, area_m2: float,
                       u: UncertaintyInputs) -> UncertaintyBudget:
    scale = 1.0 / (g2 * area_m2)           # d(eta)/d(Pmax)
    entries = [BudgetEntry(e.name, e.symbol, e.estimate, e.unit, e.standard_uncertainty,
                           e.distribution, e.sensitivity * scale, e.source)
               for e in pmax_budget.entries]
    if u.area_rel > 0:
        entries.append(BudgetEntry("device area", "A", area_m2, "m^2", u.area_rel * area_m2,
                                   "normal", -eff / area_m2, "area measurement (IEC 60904-1 Annex A)"))
    return UncertaintyBudget("efficiency", "1", eff, tuple(entries), u.coverage_factor,
                             pmax_budget.notes)
