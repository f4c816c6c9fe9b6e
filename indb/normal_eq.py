"""The normal equations X'WX beta = X'Wz of an IRLS step, solved through their block structure.

numpy/scipy only. X'WX arrives as a sparse symmetric matrix (:func:`indb.solver.assemble`).
Design columns that share their factors and their value (the non-reference levels of one
factor, or one factor x numeric term) are indicators of distinct level combinations: no row
has two of them, so their block of X'WX is diagonal. Take the longest run E of consecutive
columns whose block is diagonal (:func:`diagonal_run`), the columns before it P and after it
Q, and R = P + Q the rest (r columns)::

        | A_PP  A_PE  A_PQ |
    A = | A_EP  D     A_EQ |        D diagonal (p_E numbers)
        | A_QP  A_QE  A_QQ |

Eliminating E costs D's inverse: the Schur complement S = A_RR - A_RE D^-1 A_ER is dense
r x r, A_RE stays sparse (r x p_E, non-zero only where levels meet), and the inverse is kept
in that factored form (:class:`InverseInfo`). Work is O(r^3 + nnz(A_RE) r) and memory
O(r^2 + nnz(A_RE)) instead of O(p^3) and O(p^2): one factor of 50,000 levels next to a few
hundred other columns costs what those few hundred cost, plus a sparse pass.

Aliasing keeps its meaning: a column is set aside when its squared residual (on the
correlation-scaled matrix) against the kept columns *before it in design order* is at most
``tol``, exactly as a column-by-column Cholesky in design order decides it:

1. P by a blocked pivoted Cholesky in design order (:func:`pivoted_cholesky`);
2. each column j of E against P's kept columns and E's kept columns before it. With E's
   scaled block the identity, its residual is 1 - c_j' M_j^-1 c_j, where c_j is its scaled
   column against P and M_j the scaled A_PP less c_i c_i' for the kept i < j. Its residual
   against P and *all* of E, 1 / (V)_jj, is never larger, and one triangular solve gives it
   for every j at once; only the columns where that bound is <= tol are checked one by one
   (none, unless the data are collinear). When P and E are dependent the bound is lost in
   rounding, and every column of E is checked in turn (k^3 work each, k = |P|); a
   dependency that rounding still hides from that test (its share of each of thousands of
   levels is tiny) is found from P's side and its last column of E set aside
   (:func:`_resolve_hidden`);
3. Q by the same blocked Cholesky on S, with P's kept columns first and kept.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg, sparse
from scipy.sparse import linalg as splinalg

ALIAS_TOL = 1e-10  # squared sine below which a (standardized) column counts as aliased
PANEL = 96  # columns per panel of the blocked Cholesky (rank-one updates inside, BLAS-3 after)
CHUNK = 1 << 22  # numbers per dense scratch block when E is swept in slices
DENSE_EIG_MAX = 500  # kept columns up to which the condition number is an exact eigensolve

#: smallest eigenvalue of P's Schur complement (relative) at which the bound of step 2 is
#: trusted: its relative error is about 1e-16 / this
RESOLVED = 1e-8

#: Most columns outside the diagonal run (r): the rest is solved densely, r^2 doubles a few
#: times over (72 MB each at 3,000) and r^3 / 3 flops per IRLS step.
MAX_REST_COLUMNS = 3_000


def as_sparse(a: np.ndarray | sparse.sparray) -> sparse.csr_array:
    """X'WX as a CSR array (a dense matrix keeps its non-zero entries)."""
    return a.tocsr() if sparse.issparse(a) else sparse.csr_array(np.asarray(a, dtype=float))


def diagonal_run(a: sparse.csr_array) -> tuple[int, int]:
    """The longest range [s, e) of consecutive columns (two or more) whose block of ``a`` is
    diagonal; (0, 0) when there is none."""
    p = a.shape[0]
    if p < 2:
        return 0, 0
    coo = a.tocoo()
    below = (coo.col < coo.row) & (coo.data != 0.0)
    # lo[i]: the last column before i that row i meets; a run ending at i starts after the
    # largest lo of its rows
    lo = np.full(p, -1, dtype=np.int64)
    np.maximum.at(lo, coo.row[below], coo.col[below])
    start = np.maximum.accumulate(lo + 1)
    length = np.arange(p) - start + 1
    end = int(np.argmax(length))
    if length[end] < 2:
        return 0, 0
    return int(start[end]), end + 1


def pivoted_cholesky(m: np.ndarray, tol: float, forced: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Cholesky factor in column order, setting aside each column whose squared residual
    against the kept earlier columns is <= ``tol`` (``m`` correlation-scaled, overwritten).

    The first ``forced`` columns are kept whenever their residual is positive (their fate
    was decided before). Returns the kept mask and the lower factor of ``m[kept][:, kept]``.
    Blocked: rank-one updates inside a panel of :data:`PANEL` columns, then one matrix
    product for the columns after it; the decisions are those of a column-by-column loop.
    """
    n = m.shape[0]
    keep = np.zeros(n, dtype=bool)
    for start in range(0, n, PANEL):
        stop = min(start + PANEL, n)
        b = stop - start
        panel = m[start:, start:stop]
        for jj in range(b):
            j = start + jj
            r = panel[jj, jj]
            if not (math.isfinite(r) and r > (0.0 if j < forced else tol)):
                continue
            col = panel[jj:, jj]
            col /= math.sqrt(r)
            if jj + 1 < b:
                panel[jj + 1 :, jj + 1 :] -= np.outer(col[1:], col[1 : b - jj])
            keep[j] = True
        done = np.flatnonzero(keep[start:stop]) + start
        if stop < n and len(done):
            lb = m[stop:, done]
            m[stop:, stop:] -= lb @ lb.T
    kept = np.flatnonzero(keep)
    return keep, np.tril(m[np.ix_(kept, kept)])


@dataclass(frozen=True)
class InverseInfo:
    """(X'WX)^-1 on the kept columns (zero rows and columns at aliased ones), factored.

    With d the square roots of X'WX's diagonal, V = (X'WX)^-1 = D^-1 V_s D^-1 and, on the
    kept columns of the rest R and of the run E, V_s = Delta + K' S^-1 K with
    K = [I_R, -C] (C = the scaled A_RE) and Delta the identity on E, zero on R.
    """

    p: int
    scale: np.ndarray  # d
    rest: np.ndarray  # kept columns of R, in design order
    run: np.ndarray  # kept columns of E, in design order
    s_inv: np.ndarray  # S^-1, |rest| x |rest|, scaled
    cross: sparse.csc_array  # C, |rest| x |run|, scaled

    def diagonal(self) -> np.ndarray:
        """diag((X'WX)^-1): the variances up to the dispersion."""
        out = np.zeros(self.p)
        out[self.rest] = np.diag(self.s_inv)
        out[self.run] = 1.0 + self._run_quadratic()
        return out / self.scale**2

    def _run_quadratic(self) -> np.ndarray:
        """c_j' S^-1 c_j for every kept column j of E (in slices of E)."""
        n = len(self.run)
        out = np.zeros(n)
        if not len(self.rest) or not n:
            return out
        step = max(1, CHUNK // len(self.rest))
        for a in range(0, n, step):
            c = self.cross[:, a : a + step].toarray()
            out[a : a + step] = np.einsum("ij,ij->j", c, self.s_inv @ c)
        return out

    def _k_columns(self, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """K's columns at design columns ``idx`` (dense |rest| x len(idx)) and Delta's
        diagonal there."""
        k = np.zeros((len(self.rest), len(idx)))
        delta = np.zeros(len(idx))
        pos_r = {int(j): i for i, j in enumerate(self.rest)}
        pos_e = np.full(self.p, -1, dtype=np.int64)
        pos_e[self.run] = np.arange(len(self.run))
        at_e = pos_e[idx]
        for col, j in enumerate(idx):
            if int(j) in pos_r:
                k[pos_r[int(j)], col] = 1.0
        in_e = np.flatnonzero(at_e >= 0)
        if len(in_e):
            k[:, in_e] = -self.cross[:, at_e[in_e]].toarray()
            delta[in_e] = 1.0
        return k, delta

    def block(self, idx: np.ndarray) -> np.ndarray:
        """The dense block V[idx][:, idx] (for a small set of columns)."""
        idx = np.asarray(idx, dtype=np.int64)
        k, delta = self._k_columns(idx)
        v = k.T @ self.s_inv @ k + np.diag(delta)
        return v / np.outer(self.scale[idx], self.scale[idx])

    def dense(self) -> np.ndarray:
        """The whole p x p inverse (callers keep p small)."""
        return self.block(np.arange(self.p))

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """V at the index pairs (``rows[i]``, ``cols[i]``), in slices of pairs: k_j' S^-1 k_k
        plus Delta's 1 where j = k lies in E, over d_j d_k (0 at aliased columns)."""
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        out = np.zeros(len(rows))
        step = max(1, CHUNK // max(len(self.rest), 1))
        for a in range(0, len(rows), step):
            r, c = rows[a : a + step], cols[a : a + step]
            kr, dr = self._k_columns(r)
            kc, _ = self._k_columns(c)
            out[a : a + step] = np.einsum("ij,ij->j", kr, self.s_inv @ kc) + np.where(
                r == c, dr, 0.0
            )
        with np.errstate(divide="ignore", invalid="ignore"):
            scaled = out / (self.scale[rows] * self.scale[cols])
        return np.where(np.isfinite(scaled), scaled, 0.0)

    def scaled_operator(self, kept: np.ndarray) -> splinalg.LinearOperator:
        """V_s on the kept columns as an operator (x -> V_s x), for eigenvalue estimates."""
        n = len(kept)

        def matvec(x: np.ndarray) -> np.ndarray:
            full = np.zeros(self.p)
            full[kept] = np.ravel(x)
            kx = full[self.rest] - self.cross @ full[self.run]
            y = self.s_inv @ kx
            out = np.zeros(self.p)
            out[self.rest] = y
            out[self.run] = full[self.run] - self.cross.T @ y
            return out[kept]

        return splinalg.LinearOperator((n, n), matvec=matvec, dtype=float)


@dataclass(frozen=True)
class Solution:
    """Solved update: coefficients (0 where aliased), aliased mask, inverse information."""

    beta: np.ndarray
    aliased: np.ndarray
    inv_info: InverseInfo


def solve(xtwx: np.ndarray | sparse.sparray, xtwz: np.ndarray, tol: float = ALIAS_TOL) -> Solution:
    """Solve X'WX beta = X'Wz, setting aside columns that are (near) linear combinations of
    earlier ones (sequential pivoting in design order, on the correlation-scaled matrix),
    through the block structure described in the module docstring."""
    a = as_sparse(xtwx)
    p = len(xtwz)
    d = np.sqrt(np.clip(a.diagonal(), 0.0, None))
    usable = (d > 0) & np.isfinite(d)
    scale = np.where(usable, d, 1.0)
    inv_scale = sparse.diags_array(1.0 / scale)
    corr = (inv_scale @ a @ inv_scale).tocsr()
    s, e = diagonal_run(a)
    cols = np.arange(p)
    before, run, after = cols[:s][usable[:s]], cols[s:e][usable[s:e]], cols[e:][usable[e:]]

    keep_p, l_p = pivoted_cholesky(_dense(corr, before, before), tol)
    kept_p = before[keep_p]
    kept_e = run[_pivot_run(_dense(corr, kept_p, kept_p), corr[kept_p][:, run].tocsc(), tol)]

    rest = np.concatenate([kept_p, after])
    cross = corr[rest][:, kept_e]
    schur = _dense(corr, rest, rest) - (cross @ cross.T).toarray()
    keep_r, l_r = pivoted_cholesky(schur, tol, forced=len(kept_p))
    rest = rest[keep_r]
    cross = cross[np.flatnonzero(keep_r)].tocsc()

    g = xtwz / scale
    beta = np.zeros(p)
    if len(rest):
        y_r = linalg.cho_solve((l_r, True), g[rest] - cross @ g[kept_e])
        s_inv = _cho_inverse(l_r)
    else:
        y_r = np.zeros(0)
        s_inv = np.zeros((0, 0))
    beta[rest] = y_r
    beta[kept_e] = g[kept_e] - cross.T @ y_r
    beta /= scale
    aliased = np.ones(p, dtype=bool)
    aliased[rest] = False
    aliased[kept_e] = False
    inv = InverseInfo(p=p, scale=scale, rest=rest, run=kept_e, s_inv=s_inv, cross=cross)
    return Solution(beta=beta, aliased=aliased, inv_info=inv)


def _dense(a: sparse.csr_array, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    if not (len(rows) and len(cols)):
        return np.zeros((len(rows), len(cols)))
    return a[rows][:, cols].toarray()


def _cho_inverse(lower: np.ndarray) -> np.ndarray:
    """The inverse of L L' from its lower factor, symmetric to the last bit. (Two
    triangular solves against the identity: LAPACK's potri took 0.1-0.4 s on a 52 x 52
    factor with OpenBLAS threads on a busy machine, where this takes 0.2 ms.)"""
    inv = linalg.cho_solve((lower, True), np.eye(len(lower)))
    return 0.5 * (inv + inv.T)


def _pivot_run(m_pp: np.ndarray, c: sparse.csc_array, tol: float) -> np.ndarray:
    """Step 2 of the module docstring: which columns of the run E are kept.

    ``m_pp`` is the scaled block of P's kept columns, ``c`` the scaled A_PE (csc)."""
    n = c.shape[1]
    keep = np.ones(n, dtype=bool)
    if not m_pp.size or not n:
        return keep
    full = m_pp - (c @ c.T).toarray()
    ev = np.linalg.eigvalsh(full)
    if not ev[0] > RESOLVED * max(ev[-1], 1.0):
        # P and E are (nearly) dependent: the bound below would divide rounding noise
        # (~1e-14 in this matrix's small eigenvalue) by a small number and come out far
        # above tol (2e-10 at 12,000 levels, where the true bound is 0); check every column
        suspects = np.arange(n)
    else:
        factor = linalg.cholesky(full, lower=True)
        bound = np.empty(n)
        step = max(1, CHUNK // len(m_pp))
        for a in range(0, n, step):
            z = linalg.solve_triangular(factor, c[:, a : a + step].toarray(), lower=True)
            bound[a : a + step] = 1.0 / (1.0 + np.einsum("ij,ij->j", z, z))
        suspects = np.flatnonzero(~(bound > tol))
    m = m_pp.copy()
    prev = 0
    for j in suspects:
        if j > prev:  # every column between two suspects is kept
            blk = c[:, prev:j]
            m -= (blk @ blk.T).toarray()
        cj = np.zeros(len(m))
        lo, hi = c.indptr[j], c.indptr[j + 1]
        cj[c.indices[lo:hi]] = c.data[lo:hi]
        try:
            r = 1.0 - float(cj @ linalg.cho_solve(linalg.cho_factor(m, lower=True), cj))
        except linalg.LinAlgError:
            r = 0.0
        if r > tol:
            m -= np.outer(cj, cj)
        else:
            keep[j] = False
        prev = j + 1
    _resolve_hidden(m_pp, c, keep, tol)
    return keep


def _resolve_hidden(m_pp: np.ndarray, c: sparse.csc_array, keep: np.ndarray, tol: float) -> None:
    """Set aside what rounding hid from the per-column test of step 2 (``keep`` updated).

    A dependency between P and E spread over thousands of levels gives each level a small
    share, and the last level's residual is rounding noise divided by that share: 2e-10 at
    12,000 levels where it is 0. Seen from P the dependency is plain: a combination v of P
    whose squared sine against the kept E columns (the generalized eigenvalue of
    M v = lambda m_pp v, M = m_pp less the kept columns' c c') is <= tol. For each such v
    the last kept column of E in it is set aside, the one the design-order rule picks."""
    kept = np.flatnonzero(keep)
    ck = c[:, kept]
    m = m_pp - (ck @ ck.T).toarray()
    for _ in range(len(m_pp)):
        lam, vec = linalg.eigh(m, m_pp)
        if lam[0] > tol:
            return
        share = np.abs(ck.T @ vec[:, 0])
        involved = np.flatnonzero((share > 1e-6 * share.max()) & keep[kept])
        if not len(involved):
            return
        j = kept[involved[-1]]
        keep[j] = False
        cj = c[:, [j]].toarray()
        m += cj @ cj.T


def condition_number(xtwx: np.ndarray | sparse.sparray, sol: Solution) -> float:
    """Condition number of the correlation-scaled X'WX on the kept columns: exact up to
    :data:`DENSE_EIG_MAX` columns, above that the largest eigenvalue of the matrix and of
    its inverse by Lanczos iteration (relative accuracy ~1e-6; NaN if it does not settle)."""
    kept = np.flatnonzero(~sol.aliased)
    if not len(kept):
        return math.nan
    a = as_sparse(xtwx)[kept][:, kept]
    d = np.sqrt(a.diagonal())
    inv_d = sparse.diags_array(1.0 / d)
    corr = (inv_d @ a @ inv_d).tocsr()
    if len(kept) <= DENSE_EIG_MAX:
        ev = np.linalg.eigvalsh(corr.toarray())
        return float(ev[-1] / ev[0]) if ev[0] > 0 else math.inf
    try:
        big = splinalg.eigsh(corr, k=1, which="LA", tol=1e-8, return_eigenvectors=False)[0]
        inv_big = splinalg.eigsh(
            sol.inv_info.scaled_operator(kept),
            k=1,
            which="LA",
            tol=1e-8,
            return_eigenvectors=False,
        )[0]
    except splinalg.ArpackNoConvergence:
        return math.nan
    return float(big * inv_big)
