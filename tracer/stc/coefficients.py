"""Correction coefficients for IEC 60891 procedures 1 and 2, determined from sets of curves.

Methods after IEC 60891 Ed.2 clauses 5-7 and
Sandia PV_LIB ``pvl_est_Rs_IEC60891_1/2`` and ``pvl_est_kappa_IEC60891_1`` (Hansen & King,
45th IEEE PVSC 2018):

- alpha, beta: curves at (about) one irradiance and several temperatures; least-squares
  slopes of Isc(T) and Voc(T). Isc is first scaled to the reference irradiance
  (Isc proportional to G, IEC 60904-10 linearity); when the irradiances differ by more
  than 1 % Voc gets an extra ln(G) regressor. Relative coefficients are the slopes divided
  by the fitted value at the reference temperature.
- Rs (procedure 1), Rs' (procedure 2): curves at one temperature and several irradiances;
  all translated to the highest irradiance with kappa = 0; Rs chosen so that the translated
  Pmax agree, i.e. minimising ``max_j |Pmax_j - median(Pmax)| / median(Pmax)``.
  Procedure 2 first fixes ``a`` so that the translated Voc agree (at I = 0 the Rs terms
  vanish, so translated Voc_j = Voc_j*(1 + a*ln(G*/G_j)) + beta terms; ``a`` comes from
  linear least squares, our choice).
- kappa, kappa': curves at one irradiance and several temperatures; translated to a common
  temperature with the Rs found; kappa chosen so that the translated Pmax agree (same
  objective).

One-dimensional searches: a 25-point grid over the bracket, then bounded Brent around the
best grid point (the objective is a max of absolute values, piecewise smooth).
The Rs found is a translation parameter, not the single-diode series resistance.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Callable, Sequence

import numpy as np
from scipy.optimize import minimize_scalar

from tracer.stc.curve_figures import curve_figures
from tracer.stc.iec60891 import (
    MeasuredCurve,
    Procedure1Coefficients,
    Procedure2Coefficients,
    translate_procedure1,
    translate_procedure2,
)

__all__ = [
    "TemperatureCoefficients",
    "TunedCoefficient",
    "determine_temperature_coefficients",
    "determine_series_resistance_procedure1",
    "determine_kappa_procedure1",
    "determine_irradiance_factor_procedure2",
    "determine_series_resistance_procedure2",
    "determine_kappa_procedure2",
    "determine_procedure1_coefficients",
    "determine_procedure2_coefficients",
]

GRID_POINTS = 25


@dataclass(frozen=True)
class TemperatureCoefficients:
    """alpha and beta (absolute and relative) with the standard uncertainty of each slope."""

    alpha_a_per_k: float
    beta_v_per_k: float
    alpha_rel_per_k: float
    beta_rel_per_k: float
    alpha_uncertainty_a_per_k: float
    beta_uncertainty_v_per_k: float
    isc_at_reference_a: float
    voc_at_reference_v: float
    reference_irradiance_w_m2: float
    reference_temperature_c: float
    curves: int

    def to_dict(self) -> dict:
        return {k: (int(v) if k == "curves" else float(v)) for k, v in asdict(self).items()}


@dataclass(frozen=True)
class TunedCoefficient:
    """A coefficient found by making translated curves agree, and how well they agree."""

    name: str
    value: float
    unit: str
    agreement_rel: float          # max |X_j - median| / median at the optimum
    target_irradiance_w_m2: float
    target_temperature_c: float
    curves: int

    def to_dict(self) -> dict:
        d = asdict(self)
        return {k: (v if isinstance(v, str) else (int(v) if k == "curves" else float(v)))
                for k, v in d.items()}


def _check_curves(curves: Sequence[MeasuredCurve], minimum: int, what: str) -> list[MeasuredCurve]:
    curves = list(curves)
    if len(curves) < minimum:
        raise ValueError(f"{what} needs at least {minimum} curves, got {len(curves)}")
    for c in curves:
        if not isinstance(c, MeasuredCurve):
            raise TypeError("coefficient determination takes MeasuredCurve objects")
    return curves


def _regress(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares coefficients and their standard uncertainties (nan without dof)."""
    coef, residuals, rank, _ = np.linalg.lstsq(x, y, rcond=None)
    if rank < x.shape[1]:
        raise ValueError("the curves do not span the conditions needed for this regression")
    dof = x.shape[0] - x.shape[1]
    if dof > 0:
        resid = y - x @ coef
        s2 = float(resid @ resid) / dof
        cov = s2 * np.linalg.inv(x.T @ x)
        u = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    else:
        u = np.full(x.shape[1], np.nan)
    return coef, u


def determine_temperature_coefficients(curves: Sequence[MeasuredCurve], *,
                                       reference_temperature_c: float = 25.0,
                                       reference_irradiance_w_m2: float = 1000.0
                                       ) -> TemperatureCoefficients:
    """alpha, beta from curves at about one irradiance and two or more temperatures."""
    curves = _check_curves(curves, 2, "determining alpha and beta")
    t = np.array([c.temperature_c for c in curves])
    if np.ptp(t) < 1.0:
        raise ValueError("the curves must span at least 1 K to give temperature coefficients")
    g = np.array([c.irradiance_w_m2 for c in curves])
    figs = [curve_figures(c.voltage_v, c.current_a) for c in curves]
    isc = np.array([f.isc_a for f in figs]) * reference_irradiance_w_m2 / g
    voc = np.array([f.voc_v for f in figs])
    dt = t - reference_temperature_c
    coef_i, u_i = _regress(np.column_stack([np.ones_like(dt), dt]), isc)
    log_g = np.log(g / reference_irradiance_w_m2)
    if np.ptp(g) > 0.01 * np.median(g) and len(curves) >= 4:
        x = np.column_stack([np.ones_like(dt), dt, log_g])
    else:
        x = np.column_stack([np.ones_like(dt), dt])
    coef_v, u_v = _regress(x, voc)
    isc_ref, alpha = float(coef_i[0]), float(coef_i[1])
    voc_ref, beta = float(coef_v[0]), float(coef_v[1])
    return TemperatureCoefficients(
        alpha_a_per_k=alpha, beta_v_per_k=beta,
        alpha_rel_per_k=alpha / isc_ref, beta_rel_per_k=beta / voc_ref,
        alpha_uncertainty_a_per_k=float(u_i[1]), beta_uncertainty_v_per_k=float(u_v[1]),
        isc_at_reference_a=isc_ref, voc_at_reference_v=voc_ref,
        reference_irradiance_w_m2=float(reference_irradiance_w_m2),
        reference_temperature_c=float(reference_temperature_c), curves=len(curves))


def _spread(values: Sequence[float]) -> float:
    values = np.asarray(values, dtype=float)
    med = float(np.median(values))
    if not np.all(np.isfinite(values)) or med == 0.0:
        return float("inf")
    return float(np.max(np.abs(values - med)) / abs(med))


def _tune(objective: Callable[[float], float], lo: float, hi: float) -> tuple[float, float]:
    grid = np.linspace(lo, hi, GRID_POINTS)
    values = np.array([objective(x) for x in grid])
    if not np.any(np.isfinite(values)):
        raise ValueError("translated curves gave no usable Pmax anywhere in the search range")
    k = int(np.nanargmin(np.where(np.isfinite(values), values, np.nan)))
    a, b = grid[max(k - 1, 0)], grid[min(k + 1, grid.size - 1)]
    best_x, best_f = float(grid[k]), float(values[k])
    if b > a:
        res = minimize_scalar(objective, bounds=(a, b), method="bounded",
                              options={"xatol": 1e-6 * max(abs(hi - lo), 1e-12)})
        if np.isfinite(res.fun) and res.fun <= best_f:
            best_x, best_f = float(res.x), float(res.fun)
    return best_x, best_f


def _pmax_or_inf(v: np.ndarray, i: np.ndarray) -> float:
    try:
        return curve_figures(v, i).pmax_w
    except (ValueError, np.linalg.LinAlgError):
        return float("nan")


def _characteristic_resistance(curve: MeasuredCurve) -> float:
    f = curve_figures(curve.voltage_v, curve.current_a)
    return f.voc_v / f.isc_a


def determine_series_resistance_procedure1(
        curves: Sequence[MeasuredCurve], *, alpha_a_per_k: float = 0.0,
        beta_v_per_k: float = 0.0, max_resistance_ohm: float | None = None) -> TunedCoefficient:
    """Procedure 1 Rs from curves at one temperature and two or more irradiances."""
    curves = _check_curves(curves, 2, "determining Rs")
    top = max(curves, key=lambda c: c.irradiance_w_m2)
    g2, t2 = top.irradiance_w_m2, float(np.mean([c.temperature_c for c in curves]))
    isc = [curve_figures(c.voltage_v, c.current_a).isc_a for c in curves]
    hi = max_resistance_ohm if max_resistance_ohm is not None else 0.5 * _characteristic_resistance(top)

    def objective(rs: float) -> float:
        coeffs = Procedure1Coefficients(alpha_a_per_k, beta_v_per_k, rs, 0.0)
        p = [_pmax_or_inf(*translate_procedure1(c.voltage_v, c.current_a,
                                                irradiance_w_m2=c.irradiance_w_m2,
                                                temperature_c=c.temperature_c, isc_a=s,
                                                coefficients=coeffs,
                                                target_irradiance_w_m2=g2,
                                                target_temperature_c=t2))
             for c, s in zip(curves, isc)]
        return _spread(p)

    rs, agreement = _tune(objective, 0.0, hi)
    return TunedCoefficient("series_resistance_ohm", rs, "ohm", agreement, g2, t2, len(curves))


def determine_kappa_procedure1(
        curves: Sequence[MeasuredCurve], *, alpha_a_per_k: float, beta_v_per_k: float,
        series_resistance_ohm: float, target_temperature_c: float = 25.0,
        max_kappa_ohm_per_k: float | None = None) -> TunedCoefficient:
    """Procedure 1 kappa from curves at one irradiance and two or more temperatures."""
    curves = _check_curves(curves, 2, "determining kappa")
    t = [c.temperature_c for c in curves]
    if np.ptp(t) < 1.0:
        raise ValueError("kappa needs curves spanning at least 1 K")
    g2 = float(np.median([c.irradiance_w_m2 for c in curves]))
    isc = [curve_figures(c.voltage_v, c.current_a).isc_a for c in curves]
    limit = (max_kappa_ohm_per_k if max_kappa_ohm_per_k is not None
             else 0.5 * _characteristic_resistance(curves[0]) / np.ptp(t))

    def objective(kappa: float) -> float:
        coeffs = Procedure1Coefficients(alpha_a_per_k, beta_v_per_k, series_resistance_ohm, kappa)
        p = [_pmax_or_inf(*translate_procedure1(c.voltage_v, c.current_a,
                                                irradiance_w_m2=c.irradiance_w_m2,
                                                temperature_c=c.temperature_c, isc_a=s,
                                                coefficients=coeffs,
                                                target_irradiance_w_m2=g2,
                                                target_temperature_c=target_temperature_c))
             for c, s in zip(curves, isc)]
        return _spread(p)

    kappa, agreement = _tune(objective, -limit, limit)
    return TunedCoefficient("kappa_ohm_per_k", kappa, "ohm/K", agreement, g2,
                            float(target_temperature_c), len(curves))


def determine_irradiance_factor_procedure2(
        curves: Sequence[MeasuredCurve], *, beta_rel_per_k: float = 0.0) -> TunedCoefficient:
    """Procedure 2 irradiance factor ``a`` so that Voc translated to the highest G agree."""
    curves = _check_curves(curves, 2, "determining the irradiance factor a")
    top = max(curves, key=lambda c: c.irradiance_w_m2)
    g2, t2 = top.irradiance_w_m2, float(np.mean([c.temperature_c for c in curves]))
    voc = np.array([curve_figures(c.voltage_v, c.current_a).voc_v for c in curves])
    log_ratio = np.log(g2 / np.array([c.irradiance_w_m2 for c in curves]))
    if np.ptp(log_ratio) == 0.0:
        raise ValueError("the irradiance factor needs curves at two or more irradiances")
    dt = t2 - np.array([c.temperature_c for c in curves])
    # translated Voc_j = Voc_j*(1 + beta_rel*dT_j) + a*Voc_j*ln(G2/G_j) = common value
    y = voc * (1.0 + beta_rel_per_k * dt)
    x = np.column_stack([np.ones_like(y), -voc * log_ratio])
    coef, _ = _regress(x, y)
    a = float(coef[1])
    translated = y + a * voc * log_ratio
    return TunedCoefficient("irradiance_factor", a, "1", _spread(translated), g2, t2, len(curves))


def determine_series_resistance_procedure2(
        curves: Sequence[MeasuredCurve], *, alpha_rel_per_k: float = 0.0,
        beta_rel_per_k: float = 0.0, irradiance_factor: float,
        max_resistance_ohm: float | None = None) -> TunedCoefficient:
    """Procedure 2 Rs' from curves at one temperature and two or more irradiances."""
    curves = _check_curves(curves, 2, "determining Rs'")
    top = max(curves, key=lambda c: c.irradiance_w_m2)
    g2, t2 = top.irradiance_w_m2, float(np.mean([c.temperature_c for c in curves]))
    voc = [curve_figures(c.voltage_v, c.current_a).voc_v for c in curves]
    hi = max_resistance_ohm if max_resistance_ohm is not None else 0.5 * _characteristic_resistance(top)

    def objective(rs: float) -> float:
        coeffs = Procedure2Coefficients(alpha_rel_per_k, beta_rel_per_k, irradiance_factor, rs, 0.0)
        p = [_pmax_or_inf(*translate_procedure2(c.voltage_v, c.current_a,
                                                irradiance_w_m2=c.irradiance_w_m2,
                                                temperature_c=c.temperature_c, voc_v=s,
                                                coefficients=coeffs,
                                                target_irradiance_w_m2=g2,
                                                target_temperature_c=t2))
             for c, s in zip(curves, voc)]
        return _spread(p)

    rs, agreement = _tune(objective, 0.0, hi)
    return TunedCoefficient("series_resistance_ohm", rs, "ohm", agreement, g2, t2, len(curves))


def determine_kappa_procedure2(
        curves: Sequence[MeasuredCurve], *, alpha_rel_per_k: float, beta_rel_per_k: float,
        irradiance_factor: float, series_resistance_ohm: float,
        target_temperature_c: float = 25.0,
        max_kappa_ohm_per_k: float | None = None) -> TunedCoefficient:
    """Procedure 2 kappa' from curves at one irradiance and two or more temperatures."""
    curves = _check_curves(curves, 2, "determining kappa'")
    t = [c.temperature_c for c in curves]
    if np.ptp(t) < 1.0:
        raise ValueError("kappa' needs curves spanning at least 1 K")
    g2 = float(np.median([c.irradiance_w_m2 for c in curves]))
    voc = [curve_figures(c.voltage_v, c.current_a).voc_v for c in curves]
    limit = (max_kappa_ohm_per_k if max_kappa_ohm_per_k is not None
             else 0.5 * _characteristic_resistance(curves[0]) / np.ptp(t))

    def objective(kappa: float) -> float:
        coeffs = Procedure2Coefficients(alpha_rel_per_k, beta_rel_per_k, irradiance_factor,
                                        series_resistance_ohm, kappa)
        p = [_pmax_or_inf(*translate_procedure2(c.voltage_v, c.current_a,
                                                irradiance_w_m2=c.irradiance_w_m2,
                                                temperature_c=c.temperature_c, voc_v=s,
                                                coefficients=coeffs,
                                                target_irradiance_w_m2=g2,
                                                target_temperature_c=target_temperature_c))
             for c, s in zip(curves, voc)]
        return _spread(p)

    kappa, agreement = _tune(objective, -limit, limit)
    return TunedCoefficient("kappa_ohm_per_k", kappa, "ohm/K", agreement, g2,
                            float(target_temperature_c), len(curves))


def determine_procedure1_coefficients(*, irradiance_series: Sequence[MeasuredCurve],
                                      temperature_series: Sequence[MeasuredCurve],
                                      reference_temperature_c: float = 25.0,
                                      reference_irradiance_w_m2: float = 1000.0
                                      ) -> tuple[Procedure1Coefficients, dict]:
    """All procedure 1 coefficients: alpha, beta and kappa from the temperature series,
    Rs from the irradiance series. Returns the coefficients and a dict of the details."""
    tc = determine_temperature_coefficients(temperature_series,
                                            reference_temperature_c=reference_temperature_c,
                                            reference_irradiance_w_m2=reference_irradiance_w_m2)
    rs = determine_series_resistance_procedure1(irradiance_series, alpha_a_per_k=tc.alpha_a_per_k,
                                                beta_v_per_k=tc.beta_v_per_k)
    kappa = determine_kappa_procedure1(temperature_series, alpha_a_per_k=tc.alpha_a_per_k,
                                       beta_v_per_k=tc.beta_v_per_k,
                                       series_resistance_ohm=rs.value,
                                       target_temperature_c=reference_temperature_c)
    coeffs = Procedure1Coefficients(tc.alpha_a_per_k, tc.beta_v_per_k, rs.value, kappa.value)
    return coeffs, {"temperature": tc.to_dict(), "series_resistance": rs.to_dict(),
                    "kappa": kappa.to_dict()}


def determine_procedure2_coefficients(*, irradiance_series: Sequence[MeasuredCurve],
                                      temperature_series: Sequence[MeasuredCurve],
                                      reference_temperature_c: float = 25.0,
                                      reference_irradiance_w_m2: float = 1000.0
                                      ) -> tuple[Procedure2Coefficients, dict]:
    """All procedure 2 coefficients: alpha_rel, beta_rel and kappa' from the temperature
    series, a then Rs' from the irradiance series."""
    tc = determine_temperature_coefficients(temperature_series,
                                            reference_temperature_c=reference_temperature_c,
                                            reference_irradiance_w_m2=reference_irradiance_w_m2)
    a = determine_irradiance_factor_procedure2(irradiance_series, beta_rel_per_k=tc.beta_rel_per_k)
    rs = determine_series_resistance_procedure2(irradiance_series,
                                                alpha_rel_per_k=tc.alpha_rel_per_k,
                                                beta_rel_per_k=tc.beta_rel_per_k,
                                                irradiance_factor=a.value)
    kappa = determine_kappa_procedure2(temperature_series, alpha_rel_per_k=tc.alpha_rel_per_k,
                                       beta_rel_per_k=tc.beta_rel_per_k,
                                       irradiance_factor=a.value,
                                       series_resistance_ohm=rs.value,
                                       target_temperature_c=reference_temperature_c)
    coeffs = Procedure2Coefficients(tc.alpha_rel_per_k, tc.beta_rel_per_k, a.value, rs.value,
                                    kappa.value)
    return coeffs, {"temperature": tc.to_dict(), "irradiance_factor": a.to_dict(),
                    "series_resistance": rs.to_dict(), "kappa": kappa.to_dict()}
