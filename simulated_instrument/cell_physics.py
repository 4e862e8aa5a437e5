"""The virtual devices under test: double-diode cells and their operating point.

This is the simulator's own physics, written independently of ``tracer.model`` (which uses
the Lambert W function): every current here is found by a bracketed root search on the
implicit double-diode equation, so a fit in the application that recovers these cells checks
two separate codes.

Generator convention inside this module (photocurrent positive).  With the junction voltage
``vd`` as the free variable, every quantity of the circuit is explicit and monotone::

    i_int(vd)  = Iph - I01 (exp(vd/a1) - 1) - I02 (exp(vd/a2) - 1) - vd/Rsh
                 + Ibd exp((Vbd - vd)/s_bd)                    (reverse breakdown)
    v_cell(vd) = vd - i_int(vd) Rs                             (at the cell's contacts)
    i_gen(vd)  = i_int(vd) - (v_cell - s)/R_mem - v_cell/R_short

with ``a = n Ns k T / q``.  ``s`` is the slow internal state of the optional memory branch
(a resistance R_mem in series with a storage element whose voltage ``s`` relaxes towards the
cell voltage with a time constant; it makes forward and reverse sweeps differ) and
``R_short`` a fault short across the device.  ``v_cell`` rises and ``i_gen`` falls strictly
with ``vd``, so any target (a terminal voltage, a current) has exactly one root in ``vd``,
found by a safeguarded Newton iteration on a bracket (:func:`solve_increasing`) for single
points and by vectorised bisection (:func:`current_at_voltage`) for whole curves.

Temperature and irradiance laws (De Soto et al., Solar Energy 80 (2006) 78-88, as used by
pvlib's ``calcparams_desoto``)::

    Iph(G, T) = G/1000 * Iph_ref * (1 + alpha_rel (T - 25 C))
    I01(T)    = I01_ref (T/T_ref)^3 exp(Eg_ref/(k T_ref) - Eg(T)/(k T))
    Eg(T)     = Eg_ref (1 + dEg/dT (T - T_ref))
and for the recombination diode the usual T^(5/2) exp(-Eg/(2kT)) law (textbook, from memory).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace

import numpy as np
from scipy import constants

#: Boltzmann constant over the elementary charge [V/K] (CODATA via scipy.constants).
K_OVER_Q = constants.k / constants.e
T_REF_K = 298.15
G_REF_W_M2 = 1000.0
_EXP_CAP = 700.0
_FLOAT_MAX = 1.7976931348623157e308


@dataclass(frozen=True)
class CellParameters:
    """A device at the reference conditions (1000 W/m2, 25 C); SI units."""

    photocurrent_a: float = 0.038
    saturation_current_1_a: float = 1.5e-12
    ideality_1: float = 1.0
    saturation_current_2_a: float = 5e-9
    ideality_2: float = 2.0
    series_resistance_ohm: float = 0.5
    shunt_resistance_ohm: float = 1500.0
    cells_in_series: int = 1
    area_cm2: float = 1.0
    bandgap_ev: float = 1.121
    bandgap_tempco_per_k: float = -0.0002677
    photocurrent_tempco_per_k: float = 0.0005
    breakdown_voltage_v: float = -15.0
    breakdown_current_a: float = 1e-3
    breakdown_slope_v: float = 0.3
    memory_resistance_ohm: float | None = None
    memory_time_constant_s: float | None = None
    label: str = ""

    @classmethod
    def field_names(cls) -> set[str]:
        return {f.name for f in fields(cls)}

    def with_changes(self, **changes) -> "CellParameters":
        return replace(self, **changes)

    @property
    def has_memory(self) -> bool:
        return bool(self.memory_resistance_ohm) and bool(self.memory_time_constant_s)


@dataclass(frozen=True)
class OperatingCell:
    """Parameters at one irradiance and temperature, ready for the solver."""

    iph: float
    i01: float
    a1: float
    i02: float
    a2: float
    rs: float
    gsh: float
    vbd: float
    ibd: float
    sbd: float
    g_mem: float
    g_short: float


def bandgap_ev(params: CellParameters, temperature_k: float) -> float:
    return params.bandgap_ev * (1.0 + params.bandgap_tempco_per_k * (temperature_k - T_REF_K))


def at_conditions(params: CellParameters, irradiance_w_m2: float, temperature_c: float,
                  short_resistance_ohm: float | None = None) -> OperatingCell:
    """The cell's circuit parameters at irradiance G [W/m2] and cell temperature [C]."""
    t_k = temperature_c + 273.15
    vt = K_OVER_Q * t_k
    eg = bandgap_ev(params, t_k)
    eg_ref = params.bandgap_ev
    ratio = t_k / T_REF_K
    i01 = params.saturation_current_1_a * ratio**3 * math.exp(
        (eg_ref / T_REF_K - eg / t_k) / K_OVER_Q)
    i02 = params.saturation_current_2_a * ratio**2.5 * math.exp(
        (eg_ref / T_REF_K - eg / t_k) / (2.0 * K_OVER_Q))
    iph = max(0.0, irradiance_w_m2 / G_REF_W_M2 * params.photocurrent_a
              * (1.0 + params.photocurrent_tempco_per_k * (temperature_c - 25.0)))
    ns = params.cells_in_series
    g_mem = 1.0 / params.memory_resistance_ohm if params.has_memory else 0.0
    return OperatingCell(
        iph=iph, i01=i01, a1=params.ideality_1 * ns * vt, i02=i02, a2=params.ideality_2 * ns * vt,
        rs=params.series_resistance_ohm, gsh=1.0 / params.shunt_resistance_ohm,
        vbd=params.breakdown_voltage_v, ibd=params.breakdown_current_a,
        sbd=params.breakdown_slope_v, g_mem=g_mem,
        g_short=1.0 / short_resistance_ohm if short_resistance_ohm else 0.0)


# --------------------------------------------------------------------------- scalar circuit


def _exp(x: float) -> float:
    return math.exp(x if x < _EXP_CAP else _EXP_CAP)


def internal_current(c: OperatingCell, vd: float) -> float:
    return (c.iph - c.i01 * (_exp(vd / c.a1) - 1.0) - c.i02 * (_exp(vd / c.a2) - 1.0)
            - vd * c.gsh + c.ibd * _exp((c.vbd - vd) / c.sbd))


def circuit(c: OperatingCell, vd: float, memory_v: float = 0.0) -> tuple[float, float, float, float]:
    """(v_cell, i_gen, dv_cell/dvd, di_gen/dvd) at junction voltage ``vd``."""
    x1, x2, xb = vd / c.a1, vd / c.a2, (c.vbd - vd) / c.sbd
    e1 = c.i01 * _exp(x1)
    e2 = c.i02 * _exp(x2)
    eb = c.ibd * _exp(xb)
    i_int = c.iph - (e1 - c.i01) - (e2 - c.i02) - vd * c.gsh + eb
    # slopes of the capped exponentials: zero where the cap holds them constant, so that the
    # reported slope always belongs to the function evaluated (Newton is never misled)
    di_int = (-(e1 / c.a1 if x1 < _EXP_CAP else 0.0) - (e2 / c.a2 if x2 < _EXP_CAP else 0.0)
              - c.gsh - (eb / c.sbd if xb < _EXP_CAP else 0.0))
    v_cell = vd - i_int * c.rs
    dv_cell = 1.0 - di_int * c.rs
    g_extra = c.g_mem + c.g_short
    i_gen = i_int - (v_cell - memory_v) * c.g_mem - v_cell * c.g_short
    di_gen = di_int - dv_cell * g_extra
    return v_cell, i_gen, dv_cell, di_gen


def cell_point(c: OperatingCell, vd: float, memory_v: float = 0.0) -> tuple[float, float]:
    """(v_cell, i_gen) at junction voltage ``vd``."""
    v_cell, i_gen, _, _ = circuit(c, vd, memory_v)
    return v_cell, i_gen


def solve_increasing(fn, target: float, guess: float, tolerance: float = 1e-15,
                     max_evaluations: int = 5000) -> float:
    """Root of ``fn(x)[0] = target`` for a strictly increasing ``fn`` returning (value, slope).

    Safeguarded Newton that keeps a bracket [lo, hi] (the ``rtsafe`` scheme), built so that
    it ends for any finite root and any finite guess:

    * While the root is bracketed on one side only, a Newton step is taken when it is at most
      half the previous step (Newton closing in); otherwise (Newton creeping along a flat or
      capped stretch, or no usable slope) the step is at least twice the previous one and
      twice the previous expansion, so any root in float64 is reached within about 1,100
      evaluations.  A value that is not finite while stepping outwards counts as past the
      root (the function is increasing and overflows only far out).
    * Once bracketed, a Newton step that would leave the bracket or does not at least halve
      the previous step is replaced by bisection.
    * A Newton step below the tolerance is confirmed by one evaluation just across the
      predicted root.  If the sign does not change there (a wrong slope), the next step
      bisects or expands: convergence is judged by the bracket, never by the step size.

    Ends when the bracket is no wider than ``tolerance * max(1, |x|)`` and returns the end
    with the smaller residual.  A non-finite ``guess`` starts from 0.  Raises ``ValueError``
    for a non-finite target and ``ArithmeticError`` only if ``fn`` does not reach the target
    anywhere in float64 (not increasing, or bounded) or is undefined where it starts.
    """
    if not math.isfinite(target):
        raise ValueError(f"target {target!r} is not finite")
    x = float(guess) if guess is not None and math.isfinite(guess) else 0.0
    lo, hi = -math.inf, math.inf
    f_lo = f_hi = math.inf
    evaluations = 0

    def residual(at: float) -> tuple[float, float]:
        nonlocal evaluations
        evaluations += 1
        value, slope = fn(at)
        return value - target, slope

    f, slope = residual(x)
    if math.isnan(f) and x != 0.0:              # a guess out where the function overflows
        x = 0.0
        f, slope = residual(x)
    if math.isnan(f):
        raise ArithmeticError(f"the function is not defined at {guess!r} nor at 0")

    previous_step = math.inf
    expansion = 0.0
    expand_next = False
    while True:
        if f == 0.0:
            return x
        if f < 0.0:
            lo, f_lo = x, f
        else:
            hi, f_hi = x, f
        closed = lo > -math.inf and hi < math.inf
        if closed and hi - lo <= tolerance * max(1.0, abs(lo), abs(hi)):
            break
        if evaluations >= max_evaluations:
            raise ArithmeticError("root search did not converge within the evaluation budget")
        tol_x = tolerance * max(1.0, abs(x))
        newton = -f / slope if (slope > 0.0 and math.isfinite(slope) and math.isfinite(f)) else math.nan
        if not math.isfinite(newton):
            newton = math.nan
        confirming = False
        if closed:
            candidate = x + newton
            if expand_next or math.isnan(newton):
                candidate = 0.5 * lo + 0.5 * hi
            elif abs(newton) <= 0.5 * tol_x:
                candidate = x + newton + math.copysign(0.5 * tol_x, newton)
                confirming = lo < candidate < hi
                if not confirming:
                    candidate = 0.5 * lo + 0.5 * hi
            elif not lo < candidate < hi or abs(newton) > 0.5 * previous_step:
                candidate = 0.5 * lo + 0.5 * hi
        else:
            direction = 1.0 if f < 0.0 else -1.0
            if expand_next or math.isnan(newton) or abs(newton) > 0.5 * previous_step:
                wanted = 0.0 if math.isnan(newton) else 2.0 * abs(newton)
                step = max(wanted, 2.0 * expansion, 2.0 * previous_step if math.isfinite(previous_step) else 0.0,
                           1e-3 * max(1.0, abs(x)))
                expansion = step
            elif abs(newton) <= 0.5 * tol_x:
                step = abs(newton) + 0.5 * tol_x
                confirming = True
            else:
                step = abs(newton)
            candidate = x + direction * step
            if not math.isfinite(candidate):
                candidate = math.copysign(_FLOAT_MAX, direction)
            if candidate == x:
                raise ArithmeticError(f"the function does not reach {target!r} "
                                      f"(value {f + target!r} at {x!r})")
        expand_next = False
        if candidate == x:
            break
        was_below = f < 0.0
        previous_step = abs(candidate - x)
        x = candidate
        f, slope = residual(x)
        if math.isnan(f):
            if not closed:                      # overflow far out: past the root
                f = math.inf if direction > 0.0 else -math.inf
            else:                               # undefined inside: keep the nearer half
                f = math.inf if x > 0.5 * lo + 0.5 * hi else -math.inf
        if confirming and (f < 0.0) == was_below:
            expand_next = True                  # no sign change: the slope lied
    return lo if abs(f_lo) <= abs(f_hi) else hi


@dataclass(frozen=True)
class CircuitPoint:
    """One operating point of SMU + leads + device (load convention for the current)."""

    terminal_voltage_v: float   # at the SMU output terminals
    cell_voltage_v: float       # at the device contacts (where four-wire sense leads sit)
    load_current_a: float       # into the device's + terminal
    in_compliance: bool
    junction_voltage_v: float = 0.0


def operating_point(cell: OperatingCell | None, *, mode: str, level: float, limit: float,
                    lead_resistance_ohm: float, remote_sense: bool,
                    memory_v: float = 0.0, guess_v: float | None = None) -> CircuitPoint:
    """Solve the SMU (voltage or current source with a compliance clamp) into the device.

    ``lead_resistance_ohm`` is the total of both force leads; with two-wire sensing the SMU
    regulates its own terminals, with four-wire sensing it regulates the device contacts.
    ``cell`` None means an open circuit (no pixel connected).  ``guess_v``: a junction
    voltage to start the root search from (e.g. the previous point's), only a speed-up.
    """
    limit = abs(limit)
    r_lead = lead_resistance_ohm
    if cell is None:
        if mode == "VOLT":
            return CircuitPoint(level, level, 0.0, False)
        if level == 0.0:
            return CircuitPoint(0.0, 0.0, 0.0, False)
        v = math.copysign(limit, level)
        return CircuitPoint(v, v, 0.0, True)

    def load_current(vd: float) -> tuple[float, float]:
        _, i_gen, _, di_gen = circuit(cell, vd, memory_v)
        return -i_gen, -di_gen

    def regulated_voltage(vd: float) -> tuple[float, float]:
        v_cell, i_gen, dv_cell, di_gen = circuit(cell, vd, memory_v)
        if remote_sense:
            return v_cell, dv_cell
        return v_cell - i_gen * r_lead, dv_cell - di_gen * r_lead

    def point(vd: float, clamped: bool) -> CircuitPoint:
        v_cell, i_gen = cell_point(cell, vd, memory_v)
        i_load = -i_gen
        return CircuitPoint(v_cell + i_load * r_lead, v_cell, i_load, clamped, vd)

    if mode == "VOLT":
        start = guess_v if guess_v is not None and abs(guess_v - level) < 0.5 else level
        vd = solve_increasing(regulated_voltage, level, start)
        p = point(vd, False)
        if abs(p.load_current_a) > limit:
            vd = solve_increasing(load_current, math.copysign(limit, p.load_current_a), vd)
            p = point(vd, True)
        return p
    vd = solve_increasing(load_current, level, 0.0 if guess_v is None else guess_v)
    p = point(vd, False)
    v_regulated = p.cell_voltage_v if remote_sense else p.terminal_voltage_v
    if abs(v_regulated) > limit:
        vd = solve_increasing(regulated_voltage, math.copysign(limit, v_regulated), vd)
        p = point(vd, True)
    return p


def open_circuit_voltage(cell: OperatingCell, memory_v: float = 0.0) -> float:
    def load_current(vd: float) -> tuple[float, float]:
        _, i_gen, _, di_gen = circuit(cell, vd, memory_v)
        return -i_gen, -di_gen

    vd = solve_increasing(load_current, 0.0, 0.0)
    return cell_point(cell, vd, memory_v)[0]


# --------------------------------------------------------------------------- vectorised


def current_at_voltage(cell: OperatingCell, voltage_v, memory_v: float = 0.0,
                       iterations: int = 200) -> np.ndarray:
    """Generator-convention current at cell voltages (array), by vectorised bisection on vd.

    Used for whole curves (and by tests); the SMU path uses :func:`operating_point`.
    """
    v = np.atleast_1d(np.asarray(voltage_v, dtype=float))

    def exp(x):
        return np.exp(np.minimum(x, _EXP_CAP))

    def curve(vd):
        i_int = (cell.iph - cell.i01 * (exp(vd / cell.a1) - 1.0) - cell.i02 * (exp(vd / cell.a2) - 1.0)
                 - vd * cell.gsh + cell.ibd * exp((cell.vbd - vd) / cell.sbd))
        v_cell = vd - i_int * cell.rs
        i_gen = i_int - (v_cell - memory_v) * cell.g_mem - v_cell * cell.g_short
        return v_cell, i_gen

    lo = v - 1.0
    hi = v + 1.0
    step = np.full_like(v, 1.0)
    for _ in range(200):
        low_bad = curve(lo)[0] > v
        if not low_bad.any():
            break
        lo = np.where(low_bad, lo - step, lo)
        step = np.where(low_bad, step * 2.0, step)
    step = np.full_like(v, 1.0)
    for _ in range(200):
        high_bad = curve(hi)[0] < v
        if not high_bad.any():
            break
        hi = np.where(high_bad, hi + step, hi)
        step = np.where(high_bad, step * 2.0, step)
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        below = curve(mid)[0] < v
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
        if np.all(hi - lo <= 4 * np.finfo(float).eps * np.maximum(1.0, np.abs(mid))):
            break
    return curve(0.5 * (lo + hi))[1]
