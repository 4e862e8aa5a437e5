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
    shrink fast enough (the usual ``rtsafe`` safeguard: ``|2 f| <= |previous step * f'|``);
    otherwise the step is a bisection. The bracket is tightened after every evaluation
    from the sign of the residual, so the iteration converges whenever
    ``f(lower) <= 0 <= f(upper)``. An element stops when its Newton step is below
    ``rtol*|x| + atol`` (that step is still applied) or its bracket is narrower than that.

    Parameters
    ----------
    residual : callable
        ``residual(x, index) -> (f, dfdx)`` evaluated for the elements ``index`` of the
        flattened problem (``slice(None)`` while every element is active, else an integer
        index array); ``f`` must be non-decreasing in ``x``.
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
        Flat array of roots. Elements whose bracket is degenerate (``lower >= upper``, or
        NaN) return the clipped start.

    Raises
    ------
    RuntimeError
        If some element has not converged after ``max_iter`` iterations.
    """
    lo = np.array(lower, dtype=float, copy=True)
    hi = np.array(upper, dtype=float, copy=True)
    x = np.clip(np.asarray(start, dtype=float), lo, hi)
    n = x.size
    atol = np.broadcast_to(np.asarray(atol, dtype=float), x.shape)
    step_old = hi - lo
    active = np.flatnonzero(hi > lo)
    for _ in range(max_iter):
        if active.size == 0:
            return x
        sel = slice(None) if active.size == n else active
        xa, loa, hia = x[sel].copy(), lo[sel], hi[sel]
        f, df = residual(xa, sel)
        # tighten the bracket from the sign of the residual
        hia = np.where(f > 0, xa, hia)
        loa = np.where(f < 0, xa, loa)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            step = f / df
        x_new = xa - step
        tol = rtol * np.abs(xa) + atol[sel]
        # a Newton step below tolerance ends the iteration even when it is too small to
        # move x by one ulp (it cannot then be strictly inside the bracket)
        small = np.abs(step) <= tol  # False for NaN
        usable = small | ((x_new > loa) & (x_new < hia)
                          & (np.abs(2.0 * f) <= np.abs(step_old[sel] * df)))
        x_new = np.where(usable, x_new, 0.5 * (loa + hia))
        done = small | ((hia - loa) <= tol)
        x[sel] = x_new
        lo[sel] = loa
        hi[sel] = hia
        step_old[sel] = np.abs(x_new - xa)
        active = np.flatnonzero(~done) if active.size == n else active[~done]
    if active.size:
        raise RuntimeError(
            f"bracketed Newton did not converge for {active.size} element(s) in "
            f"{max_iter} iterations"
        )
    return x
