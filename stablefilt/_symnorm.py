"""A proved upper bound on the 2-norm of a dense symmetric matrix, cheaper
than its eigenvalues (docs/theory.md section 2, "Cost of the eigenbasis
path").

A Lanczos value ``theta ~ max |lam(M)|`` (``scipy.sparse.linalg.eigsh``,
``which="LM"``, a bounded number of products) gives ``sigma = theta (1 +
t)``; Cholesky factorisations of ``fl(sigma I - M)`` and ``fl(sigma I + M)``
that complete prove ``|lam(M)| <= sigma + gamma_(N+1) ||R||_F^2 + u (sigma +
max_i |M_ii|)`` (Higham, "Accuracy and Stability of Numerical Algorithms",
2nd ed., 2002, Thm 10.3: the computed factor ``R`` satisfies ``A + dA = R^T
R`` with ``|dA| <= gamma_(N+1) |R^T| |R|``). Two factorisations cost ``2/3
N^3`` flops in level-3 BLAS, against ``4/3 N^3``, half of them level-2, for
the tridiagonal reduction behind ``eigvalsh``. When no factorisation
completes for ``t`` in :data:`MARGINS`, the norm is ``max |eigvalsh(M)|``
with an eigensolver allowance.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
import scipy.sparse.linalg as spla

from ._exact import UNIT, gamma

#: Relative margins ``t`` tried above the Lanczos value.
MARGINS = (1e-10, 1e-7)
#: Most products of the Lanczos step.
LANCZOS_PRODUCTS = 600

def _side_bound(m: np.ndarray, sigma: float, sign: float) -> float | None:
    """A proved bound on ``lam_max(sign M)`` from a Cholesky factorisation
    of ``fl(sigma I - sign M)``, or None when it does not complete."""
    n = m.shape[0]
    a = -sign * m
    a[np.diag_indices(n)] += sigma
    try:
        r = sla.cholesky(a, lower=False, overwrite_a=True, check_finite=False)
    except (np.linalg.LinAlgError, ValueError):
        return None
    fro2 = float(np.einsum("ij,ij->", r, r))  # scipy zeroes the lower triangle of R
    if not np.isfinite(fro2):
        return None
    diag = float(np.max(np.abs(np.diagonal(m)))) if n else 0.0
    return sigma + gamma(n + 1) * fro2 * 1.01 + UNIT * (sigma + diag)


def norm2_upper(m: np.ndarray) -> tuple[float, str]:
    """``(b, method)`` with ``b >= ||M||_2`` for a symmetric dense ``M``:
    ``method`` is ``"lanczos+cholesky"`` (``b`` above the norm by about
    ``1e-9`` relative) or ``"eigvalsh"`` (``b`` the computed norm with an
    eigensolver allowance of ``8 (N + 1) u``, common practice)."""
    m = np.asarray(m, dtype=np.float64)
    n = m.shape[0]
    if n == 0 or not np.any(m):
        return 0.0, "eigvalsh"
    if n >= 3:
        ncv = min(n, 20)
        try:
            theta = float(abs(spla.eigsh(m, k=1, which="LM", tol=1e-11, ncv=ncv,
                                         maxiter=max(1, LANCZOS_PRODUCTS // ncv),
                                         return_eigenvectors=False)[0]))
        except (spla.ArpackNoConvergence, spla.ArpackError):
            theta = 0.0
        if theta > 0 and np.isfinite(theta):
            for t in MARGINS:
                sigma = theta * (1 + t)
                hi = _side_bound(m, sigma, 1.0)
                lo = _side_bound(m, sigma, -1.0) if hi is not None else None
                if hi is not None and lo is not None:
                    return max(hi, lo), "lanczos+cholesky"
    w = sla.eigh(m, eigvals_only=True, driver="evd", check_finite=False)
    # A backward-stable eigensolver errs by a modest multiple of N u ||M||
    # (Weyl's inequality); the allowance 8 (N + 1) u is common practice.
    return float(max(abs(w[0]), abs(w[-1]))) * (1 + 8 * (n + 1) * UNIT), "eigvalsh"
