"""A small bounded Levenberg-Marquardt iteration for the solver-free pre-polish.

``scipy.optimize.least_squares`` costs a fraction of a millisecond per iteration in
bookkeeping, more than the cheap equation residual itself; this loop costs tens of
microseconds for the few (5-7) parameters here. Bounds are kept by projection, with
the variables pinned at a bound (gradient pointing out) left out of each step. It only
brings starting points close: the final answer always comes from ``least_squares`` on
the exact residual.
"""
from __future__ import annotations

import numpy as np

LAMBDA_START = 1e-3
LAMBDA_MIN, LAMBDA_MAX = 1e-12, 1e12


def damping_factor(gain: float) -> float:
    """Change of the damping after an accepted step of gain ratio ``gain`` (actual over
    predicted drop), Nielsen's rule (H. B. Nielsen, "Damping parameter in Marquardt's
    method", IMM-REP-1999-05, DTU): a third where the Gauss-Newton model predicted the
    drop well, up to twice where it predicted it poorly."""
    return max(1.0 / 3.0, 1.0 - (2.0 * gain - 1.0) ** 3)


def _weights_and_cost(r, loss, f_scale):
    if loss == "soft_l1":
        z = (r / f_scale) ** 2
        return 1.0 / np.sqrt(np.sqrt(1.0 + z)), float(2.0 * f_scale**2 * np.sum(np.sqrt(1.0 + z) - 1.0))
    return None, float(r @ r)


def bounded_lm(fun_jac, x0, lb, ub, x_scale, *, loss="linear", f_scale=1.0, max_iter=100,
               ftol=1e-10, xtol=1e-10, max_eval=None, gain_damping=False):
    """Minimise sum(rho(r_k^2)) with r, J = fun_jac(x), lb <= x <= ub.

    Returns the final x. ``loss`` is ``"linear"`` or ``"soft_l1"`` (handled by iterative
    reweighting with the weights sqrt(rho'(z)) of the current point). At most
    ``max_eval`` calls of ``fun_jac`` (default: 2 * max_iter). After an accepted step the
    damping is divided by 3; with ``gain_damping`` it follows the step's gain ratio
    instead (:func:`damping_factor`), which stops Gauss-Newton steps from zigzagging
    along a flat, curved valley.
    """
    max_eval = 2 * max_iter if max_eval is None else max_eval
    evals = 1
    x = np.clip(np.asarray(x0, dtype=float), lb, ub)
    r, jac = fun_jac(x)
    if not np.all(np.isfinite(r)):
        return x
    sw, cost = _weights_and_cost(r, loss, f_scale)
    lam = LAMBDA_START
    for _ in range(max_iter):
        js = jac * x_scale
        rw = r
        if sw is not None:
            js = js * sw[:, None]
            rw = r * sw
        a = js.T @ js
        g = js.T @ rw
        blocked = ((x <= lb) & (g > 0)) | ((x >= ub) & (g < 0))
        free = ~blocked
        if not free.any():
            return x
        af = a[np.ix_(free, free)]
        diag = np.diag(af).copy()
        diag[diag <= 0] = 1.0
        gf = g[free]
        accepted = False
        while lam <= LAMBDA_MAX and evals < max_eval:
            try:
                step = np.linalg.solve(af + lam * np.diag(diag), -gf)
            except np.linalg.LinAlgError:
                lam *= 4.0
                continue
            x_new = x.copy()
            x_new[free] += step * x_scale[free]
            x_new = np.clip(x_new, lb, ub)
            r_new, jac_new = fun_jac(x_new)
            evals += 1
            if np.all(np.isfinite(r_new)):
                sw_new, cost_new = _weights_and_cost(r_new, loss, f_scale)
                if cost_new < cost:
                    accepted = True
                    break
            lam *= 4.0
        if not accepted:
            return x
        s_eff = (x_new - x) / x_scale
        moved = np.max(np.abs(s_eff))
        size = np.max(np.abs(x / x_scale))
        drop = cost - cost_new
        if gain_damping:
            # gain ratio: the drop against the one the Gauss-Newton model predicted
            predicted = -(2.0 * (g @ s_eff) + s_eff @ a @ s_eff)
            factor = damping_factor(drop / predicted) if predicted > 0 else 1.0 / 3.0
        else:
            factor = 1.0 / 3.0
        x, r, jac, sw, cost = x_new, r_new, jac_new, sw_new, cost_new
        lam = min(max(lam * factor, LAMBDA_MIN), LAMBDA_MAX)
        if drop <= ftol * cost or moved <= xtol * (size + xtol):
            break
    return x
