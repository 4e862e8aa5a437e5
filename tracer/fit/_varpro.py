"""Variable projection for the linearised diode equation.

With the current I_e at which the diode equation is evaluated held fixed (the measured
current, or the model current of the last exact solve), the residual

    r = w * (Iph - sum_k I0_k (exp(Vd/a_k) - 1) - Vd*G) - t,   Vd = V + I_e*Rs,

is linear in beta = (Iph, I0_k, G) and nonlinear only in alpha = (a_k, Rs). Variable
projection (Golub & Pereyra 1973) solves for beta exactly at every alpha (nonnegative
least squares) and iterates on alpha alone, with Kaufman's (1975) Jacobian
J = (I - Q Q^T) dA/dalpha beta, Q an orthonormal basis of the active weighted columns.
Eliminating the linear parameters removes their strong correlations from the
iteration, so a few Levenberg-Marquardt steps on 2-3 unknowns replace many on 5-7.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import nnls

from tracer.fit._lm import bounded_lm

#: Cap on exponents: e**300 ~ 1e130 keeps squares and products finite; any
#: physical diode current has an exponent (ln of its ratio to I0) far below it.
_EXP_CAP = 300.0


#: Largest condition number of the unit-norm columns for which the Gram matrix (whose
#: condition number is its square) is used; above it, QR. Rounding then leaves relative
#: errors below 1e-16 * 1e8 = 1e-8 in the projection, and second-order ones in the sum
#: of squares (the least-squares residual is orthogonal to the columns).
_GRAM_MAX_COND = 1e4


def _gram_inverse(scaled: np.ndarray):
    """Inverse of S^T S for unit-norm columns S, or None if S is too ill-conditioned."""
    gram = scaled.T @ scaled
    try:
        chol = np.linalg.cholesky(gram)
    except np.linalg.LinAlgError:
        return None
    inv_l = np.linalg.inv(chol)
    gram_inv = inv_l.T @ inv_l
    # |G|_F |G^-1|_F bounds the condition number of G = cond(S)^2 from above
    bound = np.sqrt(np.sum(gram * gram) * np.sum(gram_inv * gram_inv))
    if not (np.isfinite(bound) and bound < _GRAM_MAX_COND ** 2):
        return None
    return gram_inv


class ProjectedProblem:
    """Residual of the linearised equation as a function of alpha = (a_1[, a_2], Rs)."""

    def __init__(self, voltage_v, eval_current_a, weights, target, n_diodes, dark):
        self.v = voltage_v
        self.ie = eval_current_a
        self.w = weights
        self.t = target
        self.m = n_diodes
        self.dark = dark
        self.beta = None
        self._alpha_key = None     # the alpha of self.beta

    def _columns(self, alpha):
        """The columns A (N, p) of beta = (Iph, I0_k, G) at ``alpha``, and what their
        derivatives need: Vd and exp(Vd/a_k) per diode."""
        m = self.m
        a, rs = alpha[:m], alpha[m]
        vd = self.v + self.ie * rs
        off = 0 if self.dark else 1
        a_mat = np.empty((vd.size, off + m + 1))
        if off:
            a_mat[:, 0] = 1.0
        exps = []
        for k in range(m):
            x = np.minimum(vd / a[k], _EXP_CAP)
            exps.append(np.exp(x))
            a_mat[:, off + k] = -np.expm1(x)
        a_mat[:, -1] = -vd
        return a_mat, vd, exps

    def solve(self, alpha):
        """(residual, Kaufman Jacobian d residual / d alpha, beta) at ``alpha``."""
        m = self.m
        a = alpha[:m]
        a_mat, vd, exps = self._columns(alpha)
        aw = a_mat * self.w[:, None]
        norms = np.sqrt(np.einsum("ij,ij->j", aw, aw))
        norms = np.where(norms > 0, norms, 1.0)
        scaled = aw / norms
        # Well-conditioned columns (every single-diode fit, most two-diode ones): the
        # least-squares solution from the Gram matrix, kept where it is nonnegative;
        # otherwise (or near-collinear columns) the nonnegative solver and a QR basis
        gram_inv = _gram_inverse(scaled)
        coef = None
        if gram_inv is not None:
            coef = gram_inv @ (scaled.T @ self.t)
            if not np.all(coef > 0.0):
                coef = None
        if coef is None:
            coef, _ = nnls(scaled, self.t, maxiter=50 * scaled.shape[1])
            active = coef > 0
        else:
            active = None
        beta = coef / norms
        r = aw @ beta - self.t
        # dA/dalpha beta, column by column: d/da_k touches diode k's column only; d/dRs
        # every diode's column and the shunt's (the photocurrent column is constant)
        off = 0 if self.dark else 1
        jac = np.empty((self.v.size, m + 1))
        d_rs = None
        for k in range(m):
            b_k = beta[off + k]
            if b_k != 0.0:
                jac[:, k] = (exps[k] * vd / (a[k] * a[k])) * b_k * self.w
                term = (-exps[k] * self.ie / a[k]) * b_k
                d_rs = term if d_rs is None else d_rs + term
            else:
                jac[:, k] = 0.0
        if beta[-1] != 0.0:
            term = -self.ie * beta[-1]
            d_rs = term if d_rs is None else d_rs + term
        jac[:, m] = 0.0 if d_rs is None else d_rs * self.w
        if active is None:      # every column active: project with the Gram inverse
            jac = jac - scaled @ (gram_inv @ (scaled.T @ jac))
        elif active.any():
            q, _ = np.linalg.qr(scaled[:, active])
            jac = jac - q @ (q.T @ jac)
        self.beta = beta
        self._alpha_key = np.asarray(alpha, dtype=float).tobytes()
        return r, jac


def minimise(problem: ProjectedProblem, alpha0, lb, ub, scale, *, max_iter=50, tol=1e-12):
    """Levenberg-Marquardt over alpha; returns (alpha, beta). With two diodes the
    damping follows the gain ratio (the a_k of a two-diode fit lie in flat valleys)."""
    alpha = bounded_lm(lambda x: problem.solve(x)[:2], alpha0, lb, ub, scale,
                       max_iter=max_iter, ftol=tol, xtol=tol, gain_damping=problem.m == 2)
    if problem._alpha_key != np.asarray(alpha, dtype=float).tobytes():
        problem.solve(alpha)       # the last evaluation was a rejected trial step
    return alpha, problem.beta
