"""Keep-or-re-measure verdict of one sweep, with every reason.

:func:`assess_sweep` runs each check it has evidence for and returns a
:class:`QualityVerdict`: ``"keep"`` when no check failed, ``"re-measure"`` otherwise. Every
failed check is a :class:`Reason` (code, message for a person, measured value, threshold,
unit, source of the threshold); every check run, passed or not, is listed in ``checks``;
checks without evidence are listed in ``skipped`` with why.

Checks and their thresholds (all in :class:`QualityThresholds`):

========================  ==========================================================  =========
code                      fails when                                                  source
========================  ==========================================================  =========
``hysteresis``            |(Pmax_RS - Pmax_FS)/Pmax_RS| > 0.02                        [1]
``light-instability``     (Gmax - Gmin)/(Gmax + Gmin) over the sweep > class limit     [2]
``temperature-off-target`` |mean T - target| > 2 K                                    [3]
``temperature-drift``     max T - min T during the sweep > 1 K                        [4]
``compliance``            the SMU reported compliance at any point                    [5]
``contact-series-resistance`` fitted Rs > 3 x the bench's usual Rs                    [5]
``contact-sense``         |V_2wire - V_4wire| at open circuit > 1 % of Voc            [5]
``shunt``                 Rsh*Isc/Voc < 10                                            [6]
``residual-structure``    DW < 1.0 and runs z < -3.29 and RMSE > 0.2 % of Isc         [7]
``few-points-isc``        < 3 points with |V| <= 0.10 Voc                             [8]
``few-points-voc``        < 3 points with |V - Voc| <= 0.05 Voc                       [8]
``few-points-mpp``        < 5 points in 0.75-1.15 x (Vmp, Imp)                        [8]
``isc-not-reached``       no point at V <= 0 (Isc extrapolated)                       [8]
``voc-not-reached``       no point at I <= 0 (Voc extrapolated)                       [8]
``no-power-quadrant``     a light curve from which no Isc/Voc/Pmax can be read        [8]
``analysis-failed``       the fit or the figures could not be computed at all         —
========================  ==========================================================  =========

[1] common practice: larger than the ~1.5 % Pmax uncertainty quoted by calibration labs
    (Fraunhofer ISE CalLab, from memory), so not measurement scatter.
[2] IEC 60904-9 temporal-instability class the bench claims (limits in
    :data:`tracer.quality.checks.INSTABILITY_CLASS_LIMITS`, from memory as marked there).
[3] IEC 60904-1: direct STC measurement only at 25 +- 2 C (from memory).
[4] IEC 60904-1 temperature accuracy +-1 C (from memory); common practice.
[5] common practice. At open circuit no current flows in the leads, so force and sense
    must read the same voltage; a difference means a sense contact is open or dirty.
[6] from memory: with Green's empirical expression FF = FF0*(1 - (voc+0.7)/voc*FF0/rsh)
    (M. A. Green, Solar Cells, 1982) rsh = 10 costs about 8 % of FF; threshold common practice.
[7] Durbin & Watson (1950/51): d near 2 without autocorrelation, d < 1 a common-practice
    alarm; Wald-Wolfowitz runs test one-sided z < -3.29 (p < 0.0005); the RMSE floor is the
    IEC 60904-1 Ed.2 current accuracy of 0.2 % of Isc (from memory), so a
    structured misfit smaller than the meter's accuracy is not a reason to re-measure.
    Dark curves: the same on residuals relative to |I|, with a 2 % floor (common practice).
[8] ASTM E1036 as in pvlib ``ivtools.utils.astm_e1036``: 3 points for each axis line,
    a 4th-order polynomial (>= 5 points) in the 0.75-1.15 window (window as in
    ``tracer.fit.data_figures``). The axis windows are common practice, both in voltage
    (near Voc the current changes too fast for a current window: a 0.65 V cell crosses
    5 % of Isc within ~1.5 mV).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from tracer.quality.checks import (
    INSTABILITY_CLASS_LIMITS,
    data_figures,
    durbin_watson,
    hysteresis_indices,
    runs_test,
    shunt_from_slope,
    temporal_instability,
)

__all__ = ["QualityThresholds", "SweepEvidence", "Reason", "CheckOutcome", "QualityVerdict",
           "assess_sweep", "KEEP", "REMEASURE"]

KEEP = "keep"
REMEASURE = "re-measure"


def _num(x: Any) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if np.isfinite(x) else None


@dataclass(frozen=True)
class QualityThresholds:
    """Limits of the verdict; see the module docstring for each source."""

    hysteresis_index_max: float = 0.02
    instability_class: str = "A"
    temperature_tolerance_k: float = 2.0
    temperature_drift_max_k: float = 1.0
    series_resistance_factor_max: float = 3.0
    sense_disagreement_max_rel: float = 0.01
    normalised_shunt_min: float = 10.0
    durbin_watson_min: float = 1.0
    runs_z_min: float = -3.29
    residual_rms_floor_rel: float = 0.002
    dark_residual_rms_floor_rel: float = 0.02
    min_points_isc: int = 3
    min_points_voc: int = 3
    min_points_mpp: int = 5
    isc_window_of_voc: float = 0.10
    voc_window_of_voc: float = 0.05
    mpp_window: tuple[float, float] = (0.75, 1.15)

    def __post_init__(self):
        if self.instability_class not in INSTABILITY_CLASS_LIMITS:
            raise ValueError(f"instability class must be one of {', '.join(INSTABILITY_CLASS_LIMITS)}, "
                             f"got {self.instability_class!r}")


@dataclass(frozen=True)
class SweepEvidence:
    """What is known about one sweep. Only ``voltage_v``/``current_a`` are required;
    a check whose evidence is missing is skipped (and listed as skipped).

    Currents in the generator convention. ``paired_*``: the opposite-direction sweep;
    ``direction``: "forward" (toward +V, Isc->Voc) or "reverse".
    """

    voltage_v: np.ndarray
    current_a: np.ndarray
    dark: bool = False
    direction: str | None = None
    figures: Any = None                                   # object with isc_a, voc_v, ... (data)
    series_resistance_ohm: float | None = None            # from the fit
    shunt_resistance_ohm: float | None = None             # from the fit
    residuals_a: np.ndarray | None = None                 # measured - model, in sweep order
    irradiance_readings_w_m2: Sequence[float] | None = None
    temperature_readings_c: Sequence[float] | None = None
    target_temperature_c: float | None = None
    compliance_flags: Sequence[bool] | None = None
    paired_voltage_v: np.ndarray | None = None
    paired_current_a: np.ndarray | None = None
    paired_direction: str | None = None
    usual_series_resistance_ohm: float | None = None
    open_circuit_two_wire_voltage_v: float | None = None
    open_circuit_four_wire_voltage_v: float | None = None
    analysis_errors: Sequence[str] = ()


@dataclass(frozen=True)
class Reason:
    """One failed check."""

    code: str
    message: str
    value: float | None
    threshold: float | None
    unit: str
    source: str

    def to_dict(self) -> dict:
        return {"code": self.code, "message": self.message, "value": _num(self.value),
                "threshold": _num(self.threshold), "unit": self.unit, "source": self.source}


@dataclass(frozen=True)
class CheckOutcome:
    """One check that was run."""

    code: str
    passed: bool
    value: float | None
    threshold: float | None
    unit: str

    def to_dict(self) -> dict:
        return {"code": self.code, "passed": bool(self.passed), "value": _num(self.value),
                "threshold": _num(self.threshold), "unit": self.unit}


@dataclass(frozen=True)
class QualityVerdict:
    verdict: str
    reasons: tuple[Reason, ...]
    checks: tuple[CheckOutcome, ...]
    skipped: dict = field(default_factory=dict)
    details: dict = field(default_factory=dict)

    @property
    def keep(self) -> bool:
        return self.verdict == KEEP

    def codes(self) -> list[str]:
        return [r.code for r in self.reasons]

    def to_dict(self) -> dict:
        return {"verdict": self.verdict, "reasons": [r.to_dict() for r in self.reasons],
                "checks": [c.to_dict() for c in self.checks], "skipped": dict(self.skipped),
                "details": {k: _num(v) if isinstance(v, (int, float, np.floating)) else v
                            for k, v in self.details.items()}}


SRC_HYST = "common practice (above the ~1.5 % Pmax uncertainty of calibration labs)"
SRC_TEMP = "IEC 60904-1: STC directly only at 25 +- 2 C (from memory)"
SRC_DRIFT = "IEC 60904-1 temperature accuracy +-1 C (from memory); common practice"
SRC_COMMON = "common practice"
SRC_SHUNT = "Green's FF-with-shunt expression (from memory): rsh = 10 costs ~8 % FF; common practice"
SRC_RESID = ("Durbin-Watson d < 1 and Wald-Wolfowitz z < -3.29 (common practice), RMSE above "
             "the IEC 60904-1 Ed.2 current accuracy 0.2 % of Isc (from memory)")
SRC_POINTS = ("ASTM E1036 point counts, as in pvlib ivtools.utils.astm_e1036; windows common "
              "practice")


class _Collector:
    def __init__(self):
        self.reasons: list[Reason] = []
        self.checks: list[CheckOutcome] = []
        self.skipped: dict[str, str] = {}
        self.details: dict[str, Any] = {}

    def check(self, code, failed, value, threshold, unit, message, source):
        self.checks.append(CheckOutcome(code, not failed, value, threshold, unit))
        if failed:
            self.reasons.append(Reason(code, message, value, threshold, unit, source))

    def skip(self, code, why):
        self.skipped[code] = why


def _arr(x) -> np.ndarray | None:
    if x is None:
        return None
    a = np.asarray(x, dtype=float).ravel()
    return a


def assess_sweep(evidence: SweepEvidence,
                 thresholds: QualityThresholds = QualityThresholds()) -> QualityVerdict:
    """Run every check the evidence allows; never raises for bad data (a check that cannot
    be computed is listed in ``skipped`` with the reason)."""
    out = _Collector()
    th = thresholds
    v = _arr(evidence.voltage_v)
    i = _arr(evidence.current_a)
    if v is None or i is None or v.size != i.size:
        v = i = np.zeros(0)
    keep = np.isfinite(v) & np.isfinite(i)
    v, i = v[keep], i[keep]

    for message in evidence.analysis_errors:
        out.check("analysis-failed", True, None, None, "", str(message), "—")

    figures = evidence.figures
    if figures is None and not evidence.dark:
        why = f"only {v.size} usable point(s)"
        if v.size >= 5:
            try:
                figures = data_figures(v, i)
            except (ValueError, np.linalg.LinAlgError) as exc:
                why = str(exc)
        if figures is None:
            out.check("no-power-quadrant", True, None, None, "",
                      f"no Isc, Voc or Pmax can be read from the points ({why}): check the "
                      "light, the wiring polarity and the sweep range", SRC_POINTS)
    isc = _num(getattr(figures, "isc_a", None)) if figures is not None else None
    voc = _num(getattr(figures, "voc_v", None)) if figures is not None else None

    _check_hysteresis(evidence, v, i, th, out)
    _check_light(evidence, th, out)
    _check_temperature(evidence, th, out)
    _check_compliance(evidence, out)
    _check_contact(evidence, voc, th, out)
    if evidence.dark:
        for code in ("shunt", "few-points-isc", "few-points-voc", "few-points-mpp"):
            out.skip(code, "dark curve")
    else:
        _check_shunt(evidence, v, i, isc, voc, th, out)
        _check_points(v, i, figures, isc, voc, th, out)
    _check_residuals(evidence, i, isc, th, out)

    verdict = REMEASURE if out.reasons else KEEP
    return QualityVerdict(verdict, tuple(out.reasons), tuple(out.checks), out.skipped,
                          out.details)


def _check_hysteresis(ev, v, i, th, out):
    pv, pi = _arr(ev.paired_voltage_v), _arr(ev.paired_current_a)
    if ev.dark:
        out.skip("hysteresis", "dark curve")
        return
    if pv is None or pi is None or pv.size != pi.size or pv.size < 5:
        out.skip("hysteresis", "no opposite-direction sweep")
        return
    this_dir = (ev.direction or "").lower()
    pair_dir = (ev.paired_direction or "").lower()
    if this_dir == "reverse" or pair_dir == "forward":
        fwd, rev = (pv, pi), (v, i)
    else:
        fwd, rev = (v, i), (pv, pi)
    try:
        hi = hysteresis_indices(fwd[0], fwd[1], rev[0], rev[1])
    except (ValueError, np.linalg.LinAlgError) as exc:
        out.skip("hysteresis", f"indices could not be computed: {exc}")
        return
    out.details["hysteresis_index_pmax"] = hi.pmax
    out.details["hysteresis_index_area"] = hi.area
    kind = "reverse scan better" if hi.pmax > 0 else "forward scan better (inverted)"
    out.check("hysteresis", abs(hi.pmax) > th.hysteresis_index_max, hi.pmax,
              th.hysteresis_index_max, "1",
              f"forward and reverse sweeps disagree: Pmax {hi.pmax_forward_w:.4g} W vs "
              f"{hi.pmax_reverse_w:.4g} W, hysteresis index {100 * hi.pmax:+.2f} % ({kind}); "
              "sweep slower or stabilise the device", SRC_HYST)


def _check_light(ev, th, out):
    if ev.dark:
        out.skip("light-instability", "dark curve")
        return
    g = _arr(ev.irradiance_readings_w_m2)
    if g is None or np.count_nonzero(np.isfinite(g)) < 2:
        out.skip("light-instability", "fewer than two irradiance readings during the sweep")
        return
    try:
        inst = temporal_instability(g)
    except ValueError as exc:
        out.skip("light-instability", str(exc))
        return
    limit, source = INSTABILITY_CLASS_LIMITS[th.instability_class]
    out.details["irradiance_instability"] = inst
    out.check("light-instability", inst > limit, inst, limit, "1",
              f"irradiance varied by {100 * inst:.2f} % during the sweep, beyond the "
              f"{100 * limit:g} % of class {th.instability_class} the bench claims", source)


def _check_temperature(ev, th, out):
    t = _arr(ev.temperature_readings_c)
    if t is None or not np.any(np.isfinite(t)):
        out.skip("temperature-off-target", "no temperature readings")
        out.skip("temperature-drift", "no temperature readings")
        return
    t = t[np.isfinite(t)]
    mean = float(np.mean(t))
    out.details["temperature_mean_c"] = mean
    if ev.target_temperature_c is None:
        out.skip("temperature-off-target", "no target temperature")
    else:
        off = mean - float(ev.target_temperature_c)
        out.check("temperature-off-target", abs(off) > th.temperature_tolerance_k, off,
                  th.temperature_tolerance_k, "K",
                  f"stage at {mean:.2f} C, {off:+.2f} K from the {ev.target_temperature_c:g} C "
                  f"target (tolerance {th.temperature_tolerance_k:g} K)", SRC_TEMP)
    if t.size >= 2:
        drift = float(np.ptp(t))
        out.check("temperature-drift", drift > th.temperature_drift_max_k, drift,
                  th.temperature_drift_max_k, "K",
                  f"stage temperature moved {drift:.2f} K during the sweep", SRC_DRIFT)
    else:
        out.skip("temperature-drift", "a single temperature reading")


def _check_compliance(ev, out):
    if ev.compliance_flags is None:
        out.skip("compliance", "no compliance flags")
        return
    flags = np.asarray(list(ev.compliance_flags), dtype=bool)
    n = int(flags.sum())
    out.check("compliance", n > 0, n, 0, "points",
              f"the SMU was in compliance at {n} point(s): there the curve shows the limit, "
              "not the cell; raise the compliance within the bench limits or narrow the sweep",
              SRC_COMMON)


def _check_contact(ev, voc, th, out):
    rs, usual = _num(ev.series_resistance_ohm), _num(ev.usual_series_resistance_ohm)
    if rs is None or usual is None or usual <= 0.0:
        out.skip("contact-series-resistance", "no fitted Rs or no usual Rs for this bench")
    else:
        ratio = rs / usual
        out.details["series_resistance_ratio"] = ratio
        out.check("contact-series-resistance", ratio > th.series_resistance_factor_max, ratio,
                  th.series_resistance_factor_max, "x usual",
                  f"series resistance {rs:.4g} ohm is {ratio:.1f} x this bench's usual "
                  f"{usual:.4g} ohm: suspect a probe or contact; re-seat and re-measure",
                  SRC_COMMON)
    v2, v4 = _num(ev.open_circuit_two_wire_voltage_v), _num(ev.open_circuit_four_wire_voltage_v)
    if v2 is None or v4 is None:
        out.skip("contact-sense", "no two-wire/four-wire comparison at open circuit")
        return
    scale = abs(voc) if voc else max(abs(v4), abs(v2))
    if scale <= 0.0:
        out.skip("contact-sense", "open-circuit voltage is zero")
        return
    rel = abs(v2 - v4) / scale
    out.check("contact-sense", rel > th.sense_disagreement_max_rel, rel,
              th.sense_disagreement_max_rel, "1",
              f"two-wire and four-wire open-circuit voltages differ by {abs(v2 - v4):.4g} V "
              f"({100 * rel:.2f} % of Voc): a sense lead is not making contact", SRC_COMMON)


def _check_shunt(ev, v, i, isc, voc, th, out):
    if isc is None or voc is None or isc <= 0.0 or voc <= 0.0:
        out.skip("shunt", "no Isc/Voc")
        return
    rsh = _num(ev.shunt_resistance_ohm)
    how = "fit"
    if rsh is None and ev.shunt_resistance_ohm is not None and np.isinf(ev.shunt_resistance_ohm):
        rsh = float("inf")
    if rsh is None:
        try:
            rsh, how = shunt_from_slope(v, i, voc), "slope near Isc"
        except ValueError as exc:
            out.skip("shunt", str(exc))
            return
    normalised = rsh * isc / voc
    out.details["normalised_shunt"] = normalised
    out.check("shunt", normalised < th.normalised_shunt_min, normalised,
              th.normalised_shunt_min, "1",
              f"shunt resistance {rsh:.4g} ohm ({how}) is only {normalised:.3g} x Voc/Isc: a "
              "shunted cell or a probe touching the edge; check the contact, else the cell",
              SRC_SHUNT)


def _check_points(v, i, figures, isc, voc, th, out):
    if v.size == 0:
        out.check("isc-not-reached", True, 0, 1, "points", "the sweep has no usable point", SRC_POINTS)
        return
    if not np.any(v <= 0.0):
        out.check("isc-not-reached", True, float(v.min()), 0.0, "V",
                  f"the sweep starts at {v.min():.4g} V and never reaches short circuit: Isc "
                  "is an extrapolation; start at or below 0 V", SRC_POINTS)
    if not np.any(i <= 0.0):
        out.check("voc-not-reached", True, float(i.min()), 0.0, "A",
                  f"the current never falls to zero (lowest {i.min():.4g} A): Voc is an "
                  "extrapolation; sweep past open circuit", SRC_POINTS)
    if isc is None or voc is None or isc <= 0.0 or voc <= 0.0:
        for code in ("few-points-isc", "few-points-voc", "few-points-mpp"):
            out.skip(code, "no Isc/Voc")
        return
    n_isc = int(np.count_nonzero(np.abs(v) <= th.isc_window_of_voc * voc))
    out.check("few-points-isc", n_isc < th.min_points_isc, n_isc, th.min_points_isc, "points",
              f"only {n_isc} point(s) within {100 * th.isc_window_of_voc:g} % of Voc from short "
              "circuit: Isc is poorly defined; use a finer step near 0 V", SRC_POINTS)
    n_voc = int(np.count_nonzero(np.abs(v - voc) <= th.voc_window_of_voc * voc))
    out.check("few-points-voc", n_voc < th.min_points_voc, n_voc, th.min_points_voc, "points",
              f"only {n_voc} point(s) within {100 * th.voc_window_of_voc:g} % of Voc from open "
              "circuit: Voc is poorly defined; use a finer step near Voc", SRC_POINTS)
    vmp, imp = _num(getattr(figures, "vmp_v", None)), _num(getattr(figures, "imp_a", None))
    if vmp is None or imp is None or vmp <= 0.0 or imp <= 0.0:
        out.skip("few-points-mpp", "no maximum power point")
        return
    lo, hi = th.mpp_window
    n_mpp = int(np.count_nonzero((v >= lo * vmp) & (v <= hi * vmp) & (i >= lo * imp) & (i <= hi * imp)))
    out.check("few-points-mpp", n_mpp < th.min_points_mpp, n_mpp, th.min_points_mpp, "points",
              f"only {n_mpp} point(s) around the maximum power point: Pmax is poorly defined; "
              "use a finer step near the knee", SRC_POINTS)


def _check_residuals(ev, i, isc, th, out):
    e = _arr(ev.residuals_a)
    if e is None or e.size < 10:
        out.skip("residual-structure", "no fit residuals")
        return
    if ev.dark:
        ref = np.abs(np.asarray(ev.current_a, dtype=float).ravel())
        if ref.size != e.size:
            out.skip("residual-structure", "residuals and points differ in number")
            return
        with np.errstate(divide="ignore", invalid="ignore"):
            e = e / ref
        floor = th.dark_residual_rms_floor_rel
        scale = 1.0
    else:
        if isc is None or isc <= 0.0:
            out.skip("residual-structure", "no Isc to scale the residuals")
            return
        floor = th.residual_rms_floor_rel
        scale = isc
    v = _arr(ev.voltage_v)
    if v is not None and v.size == e.size:
        e = e[np.argsort(v, kind="stable")]        # order along the curve
    e = e[np.isfinite(e)]
    if e.size < 10:
        out.skip("residual-structure", "too few finite residuals")
        return
    rms_rel = float(np.sqrt(np.mean(e * e))) / scale
    try:
        dw = durbin_watson(e)
        _, z = runs_test(e)
    except ValueError as exc:
        out.skip("residual-structure", str(exc))
        return
    out.details["durbin_watson"] = dw
    out.details["runs_z"] = z
    out.details["residual_rms_rel"] = rms_rel
    failed = bool(dw < th.durbin_watson_min and z < th.runs_z_min and rms_rel > floor)
    out.check("residual-structure", failed, dw, th.durbin_watson_min, "1",
              f"the fit leaves structure in its residuals (Durbin-Watson {dw:.2f}, runs z "
              f"{z:.1f}, RMS {100 * rms_rel:.2f} % of {'|I|' if ev.dark else 'Isc'}): a kink, "
              "flicker or a device the model cannot describe", SRC_RESID)
