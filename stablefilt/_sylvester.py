"""Iterative solves of the relative-change equation ``S E + E S = D`` with a
sparse ``S``, for graphs too large to decompose densely (docs/theory.md
section 2, "At scale").

``minres``
  MINRES (Paige and Saunders, "Solution of sparse indefinite systems of
  linear equations", SIAM J. Numer. Anal. 12, 1975; ``scipy.sparse.linalg.
  minres``) on the Kronecker-sum operator ``L(E) = S E + E S``, applied
  matrix-free as ``S E + (S E)^T`` on symmetric ``E`` (one sparse-dense
  product per step). ``L`` is symmetric in the Frobenius inner product
  (``<L(X), Y> = tr(X S Y) + tr(S X Y) = <X, L(Y)>``), with eigenvalues
  ``lam_i + lam_j``, so MINRES applies even when ``S`` is indefinite or
  singular. ``E`` is dense ``N x N``: memory ``~8 N^2`` bytes per vector.
``diagonal``
  the change restricted to a diagonal ``E = diag(e)``: ``D_ij = S_ij (e_i +
  e_j)`` on the entries of ``S`` and 0 elsewhere, a sparse least-squares
  problem in ``N`` unknowns solved by LSQR (Paige and Saunders, ACM TOMS 8,
  1982; ``scipy.sparse.linalg.lsqr``). Its cost is ``O(nnz(S))`` per step, so
  it scales to ``10^5`` nodes and beyond; it explains exactly the changes
  ``S_ij (1 + e_i + e_j)`` (entry-wise rescaling, the ``diagonal`` and
  ``scaling`` perturbations) and reports a residual for any other.

Both stop at a budget of iterations and wall time and report the residual
``||S E + E S - D||_F`` of what they return.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ._memory import dense_bytes, require


@dataclasses.dataclass(frozen=True)
class IterativeSolution:
    """An approximate solution of ``S E + E S = D``.

    Attributes:
      e: dense symmetric ``(N, N)`` (``minres``) or the diagonal ``(N,)``
        (``diagonal``).
      residual: ``||S E + E S - D||_F``, computed from the returned ``e``.
      rhs_norm: ``||D||_F``.
      iterations: iterations made.
      converged: the solver met its tolerance within the budget.
      seconds: wall time.
      method: ``minres`` or ``diagonal``.
    """

    e: np.ndarray
    residual: float
    rhs_norm: float
    iterations: int
    converged: bool
    seconds: float
    method: str


class _Stop(Exception):
    pass


def kron_sum_operator(s: sp.csr_array, on_product=None) -> spla.LinearOperator:
    """``vec(E) -> vec(S E + E S)`` for symmetric ``E`` (row-major vec),
    matrix-free: ``S E + (S E)^T``. ``on_product`` is called before each
    product (it may raise to stop the solver)."""
    n = s.shape[0]

    def mv(x):
        if on_product is not None:
            on_product()
        e = x.reshape(n, n)
        se = s @ e
        return (se + se.T).ravel()

    return spla.LinearOperator((n * n, n * n), matvec=mv, rmatvec=mv, dtype=np.float64)


def minres_sylvester(s, d, *, tol: float = 1e-10, maxiter: int = 2000, seconds: float = 20.0,
                     progress=None) -> IterativeSolution:
    """``E`` with ``S E + E S = D`` by MINRES on the Kronecker sum.

    Args:
      s: sparse symmetric ``S`` ``(N, N)``.
      d: symmetric ``D`` ``(N, N)``, dense or sparse.
      tol: relative residual at which MINRES stops (``rtol``).
      maxiter: most iterations (one product with ``S`` each).
      seconds: most wall time; the iterate reached then is returned.
      progress: called with 1 after each iteration, or None.

    Raises:
      MemoryRefused: the dense ``N x N`` work vectors do not fit.

    Equivalent to ``scipy.linalg.solve_sylvester(S, S, D)`` (Bartels-Stewart)
    when it converges and ``L`` is nonsingular; where some ``lam_i + lam_j =
    0`` MINRES returns a least-squares solution from the start 0.
    """
    s = sp.csr_array(s, dtype=np.float64)
    n = s.shape[0]
    # MINRES keeps about seven vectors of N^2, plus D, E and a product.
    require(dense_bytes(n, 10), f"an iterative relative distance on {n} nodes (dense N x N work arrays)")
    dd = d.toarray() if sp.issparse(d) else np.asarray(d, dtype=np.float64)
    b = (0.5 * (dd + dd.T)).ravel()
    t0 = time.perf_counter()
    count = [0]
    state = {"x": np.zeros_like(b)}

    def tick():
        if time.perf_counter() - t0 > seconds:
            raise _Stop

    def callback(xk):
        count[0] += 1
        state["x"] = xk  # the iterate of the last completed iteration
        if progress is not None:
            progress(1)

    op = kron_sum_operator(s, tick)
    converged = False
    try:
        x, info = spla.minres(op, b, rtol=tol, maxiter=maxiter, callback=callback)
        converged = info == 0
    except _Stop:  # out of time: the last completed iterate; its residual is measured below
        x = np.array(state["x"])
    e = x.reshape(n, n)
    e = 0.5 * (e + e.T)
    se = s @ e
    r = se + se.T - dd
    return IterativeSolution(e, float(np.linalg.norm(r)), float(np.linalg.norm(dd)), count[0], converged,
                             time.perf_counter() - t0, "minres")


def diagonal_sylvester(s, d, *, tol: float = 1e-12, maxiter: int = 500, seconds: float = 20.0) -> IterativeSolution:
    """The diagonal ``E = diag(e)`` closest to solving ``S E + E S = D`` in
    the Frobenius norm: least squares over ``e`` of ``sum_ij (S_ij (e_i +
    e_j) - D_ij)^2`` by LSQR (off-diagonal entries counted twice, as the
    Frobenius norm does). Entries of ``D`` outside the pattern of ``S`` can
    never be matched and stay in the residual.

    Args:
      s, d: sparse symmetric ``(N, N)``.
      tol: LSQR's ``atol`` and ``btol``.
      maxiter: most LSQR iterations; ``seconds``: most wall time.
    """
    t0 = time.perf_counter()
    s = sp.csr_array(s, dtype=np.float64)
    d = sp.csr_array(d, dtype=np.float64)
    n = s.shape[0]
    u = sp.triu(s, k=0).tocoo()
    rows, cols, vals = u.row, u.col, u.data
    w = np.where(rows == cols, 1.0, np.sqrt(2.0))  # each off-diagonal entry stands for two
    k = len(vals)
    idx = np.arange(k)
    b_mat = sp.coo_array((np.concatenate([w * vals, w * vals]), (np.concatenate([idx, idx]),
                                                                 np.concatenate([rows, cols]))),
                         shape=(k, n)).tocsr()
    rhs = w * np.asarray(d[rows, cols]).ravel()
    count = [0]

    def mv(x):
        count[0] += 1
        if time.perf_counter() - t0 > seconds:
            raise _Stop
        return b_mat @ x

    def rmv(y):
        return b_mat.T @ y

    op = spla.LinearOperator((k, n), matvec=mv, rmatvec=rmv, dtype=np.float64)
    converged = False
    try:
        out = spla.lsqr(op, rhs, atol=tol, btol=tol, iter_lim=maxiter)
        e, istop = out[0], out[1]
        converged = istop in (1, 2, 4, 5) and istop != 7
    except _Stop:  # out of time before LSQR returned: no fit, the whole change stays residual
        e = np.zeros(n)
    ed = sp.diags_array(e)
    r = s @ ed + ed @ s - d
    r = sp.csr_array(r)
    return IterativeSolution(e, float(sp.linalg.norm(r)) if r.nnz else 0.0, float(sp.linalg.norm(d)) if d.nnz else 0.0,
                             count[0], bool(converged), time.perf_counter() - t0, "diagonal")
