"""The float64 machinery of the Gamma kernel (docs/theory.md, sections 4, 5
and 8): kernel matrices of a filter's taps in a split basis, their PSD parts
and matrix absolute value, quadratic forms and the direct ``N x N`` split at
a graph's eigenvalues, each with a bound on its float64 error
(docs/theory.md section 6).
"""

from __future__ import annotations

import numpy as np

from ._exact import UNIT, kernel_transform
from ._filters import Basis, basis_values
from ._series import flat_taps, with_allowance


def product_tensor(k: int) -> np.ndarray:
    """``P[a, b, n]``: ``T_a T_b = sum_n P[a, b, n] T_n``."""
    p = np.zeros((k, k, max(2 * k - 1, 1)))
    for a in range(k):
        for b in range(k):
            p[a, b, a + b] += 0.5
            p[a, b, abs(a - b)] += 0.5
    return p


def kernel_matrices(cols, basis, splits):
    """Per split, ``(M, dM)``: the kernel matrices ``(F, K, K)`` of each
    column of taps (docs/theory.md section 4; exact change of basis) and an
    entrywise bound ``dM`` on their float64 error."""
    k = cols.shape[0]
    out = []
    for split in splits:
        t = kernel_transform(k, basis, split)
        m = np.einsum("abj,jf->fab", t, cols)
        dm = 2.0 * (k + 2) * UNIT * np.einsum("abj,jf->fab", np.abs(t), np.abs(cols))
        out.append((m, dm))
    return out


def psd_parts(m):
    """``(M_+, M_-)``, the positive and negative semidefinite parts of the
    symmetric part of ``m`` (``..., K, K``): ``M = M_+ - M_-`` by one
    eigendecomposition (docs/theory.md section 5 item 2)."""
    w, v = np.linalg.eigh(0.5 * (m + np.swapaxes(m, -1, -2)))
    plus = np.einsum("...ai,...i,...bi->...ab", v, np.maximum(w, 0), v)
    minus = np.einsum("...ai,...i,...bi->...ab", v, np.maximum(-w, 0), v)
    return plus, minus


def abs_kernel(m, dm):
    """``|M| = M_+ + M_-`` ``(F, K, K)`` and, per filter, a bound on
    ``|| |M| - |M_exact| ||_2``: ``sqrt(2) ||dM||_F`` (the matrix absolute
    value is sqrt(2)-Lipschitz in the Frobenius norm: Araki and Yamagami,
    Comm. Math. Phys. 81, 1981) plus ``4 K^2 u ||M||_F`` for the
    eigendecomposition (backward stable; common practice)."""
    plus, minus = psd_parts(m)
    k = m.shape[-1]
    err = np.sqrt(2.0) * np.linalg.norm(dm, axis=(1, 2)) + 4.0 * k * k * UNIT * np.linalg.norm(m, axis=(1, 2))
    return plus + minus, err


def eigenvalue_slack(lam) -> float:
    """How far computed eigenvalues of a symmetric matrix may be from the true
    ones: ``8 N u max |lam|`` (a backward-stable eigensolver returns the exact
    eigenvalues of ``S + dS`` with ``||dS||_2`` a modest multiple of
    ``N u ||S||_2``, and Weyl's inequality moves each by at most ``||dS||_2``;
    the constant 8 is common practice)."""
    lam = np.asarray(lam, dtype=np.float64)
    return 8.0 * lam.size * UNIT * float(np.max(np.abs(lam))) if lam.size else 0.0


def basis_sizes(k, split, lam, slack):
    """Bounds ``(P, D)`` on ``|p_a|`` and ``|p_a'|`` within ``slack`` of the
    points ``lam``: Chebyshev of ``[a, b]``: ``|T_a'| <= a^2`` in the mapped
    variable (Markov), so ``D_a = 2 a^2 / (b - a)`` and ``P_a = 1`` inside;
    monomials: ``P_a = R^a``, ``D_a = a R^(a-1)``, ``R = max |lam| + slack``."""
    ka = np.arange(k, dtype=np.float64)
    if split.kind == "monomial":
        r = float(np.max(np.abs(lam))) + slack
        return r**ka, ka * r ** np.maximum(ka - 1, 0)
    lo, hi = split.interval
    d = 2.0 * ka**2 / (hi - lo)
    out = max(0.0, float(np.max(lam)) + slack - hi, lo - float(np.min(lam)) + slack)
    return 1.0 + d * out, d


def quad_upper(phi, absm, err, split=None, lam=None, slack=0.0):
    """Upper bounds ``(F, N)`` on ``phi_i^T |M_exact| phi_i`` at points with
    basis values ``phi`` ``(N, K)``: the float value plus ``err ||phi_i||^2``,
    round-off in the sum (``2 K u |phi|^T |A| |phi|``) and in ``phi`` itself
    (``2 K^2 u ||A||_F ||phi_i||^2``), and, for points ``lam`` known only to
    within ``slack`` (computed eigenvalues), ``slack sup |q'| <= slack 2 D^T |A| P``."""
    k = phi.shape[-1]
    q = np.einsum("ia,fab,ib->fi", phi, absm, phi, optimize=True)
    aq = np.einsum("ia,fab,ib->fi", np.abs(phi), np.abs(absm), np.abs(phi), optimize=True)
    n2 = np.sum(phi**2, axis=-1)
    fro = np.linalg.norm(absm, axis=(1, 2))
    out = np.maximum(q, 0) + (err + 2.0 * k * k * UNIT * fro)[:, None] * n2[None] + 2.0 * k * UNIT * aq
    if slack > 0:
        pa, da = basis_sizes(k, split, lam, slack)
        move = slack * 2.0 * np.einsum("a,fab,b->f", da, np.abs(absm), pa) + (err + 2.0 * k * k * UNIT * fro) * (
            2.0 * slack * float(np.linalg.norm(pa) * np.linalg.norm(da)))
        out = out + move[:, None]
    return out


def direct_split(lam, k, split, m, dm, slack=0.0):
    """``max_i (|Gamma|)_ii`` per filter, ``|Gamma|`` the matrix absolute
    value of ``Gamma = Phi M Phi^T`` at the eigenvalues (the Schur argument of
    docs/theory.md section 5 item 2 applied to the ``N x N`` kernel itself),
    with ``Phi`` the Chebyshev basis of the interval (values in [-1, 1]; the
    monomial basis cancels badly away from 0), plus a bound on the float64
    error: ``||Gamma - Gamma_float||_F`` (``dM``, the sums, and ``Phi``) and
    ``8 N u ||Gamma||_F`` for the eigendecomposition. Since
    ``||E o D||_2 <= ||E||_2 ||D||_2`` for Hadamard products (Horn & Johnson,
    "Topics in Matrix Analysis", 1991, ch. 5; from memory), an error ``D``
    in ``Gamma`` moves the bound by at most ``||D||_2``. Eigenvalues known
    to within ``slack`` move each entry by at most ``2 slack D^T |M| P``
    (:func:`basis_sizes`)."""
    phi = basis_values(lam, k, split)  # (N, K)
    n = lam.size
    g = np.einsum("ia,fab,jb->fij", phi, m, phi, optimize=True)
    ag = np.einsum("ia,fab,jb->fij", np.abs(phi), np.abs(m), np.abs(phi), optimize=True)
    gp, gm = psd_parts(g)
    direct = np.diagonal(gp + gm, axis1=1, axis2=2).max(axis=1)
    n2 = float(np.sum(phi**2))
    scale_m = np.linalg.norm(dm, axis=(1, 2)) + 2.0 * k * k * UNIT * np.linalg.norm(m, axis=(1, 2))
    err = scale_m * n2 + 2.0 * k * UNIT * np.linalg.norm(ag, axis=(1, 2)) + 8.0 * n * UNIT * np.linalg.norm(g, axis=(1, 2))
    if slack > 0:
        pa, da = basis_sizes(k, split, lam, slack)
        err = err + n * slack * 2.0 * np.einsum("a,fab,b->f", da, np.abs(m), pa)
    return with_allowance(np.maximum(direct, 0) + err, np.abs(g).max(axis=(1, 2)))


def spectral_first_order(taps, basis, eigenvalues, eigenvectors, z, eps: float) -> np.ndarray:
    """Input-specific first-order bounds ``(B, F_in, F_out)`` per signal and
    filter: ``eps sqrt(max_i q(lam_i)) sqrt(sum_j q(lam_j) xt_j^2)`` with
    ``q = phi^T |M| phi`` and ``xt = V^T x_f`` the signal's spectrum.

    Derived (docs/theory.md section 8): with ``Gamma_ij = <a_i, b_j>`` and
    ``||a_i||^2 = ||b_i||^2 = q(lam_i)``, ``(Et o Gamma) xt =
    sum_r D(a^r) Et D(b^r) xt``, whose norm is at most
    ``||[D(a^1) .. D(a^R)]|| ||Et|| ||[D(b^r) xt]_r||``. The smaller value over
    the Chebyshev and monomial splits is kept.
    """
    taps = np.asarray(taps, dtype=np.float64)
    k, fin, fout = taps.shape
    cols, _ = flat_taps(taps)
    lam = np.asarray(eigenvalues, dtype=np.float64)
    lo, hi = float(lam.min()), float(lam.max())
    splits = [Basis("chebyshev", (lo, hi))] if hi > lo else []
    splits.append(Basis())
    zt2 = np.einsum("ni,bnf->bif", eigenvectors, z) ** 2  # (B, N, F_in)
    best = None
    for split, (m, dm) in zip(splits, kernel_matrices(cols, basis, splits)):
        # Upper bounds on phi^T |M| phi with the float64 error included: the
        # monomial split cancels badly for eigenvalues far from 0.
        q = quad_upper(basis_values(lam, k, split), *abs_kernel(m, dm), split, lam,
                        eigenvalue_slack(lam)).reshape(fin, fout, -1)
        val = np.sqrt(q.max(axis=2))[None] * np.sqrt(np.einsum("fgi,bif->bfg", q, zt2, optimize=True))
        best = val if best is None else np.minimum(best, val)
    return with_allowance(eps * best, 0.0)
