"""Reduced (variable-projection) search over the nonlinear diode parameters.

For fixed modified ideality factors a_k = n_k Ns Vt and series resistance Rs, the
implicit diode equation evaluated at the *measured* current,

    I_k = Iph - sum_j I0_j * (exp((V_k + I_k*Rs) / a_j) - 1) - (V_k + I_k*Rs) * G,

is linear in (Iph, I0_1 [, I0_2], G = 1/Rsh). Those are found by a nonnegative linear
least-squares solve for many trials of (a [, a_2], Rs) at once, through batched normal
equations; the nonnegativity is exact (every support set is tried and the best
feasible one kept). A coarse grid finds the basins; each competitive local minimum is
then refined by a few zoomed grids around it, with each point's equation residual
divided by 1 + Rs*dD/dVd (D the diode-plus-shunt current), which turns it into the
current residual to first order. The refined points start the exact polish.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

#: Ideality factors searched (per diode), geometric grid.
IDEALITY_RANGE = (0.5, 5.0)
GRID_SIZE_SINGLE = (16, 12)      # (ideality values, series-resistance values)
GRID_SIZE_DOUBLE = (14, 12)
#: Smallest nonzero series resistance on the grid, as a fraction of the largest.
RS_GRID_DYNAMIC_RANGE = 1e-3
#: Zoomed refinement: points per dimension, levels, shrink factor per level.
ZOOM_POINTS = {1: 7, 2: 5}
ZOOM_LEVELS = 5
ZOOM_MAX_STEPS = 15
ZOOM_SHRINK = 3.0
_RIDGE = 1e-13


@dataclass(frozen=True)
class LinearSolution:
    """One trial's solution of the reduced problem."""

    photocurrent_a: float
    saturation_currents_a: tuple[float, ...]
    n_ns_vt_v: tuple[float, ...]
    series_resistance_ohm: float
    shunt_conductance_s: float
    score: float  # first-order estimate of the weighted sum of squared current residuals


def _batched_nnls(m: np.ndarray, b: np.ndarray, yy: float):
    """Minimise yy - 2 c.b + c.M.c over c >= 0 for a batch of small systems.

    ``m`` (B, p, p) symmetric positive semi-definite, ``b`` (B, p). Returns
    (c (B, p), ssr (B,)). Exact: the unconstrained solution where it is feasible,
    otherwise every support set is solved and the best feasible one kept.
    """
    batch, p = b.shape
    eye = np.eye(p)
    ridge = _RIDGE * np.trace(m, axis1=1, axis2=2)[:, None, None] * eye
    c = np.linalg.solve(m + ridge, b[..., None])[..., 0]
    ssr = yy - 2.0 * np.einsum("bi,bi->b", c, b) + np.einsum("bi,bij,bj->b", c, m, c)
    todo = np.flatnonzero(~(np.all(c >= 0.0, axis=1) & np.isfinite(ssr)))
    if todo.size == 0:
        return c, ssr
    mt, bt, rt = m[todo], b[todo], ridge[todo]
    best_c = np.zeros((todo.size, p))
    best_ssr = np.full(todo.size, yy)  # empty support
    for size in range(1, p):
        for support in itertools.combinations(range(p), size):
            mask = np.zeros(p, dtype=bool)
            mask[list(support)] = True
            outer = mask[:, None] & mask[None, :]
            ms = np.where(outer, mt + rt, eye)
            bs = np.where(mask, bt, 0.0)
            cs = np.where(mask, np.linalg.solve(ms, bs[..., None])[..., 0], 0.0)
            ss = yy - 2.0 * np.einsum("bi,bi->b", cs, bt) + np.einsum("bi,bij,bj->b", cs, mt, cs)
            ok = np.all(cs[:, mask] >= 0.0, axis=1) & np.isfinite(ss) & (ss < best_ssr)
            best_c[ok] = cs[ok]
            best_ssr[ok] = ss[ok]
    c[todo] = best_c
    ssr[todo] = best_ssr
    return c, ssr


class _Reduced:
    """The reduced problem of one curve: linear solves for batches of trials."""

    def __init__(self, v, y, weights, n_diodes, dark):
        self.v = v
        self.y = y
        self.base_sw = weights**2
        self.n_diodes = n_diodes
        self.dark = dark

    def solve(self, a, rs, sw=None, exp_cols=None):
        """Solve the batch of trials ``a`` (B, m) [V], ``rs`` (B,) [ohm].

        Returns a dict of arrays: ``iph`` (B,), ``i0`` (B, m), ``g`` (B,), ``ssr`` (B,).
        ``exp_cols`` optionally gives the normalised diode columns and their log scales
        (precomputed for a tensor grid).
        """
        sw = self.base_sw if sw is None else sw
        v, y = self.v, self.y
        batch = rs.size
        vd = v[None, :] + y[None, :] * rs[:, None]                       # (B, N)
        vd_scale = np.max(np.abs(vd), axis=1)
        if exp_cols is None:
            x = vd[:, None, :] / a[:, :, None]                           # (B, m, N)
            log_scale = np.maximum(x.max(axis=2), 0.0)                   # (B, m)
            e = np.exp(x - log_scale[..., None]) - np.exp(-log_scale)[..., None]
        else:
            e, log_scale = exp_cols
        vdn = vd / vd_scale[:, None]
        # Normal equations of the columns [1], -e_1..-e_m, -vdn, built from dot products.
        m_d = self.n_diodes
        off = 0 if self.dark else 1
        p = off + m_d + 1
        ew = e * sw
        swy = sw * y
        vdn_w = vdn * sw
        m = np.empty((batch, p, p))
        b = np.empty((batch, p))
        m[:, off:off + m_d, off:off + m_d] = np.einsum("bin,bjn->bij", ew, e)
        m[:, off:off + m_d, -1] = np.einsum("bin,bn->bi", ew, vdn)
        m[:, -1, off:off + m_d] = m[:, off:off + m_d, -1]
        m[:, -1, -1] = np.einsum("bn,bn->b", vdn_w, vdn)
        b[:, off:off + m_d] = -(e @ swy)
        b[:, -1] = -(vdn @ swy)
        if not self.dark:
            m[:, 0, 0] = sw.sum()
            m[:, 0, 1:1 + m_d] = -ew.sum(axis=2)
            m[:, 1:1 + m_d, 0] = m[:, 0, 1:1 + m_d]
            m[:, 0, -1] = -vdn_w.sum(axis=1)
            m[:, -1, 0] = m[:, 0, -1]
            b[:, 0] = swy.sum()
        coef, ssr = _batched_nnls(m, b, float(sw @ (y * y)))
        return {
            "iph": np.zeros(batch) if self.dark else coef[:, 0],
            "i0": coef[:, off:off + self.n_diodes] * np.exp(-log_scale),
            "g": coef[:, -1] / vd_scale,
            "ssr": ssr,
        }

    def first_order_weights(self, a, rs, i0, g):
        """1 / (1 + Rs*dD/dVd)^2 at the measured points for one trial (squared weights)."""
        vd = self.v + self.y * rs
        conductance = np.full_like(vd, g)
        for ak, i0k in zip(a, i0):
            conductance += i0k * np.exp(np.minimum(vd / ak, 700.0)) / ak
        return 1.0 / (1.0 + rs * conductance) ** 2

    def score(self, a, rs, iph, i0, g):
        """First-order estimate of the weighted SSR of the current for one trial."""
        vd = self.v + self.y * rs
        model = iph - vd * g
        for ak, i0k in zip(a, i0):
            model = model - i0k * np.expm1(np.minimum(vd / ak, 700.0))
        w2 = self.first_order_weights(a, rs, i0, g)
        r = self.y - model
        return float(np.sum(self.base_sw * w2 * r * r))


def _coarse_grid(red: _Reduced, ns_vt_v, rs_max_ohm):
    n_diodes = red.n_diodes
    n_ideal, n_rs = GRID_SIZE_SINGLE if n_diodes == 1 else GRID_SIZE_DOUBLE
    a_grid = ns_vt_v * np.geomspace(*IDEALITY_RANGE, n_ideal)
    rs_grid = np.concatenate(
        ([0.0], np.geomspace(RS_GRID_DYNAMIC_RANGE * rs_max_ohm, rs_max_ohm, n_rs - 1)))
    n_r, n_a = rs_grid.size, a_grid.size
    vd = red.v[None, :] + red.y[None, :] * rs_grid[:, None]              # (R, N)
    x = vd[:, None, :] / a_grid[None, :, None]                           # (R, A, N)
    log_scale = np.maximum(x.max(axis=2), 0.0)                           # (R, A)
    e = np.exp(x - log_scale[..., None]) - np.exp(-log_scale)[..., None]
    if n_diodes == 1:
        idx_r, idx_a = (g.ravel() for g in np.meshgrid(np.arange(n_r), np.arange(n_a),
                                                       indexing="ij"))
        diode_idx = [idx_a]
        shape = (n_r, n_a)
    else:
        ia, ib = np.triu_indices(n_a, k=1)
        idx_r = np.repeat(np.arange(n_r), ia.size)
        diode_idx = [np.tile(ia, n_r), np.tile(ib, n_r)]
        shape = (n_r, n_a, n_a)
    e_cols = np.stack([e[idx_r, d] for d in diode_idx], axis=1)          # (B, m, N)
    ls = np.stack([log_scale[idx_r, d] for d in diode_idx], axis=1)      # (B, m)
    a = np.stack([a_grid[d] for d in diode_idx], axis=1)
    rs = rs_grid[idx_r]
    sol = red.solve(a, rs, exp_cols=(e_cols, ls))

    grid = np.full(shape, np.inf)
    grid[(idx_r, *diode_idx)] = sol["ssr"]
    finite = np.isfinite(grid)
    filled = np.where(finite, grid, np.max(grid[finite]) * 10 + 1)
    is_min = (ndimage.minimum_filter(filled, size=3, mode="nearest") >= filled) & finite
    lookup = np.full(shape, -1)
    lookup[(idx_r, *diode_idx)] = np.arange(rs.size)
    minima = lookup[is_min]
    minima = minima[minima >= 0]
    minima = minima[np.argsort(sol["ssr"][minima], kind="stable")]

    log_step = np.log(a_grid[1] / a_grid[0])
    rs_step = np.empty(n_r)
    rs_step[0] = rs_grid[1]
    rs_step[1:-1] = 0.5 * (rs_grid[2:] - rs_grid[:-2])
    rs_step[-1] = rs_grid[-1] - rs_grid[-2]
    return a, rs, sol, minima, log_step, rs_step[idx_r]


def _refine(red: _Reduced, a0, rs0, log_step, rs_step):
    """Zoomed grids around one start; returns the best trial (a, rs, solution dict)."""
    m = red.n_diodes
    pts = ZOOM_POINTS[m]
    offsets = np.linspace(-1.0, 1.0, pts)
    mesh = np.stack([g.ravel() for g in np.meshgrid(*([offsets] * (m + 1)), indexing="ij")],
                    axis=1)                                              # (K, m+1)
    a_c, rs_c = np.array(a0, dtype=float), float(rs0)
    la_step, r_step = log_step, rs_step
    sw = red.base_sw
    best = None
    shrinks = 0
    for _ in range(ZOOM_MAX_STEPS):
        if shrinks >= ZOOM_LEVELS:
            break
        a = a_c[None, :] * np.exp(mesh[:, :m] * la_step)
        rs = np.maximum(rs_c + mesh[:, m] * r_step, 0.0)
        if m == 2:
            keep = a[:, 0] <= a[:, 1]
            a, rs = a[keep], rs[keep]
        sol = red.solve(a, rs, sw=sw)
        k = int(np.argmin(sol["ssr"]))
        best = (a[k].copy(), float(rs[k]), {key: val[k] for key, val in sol.items()})
        # shrink the box around an interior minimum; move it (same size) otherwise
        on_edge = np.any(np.abs(np.log(best[0] / a_c)) >= 0.999 * la_step) or (
            abs(best[1] - rs_c) >= 0.999 * r_step and best[1] > 0.0)
        a_c, rs_c = best[0], best[1]
        if not on_edge:
            la_step /= ZOOM_SHRINK
            r_step /= ZOOM_SHRINK
            shrinks += 1
        sw = red.base_sw * red.first_order_weights(a_c, rs_c, best[2]["i0"], best[2]["g"])
    return best


def grid_search(voltage_v, current_a, weights, ns_vt_v, *, n_diodes, dark, rs_max_ohm,
                keep=3, competitive_ratio=10.0):
    """Starting points for the polish, best first (list of :class:`LinearSolution`).

    ``weights`` multiply each point's residual (1 for light curves, 1/|I| for dark
    curves, so that the screen approximates the log-current objective). At most
    ``keep`` coarse-grid local minima are refined, and only those whose coarse score is
    within ``competitive_ratio`` of the best one.
    """
    red = _Reduced(np.asarray(voltage_v, dtype=float), np.asarray(current_a, dtype=float),
                   np.asarray(weights, dtype=float), n_diodes, dark)
    a, rs, sol, minima, log_step, rs_step = _coarse_grid(red, ns_vt_v, rs_max_ohm)
    floor = sol["ssr"][minima[0]]
    chosen = [k for k in minima[:keep]
              if k == minima[0] or sol["ssr"][k] <= competitive_ratio * max(floor, 0.0)]
    out = []
    for k in chosen:
        a_k, rs_k, s = _refine(red, a[k], rs[k], log_step, rs_step[k])
        score = red.score(a_k, rs_k, s["iph"], s["i0"], s["g"])
        out.append(LinearSolution(float(s["iph"]), tuple(map(float, s["i0"])),
                                  tuple(map(float, a_k)), rs_k, float(s["g"]), score))
    out.sort(key=lambda s: s.score)
    return out
