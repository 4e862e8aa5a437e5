"""Global extraction of single- and double-diode parameters from one I-V curve.

Method
------
1. Reduced search (:mod:`tracer.fit._grid`). For trial values of the nonlinear
   parameters (ideality factors and series resistance) the others (Iph, I0s, 1/Rsh)
   enter the diode equation, evaluated at the measured current, linearly: a
   nonnegative linear least-squares solve gives them for a whole grid of trials at
   once. The grid's competitive local minima are refined by zoomed grids. A curve of
   more than 200 points is screened on 200 of them spread evenly over it; everything
   after the grids works on every point.
2. Linearised rounds. From the best start, the model current is solved exactly once
   per round; around it the current is linearised in the parameters (one Newton step
   of the implicit equation), and that explicit stand-in is minimised by variable
   projection (:mod:`tracer.fit._varpro`). Rounds stop when a round lowers the true sum
   of squares by less than 1e-3 of the residual variance. A runner-up start is taken
   only if its estimated minimum beats the incumbent's true one.
3. Polish. A bounded trust-region least squares (``scipy.optimize.least_squares``)
   over *all* parameters on the true residual: measured current minus the model
   current solved exactly by :mod:`tracer.model` at each measured voltage. Saturation
   currents are fitted as ln I0, the shunt as a conductance G = 1/Rsh >= 0. Dark curves
   (Iph = 0) are fitted on ln|I| instead, so that every decade of current counts.
4. Uncertainty. Covariance s^2 (J^T J)^-1 at the optimum (J the Jacobian of the
   residuals, s^2 = SSR/(N - p)), propagated to the reported parameters.
5. ``model="auto"`` fits both models and keeps the one with the lower Bayesian
   information criterion, BIC = N ln(SSR/N) + k ln N (Schwarz 1978).
"""
from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from tracer.fit import _grid, _varpro
from tracer.fit._checks import as_curve
from tracer.fit._lm import bounded_lm
from tracer.fit._layout import (Layout, current_jacobian, equation_terms, first_order_denominator,
                                model_current)
from tracer.fit.errors import FitError
from tracer.fit.result import DOUBLE_KEYS, SINGLE_KEYS, FitResult
from tracer.model import thermal_voltage

MODELS = ("single", "double", "auto")
LOSSES = ("linear", "soft_l1")
#: Bounds of the ideality factor during the polish (wider than the grid).
IDEALITY_BOUNDS = (0.1, 30.0)
#: ln I0 may go this far below ln(current scale): I0 ~ 1e-174 * Isc is "no diode" even
#: for a trial with a junction voltage of hundreds of a = n*Ns*Vt.
LOG_I0_SPAN = 400.0
#: Linearised-model rounds (one exact solve each), their stopping rules, and the
#: iterations of the cheap inner minimisation per round.
_SURROGATE_ROUNDS = 10
_SURROGATE_XTOL = 1e-10
_INNER_TOL = 1e-10
_INNER_MAX_ITER = 30
#: Final exact polish (scipy.optimize.least_squares) tolerances and budget.
_TOL = 1e-14
#: Stop once a round lowers the sum of squares by less than this fraction of the
#: residual variance s^2 = SSR/(N - p): far below any statistical meaning (a change of
#: 1e-6 in chi-square), and on noise-free data still a relative 1e-6/(N - p) per step.
_STAT_FTOL = 1e-6
#: The linearised rounds stop earlier, once a round lowers the sum of squares by less than
#: 1e-3 of the residual variance (parameters then within a few hundredths of their
#: standard uncertainties of the optimum); the exact polish, to _STAT_FTOL, follows. A
#: last round that confirms what the polish confirms anyway is saved.
_SURROGATE_STAT_FTOL = 1e-3
_MAX_NFEV = {1: 100, 2: 30}
#: Relative size of a singular value of the scaled Jacobian treated as zero.
_SINGULAR_RTOL = 1e-11


@dataclass
class _Problem:
    voltage_v: np.ndarray          # all points
    current_a: np.ndarray
    fit_mask: np.ndarray           # points entering the objective
    ns_vt_v: float                 # Ns * Vt
    dark: bool
    loss: str
    current_scale_a: float
    voltage_scale_v: float
    rs_max_ohm: float

    @property
    def v_fit(self):
        return self.voltage_v[self.fit_mask]

    @property
    def i_fit(self):
        return self.current_a[self.fit_mask]


@dataclass
class _Fit:
    layout: Layout
    theta: np.ndarray
    residual: np.ndarray           # objective residual (current or ln current), fitted points
    ssr: float
    covariance: np.ndarray         # of theta
    model_current_a: np.ndarray | None = None  # at every point, when already solved


def _parameter_count(n_diodes: int, dark: bool) -> int:
    return Layout(n_diodes, dark).size


def _series_resistance_ceiling(v: np.ndarray, i: np.ndarray) -> float:
    """Upper end of the Rs grid [ohm]: -dV/dI among the lowest-current points.

    At high forward bias (near and past Voc under light) -dV/dI = Rs + 1/(dD/dVd), so the
    slope there bounds Rs; a 50 % margin covers noise in the slope.
    """
    if v.size < 2:
        return 1.0
    n = max(5, v.size // 10)
    idx = np.argsort(i, kind="stable")[:n]
    vi, ii = v[idx], i[idx]
    r = np.nan
    if np.ptp(ii) > 0:
        slope = np.polyfit(ii, vi, 1)[0]
        r = -slope
    if not (math.isfinite(r) and r > 0):
        di = np.ptp(i)
        r = np.ptp(v) / di if di > 0 else 1.0
    return 1.5 * r


def _prepare(v, i, *, temperature_k, cells_in_series, dark, loss) -> _Problem:
    vt = thermal_voltage(temperature_k)
    ns_vt = cells_in_series * vt
    current_scale = float(np.max(np.abs(i)))
    if current_scale <= 0.0:
        raise FitError("all currents are zero; nothing to fit")
    if dark:
        # generator convention: forward bias (V > 0) drives a negative current
        fit_mask = (v != 0.0) & (i != 0.0) & (np.sign(i) == -np.sign(v))
        forward = v > 0
        if forward.any() and np.mean(i[forward] > 0) > 0.5:
            raise FitError(
                "dark curve: the current is positive under forward bias; pass it in the "
                "generator convention (negative current for V > 0)"
            )
    else:
        fit_mask = np.ones(v.size, dtype=bool)
        if np.max(i) <= 0.0:
            raise FitError(
                "light curve without positive current: pass it in the generator "
                "convention (Isc > 0), or fit it as a dark curve"
            )
        order = np.argsort(v, kind="stable")
        tenth = max(1, v.size // 10)
        rise = np.mean(i[order[-tenth:]]) - np.mean(i[order[:tenth]])
        if rise > 0.1 * current_scale:  # clearly rising, not a flat noisy stretch
            raise FitError(
                "the current rises with the voltage: the curve looks like the load "
                "convention; pass it in the generator convention (Isc > 0)"
            )
    return _Problem(
        voltage_v=v, current_a=i, fit_mask=fit_mask, ns_vt_v=ns_vt, dark=dark, loss=loss,
        current_scale_a=current_scale, voltage_scale_v=float(np.max(np.abs(v))),
        rs_max_ohm=_series_resistance_ceiling(v[fit_mask], i[fit_mask]),
    )


# --------------------------------------------------------------------------- objective
class _Objective:
    """Residuals and Jacobian for least_squares, sharing one exact solve per theta."""

    def __init__(self, problem: _Problem, layout: Layout):
        self.problem = problem
        self.layout = layout
        self.v = problem.v_fit
        self.i = problem.i_fit
        if problem.dark:
            self.log_abs_i = np.log(np.abs(self.i))
        self.loss = problem.loss
        self.f_scale = 1.0
        self._key = None
        self._model = None

    def cost(self, theta) -> float:
        """Sum of rho(r^2) (the least_squares cost times 2); inf where not finite."""
        try:
            r = self.residual(theta)
        except (ValueError, RuntimeError):
            return math.inf
        if not np.all(np.isfinite(r)):
            return math.inf
        if self.loss == "soft_l1":
            z = (r / self.f_scale) ** 2
            return float(2.0 * self.f_scale**2 * np.sum(np.sqrt(1.0 + z) - 1.0))
        return float(r @ r)

    def model(self, theta):
        key = theta.tobytes()
        if key != self._key:
            self._model = model_current(self.layout, theta, self.v)
            self._key = key
        return self._model

    def residual(self, theta):
        m = self.model(theta)
        if self.problem.dark:
            return np.log(np.maximum(np.abs(m), 1e-300)) - self.log_abs_i
        return m - self.i

    def jacobian(self, theta):
        m = self.model(theta)
        jac = current_jacobian(self.layout, theta, self.v, m)
        if self.problem.dark:
            jac = jac / np.where(m == 0.0, 1e-300, m)[:, None]
        return jac


def _bounds(problem: _Problem, layout: Layout):
    lb = np.zeros(layout.size)
    ub = np.full(layout.size, np.inf)
    log_scale = math.log(problem.current_scale_a)
    for k in layout.log_i0_indices():
        lb[k], ub[k] = log_scale - LOG_I0_SPAN, log_scale + 5.0
    for k in layout.a_indices():
        lb[k], ub[k] = IDEALITY_BOUNDS[0] * problem.ns_vt_v, IDEALITY_BOUNDS[1] * problem.ns_vt_v
    return lb, ub


def _scales(problem: _Problem, layout: Layout, theta0) -> np.ndarray:
    """Characteristic size of each parameter: a change that moves the current by about
    the current scale (used as least_squares' x_scale)."""
    s = np.ones(layout.size)
    if not layout.dark:
        s[0] = problem.current_scale_a
    for k in layout.a_indices():
        s[k] = max(theta0[k], problem.ns_vt_v) * 0.1
    s[layout.rs_index] = problem.voltage_scale_v / problem.current_scale_a
    s[layout.g_index] = problem.current_scale_a / problem.voltage_scale_v
    return s


def _theta_from_solution(problem, layout, sol: _grid.LinearSolution, lb, ub):
    log_i0 = [math.log(x) if x > 0 else -np.inf for x in sol.saturation_currents_a]
    theta = layout.pack(sol.photocurrent_a, log_i0, sol.n_ns_vt_v,
                        sol.series_resistance_ohm, sol.shunt_conductance_s)
    return np.clip(theta, lb, ub)


def _robust_scale(r: np.ndarray) -> float:
    """Normal-consistent median absolute deviation (1.4826 MAD)."""
    mad = float(np.median(np.abs(r - np.median(r))))
    return max(1.4826 * mad, 1e-300)


def _ftol(objective: _Objective, stat_ftol: float = None) -> float:
    """Relative cost-change tolerance equivalent to ``stat_ftol`` (default _STAT_FTOL) of
    the residual variance."""
    dof = max(objective.v.size - objective.layout.size, 1)
    return max((_STAT_FTOL if stat_ftol is None else stat_ftol) / dof, 1e-15)


def _polish(objective: _Objective, theta0, lb, ub, x_scale, loss, f_scale, max_nfev):
    return least_squares(
        objective.residual, theta0, jac=objective.jacobian, bounds=(lb, ub), method="trf",
        x_scale=x_scale, loss=loss, f_scale=f_scale, ftol=_ftol(objective), xtol=_TOL,
        gtol=_TOL, max_nfev=max_nfev,
    )


def _covariance(jac: np.ndarray, residual: np.ndarray, n_params: int, weights=None):
    """s^2 (J^T W J)^-1 via an SVD of the column-scaled Jacobian; inf variance along
    directions the data do not determine."""
    n = residual.size
    w = np.ones(n) if weights is None else weights
    jw = jac * np.sqrt(w)[:, None]
    dof = max(n - n_params, 1)
    s2 = float(np.sum(w * residual**2)) / dof
    col = np.linalg.norm(jw, axis=0)
    col = np.where(col > 0, col, 1.0)
    js = jw / col
    _, sv, vt = np.linalg.svd(js, full_matrices=False)
    small = sv <= _SINGULAR_RTOL * sv[0] if sv.size and sv[0] > 0 else np.ones_like(sv, bool)
    inv_sv2 = np.where(small, 0.0, 1.0 / np.where(small, 1.0, sv) ** 2)
    cov_s = (vt.T * inv_sv2) @ vt
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        # a column of ~1e-170 (a diode of no consequence) has an unbounded variance
        cov = s2 * cov_s / col[:, None] / col[None, :]
    cov = np.where(np.isnan(cov), np.inf, cov)
    if small.any():
        undetermined = np.any(np.abs(vt[small]) > 1e-6, axis=0)
        cov[undetermined, :] = np.inf
        cov[:, undetermined] = np.inf
    return cov


def _sort_diodes(layout: Layout, theta, cov):
    """Label the diodes so that a_1 <= a_2 (the model is symmetric in them)."""
    if layout.n_diodes != 2:
        return theta, cov
    a1, a2 = layout.a_indices()
    if theta[a1] <= theta[a2]:
        return theta, cov
    l1, l2 = layout.log_i0_indices()
    perm = np.arange(layout.size)
    perm[[l1, l2]] = [l2, l1]
    perm[[a1, a2]] = [a2, a1]
    return theta[perm], cov[np.ix_(perm, perm)]


def _projected_step(problem: _Problem, layout: Layout, theta, eval_current, weights, target,
                    lb, ub, x_scale):
    """Minimise |weights * F(theta; V, eval_current) - target| by variable projection
    (linear parameters solved exactly, Levenberg-Marquardt on a_k and Rs)."""
    nonlinear = layout.a_indices() + [layout.rs_index]
    vp = _varpro.ProjectedProblem(problem.v_fit, eval_current, weights, target,
                                  layout.n_diodes, layout.dark)
    alpha, beta = _varpro.minimise(vp, theta[nonlinear], lb[nonlinear], ub[nonlinear],
                                   x_scale[nonlinear], max_iter=_INNER_MAX_ITER,
                                   tol=_INNER_TOL)
    off = layout.offset
    i0 = beta[off:off + layout.n_diodes]
    with np.errstate(divide="ignore"):
        log_i0 = np.log(i0)
    new = layout.pack(0.0 if layout.dark else beta[0], log_i0, alpha[:-1], alpha[-1], beta[-1])
    return np.clip(new, lb, ub)


def _surrogate_polish(problem: _Problem, objective: _Objective, theta0, lb, ub, x_scale, *,
                      rounds: int | None = None):
    """Newton-linearised model current, minimised cheaply, relinearised until it stops.

    At theta_j the model current I_j is solved exactly once; nearby, the model current
    is I(theta) ~ I_j + F(theta; V, I_j) / (1 + Rs_j*dD/dVd_j) (one Newton step of the
    implicit equation from I_j), which is explicit. Its value and gradient equal the
    true ones at theta_j, so a fixed point of this iteration is a stationary point of
    the true objective; each round costs one exact solve instead of one per step.
    A round that raises the true cost is halved back (at most a few times).
    """
    layout = objective.layout
    v, i_meas = objective.v, objective.i
    theta = np.asarray(theta0, dtype=float)
    cost = objective.cost(theta)
    if not math.isfinite(cost):
        return theta
    for _ in range(_SURROGATE_ROUNDS if rounds is None else rounds):
        i_j = objective.model(theta)
        denom = first_order_denominator(layout, theta, v, i_j)
        if problem.dark:
            w = 1.0 / (denom * i_j)
            base = np.log(np.abs(i_j)) - objective.log_abs_i
        else:
            w = 1.0 / denom
            base = i_j - i_meas

        if problem.loss == "linear":
            proposal = _projected_step(problem, layout, theta, i_j, w, w * i_j - base,
                                       lb, ub, x_scale)
        else:
            def fun_jac(t, i_j=i_j, w=w, base=base):
                f, jac, _ = equation_terms(layout, t, v, i_j)
                return base + f * w, jac * w[:, None]

            proposal = bounded_lm(fun_jac, theta, lb, ub, x_scale, loss=problem.loss,
                                  f_scale=objective.f_scale, max_iter=_INNER_MAX_ITER,
                                  ftol=_INNER_TOL, xtol=_INNER_TOL)
        step = proposal - theta
        for _halving in range(4):
            new_cost = objective.cost(theta + step)
            if new_cost <= cost:
                break
            step = 0.5 * step
        else:
            return theta
        if not np.all(np.isfinite(step)):
            return theta
        moved = float(np.max(np.abs(step / x_scale)))
        theta = theta + step
        drop = cost - new_cost
        cost = new_cost
        if moved <= _SURROGATE_XTOL or drop <= _ftol(objective, _SURROGATE_STAT_FTOL) * cost:
            break
    return theta


def _fit_model(problem: _Problem, n_diodes: int) -> _Fit:
    layout = Layout(n_diodes, problem.dark)
    objective = _Objective(problem, layout)
    lb, ub = _bounds(problem, layout)
    v, i = problem.v_fit, problem.i_fit
    weights = 1.0 / np.abs(i) if problem.dark else np.ones_like(i)
    solutions = _grid.grid_search(v, i, weights, problem.ns_vt_v, n_diodes=n_diodes,
                                  dark=problem.dark, rs_max_ohm=problem.rs_max_ohm)
    if not solutions:
        raise FitError("the reduced search found no admissible starting point")
    incumbent = None  # (cost, theta, sum of squares)
    for rank, sol in enumerate(solutions):
        theta = _theta_from_solution(problem, layout, sol, lb, ub)
        x_scale = _scales(problem, layout, theta)
        if rank == 0 and problem.loss == "soft_l1":
            r0 = objective.residual(theta)
            if np.all(np.isfinite(r0)):
                objective.f_scale = _robust_scale(r0)
        if incumbent is not None and not sol.score < incumbent[2]:
            # a runner-up basin whose estimated minimum is no better than the optimum
            # already found: not worth a polish
            continue
        theta = _surrogate_polish(problem, objective, theta, lb, ub, x_scale)
        cost = objective.cost(theta)
        if math.isfinite(cost) and (incumbent is None or cost < incumbent[0]):
            r = objective.residual(theta)
            incumbent = (cost, theta, float(r @ r))
    if incumbent is None:
        raise FitError("no starting point gave a finite model current")

    theta0 = incumbent[1]
    x_scale = _scales(problem, layout, theta0)
    result = _polish(objective, theta0, lb, ub, x_scale, problem.loss, objective.f_scale,
                     _MAX_NFEV[n_diodes])
    if problem.loss == "soft_l1":
        # again with the noise scale of the polished residuals
        objective.f_scale = _robust_scale(result.fun)
        result = _polish(objective, result.x, lb, ub, x_scale, problem.loss,
                         objective.f_scale, _MAX_NFEV[n_diodes])
    theta = result.x.copy()
    r = objective.residual(theta)
    ssr = float(r @ r)
    jac = objective.jacobian(theta)
    weights = None
    if problem.loss == "soft_l1":
        # soft_l1: rho'(z) = 1/sqrt(1 + z), z = (r/C)^2 (iteratively reweighted estimate)
        weights = 1.0 / np.sqrt(1.0 + (r / objective.f_scale) ** 2)
    cov = _covariance(jac, r, layout.size, weights)
    # the exact model current at the optimum, already solved for the residual (every
    # point fitted, diodes not relabelled): kept for the caller
    current = None
    if problem.fit_mask.all():
        current = objective.model(theta)
    sorted_theta, cov = _sort_diodes(layout, theta, cov)
    if sorted_theta is not theta:
        current = None
    return _Fit(layout=layout, theta=sorted_theta, residual=r, ssr=ssr, covariance=cov,
                model_current_a=current)


def _bic(fit: _Fit) -> float:
    n = fit.residual.size
    ssr = max(fit.ssr, 1e-300 * n)
    return n * math.log(ssr / n) + fit.layout.size * math.log(n)


def _report(fit: _Fit, problem: _Problem):
    """Parameters and 1-sigma uncertainties under the public names."""
    layout = fit.layout
    th = fit.theta
    sd = np.sqrt(np.clip(np.diag(fit.covariance), 0.0, np.inf))
    iph, log_i0, a, rs, g = layout.unpack(th)
    i0 = [math.exp(x) for x in log_i0]
    n = [x / problem.ns_vt_v for x in a]
    rsh = math.inf if g <= 0.0 else 1.0 / g
    sd_iph = 0.0 if layout.dark else float(sd[0])
    sd_i0 = [i0[k] * float(sd[j]) for k, j in enumerate(layout.log_i0_indices())]
    sd_n = [float(sd[j]) / problem.ns_vt_v for j in layout.a_indices()]
    sd_rs = float(sd[layout.rs_index])
    sd_g = float(sd[layout.g_index])
    sd_rsh = math.inf if g <= 0.0 else sd_g / (g * g)
    if layout.n_diodes == 1:
        values = (iph, i0[0], n[0], rs, rsh)
        sigmas = (sd_iph, sd_i0[0], sd_n[0], sd_rs, sd_rsh)
        keys = SINGLE_KEYS
    else:
        values = (iph, i0[0], i0[1], n[0], n[1], rs, rsh)
        sigmas = (sd_iph, sd_i0[0], sd_i0[1], sd_n[0], sd_n[1], sd_rs, sd_rsh)
        keys = DOUBLE_KEYS
    return dict(zip(keys, map(float, values))), dict(zip(keys, map(float, sigmas)))


def _notes(fit: _Fit, problem: _Problem) -> tuple[str, ...]:
    """Warnings for the reader: parameters pinned at a search limit, undetermined ones."""
    notes = []
    layout = fit.layout
    for k, j in enumerate(layout.a_indices()):
        n = fit.theta[j] / problem.ns_vt_v
        name = "ideality" if layout.n_diodes == 1 else f"ideality_{k + 1}"
        for limit in IDEALITY_BOUNDS:
            if abs(n / limit - 1.0) < 1e-6:
                notes.append(f"{name} stopped at the search limit {limit:g}: the data do "
                             "not support this diode, or cells_in_series or the "
                             "temperature is wrong")
    sd = np.sqrt(np.clip(np.diag(fit.covariance), 0.0, np.inf))
    if not np.all(np.isfinite(sd)):
        notes.append("some parameters are not determined by these data (infinite "
                     "uncertainty): the curve does not constrain every part of the model")
    return tuple(notes)


def _check_options(model, loss, temperature_k, cells_in_series):
    if model not in MODELS:
        raise FitError(f"model must be one of {', '.join(MODELS)}, got {model!r}")
    if loss not in LOSSES:
        raise FitError(f"loss must be one of {', '.join(LOSSES)}, got {loss!r}")
    try:
        t = float(temperature_k)
    except (TypeError, ValueError):
        raise FitError(f"temperature_k must be a number, got {temperature_k!r}") from None
    if not (math.isfinite(t) and t > 0):
        raise FitError(f"temperature_k must be a finite positive temperature [K], got {t!r}")
    if isinstance(cells_in_series, bool) or int(cells_in_series) != cells_in_series \
            or cells_in_series < 1:
        raise FitError(f"cells_in_series must be an integer >= 1, got {cells_in_series!r}")
    return t, int(cells_in_series)


def fit_curve(voltage_v, current_a, *, model: str = "single", temperature_k: float = 298.15,
              cells_in_series: int = 1, dark: bool = False,
              loss: str = "linear") -> FitResult:
    """Fit a single- or double-diode equivalent circuit to one I-V curve.

    Parameters
    ----------
    voltage_v, current_a : array_like
        The measured points [V], [A]; current in the generator convention (positive at
        short circuit under light; negative under forward bias in the dark).
    model : {"single", "double", "auto"}
        Which circuit; ``"auto"`` fits both and keeps the one with the lower BIC.
    temperature_k : float
        Cell temperature [K], sets the thermal voltage kT/q.
    cells_in_series : int
        Cells in series Ns; the diode exponent uses n*Ns*kT/q.
    dark : bool
        Dark curve: Iph is held at 0 and the fit minimises the residual of ln|I| over
        the points with current of the forward/reverse-bias sign (V = 0 and I = 0
        points are left out).
    loss : {"linear", "soft_l1"}
        ``"soft_l1"`` down-weights outliers (scale: 1.4826 MAD of the residuals).

    Returns
    -------
    FitResult

    Raises
    ------
    FitError
        For NaN or infinite values, fewer points (or distinct voltages) than the
        parameters plus one, a single voltage, or an unknown option.
    """
    started = time.perf_counter()
    temperature_k, cells_in_series = _check_options(model, loss, temperature_k, cells_in_series)
    dark = bool(dark)
    p_single = _parameter_count(1, dark)
    p_double = _parameter_count(2, dark)
    p_needed = p_double if model == "double" else p_single
    what = f"a {'dark ' if dark else ''}{'double' if model == 'double' else 'single'}-diode fit"
    v, i = as_curve(voltage_v, current_a, min_points=p_needed + 1, what=what)
    problem = _prepare(v, i, temperature_k=temperature_k, cells_in_series=cells_in_series,
                       dark=dark, loss=loss)
    n_fit = int(problem.fit_mask.sum())
    if n_fit < p_needed + 1:
        raise FitError(
            f"{what} needs at least {p_needed + 1} points with current of the expected "
            f"sign, got {n_fit}"
        )

    fits: dict[str, _Fit] = {}
    if model in ("single", "auto"):
        fits["single"] = _fit_model(problem, 1)
    if model == "double" or (model == "auto" and n_fit >= p_double + 1):
        fits["double"] = _fit_model(problem, 2)
    criteria = {name: _bic(f) for name, f in fits.items()}

    if model != "auto":
        chosen = model
        reason = f"model {model!r} requested (BIC {criteria[model]:.2f})"
    elif "double" not in fits:
        chosen = "single"
        reason = (f"auto: only {n_fit} points, too few for the double-diode model "
                  f"({p_double} parameters); single-diode kept (BIC {criteria['single']:.2f})")
    else:
        b1, b2 = criteria["single"], criteria["double"]
        chosen = "double" if b2 < b1 else "single"
        why = ("the second diode lowers the residual more than its two extra parameters cost"
               if chosen == "double" else
               "the second diode does not lower the residual enough to pay for its two "
               "extra parameters")
        reason = (f"auto: BIC single {b1:.2f}, double {b2:.2f} "
                  f"(BIC = N ln(SSR/N) + k ln N, N = {n_fit}); chose {chosen}: {why}")

    fit = fits[chosen]
    parameters, uncertainty = _report(fit, problem)
    notes = _notes(fit, problem)
    current_model = fit.model_current_a
    if current_model is None:
        current_model = model_current(fit.layout, fit.theta, v)
    residuals = i - current_model
    rmse = float(np.sqrt(np.mean(residuals**2)))
    rmse_log = float(np.sqrt(np.mean(fit.residual**2))) if dark else None
    result = FitResult(
        model=chosen, parameters=parameters, uncertainty=uncertainty, rmse_a=rmse,
        residuals_a=residuals, figures=None, selection_reason=reason, elapsed_s=0.0,
        temperature_k=temperature_k, cells_in_series=cells_in_series, dark=dark, loss=loss,
        rmse_log=rmse_log, information_criteria=criteria, n_points=int(v.size),
        n_points_fitted=n_fit, notes=notes,
    )
    figures = None if dark else result.to_model().figures()
    elapsed = time.perf_counter() - started
    return dataclasses.replace(result, figures=figures, elapsed_s=elapsed)

