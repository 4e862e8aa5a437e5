"""Vectorised safeguarded Newton iteration on a bracket, for monotone residuals."""
from __future__ import annotations

import numpy as np

#: Default relative tolerance on the unknown (Newton step size).
DEFAULT_RTOL = 1e-12
#: Iteration cap; bisection alone halves the bracket each step, so 200 always suffices
#: for float64 brackets.
DEFAULT_MAX_ITER = 200


def bracketed_newton(residual, lower, upper, start, *, atol, rtol=DEFAULT_RTOL,
                     max_iter=DEFAULT_MAX_ITER):
    """Solve ``f(x) = 0`` element-wise for an *increasing* residual on a bracket.

    Newton steps are taken while they stay strictly inside the current bracket and
    shrink fast enough (the usual ``rtsafe`` safeguard); otherwise the step is a
    bisection. The bracket is tightened after every evaluation from the sign of the
    residual, so the iteration always converges when ``f(lower) <= 0 <= f(upper)``.

    Parameters
    ----------
    residual : callable
        ``residual(x, index) -> (f, dfdx)`` evaluated for the elements ``index``
        (an integer index array into the flattened problem); ``f`` must be
        non-decreasing in ``x``.
    lower, upper : numpy.ndarray
        Flat float arrays bracketing the root (``lower <= upper``).
    start : numpy.ndarray
        Flat float array of starting points (clipped into the bracket).
    atol : numpy.ndarray or float
        Absolute step tolerance per element (same unit as ``x``).
    rtol : float
        Relative step tolerance.
    max_iter : int
        Maximum number of iterations.

    Returns
    -------
    numpy.ndarray
        Flat array of roots. Elements whose bracket is degenerate return ``lower``.

    Raises
    ------
    RuntimeError
        If some element has not converged after ``max_iter`` iterations.
    """
    lo = np.array(lower, dtype=float, copy=True)
    hi = np.array(upper, dtype=float, copy=True)
    x = np.clip(np.asarray(start, dtype=float), lo, hi)
    atol = np.broadcast_to(np.asarray(atol, dtype=float), x.shape)
    step_old = hi - lo
    active = np.flatnonzero(hi > lo)
    for _ in range(max_iter):
        if active.size == 0:
            return x
        xa, loa, hia = x[active], lo[active], hi[active]
        f, df = residual(xa, active)
        # tighten the bracket from the sign of the residual
        pos = f > 0
        neg = f < 0
        hia = np.where(pos, xa, hia)
        loa = np.where(neg, xa, loa)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            step = f / df
            x_new = xa - step
        tol = rtol * np.abs(xa) + atol[active]
        # a Newton step below tolerance ends the iteration even when it is too small to
        # move x by one ulp (it cannot then be strictly inside the bracket)
        small = np.isfinite(step) & (np.abs(step) <= tol)
        usable = (np.isfinite(x_new) & (x_new > loa) & (x_new < hia)
                  & (np.abs(2.0 * f) <= np.abs(step_old[active] * df)))
        mid = 0.5 * (loa + hia)
        x_new = np.where(usable | small, x_new, mid)
        x_new = np.where(f == 0, xa, x_new)
        taken = np.abs(x_new - xa)
        done = (f == 0) | small | ((hia - loa) <= tol)
        x[active] = x_new
        lo[active] = loa
        hi[active] = hia
        step_old[active] = taken
        active = active[~done]
    if active.size:
        raise RuntimeError(
            f"bracketed Newton did not converge for {active.size} element(s) in "
            f"{max_iter} iterations"
        )
    return x
