"""Search for the relative perturbation that moves a filter or bank the most,
in float64 on dense matrices (small graphs).

Maximises ``||H(S + E S + S E) - H(S)||_2`` over symmetric ``E`` with
``||E||_2 <= eps``. The objective is convex in ``E`` near the origin, so its
maximum sits at an extreme point of the ball; each step takes the
linearisation ``<G, E>`` at the current ``E`` and jumps to its maximiser
``eps Q sign(Lambda) Q^T`` (``G = Q Lambda Q^T``), the generalised power
method (Journee, Nesterov, Richtarik, Sepulchre, "Generalized power method for
sparse principal component analysis", JMLR 2010). The gradient ``G`` comes
from the Daleckii-Krein formula for the derivative of ``H`` (Bhatia, "Matrix
Analysis", 1997, ch. V). Every value returned is a change measured on an
actually perturbed matrix.

Also here: the realised ``lower`` figure of a filter certificate
(:func:`lower_change`), power iteration on the change under constructed
perturbations (scaling, and eigenvector pairs of the kernel), matrix-free.
"""

from __future__ import annotations

import dataclasses
import functools
import time
from typing import NamedTuple

import numpy as np

from ._exact import kernel_transform
from ._filters import Basis, basis_values, frequency_response, response_derivative, run_filter
from ._graph import ShiftOperator
from ._perturb import project_ball, relative_product
from ._series import flat_taps


def _dense_bank(s, taps, basis):
    """``(w, v, hw)``: eigenpairs of ``s`` and ``h`` at the eigenvalues,
    ``hw`` of shape ``(N, F)`` with ``F`` the filters of the bank."""
    w, v = np.linalg.eigh(s)
    cols = taps.reshape(taps.shape[0], -1)
    return w, v, frequency_response(cols, w, basis)


def change_operator(s, s_hat, taps, basis: Basis) -> np.ndarray:
    """The dense change ``H(S_hat) - H(S)``: ``(N, N)`` for one filter, or
    ``(N F_out, N F_in)`` acting on column-stacked ``vec(X)`` for a bank."""
    taps = np.asarray(taps, dtype=np.float64)
    out = []
    for m in (s_hat, s):
        w, v, hw = _dense_bank(m, taps, basis)
        if hw.shape[1] == 1:
            out.append(np.einsum("ia,af,ja->fij", v, hw, v))  # (1, N, N)
        else:
            # V diag(h_f) V^T for every filter f as one batched product (the
            # three-operand einsum above cost 60 ms at N = 120, F = 16; kept
            # for one filter, whose searches then round as they always did).
            out.append(np.matmul(v[None] * hw.T[:, None, :], v.T))  # (F, N, N)
    d = out[0] - out[1]
    if taps.ndim == 1:
        return d[0]
    fin, fout = taps.shape[1:]
    n = s.shape[0]
    d = d.reshape(fin, fout, n, n)
    # vec(Y)_(g, i) = sum_f sum_j d[f, g, i, j] X_(j, f)
    return d.transpose(1, 2, 0, 3).reshape(fout * n, fin * n)


def measured_change(s, s_hat, taps, basis: Basis) -> float:
    """``||H(S_hat) - H(S)||_2`` measured on dense matrices."""
    return float(np.linalg.norm(change_operator(s, s_hat, taps, basis), 2))


def divided_differences(taps_cols, w, basis):
    """First divided differences ``h^[1](w_i, w_j) = (h(w_i) - h(w_j)) /
    (w_i - w_j)`` per filter, ``(F, N, N)``, with ``h'`` at the midpoint for
    (nearly) equal ``w_i, w_j`` (Bhatia, "Matrix Analysis", 1997, ch. V)."""
    hw = frequency_response(taps_cols, w, basis).T  # (F, N)
    gap = w[:, None] - w[None, :]
    close = np.abs(gap) <= 1e-7 * max(1.0, np.abs(w).max())
    mid = 0.5 * (w[:, None] + w[None, :])
    dmid = response_derivative(taps_cols, mid.ravel(), basis).T.reshape(-1, *gap.shape)
    safe = np.where(close, 1.0, gap)
    return np.where(close[None], dmid, (hw[:, :, None] - hw[:, None, :]) / safe[None])


@dataclasses.dataclass(frozen=True)
class SearchResult:
    """The strongest perturbation found and the change it causes."""

    e: np.ndarray
    change: float
    start: str
    history: tuple[float, ...]


def worst_perturbation(s, taps, basis: Basis, eps: float, *, restarts: int = 6, iters: int = 25,
                       seed: int = 0) -> SearchResult:
    """Strongest relative perturbation found by restarted generalised power
    iterations; starts: the worst-pair ``E`` of the first-order kernel,
    ``v_i v_i^T`` at the extreme eigenvalues, scaling, and random.

    Args:
      s: dense symmetric ``(N, N)`` shift operator.
      taps: ``(K,)`` or ``(K, F_in, F_out)``.
      basis: the filter basis.
      eps: radius of the ball ``||E||_2 <= eps``.

    Returns:
      :class:`SearchResult`; ``change`` is measured on ``S + E S + S E``.
    """
    s = np.asarray(s, dtype=np.float64)
    taps = np.asarray(taps, dtype=np.float64)
    n = s.shape[0]
    rng = np.random.default_rng(seed)
    cols = taps.reshape(taps.shape[0], -1)
    bank = taps.ndim == 3
    fin, fout = (taps.shape[1], taps.shape[2]) if bank else (1, 1)
    w0, v0 = np.linalg.eigh(s)
    starts = [("scaling", np.eye(n)), ("scaling-", -np.eye(n))]
    for i in (0, n - 1):
        starts.append((f"v{i}v{i}", np.outer(v0[:, i], v0[:, i])))
    # Worst pairs of the first-order kernel 2 lam h' / divided differences.
    g = (w0[:, None] + w0[None, :]) * divided_differences(cols, w0, basis)
    gn = np.sqrt(np.sum(g**2, axis=0))
    for idx in np.argsort(gn, axis=None)[::-1][:2]:
        i, j = divmod(int(idx), n)
        e = np.outer(v0[:, i], v0[:, j])
        starts.append((f"pair{i},{j}", e + e.T))
    while len(starts) < restarts + 6:
        e = rng.standard_normal((n, n))
        starts.append(("random", e + e.T))
    best = SearchResult(np.zeros((n, n)), 0.0, "none", ())
    eye = np.eye(n)
    for name, e in starts:
        # Scale the start onto the ball (keeping its direction), then project.
        e = 0.5 * (e + e.T)
        top = float(np.max(np.abs(np.linalg.eigvalsh(e))))
        e = project_ball(e * (eps / top) if top > eps else e, eps)
        hist = []
        for _ in range(iters):
            s_hat = relative_product(s, e, eye)
            d = change_operator(s, s_hat, taps, basis)
            # Thin SVD: only the top pair is used (the full U of a (N F_out,
            # N F_in) bank's change cost 25x the thin one at N = 120, F = 16).
            uu, sv, vt = np.linalg.svd(d, full_matrices=False)
            val = float(sv[0])
            hist.append(val)
            if val > best.change:
                best = SearchResult(e.copy(), val, name, tuple(hist))
            # Gradient of <u, D v> with respect to S_hat, then E.
            u = uu[:, 0].reshape(fout, n).T  # (N, F_out)
            x = vt[0].reshape(fin, n).T  # (N, F_in)
            w, v = np.linalg.eigh(s_hat)
            dd = divided_differences(cols, w, basis).reshape(fin, fout, n, n)
            ut, xt = v.T @ u, v.T @ x
            gs = np.einsum("fgij,ig,jf->ij", dd, ut, xt)
            gs = v @ gs @ v.T
            gs = 0.5 * (gs + gs.T)
            ge = gs @ s + s @ gs
            ge = 0.5 * (ge + ge.T)
            if not np.any(ge):
                break
            new = _extreme(ge, eps)
            if np.allclose(new, e, atol=1e-12 * max(eps, 1e-300)):
                break
            e = new
        # Measure the last iterate too.
        val = measured_change(s, relative_product(s, e, eye), taps, basis)
        if val > best.change:
            best = SearchResult(e.copy(), val, name, tuple(hist + [val]))
    return best


def _extreme(g, eps):
    """``argmax_{||E|| <= eps} <G, E> = eps Q sign(Lambda) Q^T``."""
    lam, q = np.linalg.eigh(g)
    return (q * (eps * np.where(lam >= 0, 1.0, -1.0))) @ q.T


# ---------------------------------------------------------------------------
# Realised changes on the given graph (the ``lower`` figure of a certificate).


#: Largest graph for which eigenvectors are used to build worst-pair
#: perturbations for the ``lower`` figure.
LOWER_EIG_LIMIT = 600


def _bank_apply(matvec, taps, x, basis, transpose=False):
    t = np.swapaxes(taps, 1, 2) if (transpose and taps.ndim == 3) else taps
    return run_filter(matvec, t, x, basis)


def realised_change(mv_a, mv_b, taps, basis: Basis, n: int, *, start=None, iters: int = 40, seed: int = 0,
                    deadline: float | None = None) -> float:
    """A realised lower bound on ``||H_a - H_b||`` (operator 2-norm) by power
    iteration on ``D^T D`` with ``D = H_a - H_b``: every iterate gives
    ``||D x|| / ||x||``, the change of an actual signal ``x``.

    ``mv_a``, ``mv_b``: products with the two shift operators.
    ``deadline``: a ``time.perf_counter()`` value after which no further
    iteration starts (at least one is made); the best change so far is
    still a realised one.
    """
    taps = np.asarray(taps, dtype=np.float64)
    fin = taps.shape[1] if taps.ndim == 3 else 1
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, fin)) if start is None else np.asarray(start, dtype=np.float64).reshape(n, fin)
    if taps.ndim == 1:
        x = x[:, 0]

    def d(z, tr=False):
        return _bank_apply(mv_a, taps, z, basis, tr) - _bank_apply(mv_b, taps, z, basis, tr)

    best = 0.0
    for it in range(iters):
        if it and deadline is not None and time.perf_counter() > deadline:
            break
        nx = np.linalg.norm(x)
        if nx == 0 or not np.isfinite(nx):
            break
        x = x / nx
        y = d(x)
        best = max(best, float(np.linalg.norm(y)))
        x = d(y, True)
    return best


def _worst_pairs(lam, vecs, taps, basis, count=3):
    """Eigenpair indices ``(i, j)`` with the largest first-order change
    ``|Gamma_ij|`` (Frobenius over the filters of a bank)."""
    cols, _ = flat_taps(taps)
    k = cols.shape[0]
    lo, hi = float(np.min(lam)), float(np.max(lam))
    split = Basis("chebyshev", (lo, hi)) if hi > lo else Basis()  # monomials cancel away from 0
    m = np.einsum("abj,jf->fab", kernel_transform(k, basis, split), cols)
    phi = basis_values(lam, k, split)
    g = np.einsum("ia,fab,jb->ij", phi, m, phi) if cols.shape[1] == 1 else np.sqrt(
        np.einsum("fij->ij", np.einsum("ia,fab,jb->fij", phi, m, phi) ** 2))
    g = np.abs(g)
    flat = np.argsort(g, axis=None)[::-1]
    out = []
    for idx in flat:
        i, j = divmod(int(idx), g.shape[0])
        if (j, i) not in out:
            out.append((i, j))
        if len(out) >= count:
            break
    return out


class LowerChange(NamedTuple):
    """A change actually realised, and the perturbation that realised it."""

    value: float
    perturbation: str


#: Wall time of the power iterations behind one ``lower`` figure; on large
#: graphs they stop there with the largest change realised so far.
LOWER_SECONDS = 3.0


def lower_change(op: ShiftOperator, taps, basis: Basis, eps: float, *, eig=None, iters: int = 40,
                 seconds: float = LOWER_SECONDS) -> LowerChange:
    """The largest change actually realised by perturbations built here:
    ``E = +-eps I`` (scaling) and, when eigenvectors are at hand,
    ``E = +-eps (v_i v_j^T + v_j v_i^T)`` (or ``+-eps v_i v_i^T``) for the
    pairs with the largest ``|Gamma_ij|`` (docs/theory.md section 5 item 3).
    The iterations stop after ``seconds`` in all (bounded cost at scale).

    Returns a :class:`LowerChange`.
    """
    s = op.matrix
    n = s.shape[0]
    deadline = time.perf_counter() + seconds

    def s_mv(x):
        return s @ x

    best, how = 0.0, "none"
    for sign in (1.0, -1.0):
        e = sign * eps
        # E = e I gives S + E S + S E = (1 + 2 e) S exactly: one product with S
        # per step in place of the three of relative_product.
        v = realised_change(lambda x, c=1.0 + 2.0 * e: c * (s @ x), s_mv, taps, basis, n, iters=iters,
                            deadline=deadline)
        if v > best:
            best, how = v, f"scaling E = {sign * eps:+g} I"
    if eig is not None:
        lam, vecs = eig
        for i, j in _worst_pairs(lam, vecs, taps, basis):
            vi, vj = vecs[:, i], vecs[:, j]
            for sign in (1.0, -1.0):
                e = sign * eps
                if i == j:
                    def e_mv(x, vi=vi, e=e):
                        return e * np.multiply.outer(vi, vi @ x)
                else:
                    def e_mv(x, vi=vi, vj=vj, e=e):
                        return e * (np.multiply.outer(vi, vj @ x) + np.multiply.outer(vj, vi @ x))
                fin = taps.shape[1] if np.ndim(taps) == 3 else 1
                start = np.repeat(vj[:, None], fin, axis=1) + 1e-3 * np.repeat(vi[:, None], fin, axis=1)
                v = realised_change(functools.partial(relative_product, s, e_mv), s_mv, taps, basis, n, start=start,
                                    iters=iters, deadline=deadline)
                if v > best:
                    kind = f"v_{i} v_{i}^T" if i == j else f"(v_{i} v_{j}^T + v_{j} v_{i}^T)"
                    best, how = v, f"E = {sign * eps:+g} {kind}"
    return LowerChange(best, how)
