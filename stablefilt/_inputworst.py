"""The largest first-order change of one bank for one given input, bounded by
a concave maximisation (docs/theory.md section 9.5).

For signals ``X`` (``N x F_in``) the first-order change of a bank is
``Y~_ig = sum_{j,f} E~_ij Gamma_fg(lam_i, lam_j) X~_jf``, and

``sup_{||E||_2 <= 1} ||Y||_F = sup_U ||P M Q^T||_* <= sup_W tr((C^T (sum_i W_i (x) phi_i phi_i^T) C)^(1/2))``

with ``Q^T Q = sum_j (X~_j X~_j^T) (x) (phi_j phi_j^T)``, ``C = M R^T`` (``R``
the square root of ``Q^T Q``) and ``W_i`` positive semidefinite ``F_out x F_out``
blocks with ``sum_i tr W_i = 1``. The right side is the supremum of a concave
function over a convex set; Frank-Wolfe iterations approach it, and at every
iterate concavity gives the upper bound ``f(W) + max_i lambda_max(G_i) -
sum_i tr(G_i W_i)`` (``G`` the gradient), which is what is returned, with
float64 error terms.
"""

from __future__ import annotations

import numpy as np

from ._exact import UNIT
from ._filters import Basis, basis_values
from ._joint import block_kernels
from ._series import REL_ALLOW

#: Frank-Wolfe iterations per signal.
ITERS = 40


def _sqrt_psd(a):
    w, v = np.linalg.eigh(0.5 * (a + a.T))
    return (v * np.sqrt(np.maximum(w, 0.0))) @ v.T


def input_worst(taps, basis: Basis, lam, vecs, z, slack: float = 0.0, iters: int = ITERS) -> np.ndarray:
    """Upper bounds ``(B,)`` on ``sup_{||E||_2 <= 1} ||DH(S)[E S + S E] z_b||_F``
    (first order, per unit eps) for signals ``z`` ``(B, N, F_in)``, with ``lam``,
    ``vecs`` the computed eigenpairs of ``S`` (eigenvalues within ``slack``)."""
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        taps = taps[:, None, None]
    k = taps.shape[0]
    lam = np.asarray(lam, dtype=np.float64)
    lo, hi = float(lam.min()), float(lam.max())
    if not hi > lo:
        lo, hi = lo - 1e-6 * max(1.0, abs(lo)), hi + 1e-6 * max(1.0, abs(hi))
    split = Basis("chebyshev", (lo, hi))
    m, dm, (fout, fin), _ = block_kernels(taps, basis, split, "gamma", True)
    m, dm = m[0], dm[0]  # (F_out K, F_in K)
    phi = basis_values(lam, k, split)  # (N, K), entries in [-1, 1]
    n = lam.size
    # Error terms (docs/theory.md 9.5): the kernel matrix (dM), the computed
    # eigenvalues (slack times a Markov bound on the kernel's derivative), each
    # moving the Schur multiplier by at most its Frobenius norm (N max entry).
    ka = np.arange(k, dtype=np.float64)
    dmax = 2.0 / (hi - lo) * float(np.sum(np.abs(m).reshape(fout, k, fin, k) * (ka[None, :, None, None] ** 2
                                                                              + ka[None, None, None, :] ** 2)))
    kernel_err = n * (float(np.abs(dm).sum()) + slack * dmax) + 4.0 * k * UNIT * n * float(np.abs(m).sum())
    zt = np.einsum("ni,bnf->bif", vecs, np.asarray(z, dtype=np.float64))
    out = np.empty(zt.shape[0])
    outer_phi = np.einsum("ia,ib->iab", phi, phi)  # (N, K, K)
    for b in range(zt.shape[0]):
        xt = zt[b]  # (N, F_in)
        qtq = np.einsum("ie,if,iab->eafb", xt, xt, outer_phi).reshape(fin * k, fin * k)
        c = m @ _sqrt_psd(qtq)  # (F_out K, F_in K)
        out[b] = _frank_wolfe(c, phi, fout, k, iters) + kernel_err * float(np.linalg.norm(xt))
    return out * (1 + 1e-8)


def value_and_gradient(c, w, phi2, k: int, delta: float):
    """``(f(W), G)`` for ``f(W) = tr((C^T S(W) C + delta I)^(1/2))``,
    ``S(W) = sum_i W_i (x) phi_i phi_i^T`` (``w`` ``(N, F, F)``, ``phi2`` the
    rows ``phi_i (x) phi_i``), and its gradient blocks
    ``G_i = (1/2) Phi_i^T C (C^T S C + delta I)^(-1/2) C^T Phi_i`` (docs/theory.md 9.5)."""
    n, f = w.shape[0], w.shape[1]
    dim = c.shape[1]
    s = (w.reshape(n, f * f).T @ phi2).reshape(f, f, k, k).transpose(0, 2, 1, 3).reshape(f * k, f * k)
    y = c.T @ s @ c
    ev, ew = np.linalg.eigh(0.5 * (y + y.T) + delta * np.eye(dim))
    ev = np.maximum(ev, delta)
    inv_half = (ew / np.sqrt(ev)) @ ew.T
    tmat = (0.5 * c @ inv_half @ c.T).reshape(f, k, f, k)
    g = (phi2 @ tmat.transpose(1, 3, 0, 2).reshape(k * k, f * f)).reshape(n, f, f)
    return float(np.sum(np.sqrt(ev))), g


def _frank_wolfe(c, phi, fout: int, k: int, iters: int) -> float:
    """``min over iterates of f(W) + max_i lambda_max(G_i) - <G, W>``: an upper
    bound on ``sup_W tr((C^T S(W) C + delta I)^(1/2))`` (concavity), with
    ``S(W) = sum_i W_i (x) phi_i phi_i^T``."""
    n = phi.shape[0]
    scale = float(np.linalg.norm(c, 2)) ** 2 * k + 1e-300
    delta = 1e-12 * scale
    w = np.repeat(np.eye(fout)[None] / (n * fout), n, axis=0)  # (N, F, F)
    best = np.inf
    dim = c.shape[1]
    phi2 = np.einsum("ia,ib->iab", phi, phi).reshape(n, k * k)  # (N, K^2)
    for t in range(iters):
        f, g = value_and_gradient(c, w, phi2, k, delta)
        gv, gw = np.linalg.eigh(g)
        top = gv[:, -1]
        i = int(np.argmax(top))
        inner = float(np.sum(g * w))
        # f(W*) <= f(W) + <G, W* - W> <= f(W) + max_i lambda_max(G_i) - <G, W>;
        # allowances for the eigensolvers (relative, common practice).
        bound = f * (1 + 64 * dim * UNIT) + top[i] - inner + 1e-9 * abs(top[i]) + 1e-9 * abs(inner)
        best = min(best, bound)
        u = gw[i, :, -1]
        step = 2.0 / (t + 3.0)
        w *= 1 - step
        w[i] += step * np.outer(u, u)
    return max(best, 0.0) * (1 + REL_ALLOW)
