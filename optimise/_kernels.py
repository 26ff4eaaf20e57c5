"""Numba kernels of the optimiser: a primal active-set QP solver and its batch drivers.

Everything here works on clean float64 arrays that the public layer (``optimise.rules``)
has validated. Each kernel is a plain Python function wrapped by :func:`numba.njit`
(``cache=True``); the undecorated function is reachable as ``kernel.py_func`` and a test
runs both on the same problems and compares the results.

The quadratic programme solved by :func:`qp_solve` is::

    minimise    1/2 x' H x - c' x
    subject to  lb <= x <= ub                 (per variable, entries may be -inf / +inf)
                lo <= A x <= hi               (M general rows; lo == hi is an equality)

``H`` is symmetric positive semidefinite. The method is a primal active-set method
(Nocedal & Wright 2006, *Numerical Optimization*, 2nd ed., algorithm 16.3; citation from
memory) on a working
set made of variables fixed at a bound and general rows held at one side. Each
equality-constrained subproblem is solved through a Cholesky factor of the free block
``H_FF`` and the Schur complement of the working rows. When ``H_FF`` is numerically
singular (a pivot below ``1e-12`` of the largest diagonal entry) the solver switches to the
proximal-point method (see :func:`qp_solve`), which handles positive semidefinite ``H``
exactly; if that iteration does not settle, the problem has no bounded minimiser along a
zero-curvature direction and is reported as ``SINGULAR``.

Multiplier conventions (stationarity ``H x - c + A' nu - z = 0``):

* ``z[i] > 0`` only at a lower bound, ``z[i] < 0`` only at an upper bound;
* ``nu[k] < 0`` only when row ``k`` sits at ``lo[k]``, ``nu[k] > 0`` only at ``hi[k]``.

Status codes: 0 optimal, 1 iteration limit, 2 singular (unbounded along a zero-curvature
direction), 3 the start point is infeasible, 4 target out of reach (target-volatility),
5 no convergence (equal risk contribution).
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

OK = 0
MAXITER = 1
SINGULAR = 2
BAD_START = 3
OUT_OF_REACH = 4
NO_CONVERGENCE = 5

FACTOR_SINGULAR = -1  # internal: H_FF is singular, switch to the proximal-point method
NOT_SETTLED = -2      # internal: the primal-dual active-set phase gave up (see _pdas)

_PIVOT_TOL = 1e-12   # relative pivot below which H_FF counts as singular
_PROX = 1e-7         # proximal weight delta, relative to the largest diagonal entry of H
_PROX_MAXOUTER = 5000
_PDAS_MAXIT = 8      # subproblems the primal-dual phase may take before the primal method
_PROX_PDAS_MAXIT = 30  # the same in each proximal-point step (see qp_solve)


# ----------------------------------------------------------------------------------------
# small dense linear algebra on index subsets
# ----------------------------------------------------------------------------------------
def _chol_subset(H, idx, nf, L, ridge, piv_tol):
    """Cholesky factor of H[idx[:nf]][:, idx[:nf]] + ridge*I into L[:nf, :nf].

    Returns False when a pivot falls below ``piv_tol`` (numerically singular).
    """
    for a in range(nf):
        ia = idx[a]
        for b in range(a + 1):
            ib = idx[b]
            s = H[ia, ib]
            if a == b:
                s += ridge
            for k in range(b):
                s -= L[a, k] * L[b, k]
            if a == b:
                if s <= piv_tol:
                    return False
                L[a, a] = math.sqrt(s)
            else:
                L[a, b] = s / L[b, b]
    return True


def _chol_solve(L, n, v):
    """Solve (L L') y = v in place on v[:n]."""
    for a in range(n):
        s = v[a]
        for k in range(a):
            s -= L[a, k] * v[k]
        v[a] = s / L[a, a]
    for a in range(n - 1, -1, -1):
        s = v[a]
        for k in range(a + 1, n):
            s -= L[k, a] * v[k]
        v[a] = s / L[a, a]


# ----------------------------------------------------------------------------------------
# the equality-constrained subproblem on the current working set
# ----------------------------------------------------------------------------------------
def _eqp(H, c, A, lo, hi, x, vs, rs, hscale, delta, xk, idx, ridx, L, V, S, LS, u, t, xs, nu,
         r1, r2):
    """Minimiser of the objective with the working set held at equality.

    Writes the free-variable solution into ``xs[:nf]`` (ordered as ``idx``) and the
    working-row multipliers into ``nu`` (zero for rows outside the working set).

    The objective is ``1/2 x'Hx - c'x + delta/2 |x - xk|^2`` (``delta = 0`` except in the
    proximal-point fallback for singular ``H``).

    Returns (nf, nr, code) where code is 0 on success, -1 when ``H_FF`` (plus ``delta``)
    is numerically singular, and ``k + 1`` when working row ``k`` turned out to depend on
    the other working constraints (the caller repairs the working set and calls again).
    """
    n = H.shape[0]
    m = A.shape[0]
    nf = 0
    for i in range(n):
        if vs[i] == 0:
            idx[nf] = i
            nf += 1
    nr = 0
    for k in range(m):
        nu[k] = 0.0
        if rs[k] != 0:
            ridx[nr] = k
            nr += 1
    # right-hand side c_F - H_FB x_B
    for a in range(nf):
        u[a] = c[idx[a]]
        if delta != 0.0:
            u[a] += delta * xk[idx[a]]
    for j in range(n):
        if vs[j] != 0 and x[j] != 0.0:
            xj = x[j]
            for a in range(nf):
                u[a] -= H[j, idx[a]] * xj
    if nf > 0:
        if not _chol_subset(H, idx, nf, L, delta, _PIVOT_TOL * hscale):
            return nf, nr, -1
        _chol_solve(L, nf, u)
    if nr == 0:
        for a in range(nf):
            xs[a] = u[a]
        return nf, nr, 0
    # linear dependence of the working rows on the free variables, in the Euclidean
    # metric: Cholesky of the Gram matrix A_RF A_RF' (pivot / diagonal = squared sine of
    # the angle between a row and the earlier ones)
    for r in range(nr):
        kr = ridx[r]
        for q in range(r + 1):
            kq = ridx[q]
            s = 0.0
            for a in range(nf):
                s += A[kr, idx[a]] * A[kq, idx[a]]
            diag = s
            for k2 in range(q):
                s -= LS[r, k2] * LS[q, k2]
            if r == q:
                if s <= 1e-20 * diag or s <= 1e-300:
                    return nf, nr, kr + 1
                LS[r, r] = math.sqrt(s)
            else:
                LS[r, q] = s / LS[q, q]
    # V = H_FF^-1 A_RF',  S = A_RF V,  t = A_RF u - (b_R - A_RB x_B)
    amax = 0.0
    for r in range(nr):
        k = ridx[r]
        for a in range(nf):
            V[a, r] = A[k, idx[a]]
            if abs(V[a, r]) > amax:
                amax = abs(V[a, r])
        if nf > 0:
            _chol_solve_col(L, nf, V, r)
    for r in range(nr):
        k = ridx[r]
        for q in range(r + 1):
            s = 0.0
            for a in range(nf):
                s += A[k, idx[a]] * V[a, q]
            S[r, q] = s
            S[q, r] = s
        b = lo[k] if rs[k] < 0 else hi[k]
        s = -b
        for j in range(n):
            if vs[j] != 0:
                s += A[k, j] * x[j]
        for a in range(nf):
            s += A[k, idx[a]] * u[a]
        t[r] = s
    # Cholesky of S (positive definite for independent rows; a vanishing pivot here comes
    # from an ill-conditioned H_FF: handled as a singular factor, i.e. by the
    # proximal-point method)
    for r in range(nr):
        for q in range(r + 1):
            s = S[r, q]
            for k2 in range(q):
                s -= LS[r, k2] * LS[q, k2]
            if r == q:
                if s <= 1e-15 * S[r, r] or s <= 1e-300:
                    return nf, nr, -1
                LS[r, r] = math.sqrt(s)
            else:
                LS[r, q] = s / LS[q, q]
    _chol_solve(LS, nr, t)
    for r in range(nr):
        nu[ridx[r]] = t[r]
    for a in range(nf):
        s = u[a]
        for r in range(nr):
            s -= V[a, r] * t[r]
        xs[a] = s
    # iterative refinement: with an ill-conditioned H_FF the Schur-complement solution
    # loses digits by cancellation (x = u - V nu with large u and V nu); up to three
    # sweeps on the KKT residuals restore the working rows to round-off
    for sweep in range(3):
        worst = 0.0
        bmax = 1.0
        for r in range(nr):
            k = ridx[r]
            b = lo[k] if rs[k] < 0 else hi[k]
            s = b
            for j in range(n):
                if vs[j] != 0:
                    s -= A[k, j] * x[j]
            for a in range(nf):
                s -= A[k, idx[a]] * xs[a]
            r2[r] = s
            worst = max(worst, abs(s))
            bmax = max(bmax, abs(b))
        if worst <= 1e-15 * bmax:
            break
        for a in range(nf):
            i = idx[a]
            s = c[i]
            if delta != 0.0:
                s += delta * (xk[i] - xs[a])
            for j in range(n):
                if vs[j] != 0 and x[j] != 0.0:
                    s -= H[j, i] * x[j]
            for b2 in range(nf):
                s -= H[idx[b2], i] * xs[b2]
            for r in range(nr):
                s -= A[ridx[r], i] * nu[ridx[r]]
            r1[a] = s
        if nf > 0:
            _chol_solve(L, nf, r1)
        for r in range(nr):
            k = ridx[r]
            s = -r2[r]
            for a in range(nf):
                s += A[k, idx[a]] * r1[a]
            r2[r] = s
        _chol_solve(LS, nr, r2)
        for r in range(nr):
            nu[ridx[r]] += r2[r]
        for a in range(nf):
            s = r1[a]
            for r in range(nr):
                s -= V[a, r] * r2[r]
            xs[a] += s
    return nf, nr, 0


def _chol_solve_col(L, n, V, col):
    """Solve (L L') y = V[:n, col] in place."""
    for a in range(n):
        s = V[a, col]
        for k in range(a):
            s -= L[a, k] * V[k, col]
        V[a, col] = s / L[a, a]
    for a in range(n - 1, -1, -1):
        s = V[a, col]
        for k in range(a + 1, n):
            s -= L[k, a] * V[k, col]
        V[a, col] = s / L[a, a]


# ----------------------------------------------------------------------------------------
# one QP
# ----------------------------------------------------------------------------------------
def qp_solve(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxiter, work_f, work_i):
    """Solve one QP by the primal active-set method, starting from a feasible ``x``.

    When a free block of ``H`` is numerically singular, the problem is solved by the
    proximal-point method (Rockafellar 1976, *SIAM J. Control Optim.* 14(5), from memory): a sequence
    of strictly convex QPs ``min 1/2 x'Hx - c'x + delta/2 |x - x_k|^2``, each solved by the
    same active-set method warm-started from the last, until ``delta |x_{k+1} - x_k|`` (the
    stationarity error for the original problem) is below the tolerance. Nothing is
    regularised in the answer: the multipliers certify the original problem. When the
    general rows are all equalities, each of those QPs first goes through the primal-dual
    active-set phase (:func:`_pdas`, at most ``_PROX_PDAS_MAXIT`` subproblems), which gives
    the primal method's answer in far fewer steps when it settles.

    Parameters
    ----------
    H : ndarray, shape (N, N)
        Symmetric positive semidefinite Hessian.
    c : ndarray, shape (N,)
        Linear term (the objective is ``1/2 x'Hx - c'x``).
    A : ndarray, shape (M, N)
        General constraint rows; ``lo``, ``hi`` shape (M,) their sides.
    lb, ub : ndarray, shape (N,)
        Variable bounds (may be infinite).
    x : ndarray, shape (N,)
        In: a feasible point. Out: the solution.
    vs : ndarray of int64, shape (N,)
        In: the working set for variables consistent with ``x`` (0 free, -1 at ``lb``,
        +1 at ``ub``). Out: the final working set.
    rs : ndarray of int64, shape (M,)
        Same for rows (0 inactive, -1 at ``lo``, +1 at ``hi``); equality rows are forced in.
    z, nu : ndarray, shapes (N,), (M,)
        Out: bound and row multipliers (conventions in the module docstring).
    maxiter : int
        Iteration limit.
    work_f, work_i : ndarray
        Workspace from :func:`make_work` (float64 and int64).

    Returns
    -------
    status : int
        0 optimal, 1 iteration limit, 2 singular (the proximal-point iteration did not
        settle: no bounded minimiser along a zero-curvature direction).
    iterations : int
    """
    n = H.shape[0]
    xk = np.zeros(n)
    st, it = _qp_core(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxiter, work_f, work_i,
                      0.0, xk)
    if st != FACTOR_SINGULAR:
        return st, it
    hscale, gscale = _scales(H, c)
    delta = _PROX * hscale
    m = A.shape[0]
    equalities = _all_rows_equal(lo, hi)
    work = _unpack(work_f, work_i, n, m)
    vs0 = np.empty(n, dtype=np.int64)
    rs0 = np.empty(m, dtype=np.int64)
    for outer in range(_PROX_MAXOUTER):
        for j in range(n):
            xk[j] = x[j]
        if equalities:
            # bounds and equality rows only: the primal-dual phase first. From a start with
            # every weight free (the usual cold point) the first step's optimum drops
            # dozens of assets, which the primal method drops one per iteration (146
            # iterations, 25 ms for 200 assets and a 120-row sample covariance) and the
            # primal-dual phase several at a time (13 subproblems, 1.7 ms). When it
            # settles, its answer is the primal method's to the bit (same final working
            # set, same subproblem solve; see _pdas); otherwise the primal method runs
            # from the same point.
            for j in range(n):
                vs0[j] = vs[j]
            for k in range(m):
                rs0[k] = rs[k]
                rs[k] = -1
            st, it2 = _pdas(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, _PROX_PDAS_MAXIT,
                            work, delta, xk)
            it += it2
            if st != OK:
                for j in range(n):
                    x[j] = xk[j]
                    vs[j] = vs0[j]
                for k in range(m):
                    rs[k] = rs0[k]
        else:
            st = NOT_SETTLED
        if st != OK:
            st, it2 = _qp_core(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxiter, work_f,
                               work_i, delta, xk)
            it += it2
        if st == FACTOR_SINGULAR:
            return SINGULAR, it
        if st != OK:
            return st, it
        move = 0.0
        for j in range(n):
            move = max(move, abs(x[j] - xk[j]))
        if delta * move <= 1e-12 * gscale:
            # the multipliers of the last subproblem certify the original problem up to
            # the stationarity error delta * move
            return OK, it
    return SINGULAR, it


def _scales(H, c):
    """(hscale, gscale): the largest diagonal entry of ``H`` (1 when none is positive),
    and the larger of it and the largest ``|c_i|``; the solvers' tolerances scale with them."""
    hscale = 0.0
    for i in range(H.shape[0]):
        if H[i, i] > hscale:
            hscale = H[i, i]
    if hscale <= 0.0:
        hscale = 1.0
    gscale = 0.0
    for i in range(c.shape[0]):
        if abs(c[i]) > gscale:
            gscale = abs(c[i])
    return hscale, max(gscale, hscale)


def _gradient(H, c, A, x, nu, ridx, nr, delta, xk, g):
    """``g = H x - c + delta (x - xk) + A_R' nu_R`` over the ``nr`` working rows ``ridx``.

    H is symmetric, so ``H x`` is the sum over the non-zero ``x_j`` of ``x_j H[j, :]``
    (rows are contiguous); long-only solutions are sparse, which makes this O(N nnz)
    rather than O(N^2).
    """
    n = H.shape[0]
    for i in range(n):
        g[i] = -c[i]
        if delta != 0.0:
            g[i] += delta * (x[i] - xk[i])
    for j in range(n):
        xj = x[j]
        if xj != 0.0:
            for i in range(n):
                g[i] += H[j, i] * xj
    for r in range(nr):
        k = ridx[r]
        nk = nu[k]
        for i in range(n):
            g[i] += A[k, i] * nk


def _qp_core(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxiter, work_f, work_i, delta, xk):
    """The active-set iterations for ``1/2 x'Hx - c'x + delta/2 |x - xk|^2``.

    Returns (status, iterations) with status -1 when ``H_FF`` is singular (``delta = 0``).
    """
    n = H.shape[0]
    m = A.shape[0]
    L, V, S, LS, u, t, xs, g, r1, r2, idx, ridx = _unpack(work_f, work_i, n, m)
    hscale, gscale = _scales(H, c)
    dtol = 1e-11 * gscale
    for k in range(m):
        if lo[k] == hi[k]:
            rs[k] = -1
    it = 0
    # anti-cycling: multipliers within round-off of zero can make the method drop and
    # re-add one constraint forever; every (N + M + 5) iterations the dual tolerance
    # grows tenfold, up to 1e-8 of the gradient scale (far inside the KKT check)
    period = n + m + 5
    while it < maxiter:
        it += 1
        if it % period == 0 and dtol < 1e-8 * gscale:
            dtol *= 10.0
        nf, nr, code = _eqp(H, c, A, lo, hi, x, vs, rs, hscale, delta, xk,
                            idx, ridx, L, V, S, LS, u, t, xs, nu, r1, r2)
        if code < 0:
            return FACTOR_SINGULAR, it
        if code > 0:
            k = code - 1
            if lo[k] != hi[k]:
                rs[k] = 0          # dependent inequality row: leave it out
                continue
            freed = False          # dependent equality row: free a fixed variable in it
            for j in range(n):
                if vs[j] != 0 and A[k, j] != 0.0:
                    vs[j] = 0
                    freed = True
                    break
            if not freed:
                rs[k] = 0          # implied by the other equality rows: redundant
            continue
        # step towards the subproblem minimiser, cut by the ratio test
        xnorm = 1.0
        for a in range(nf):
            if abs(x[idx[a]]) > xnorm:
                xnorm = abs(x[idx[a]])
        ptol = 1e-14 * xnorm
        alpha = 1.0
        block = -1
        bkind = 0
        for a in range(nf):
            i = idx[a]
            d = xs[a] - x[i]
            if d < -ptol and lb[i] > -np.inf:
                s = (lb[i] - x[i]) / d
                if s < alpha:
                    alpha = s
                    block = i
                    bkind = -1
            elif d > ptol and ub[i] < np.inf:
                s = (ub[i] - x[i]) / d
                if s < alpha:
                    alpha = s
                    block = i
                    bkind = 1
        for k in range(m):
            if rs[k] != 0:
                continue
            ad = 0.0
            ax = 0.0
            for a in range(nf):
                ad += A[k, idx[a]] * (xs[a] - x[idx[a]])
            for j in range(n):
                ax += A[k, j] * x[j]
            if ad < -ptol and lo[k] > -np.inf:
                s = (lo[k] - ax) / ad
                if s < alpha:
                    alpha = s
                    block = n + k
                    bkind = -1
            elif ad > ptol and hi[k] < np.inf:
                s = (hi[k] - ax) / ad
                if s < alpha:
                    alpha = s
                    block = n + k
                    bkind = 1
        if alpha < 0.0:
            alpha = 0.0
        if alpha == 1.0:
            # a full step lands exactly on the subproblem minimiser, so the answer depends
            # only on the final working set, not on the path (warm or cold start)
            for a in range(nf):
                x[idx[a]] = xs[a]
        else:
            for a in range(nf):
                i = idx[a]
                x[i] = x[i] + alpha * (xs[a] - x[i])
        if block >= 0:
            if block < n:
                vs[block] = bkind
                x[block] = lb[block] if bkind < 0 else ub[block]
            else:
                rs[block - n] = bkind
            continue
        # at the subproblem minimiser: gradient and multipliers
        _gradient(H, c, A, x, nu, ridx, nr, delta, xk, g)
        worst = dtol
        wi = -1
        for i in range(n):
            z[i] = g[i] if vs[i] != 0 else 0.0
            if vs[i] < 0 and -g[i] > worst:
                worst = -g[i]
                wi = i
            elif vs[i] > 0 and g[i] > worst:
                worst = g[i]
                wi = i
        for k in range(m):
            if lo[k] == hi[k] or rs[k] == 0:
                continue
            if rs[k] < 0 and nu[k] > worst:
                worst = nu[k]
                wi = n + k
            elif rs[k] > 0 and -nu[k] > worst:
                worst = -nu[k]
                wi = n + k
        if wi < 0:
            return OK, it
        if wi < n:
            vs[wi] = 0
            z[wi] = 0.0
        else:
            rs[wi - n] = 0
            nu[wi - n] = 0.0
    return MAXITER, it


def _unpack(work_f, work_i, n, m):
    p = 0
    L = work_f[p:p + n * n].reshape((n, n))
    p += n * n
    V = work_f[p:p + n * max(m, 1)].reshape((n, max(m, 1)))
    p += n * max(m, 1)
    S = work_f[p:p + max(m, 1) * max(m, 1)].reshape((max(m, 1), max(m, 1)))
    p += max(m, 1) * max(m, 1)
    LS = work_f[p:p + max(m, 1) * max(m, 1)].reshape((max(m, 1), max(m, 1)))
    p += max(m, 1) * max(m, 1)
    u = work_f[p:p + n]
    p += n
    t = work_f[p:p + max(m, 1)]
    p += max(m, 1)
    xs = work_f[p:p + n]
    p += n
    g = work_f[p:p + n]
    p += n
    r1 = work_f[p:p + n]
    p += n
    r2 = work_f[p:p + max(m, 1)]
    idx = work_i[0:n]
    ridx = work_i[n:n + max(m, 1)]
    return L, V, S, LS, u, t, xs, g, r1, r2, idx, ridx


def make_work(n, m):
    """Workspace arrays (float64, int64) for :func:`qp_solve` with N variables, M rows."""
    mm = max(m, 1)
    nfl = n * n + n * mm + 2 * mm * mm + 4 * n + 2 * mm
    return np.zeros(nfl), np.zeros(n + mm, dtype=np.int64)


def _states(x, A, lo, hi, lb, ub, vs, rs):
    """Working set of the constraints that ``x`` meets exactly (bounds) or to 1e-13 (rows)."""
    n = x.shape[0]
    for i in range(n):
        vs[i] = 0
        if x[i] == lb[i]:
            vs[i] = -1
        elif x[i] == ub[i]:
            vs[i] = 1
    for k in range(A.shape[0]):
        rs[k] = 0
        if lo[k] == hi[k]:
            rs[k] = -1
            continue
        ax = 0.0
        for j in range(n):
            ax += A[k, j] * x[j]
        tol = 1e-13 * (1.0 + abs(ax))
        if lo[k] > -np.inf and abs(ax - lo[k]) <= tol:
            rs[k] = -1
        elif hi[k] < np.inf and abs(ax - hi[k]) <= tol:
            rs[k] = 1


def _feasible(x, A, lo, hi, lb, ub, tol):
    n = x.shape[0]
    for i in range(n):
        if x[i] < lb[i] - tol or x[i] > ub[i] + tol:
            return False
    for k in range(A.shape[0]):
        ax = 0.0
        for j in range(n):
            ax += A[k, j] * x[j]
        if ax < lo[k] - tol or ax > hi[k] + tol:
            return False
    return True


def _all_rows_equal(lo, hi):
    """Whether every general row is an equality (``lo == hi``)."""
    for k in range(lo.shape[0]):
        if lo[k] != hi[k]:
            return False
    return True


def _pdas(H, c, A, lo, hi, lb, ub, x, vs, rs, z, nu, maxit, work, delta, xk):
    """Primal-dual active-set iterations for a QP whose general rows are all equalities.

    From the working set ``vs`` (variables at a bound), each iteration solves the
    equality-constrained subproblem (:func:`_eqp`, the same routine the primal method
    uses) and then moves, all at once, every free variable that left its bounds to the
    bound it crossed and frees every fixed variable whose multiplier has the wrong sign
    (the primal-dual active-set strategy of Hintermueller, Ito & Kunisch 2003, SIAM J.
    Optim. 13(3), for bound constraints, from memory). When no variable moves, ``x``
    satisfies the bounds, the rows and the multiplier signs, which are the optimality
    conditions the primal method stops on (same tolerance), and ``x`` is that
    subproblem's minimiser: the primal method ending on the same working set gives the
    same numbers to the bit. The strategy can cycle on some problems; after ``maxit``
    subproblems without settling, or when a subproblem is singular or its rows dependent,
    it gives up and the caller runs the primal method from its own start.

    Parameters as :func:`qp_solve` (``x`` in: any point whose fixed entries are at
    their bounds as ``vs`` says; ``rs`` all -1: every row is an equality), except
    ``work``: the workspace already split by :func:`_unpack` (split once per batch), and
    ``delta``, ``xk``: the proximal term ``delta/2 |x - xk|^2`` added to the objective, as
    in :func:`_qp_core` (0 for the problem itself; the proximal-point steps of
    :func:`qp_solve` use it).

    Returns
    -------
    (status, iterations) : status 0 (optimal; ``x``, ``z``, ``nu``, ``vs`` set) or
    :data:`NOT_SETTLED`.
    """
    n = H.shape[0]
    L, V, S, LS, u, t, xs, g, r1, r2, idx, ridx = work
    hscale, gscale = _scales(H, c)
    dtol = 1e-11 * gscale                      # the primal method's stopping tolerance
    it = 0
    while it < maxit:
        it += 1
        for j in range(n):
            if vs[j] < 0:
                x[j] = lb[j]
            elif vs[j] > 0:
                x[j] = ub[j]
        nf, nr, code = _eqp(H, c, A, lo, hi, x, vs, rs, hscale, delta, xk,
                            idx, ridx, L, V, S, LS, u, t, xs, nu, r1, r2)
        if code != 0:
            return NOT_SETTLED, it
        for a in range(nf):
            x[idx[a]] = xs[a]
        _gradient(H, c, A, x, nu, ridx, nr, delta, xk, g)
        moved = False
        for i in range(n):
            if vs[i] == 0:
                if x[i] < lb[i]:
                    vs[i] = -1
                    moved = True
                elif x[i] > ub[i]:
                    vs[i] = 1
                    moved = True
            elif vs[i] < 0:
                if -g[i] > dtol:
                    vs[i] = 0
                    moved = True
            elif g[i] > dtol:
                vs[i] = 0
                moved = True
        if not moved:
            for i in range(n):
                z[i] = g[i] if vs[i] != 0 else 0.0
            return OK, it
    return NOT_SETTLED, it


# ----------------------------------------------------------------------------------------
# batch drivers
# ----------------------------------------------------------------------------------------
def qp_batch(H, c, A, lo, hi, lb, ub, x0, warm, rescale_row, maxiter, X, Z, NU, status, iters):
    """Solve D QPs that share the bounds, in order, warm-starting each from the last.

    From a cold point, a problem whose general rows are all equalities (bounds and the
    budget, say) first goes through the primal-dual active-set phase (:func:`_pdas`);
    when that does not settle, the primal active-set method solves it from the same point.

    Parameters
    ----------
    H : ndarray, shape (D, N, N)
    c : ndarray, shape (D, N)
    A : ndarray, shape (D, M, N)   (may be a broadcast view with stride 0 on D)
    lo, hi : ndarray, shape (D, M)
    lb, ub : ndarray, shape (N,)
    x0 : ndarray, shape (D, N)
        A feasible start for each problem (used when the previous solution is not).
    warm : bool
        Start problem d from the solution and working set of problem d - 1 when that
        point is feasible for problem d.
    rescale_row : int
        When >= 0, the previous solution is first scaled so that row ``rescale_row``
        equals its ``lo`` (homogeneous problems such as the maximum Sharpe ratio).
    maxiter : int
    X, Z, NU : ndarray, shapes (D, N), (D, N), (D, M)
        Out: solutions and multipliers.
    status, iters : ndarray of int64, shape (D,)
        Out: status code and iteration count per problem.
    """
    D = H.shape[0]
    n = H.shape[1]
    m = A.shape[1]
    work_f, work_i = make_work(n, m)
    work = _unpack(work_f, work_i, n, m)
    x = np.empty(n)
    xk0 = np.zeros(n)
    vs = np.zeros(n, dtype=np.int64)
    rs = np.zeros(m, dtype=np.int64)
    have_prev = False
    for d in range(D):
        used_prev = False
        if warm and have_prev:
            ok = True
            if rescale_row >= 0:
                ax = 0.0
                for j in range(n):
                    ax += A[d, rescale_row, j] * x[j]
                if ax > 0.0:
                    f = lo[d, rescale_row] / ax
                    for j in range(n):
                        x[j] *= f
                else:
                    ok = False
            if ok and _feasible(x, A[d], lo[d], hi[d], lb, ub, 1e-12):
                # keep the previous solution only when it is at least as good a start as
                # the cold point for this problem (lower objective)
                if _objective(H[d], c[d], x) <= _objective(H[d], c[d], x0[d]):
                    used_prev = True
                    _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
        st = NOT_SETTLED
        it = 0
        if not used_prev:
            for j in range(n):
                x[j] = x0[d, j]
            _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
            if rescale_row < 0 and _all_rows_equal(lo[d], hi[d]):
                # bounds and equality rows only (e.g. long-only, fully invested): the
                # primal-dual phase changes several bounds per subproblem (2.9 instead of
                # 5.1 subproblems at N = 50 on the benchmark problem); when it does not
                # settle, the primal method starts from the same cold point
                for k in range(m):
                    rs[k] = -1
                st, it = _pdas(H[d], c[d], A[d], lo[d], hi[d], lb, ub, x, vs, rs,
                               Z[d], NU[d], _PDAS_MAXIT, work, 0.0, xk0)
                if st != OK:
                    for j in range(n):
                        x[j] = x0[d, j]
                    _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
        if st != OK:
            st, it2 = _qp_core(H[d], c[d], A[d], lo[d], hi[d], lb, ub, x, vs, rs,
                               Z[d], NU[d], maxiter, work_f, work_i, 0.0, xk0)
            it += it2
        if st == FACTOR_SINGULAR:
            # a singular free block: the optimum may not be unique, and which optimum the
            # proximal-point path reaches depends on its start. Always start it from the
            # cold point, so that the answer does not depend on the previous problem
            # (block size, order).
            if used_prev:
                used_prev = False
                for j in range(n):
                    x[j] = x0[d, j]
                _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
            st, it2 = qp_solve(H[d], c[d], A[d], lo[d], hi[d], lb, ub, x, vs, rs,
                               Z[d], NU[d], maxiter, work_f, work_i)
            it += it2
        if st != OK and used_prev:
            # never let a warm start decide the outcome: retry from the cold point
            for j in range(n):
                x[j] = x0[d, j]
            _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
            st, it2 = qp_solve(H[d], c[d], A[d], lo[d], hi[d], lb, ub, x, vs, rs,
                               Z[d], NU[d], maxiter, work_f, work_i)
            it += it2
        status[d] = st
        iters[d] = it
        for j in range(n):
            X[d, j] = x[j]
        have_prev = st == OK


def target_vol_batch(S, mu, A, lo, hi, lb, ub, x0, xmax, var_target, maxiter,
                     X, Z, NU, T, status):
    """Maximum expected return subject to w' S w <= var_target, for D problems.

    The solution lies on the mean-variance path ``w(t) = argmin 1/2 w'Sw - t mu'w``
    (t = 1 / risk aversion), along which the variance increases with t and the weights
    are piecewise linear in t (constant working set on each piece). The kernel brackets
    the t whose variance equals the target, bisects until both ends share one working set
    and then solves the quadratic for the variance on that piece exactly.

    Parameters
    ----------
    S : (D, N, N) covariances; mu : (D, N) means; A, lo, hi, lb, ub as :func:`qp_batch`
    x0 : (D, N) feasible starts; xmax : (D, N) maximum-return portfolios
    var_target : float
        Target variance (volatility squared), per period.
    X, Z, NU : out, solutions and multipliers of the mean-variance problem at ``T[d]``
    T : (D,) out, the t of the solution (0 when the minimum variance already meets the
        target with equality, inf when the maximum-return portfolio is inside the target)
    status : (D,) out, 0 optimal, 4 target below the minimum attainable volatility,
        other codes from :func:`qp_solve`.
    """
    D = S.shape[0]
    n = S.shape[1]
    m = A.shape[1]
    work_f, work_i = make_work(n, m)
    c = np.zeros(n)
    xa = np.empty(n)
    xb = np.empty(n)
    za = np.empty(n)
    zb = np.empty(n)
    na = np.empty(m)
    nb = np.empty(m)
    vsa = np.zeros(n, dtype=np.int64)
    rsa = np.zeros(m, dtype=np.int64)
    vsb = np.zeros(n, dtype=np.int64)
    rsb = np.zeros(m, dtype=np.int64)
    vs = np.zeros(n, dtype=np.int64)
    rs = np.zeros(m, dtype=np.int64)
    x = np.empty(n)
    z = np.empty(n)
    nu = np.empty(m)
    for d in range(D):
        Sd = S[d]
        # the maximum-return portfolio already inside the target?
        vmax = _quad(Sd, xmax[d])
        if vmax <= var_target:
            for j in range(n):
                X[d, j] = xmax[d, j]
                Z[d, j] = 0.0
            for k in range(m):
                NU[d, k] = 0.0
            T[d] = np.inf
            status[d] = OK
            continue
        # minimum variance (t = 0)
        for j in range(n):
            x[j] = x0[d, j]
            c[j] = 0.0
        _states(x, A[d], lo[d], hi[d], lb, ub, vs, rs)
        st, it = qp_solve(Sd, c, A[d], lo[d], hi[d], lb, ub, x, vs, rs, z, nu,
                          maxiter, work_f, work_i)
        if st != OK:
            status[d] = st
            continue
        v0 = _quad(Sd, x)
        if v0 > var_target * (1.0 + 1e-12):
            status[d] = OUT_OF_REACH
            continue
        _copy_state(x, z, nu, vs, rs, xa, za, na, vsa, rsa)
        ta = 0.0
        # bracket: double t until the variance reaches the target
        mmax = 0.0
        for j in range(n):
            if abs(mu[d, j]) > mmax:
                mmax = abs(mu[d, j])
        tb = max(v0, var_target) / max(mmax, 1e-300)   # t ~ variance / mean scale
        found = False
        for _ in range(200):
            for j in range(n):
                c[j] = tb * mu[d, j]
            st, it = qp_solve(Sd, c, A[d], lo[d], hi[d], lb, ub, x, vs, rs, z, nu,
                              maxiter, work_f, work_i)
            if st != OK:
                break
            if _quad(Sd, x) >= var_target:
                found = True
                break
            _copy_state(x, z, nu, vs, rs, xa, za, na, vsa, rsa)
            ta = tb
            tb = 2.0 * tb
        if not found:
            status[d] = st if st != OK else MAXITER
            continue
        _copy_state(x, z, nu, vs, rs, xb, zb, nb, vsb, rsb)
        # bisect until both ends share a working set
        for _ in range(200):
            same = True
            for j in range(n):
                if vsa[j] != vsb[j]:
                    same = False
                    break
            if same:
                for k in range(m):
                    if rsa[k] != rsb[k]:
                        same = False
                        break
            if same or tb - ta <= 1e-15 * tb:
                break
            tm = 0.5 * (ta + tb)
            for j in range(n):
                c[j] = tm * mu[d, j]
            st, it = qp_solve(Sd, c, A[d], lo[d], hi[d], lb, ub, x, vs, rs, z, nu,
                              maxiter, work_f, work_i)
            if st != OK:
                break
            if _quad(Sd, x) >= var_target:
                _copy_state(x, z, nu, vs, rs, xb, zb, nb, vsb, rsb)
                tb = tm
            else:
                _copy_state(x, z, nu, vs, rs, xa, za, na, vsa, rsa)
                ta = tm
        if st != OK:
            status[d] = st
            continue
        # exact interpolation on the piece [ta, tb]: var(xa + s (xb - xa)) = target
        for j in range(n):
            x[j] = xb[j] - xa[j]
        qa = _quad(Sd, x)
        qb = 0.0
        for i in range(n):
            s = 0.0
            for j in range(n):
                s += Sd[i, j] * x[j]
            qb += 2.0 * xa[i] * s
        qc = _quad(Sd, xa) - var_target
        if qa > 1e-300:
            disc = qb * qb - 4.0 * qa * qc
            if disc < 0.0:
                disc = 0.0
            sq = math.sqrt(disc)
            # numerically stable root of the increasing branch
            if qb >= 0.0:
                s = (-2.0 * qc) / (qb + sq) if qb + sq > 0.0 else 0.0
            else:
                s = (-qb + sq) / (2.0 * qa)
        elif abs(qb) > 1e-300:
            s = -qc / qb
        else:
            s = 0.0
        if s < 0.0:
            s = 0.0
        if s > 1.0:
            s = 1.0
        for j in range(n):
            X[d, j] = xa[j] + s * (xb[j] - xa[j])
            Z[d, j] = za[j] + s * (zb[j] - za[j])
        for k in range(m):
            NU[d, k] = na[k] + s * (nb[k] - na[k])
        T[d] = ta + s * (tb - ta)
        status[d] = OK


def _objective(H, c, x):
    """1/2 x'Hx - c'x, skipping zero entries of x."""
    n = x.shape[0]
    v = 0.0
    for i in range(n):
        xi = x[i]
        if xi != 0.0:
            s = 0.5 * H[i, i] * xi
            for j in range(i):
                if x[j] != 0.0:
                    s += H[i, j] * x[j]
            v += xi * s - c[i] * xi
    return v


def _copy_state(x, z, nu, vs, rs, xo, zo, nuo, vso, rso):
    for j in range(x.shape[0]):
        xo[j] = x[j]
        zo[j] = z[j]
        vso[j] = vs[j]
    for k in range(nu.shape[0]):
        nuo[k] = nu[k]
        rso[k] = rs[k]


def _quad(S, x):
    n = x.shape[0]
    q = 0.0
    for i in range(n):
        s = 0.0
        for j in range(n):
            s += S[i, j] * x[j]
        q += x[i] * s
    return q


# ----------------------------------------------------------------------------------------
# equal risk contribution
# ----------------------------------------------------------------------------------------
def erc_batch(S, budgets, tol, maxiter, X, status, iters):
    """Long-only equal (or budgeted) risk contributions by Newton's method.

    Solves the strictly convex problem ``min 1/2 y'Sy - sum_i b_i log y_i`` over ``y > 0``,
    whose optimum satisfies ``y_i (S y)_i = b_i`` (set the gradient to zero); the weights
    are ``y / sum(y)``. Maillard, Roncalli & Teiletche (2010) characterise the equal-risk
    portfolio through a log-constrained variance minimisation of this kind; the Newton
    approach on the barrier form follows Spinu (2013) (both citations from memory).

    Parameters
    ----------
    S : (D, N, N) covariances; budgets : (N,) risk budgets summing to 1
    tol : float, stopping tolerance on max_i |y_i (S y)_i - b_i| (the risk-budget error)
    X : (D, N) out weights; status, iters : (D,) out
    """
    D = S.shape[0]
    n = S.shape[1]
    y = np.empty(n)
    g = np.empty(n)
    Hm = np.empty((n, n))
    L = np.empty((n, n))
    step = np.empty(n)
    yn = np.empty(n)
    idx = np.arange(n)
    for d in range(D):
        Sd = S[d]
        for i in range(n):
            y[i] = 1.0 / math.sqrt(Sd[i, i]) if Sd[i, i] > 0.0 else 1.0
        q = _quad(Sd, y)
        f = math.sqrt(1.0 / q) if q > 0.0 else 1.0
        for i in range(n):
            y[i] *= f
        st = NO_CONVERGENCE
        it = 0
        while it < maxiter:
            it += 1
            for i in range(n):
                s = 0.0
                for j in range(n):
                    s += Sd[i, j] * y[j]
                g[i] = s - budgets[i] / y[i]
                for j in range(n):
                    Hm[i, j] = Sd[i, j]
                Hm[i, i] += budgets[i] / (y[i] * y[i])
            if not _chol_subset(Hm, idx, n, L, 0.0, 0.0):
                break
            for i in range(n):
                step[i] = g[i]
            _chol_solve(L, n, step)
            dec = 0.0
            for i in range(n):
                dec += g[i] * step[i]
            worst = 0.0
            for i in range(n):
                if abs(g[i] * y[i]) > worst:
                    worst = abs(g[i] * y[i])
            if worst <= tol or dec <= 0.0:
                st = OK
                break
            # damped step keeping y > 0, with backtracking on the objective
            a = 1.0
            for i in range(n):
                if step[i] > 0.0 and a * step[i] >= 0.9 * y[i]:
                    a = 0.9 * y[i] / step[i]
            f0 = _erc_obj(Sd, y, budgets)
            # near the optimum (small decrement) the objective's round-off hides the
            # decrease: take the (positivity-limited) Newton step without the test
            for _ in range(60 if dec > 1e-10 else 0):
                for i in range(n):
                    yn[i] = y[i] - a * step[i]
                if _erc_obj(Sd, yn, budgets) <= f0 - 0.25 * a * dec:
                    break
                a *= 0.5
            if dec <= 1e-10:
                for i in range(n):
                    yn[i] = y[i] - a * step[i]
            for i in range(n):
                y[i] = yn[i]
        sy = 0.0
        for i in range(n):
            sy += y[i]
        for i in range(n):
            X[d, i] = y[i] / sy
        status[d] = st
        iters[d] = it


def _erc_obj(S, y, b):
    v = 0.5 * _quad(S, y)
    for i in range(y.shape[0]):
        if y[i] <= 0.0:
            return np.inf
        v -= b[i] * math.log(y[i])
    return v


# ----------------------------------------------------------------------------------------
# checks on batches (fused passes, no temporaries)
# ----------------------------------------------------------------------------------------
def cov_checks(C):
    """Scan D covariances once: (first draw with a non-finite entry or -1, largest
    asymmetry relative to the largest entry, first draw with a negative variance or -1)."""
    D = C.shape[0]
    n = C.shape[1]
    bad = -1
    neg = -1
    worst = 0.0
    for d in range(D):
        big = 0.0
        asym = 0.0
        for i in range(n):
            if C[d, i, i] < 0.0 and neg < 0:
                neg = d
            for j in range(n):
                v = C[d, i, j]
                if not math.isfinite(v):
                    if bad < 0:
                        bad = d
                    continue
                if abs(v) > big:
                    big = abs(v)
                if j > i:
                    a = abs(v - C[d, j, i])
                    if a > asym:
                        asym = a
        if big > 0.0 and asym / big > worst:
            worst = asym / big
    return bad, worst, neg


def kkt_batch(H, c, A, lo, hi, lb, ub, X, Z, NU, out):
    """Largest KKT residual of each of D solutions, scaled by max(1, |c|, |Hx|).

    Same quantities as :func:`optimise.kkt.kkt_residuals` with given multipliers:
    stationarity ``|Hx - c + A'nu - z|``, primal violation, dual sign violation and
    complementarity ``|multiplier| * slack``; the largest of the four, per problem.
    """
    D = H.shape[0]
    n = H.shape[1]
    m = A.shape[1]
    g = np.empty(n)
    for d in range(D):
        scale = 1.0
        for i in range(n):
            g[i] = -c[d, i]
            if abs(c[d, i]) > scale:
                scale = abs(c[d, i])
        for j in range(n):
            xj = X[d, j]
            if xj != 0.0:
                for i in range(n):
                    g[i] += H[d, j, i] * xj
        for i in range(n):
            hx = g[i] + c[d, i]
            if abs(hx) > scale:
                scale = abs(hx)
        worst = 0.0
        for k in range(m):
            ax = 0.0
            nk = NU[d, k]
            for i in range(n):
                ax += A[d, k, i] * X[d, i]
                g[i] += A[d, k, i] * nk
            v = max(lo[d, k] - ax, ax - hi[d, k], 0.0)
            if nk > 0.0:
                if hi[d, k] == np.inf:
                    v = max(v, nk)
                elif lo[d, k] != hi[d, k]:
                    v = max(v, nk * abs(hi[d, k] - ax))
            elif nk < 0.0:
                if lo[d, k] == -np.inf:
                    v = max(v, -nk)
                elif lo[d, k] != hi[d, k]:
                    v = max(v, -nk * abs(ax - lo[d, k]))
            if v > worst:
                worst = v
        for i in range(n):
            zi = Z[d, i]
            xi = X[d, i]
            v = max(abs(g[i] - zi), lb[i] - xi, xi - ub[i], 0.0)
            if zi > 0.0:
                v = max(v, zi if lb[i] == -np.inf else zi * abs(xi - lb[i]))
            elif zi < 0.0:
                v = max(v, -zi if ub[i] == np.inf else -zi * abs(ub[i] - xi))
            if v > worst:
                worst = v
        out[d] = worst / scale


def path_slopes(H, g, A, lo, hi, lb, ub, X, tol, out):
    """Slope ``dx/dt`` of parametric QP solutions along their current active set.

    The QP ``min 1/2 x'Hx - (c + t g)'x`` (constraints as in :func:`qp_solve`) has a
    solution that is affine in ``t`` while its active set stays the same; this returns
    that slope at the solutions ``X``. Active: variables within ``tol (1 + |bound|)`` of a
    bound (slope 0), rows that are equalities or within ``tol (1 + |side|)`` of a side
    (held). The free block solves ``[H_FF E'; E 0] [dx_F; dnu] = [g_F; 0]`` by least
    squares (dependent active rows are harmless).

    Parameters
    ----------
    H : (D, N, N); g : (D, N); A : (D, M, N); lo, hi : (D, M); lb, ub : (N,)
    X : (D, N) solutions; tol : float
    out : (D, N) written with the slopes.
    """
    D = H.shape[0]
    n = H.shape[1]
    m = A.shape[1]
    free = np.empty(n, dtype=np.int64)
    rows = np.empty(m, dtype=np.int64)
    for d in range(D):
        nf = 0
        for i in range(n):
            x = X[d, i]
            at_lo = lb[i] > -np.inf and x - lb[i] <= tol * (1.0 + abs(lb[i]))
            at_hi = ub[i] < np.inf and ub[i] - x <= tol * (1.0 + abs(ub[i]))
            out[d, i] = 0.0
            if not (at_lo or at_hi):
                free[nf] = i
                nf += 1
        nr = 0
        for k in range(m):
            ax = 0.0
            for i in range(n):
                ax += A[d, k, i] * X[d, i]
            act = lo[d, k] == hi[d, k]
            if not act and lo[d, k] > -np.inf and abs(ax - lo[d, k]) <= tol * (1.0 + abs(lo[d, k])):
                act = True
            if not act and hi[d, k] < np.inf and abs(hi[d, k] - ax) <= tol * (1.0 + abs(hi[d, k])):
                act = True
            if act:
                rows[nr] = k
                nr += 1
        if nf == 0:
            continue
        size = nf + nr
        K = np.zeros((size, size))
        rhs = np.zeros(size)
        for a in range(nf):
            ia = free[a]
            rhs[a] = g[d, ia]
            for b in range(nf):
                K[a, b] = H[d, ia, free[b]]
            for r in range(nr):
                K[a, nf + r] = A[d, rows[r], ia]
                K[nf + r, a] = A[d, rows[r], ia]
        sol = np.linalg.lstsq(K, rhs, -1.0)[0]
        for a in range(nf):
            out[d, free[a]] = sol[a]


def greedy_fill_rows(score, lower, cap, left0, out):
    """Greedy vertex per row: the compiled form of ``constraints._greedy_fill`` (full
    budget, no cash sleeve), used for the cold starts of batched long-only QPs.

    Parameters
    ----------
    score : ndarray, shape (D, N)
        Ranking score per draw (assets are filled in order of decreasing score; ties keep
        the column order, as a stable sort does).
    lower : ndarray, shape (N,)
        Lower bounds (every weight starts there).
    cap : ndarray, shape (N,)
        ``minimum(upper, lower + 1 - lower.sum())``: the most any weight can reach.
    left0 : float
        ``1 - lower.sum()``: the budget left after the lower bounds.
    out : ndarray, shape (D, N)
        Written with the weights. Same arithmetic, in the same order, as the numpy
        reference (``min(room, left)`` clipped at 0, added, then subtracted from ``left``),
        so the results are identical to the last bit (``tests/test_simulate_kernels.py``
        compares them).
    """
    D, n = score.shape
    neg = np.empty(n)
    for d in range(D):
        for i in range(n):
            neg[i] = -score[d, i]
            out[d, i] = lower[i]
        order = np.argsort(neg, kind="mergesort")
        left = left0
        for r in range(n):
            j = order[r]
            room = cap[j] - lower[j]
            # numpy's minimum / maximum, signed zeros and NaN included
            if room < left:
                add = room
            elif left < room:
                add = left
            elif math.isnan(room) or math.copysign(1.0, room) < 0.0:
                add = room
            else:
                add = left
            if add <= 0.0:
                add = 0.0
            out[d, j] += add
            left = left - add


def _level_terms(ch, ih, lower, cap, lam):
    """At water level ``lam`` (see :func:`separable_start_rows`): the sum of the weights
    ``clip(ch_i - lam ih_i, lower_i, cap_i)``, its slope ``-sum`` over the free weights of
    ``ih_i`` (returned positive), and the two sums that give the exact level for the free
    weights there: ``num = sum(bound weights) + sum_free ch_i - 1`` and ``den = sum_free ih_i``.
    """
    tot = 0.0
    slope = 0.0
    num = -1.0
    den = 0.0
    for i in range(ch.shape[0]):
        v = ch[i] - lam * ih[i]
        if v <= lower[i]:
            tot += lower[i]
            num += lower[i]
        elif v >= cap[i]:
            tot += cap[i]
            num += cap[i]
        else:
            tot += v
            slope += ih[i]
            num += ch[i]
            den += ih[i]
    return tot, slope, num, den


def separable_start_rows(H, c, lower, cap, out, done):
    """Start points of batched long-only QPs: the minimiser of the separable problem.

    For each draw, ``min sum_i (h_i / 2 w_i^2 - c_i w_i)`` subject to ``sum w = 1`` and
    ``lower <= w <= cap``, with ``h_i = H[d, i, i]``: the full problem with the
    covariances between assets dropped. Its solution is ``w_i = clip((c_i - lam) / h_i)``
    with the one ``lam`` at which the weights sum to 1 (a water level): Newton steps on the
    non-increasing, piecewise linear sum (safeguarded by bisection) find the piece of the
    root, then the level is solved exactly from the assets free there. Its support is
    usually close to the full problem's, so the active-set method starts a few changes
    away from the optimum (at
    N = 50 about 5 iterations instead of 9 from the best-asset vertex). Any feasible point
    is a valid start; this one only saves iterations. Rows with a non-positive or
    non-finite ``h_i`` or a non-finite ``c_i`` are left as they are (the caller fills them
    with another start first).

    Parameters
    ----------
    H : ndarray, shape (D, N, N)
    c : ndarray, shape (D, N)
    lower, cap : ndarray, shape (N,)
        Lower bounds and the most each weight can reach (``sum(lower) <= 1 <= sum(cap)``).
    out : ndarray, shape (D, N)
        Rows written with the start where it applies.
    done : ndarray of bool, shape (D,)
        Out: whether row ``d`` of ``out`` was written.
    """
    D, n = c.shape
    w = np.empty(n)
    ih = np.empty(n)
    ch = np.empty(n)
    for d in range(D):
        ok = True
        lam_hi = -np.inf
        lam_lo = np.inf
        for i in range(n):
            h = H[d, i, i]
            if not (h > 0.0 and math.isfinite(h) and math.isfinite(c[d, i])):
                ok = False
                break
            ih[i] = 1.0 / h
            ch[i] = c[d, i] * ih[i]
            a = c[d, i] - h * lower[i]         # at or above this level, w_i = lower_i
            b = c[d, i] - h * cap[i]           # at or below this level, w_i = cap_i
            if a > lam_hi:
                lam_hi = a
            if b < lam_lo:
                lam_lo = b
        done[d] = ok
        if not ok:
            continue
        scale = abs(lam_lo) + abs(lam_hi)
        # the sum is piecewise linear in the level: Newton steps (exact on the root's
        # piece), kept inside the bracket by bisection, which narrows it to a relative 1e-9
        mid = 0.5 * (lam_lo + lam_hi)
        for _ in range(64):                    # sum(lam_lo) >= 1 >= sum(lam_hi)
            tot, slope, _, _ = _level_terms(ch, ih, lower, cap, mid)
            if tot > 1.0:
                lam_lo = mid
            else:
                lam_hi = mid
            if lam_hi - lam_lo <= 1e-9 * scale:
                break
            if slope > 0.0:
                nxt = mid + (tot - 1.0) / slope
                if nxt == mid:
                    break                      # on the root's piece: the level is exact
                if not lam_lo < nxt < lam_hi:
                    nxt = 0.5 * (lam_lo + lam_hi)
            else:                              # no asset free here: bisect
                nxt = 0.5 * (lam_lo + lam_hi)
            mid = nxt
        # exact level for the assets free at the last point
        _, _, num, den = _level_terms(ch, ih, lower, cap, mid)
        lam = num / den if den > 0.0 else mid
        tot = 0.0
        for i in range(n):
            w[i] = min(max(ch[i] - lam * ih[i], lower[i]), cap[i])
            tot += w[i]
        # put the rounding left in the budget on the largest weight that has room
        j = -1
        for i in range(n):
            if lower[i] < w[i] < cap[i] and (j < 0 or w[i] > w[j]):
                j = i
        if j >= 0:
            w[j] = min(max(w[j] + (1.0 - tot), lower[j]), cap[j])
        for i in range(n):
            out[d, i] = w[i]


# ----------------------------------------------------------------------------------------
# compile: each name below becomes a numba kernel. :func:`plain_twin` executes this same
# source with an identity decorator, giving undecorated Python twins for the tests.
# ----------------------------------------------------------------------------------------
_compile = globals().get("_PLAIN_TWIN_DECORATOR") or njit(cache=True)
_chol_subset = _compile(_chol_subset)
_chol_solve = _compile(_chol_solve)
_chol_solve_col = _compile(_chol_solve_col)
_eqp = _compile(_eqp)
_scales = _compile(_scales)
_gradient = _compile(_gradient)
_all_rows_equal = _compile(_all_rows_equal)
_pdas = _compile(_pdas)
_unpack = _compile(_unpack)
make_work = _compile(make_work)
_states = _compile(_states)
_feasible = _compile(_feasible)
_qp_core = _compile(_qp_core)
qp_solve = _compile(qp_solve)
qp_batch = _compile(qp_batch)
_copy_state = _compile(_copy_state)
_objective = _compile(_objective)
_quad = _compile(_quad)
target_vol_batch = _compile(target_vol_batch)
_erc_obj = _compile(_erc_obj)
erc_batch = _compile(erc_batch)
cov_checks = _compile(cov_checks)
kkt_batch = _compile(kkt_batch)
path_slopes = _compile(path_slopes)
greedy_fill_rows = _compile(greedy_fill_rows)
_level_terms = _compile(_level_terms)
separable_start_rows = _compile(separable_start_rows)


def plain_twin():
    """The kernels of this module as plain (undecorated) Python functions.

    Returns a dict of names to functions, built by executing this module's source with
    an identity decorator, so the twin is the same code line for line.
    """
    import pathlib

    src = pathlib.Path(__file__).read_text()
    ns = {"__name__": "optimise._kernels_plain_twin",
          "_PLAIN_TWIN_DECORATOR": lambda f: f}
    exec(compile(src, __file__ + " (plain twin)", "exec"), ns)
    return ns
