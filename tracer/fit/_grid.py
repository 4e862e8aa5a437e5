"""Reduced (variable-projection) search over the nonlinear diode parameters.

For fixed modified ideality factors a_k = n_k Ns Vt and series resistance Rs, the
implicit diode equation evaluated at the *measured* current,

    I_k = Iph - sum_j I0_j * (exp((V_k + I_k*Rs) / a_j) - 1) - (V_k + I_k*Rs) * G,

is linear in (Iph, I0_1 [, I0_2], G = 1/Rsh). Those are found by a nonnegative linear
least-squares solve for many trials of (a [, a_2], Rs) at once, through batched normal
equations (the nonnegativity by trying the support sets, see :func:`_batched_nnls`).
The grid is searched twice, the second time with every point's equation residual
divided by 1 + Rs*dD/dVd (D the diode-plus-shunt current, dD/dVd from the first pass's
best trial), which turns it into the current residual to first order. A coarse grid
finds the basins; each competitive local minimum is
then refined by a few zoomed grids around it (weights from the current best trial),
which shrink around an interior minimum and move (regrowing up to their first size)
after one on their edge.
For two diodes, trials where a diode carries no current are set aside (they form a
flat floor of single-diode fits) and the customary n1 = 1, n2 = 2 start is always
added. A long curve is screened on SCREEN_POINTS of its points, spread evenly over it;
the score of each refined start is then taken over every point. The refined points
start the polish in :mod:`tracer.fit.extraction`, which works on every point.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

#: Ideality factors searched (per diode), geometric grid.
IDEALITY_RANGE = (0.5, 5.0)
GRID_SIZE_SINGLE = (16, 16)      # (ideality values, series-resistance values)
GRID_SIZE_DOUBLE = (11, 20)
#: Smallest nonzero series resistance on the grid, as a fraction of the largest.
RS_GRID_DYNAMIC_RANGE = 3e-3
#: Zoomed refinement: points per dimension, levels, shrink factor per level.
ZOOM_POINTS = {1: 5, 2: 5}
ZOOM_LEVELS = 2
ZOOM_MAX_STEPS = 8
ZOOM_SHRINK = 3.0
#: A box whose best trial lies on its edge moves there and grows by this factor, never
#: past its first size: a box that had shrunk regains its reach in a step or two instead
#: of creeping along a valley at its smallest size.
ZOOM_GROW = 2.0
#: A diode carrying less than this fraction of the largest current is "absent".
DEGENERATE_FRACTION = 1e-6
#: The customary double-diode idealities, always tried as a start.
STANDARD_IDEALITIES = (1.0, 2.0)
_RIDGE = 1e-13
#: Points the grids work on: a longer curve is screened on this many, spread evenly over
#: it (:func:`screen_subset`); the score that ranks each refined start is computed on
#: every point. The grids only propose starting points, which the polish then takes to
#: the optimum over all points.
SCREEN_POINTS = 200
#: Cap on exponents (see tracer.fit._layout).
EXP_CAP = 300.0


@dataclass(frozen=True)
class LinearSolution:
    """One trial's solution of the reduced problem."""

    photocurrent_a: float
    saturation_currents_a: tuple[float, ...]
    n_ns_vt_v: tuple[float, ...]
    series_resistance_ohm: float
    shunt_conductance_s: float
    score: float  # first-order estimate of the weighted sum of squared current residuals


def _supports(p: int, required: tuple[int, ...], diodes: tuple[int, ...]):
    """Proper subsets of range(p) holding every ``required`` index and a diode."""
    out = []
    for size in range(1, p):
        for support in itertools.combinations(range(p), size):
            if set(required) <= set(support) and set(diodes) & set(support):
                out.append(support)
    return out


def _solve_spd(m: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve a batch of small symmetric positive-definite systems m x = b.

    ``m`` (p, p, B), ``b`` (p, B), the batch last (contiguous), so that every step is one
    pass over B values; returns x (p, B). Gaussian elimination without pivoting (safe
    for SPD matrices), vectorised over the batch: for p <= 5 this is far cheaper than
    one LAPACK call per matrix.
    """
    a = np.array(m, dtype=float)          # copies
    x = np.array(b, dtype=float)
    p = x.shape[0]
    for k in range(p):
        pivot = a[k, k]
        pivot = np.where(pivot > 0, pivot, np.inf)  # a null pivot gives a zero unknown
        for i in range(k + 1, p):
            f = a[i, k] / pivot
            a[i, k:] -= f * a[k, k:]
            x[i] -= f * x[k]
        a[k, k] = pivot
    for k in range(p - 1, -1, -1):
        acc = x[k].copy()
        for j in range(k + 1, p):
            acc -= a[k, j] * x[j]
        x[k] = acc / a[k, k]
    return x


def _quadratic(m: np.ndarray, c: np.ndarray) -> np.ndarray:
    """c.M.c for batch-last ``m`` (p, p, B) and ``c`` (p, B)."""
    p = c.shape[0]
    out = np.zeros(c.shape[1])
    for i in range(p):
        row = m[i, 0] * c[0]
        for j in range(1, p):
            row += m[i, j] * c[j]
        out += c[i] * row
    return out


def _batched_nnls(m: np.ndarray, b: np.ndarray, yy: np.ndarray, supports):
    """Minimise yy - 2 c.b + c.M.c over c >= 0 for a batch of small systems.

    Batch last: ``m`` (p, p, B) symmetric positive semi-definite, ``b`` (p, B), ``yy``
    (B,). Returns (c (p, B), ssr (B,)). The unconstrained solution where it is
    feasible; otherwise each support set in ``supports`` is solved and the best
    feasible one kept. With all proper subsets this is the exact nonnegative solution;
    the reduced problem leaves out supports that drop the photocurrent of a light curve
    or every diode, which describe no I-V curve (such a trial then scores as "no fit").
    """
    p, batch = b.shape
    ridge = _RIDGE * np.einsum("iib->b", m)
    mr = np.array(m)
    for k in range(p):
        mr[k, k] += ridge
    c = _solve_spd(mr, b)
    ssr = yy - 2.0 * np.sum(c * b, axis=0) + _quadratic(m, c)
    todo = np.flatnonzero(~(np.all(c >= 0.0, axis=0) & np.isfinite(ssr)))
    if todo.size == 0:
        return c, ssr
    mt, mrt, bt, yt = m[:, :, todo], mr[:, :, todo], b[:, todo], yy[todo]
    n_t = todo.size
    # every support's sub-system; the supports of one size are solved in one batch
    ssr_s = np.empty((len(supports), n_t))
    c_s = np.zeros((len(supports), p, n_t))
    for size in sorted({len(sp) for sp in supports}):
        rows = [k for k, sp in enumerate(supports) if len(sp) == size]
        idx = np.array([supports[k] for k in rows]).T                        # (k, S)
        n_s = len(rows)
        # (k, k, S*T) and (k, S*T): support-major along the batch axis
        ms = mrt[idx[:, None, :], idx[None, :, :]].reshape(size, size, n_s * n_t)
        mo = mt[idx[:, None, :], idx[None, :, :]].reshape(size, size, n_s * n_t)
        bs = bt[idx].reshape(size, n_s * n_t)
        cs = _solve_spd(ms, bs)                                              # (k, S*T)
        ss = np.tile(yt, n_s) - 2.0 * np.sum(cs * bs, axis=0) + _quadratic(mo, cs)
        feasible = np.all(cs >= 0.0, axis=0) & np.isfinite(ss)
        ssr_s[rows] = np.where(feasible, ss, np.inf).reshape(n_s, n_t)
        cs = cs.reshape(size, n_s, n_t)
        for r, k in enumerate(rows):
            c_s[k, idx[:, r]] = cs[:, r]
    # the best feasible support, the empty one (ssr = yy) first: ties keep the earlier
    candidates = np.concatenate([yt[None], ssr_s], axis=0)
    pick = np.argmin(candidates, axis=0)                                     # (T,)
    columns = np.arange(n_t)
    ssr[todo] = candidates[pick, columns]
    c[:, todo] = np.where(pick > 0, c_s[np.maximum(pick - 1, 0), :, columns].T, 0.0)
    return c, ssr


class _Reduced:
    """The reduced problem of one curve: linear solves for batches of trials."""

    def __init__(self, v, y, weights, n_diodes, dark):
        self.v = v
        self.y = y
        self.base_sw = weights**2
        self.n_diodes = n_diodes
        self.dark = dark
        off = 0 if dark else 1
        self.p = off + n_diodes + 1
        self.supports = _supports(self.p, () if dark else (0,),
                                  tuple(range(off, off + n_diodes)))

    def _finish(self, m, b, yy, log_scale, vd_scale):
        yy = np.broadcast_to(yy, (b.shape[1],))
        coef, ssr = _batched_nnls(m, b, yy, self.supports)
        off = 0 if self.dark else 1
        diodes = coef[off:off + self.n_diodes].T
        return {
            "iph": np.zeros(ssr.size) if self.dark else coef[0],
            "i0": diodes * np.exp(-log_scale),
            "g": coef[-1] / vd_scale,
            "ssr": ssr,
            # each diode's current at the trial's largest |Vd| [A]
            "diode_peak": np.abs(diodes),
        }

    def _assemble(self, batch, see, sed, s1e, be, sdd, s1d, bd, s11, b1):
        """Normal equations of the columns [1], -e_1..-e_m, -vdn from their moments,
        batch last: m (p, p, B), b (p, B)."""
        m_d = self.n_diodes
        off = 0 if self.dark else 1
        m = np.empty((self.p, self.p, batch))
        b = np.empty((self.p, batch))
        m[off:off + m_d, off:off + m_d] = np.moveaxis(see, 0, -1)
        m[off:off + m_d, -1] = sed.T
        m[-1, off:off + m_d] = sed.T
        m[-1, -1] = sdd
        b[off:off + m_d] = -be.T
        b[-1] = -bd
        if not self.dark:
            m[0, 0] = s11
            m[0, 1:1 + m_d] = -s1e.T
            m[1:1 + m_d, 0] = -s1e.T
            m[0, -1] = -s1d
            m[-1, 0] = -s1d
            b[0] = b1
        return m, b

    def solve(self, a, rs, sw=None):
        """Solve the batch of trials ``a`` (B, m) [V], ``rs`` (B,) [ohm].

        Returns a dict of arrays: ``iph`` (B,), ``i0`` (B, m), ``g`` (B,), ``ssr`` (B,).
        """
        sw = self.base_sw if sw is None else sw
        v, y = self.v, self.y
        vd = v[None, :] + y[None, :] * rs[:, None]                       # (B, N)
        vd_scale = np.max(np.abs(vd), axis=1)
        x = vd[:, None, :] / a[:, :, None]                               # (B, m, N)
        log_scale = np.maximum(x.max(axis=2), 0.0)                       # (B, m)
        e = np.exp(x - log_scale[..., None]) - np.exp(-log_scale)[..., None]
        vdn = vd / vd_scale[:, None]
        ew = e * sw
        swy = sw * y
        vdn_w = vdn * sw
        m, b = self._assemble(
            rs.size, ew @ e.transpose(0, 2, 1), np.einsum("bin,bn->bi", ew, vdn),
            ew.sum(axis=2), e @ swy, np.einsum("bn,bn->b", vdn_w, vdn), vdn_w.sum(axis=1),
            vdn @ swy, sw.sum(), swy.sum())
        return self._finish(m, b, swy @ y, log_scale, vd_scale)

    def solve_tensor(self, a_grid, rs_grid, r_idx, diode_idx, sw_r=None):
        """Solve the trials (a_grid[diode_idx[k]], rs_grid[r_idx]) of a tensor grid, with
        the exponentials and their dot products computed once per (Rs, a) pair.
        ``a_grid`` (A,) is shared by every Rs value; (R, A) gives each Rs value its own
        (trial k then takes a_grid[r_idx[k], diode_idx[.][k]]). ``sw_r`` (R, N) gives
        squared row weights per series resistance."""
        v, y = self.v, self.y
        sw = np.broadcast_to(self.base_sw if sw_r is None else sw_r, (rs_grid.size, v.size))
        vd = v[None, :] + y[None, :] * rs_grid[:, None]                  # (R, N)
        vd_scale = np.max(np.abs(vd), axis=1)
        vdn = vd / vd_scale[:, None]
        a_rows = a_grid[None, :] if a_grid.ndim == 1 else a_grid         # (1 or R, A)
        x = vd[:, None, :] / a_rows[:, :, None]                          # (R, A, N)
        log_scale = np.maximum(x.max(axis=2), 0.0)                       # (R, A)
        e = np.exp(x - log_scale[..., None]) - np.exp(-log_scale)[..., None]
        ew = e * sw[:, None, :]
        swy = sw * y                                                     # (R, N)
        vdn_w = vdn * sw
        see_t = ew @ e.transpose(0, 2, 1)                                # (R, A, A)
        sed_t = (ew @ vdn[:, :, None])[..., 0]                           # (R, A)
        s1e_t = ew.sum(axis=2)
        be_t = (e @ swy[:, :, None])[..., 0]
        sdd_t = np.einsum("rn,rn->r", vdn_w, vdn)
        s1d_t = vdn_w.sum(axis=1)
        bd_t = np.einsum("rn,rn->r", vdn, swy)
        m_d = self.n_diodes
        see = np.empty((r_idx.size, m_d, m_d))
        for i in range(m_d):
            for j in range(m_d):
                see[:, i, j] = see_t[r_idx, diode_idx[i], diode_idx[j]]
        stack = lambda t: np.stack([t[r_idx, d] for d in diode_idx], axis=1)  # noqa: E731
        s11, b1, yy = sw.sum(axis=1), swy.sum(axis=1), swy @ y
        m, b = self._assemble(r_idx.size, see, stack(sed_t), stack(s1e_t), stack(be_t),
                              sdd_t[r_idx], s1d_t[r_idx], bd_t[r_idx], s11[r_idx], b1[r_idx])
        return self._finish(m, b, yy[r_idx], stack(log_scale), vd_scale[r_idx])

    def conductance(self, a, rs, i0, g):
        """dD/dVd [S] at the measured points for one trial (D: diode plus shunt current)."""
        vd = self.v + self.y * rs
        conductance = np.full_like(vd, g)
        for ak, i0k in zip(a, i0):
            conductance += i0k * np.exp(np.minimum(vd / ak, EXP_CAP)) / ak
        return conductance

    def first_order_weights(self, a, rs, i0, g):
        """1 / (1 + Rs*dD/dVd)^2 at the measured points for one trial (squared weights)."""
        return 1.0 / (1.0 + rs * self.conductance(a, rs, i0, g)) ** 2

    def score(self, a, rs, iph, i0, g):
        """First-order estimate of the weighted SSR of the current for one trial."""
        vd = self.v + self.y * rs
        model = iph - vd * g
        for ak, i0k in zip(a, i0):
            model = model - i0k * np.expm1(np.minimum(vd / ak, EXP_CAP))
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
    a = np.stack([a_grid[d] for d in diode_idx], axis=1)
    rs = rs_grid[idx_r]
    sol = red.solve_tensor(a_grid, rs_grid, idx_r, diode_idx)
    # second pass: rows weighted by 1/(1 + Rs*dD/dVd), dD/dVd taken from the best trial
    k = int(np.argmin(sol["ssr"]))
    conductance = red.conductance(a[k], rs[k], sol["i0"][k], sol["g"][k])
    sw_r = red.base_sw / (1.0 + rs_grid[:, None] * conductance[None, :]) ** 2
    sol = red.solve_tensor(a_grid, rs_grid, idx_r, diode_idx, sw_r=sw_r)

    values = np.where(np.isfinite(sol["ssr"]), sol["ssr"], np.inf)
    if not np.isfinite(values).any():
        return a, rs, sol, np.array([], dtype=int), 0.0, np.zeros(rs.size), None
    if n_diodes == 2:
        # trials where one diode carries no current are single-diode trials in disguise;
        # they form a flat floor that would hide the two-diode basins
        degenerate = np.any(sol["diode_peak"] < DEGENERATE_FRACTION * np.max(np.abs(red.y)),
                            axis=1)
        if np.any(~degenerate & np.isfinite(values)):
            values[degenerate] = np.inf
    grid = np.full(shape, np.inf)
    grid[(idx_r, *diode_idx)] = values
    finite = np.isfinite(grid)
    filled = np.where(finite, grid, np.max(grid[finite]) * 10 + 1)
    is_min = (ndimage.minimum_filter(filled, size=3, mode="nearest") >= filled) & finite
    lookup = np.full(shape, -1)
    lookup[(idx_r, *diode_idx)] = np.arange(rs.size)
    minima = lookup[is_min]
    minima = minima[minima >= 0]
    minima = minima[np.argsort(sol["ssr"][minima], kind="stable")]
    standard = None
    if n_diodes == 2:
        # the customary two-diode start, n1 = 1 and n2 = 2 (best Rs on the grid there)
        ia = int(np.argmin(np.abs(np.log(a_grid / (STANDARD_IDEALITIES[0] * ns_vt_v)))))
        ib = int(np.argmin(np.abs(np.log(a_grid / (STANDARD_IDEALITIES[1] * ns_vt_v)))))
        column = lookup[:, ia, ib]
        column = column[column >= 0]
        if column.size:
            standard = int(column[np.argmin(sol["ssr"][column])])

    log_step = np.log(a_grid[1] / a_grid[0])
    rs_step = np.empty(n_r)
    rs_step[0] = rs_grid[1]
    rs_step[1:-1] = 0.5 * (rs_grid[2:] - rs_grid[:-2])
    rs_step[-1] = rs_grid[-1] - rs_grid[-2]
    return a, rs, sol, minima, log_step, rs_step[idx_r], standard


class _Zoom:
    """State of one start's zoomed refinement (see :func:`_refine`)."""

    def __init__(self, red: _Reduced, a0, rs0, log_step, rs_step, start):
        self.a_c, self.rs_c = np.array(a0, dtype=float), float(rs0)
        self.la_step, self.r_step = log_step, rs_step
        self.la_step0, self.r_step0 = log_step, rs_step      # never grown past these
        self.weights = red.first_order_weights(self.a_c, self.rs_c, start["i0"], start["g"])
        self.best = None
        self.shrinks = 0

    def box(self, offsets, m):
        """The a_k values (m*pts, a_k taking k*pts ... k*pts + pts - 1) and Rs values."""
        a_values = np.concatenate([self.a_c[k] * np.exp(offsets * self.la_step)
                                   for k in range(m)])
        return a_values, np.maximum(self.rs_c + offsets * self.r_step, 0.0)


def _refine(red: _Reduced, starts):
    """Zoomed grids around each start of ``starts`` (tuples a0, rs0, log_step, rs_step,
    solution dict); returns the best trial (a, rs, solution dict) of each.

    Each zoom is a small tensor grid (ZOOM_POINTS values of each a_k and of Rs) around
    the current best; the box shrinks around an interior minimum and moves, grown by
    ZOOM_GROW up to its first size, when the minimum lies on its edge. The starts
    advance together: one step of all of them is one batch of trials (each start's rows
    weighted by its own best trial).
    """
    m = red.n_diodes
    pts = ZOOM_POINTS[m]
    offsets = np.linspace(-1.0, 1.0, pts)
    zooms = [_Zoom(red, *start) for start in starts]
    # trial index sets of one start's tensor grid
    mesh = np.meshgrid(*([np.arange(pts)] * (m + 1)), indexing="ij")
    r_one = mesh[0].ravel()
    diode_one = [mesh[k + 1].ravel() + k * pts for k in range(m)]
    n_one = r_one.size
    for _ in range(ZOOM_MAX_STEPS):
        live = [z for z in zooms if z.shrinks < ZOOM_LEVELS]
        if not live:
            break
        boxes = [z.box(offsets, m) for z in live]
        # one Rs row per start and Rs value, each row with its start's a_k values
        a_rows = np.repeat(np.stack([b[0] for b in boxes]), pts, axis=0)
        rs_all = np.concatenate([b[1] for b in boxes])
        sw_r = np.repeat(red.base_sw * np.stack([z.weights for z in live]), pts, axis=0)
        r_idx = np.concatenate([r_one + j * pts for j in range(len(live))])
        diode_idx = [np.tile(d, len(live)) for d in diode_one]
        sol_all = red.solve_tensor(a_rows, rs_all, r_idx, diode_idx, sw_r=sw_r)
        for j, z in enumerate(live):
            a_values, rs_values = boxes[j]
            part = slice(j * n_one, (j + 1) * n_one)
            sol = {key: val[part] for key, val in sol_all.items()}
            ssr = sol["ssr"]
            if m == 2:
                ssr = np.where(a_values[diode_one[0]] <= a_values[diode_one[1]], ssr, np.inf)
            k = int(np.argmin(ssr))
            a_best = np.array([a_values[d[k]] for d in diode_one])
            z.best = (a_best, float(rs_values[r_one[k]]),
                      {key: val[k] for key, val in sol.items()})
            # shrink the box around an interior minimum; move it (same size) otherwise
            on_edge = any(d[k] % pts in (0, pts - 1) for d in diode_one) or (
                r_one[k] in (0, pts - 1) and z.best[1] > 0.0)
            z.a_c, z.rs_c = z.best[0], z.best[1]
            if not on_edge:
                z.la_step /= ZOOM_SHRINK
                z.r_step /= ZOOM_SHRINK
                z.shrinks += 1
            else:
                z.la_step = min(z.la_step * ZOOM_GROW, z.la_step0)
                z.r_step = min(z.r_step * ZOOM_GROW, z.r_step0)
            z.weights = red.first_order_weights(z.a_c, z.rs_c, z.best[2]["i0"],
                                                z.best[2]["g"])
    return [z.best for z in zooms]


def screen_subset(voltage_v: np.ndarray, points: int | None):
    """Indices of ``points`` points spread evenly (by rank in voltage) over the curve,
    or None when the curve has no more points than that.

    Every k-th point in voltage order keeps the sweep's own point density (denser near
    Voc where the sweep was planned so) and both ends of the curve.
    """
    n = voltage_v.size
    if points is None or n <= points:
        return None
    order = np.argsort(voltage_v, kind="stable")
    ranks = np.unique(np.round(np.linspace(0.0, n - 1.0, points)).astype(int))
    return np.sort(order[ranks])


def grid_search(voltage_v, current_a, weights, ns_vt_v, *, n_diodes, dark, rs_max_ohm,
                keep=3, competitive_ratio=10.0):
    """Starting points for the polish, best first (list of :class:`LinearSolution`).

    ``weights`` multiply each point's residual (1 for light curves, 1/|I| for dark
    curves, so that the screen approximates the log-current objective). At most
    ``keep`` coarse-grid local minima are refined, and only those whose coarse score is
    within ``competitive_ratio`` of the best one.
    """
    v = np.asarray(voltage_v, dtype=float)
    y = np.asarray(current_a, dtype=float)
    w = np.asarray(weights, dtype=float)
    full = _Reduced(v, y, w, n_diodes, dark)
    sub = screen_subset(v, SCREEN_POINTS)
    red = full if sub is None else _Reduced(v[sub], y[sub], w[sub], n_diodes, dark)
    a, rs, sol, minima, log_step, rs_step, standard = _coarse_grid(red, ns_vt_v, rs_max_ohm)
    if minima.size == 0:
        return []
    floor = sol["ssr"][minima[0]]
    chosen = [k for k in minima[:keep]
              if k == minima[0] or sol["ssr"][k] <= competitive_ratio * max(floor, 0.0)]
    if standard is not None and standard not in chosen:
        chosen.append(standard)
    out = []
    starts = [(a[k], rs[k], log_step, rs_step[k], {key: val[k] for key, val in sol.items()})
              for k in chosen]
    if ZOOM_LEVELS:
        refined = _refine(red, starts)
    else:
        refined = [(st[0], float(st[1]), st[4]) for st in starts]
    for a_k, rs_k, s in refined:
        score = full.score(a_k, rs_k, s["iph"], s["i0"], s["g"])
        if any(np.allclose(a_k, o.n_ns_vt_v, rtol=1e-3)
               and abs(rs_k - o.series_resistance_ohm) <= 1e-3 * max(rs_k, 1e-12)
               for o in out):
            continue  # two grid minima refined into the same point
        out.append(LinearSolution(float(s["iph"]), tuple(map(float, s["i0"])),
                                  tuple(map(float, a_k)), rs_k, float(s["g"]), score))
    out.sort(key=lambda s: s.score)
    return out

