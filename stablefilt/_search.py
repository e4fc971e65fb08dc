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
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._filters import Basis, frequency_response, response_derivative


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
        out.append(np.einsum("ia,af,ja->fij", v, hw, v))  # (F, N, N)
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


def _divided(taps_cols, w, basis):
    """``h^[1](w_i, w_j)`` per filter, ``(F, N, N)``."""
    hw = frequency_response(taps_cols, w, basis).T  # (F, N)
    dw = response_derivative(taps_cols, w, basis).T
    gap = w[:, None] - w[None, :]
    close = np.abs(gap) <= 1e-7 * max(1.0, np.abs(w).max())
    mid = 0.5 * (w[:, None] + w[None, :])
    dmid = response_derivative(taps_cols, mid.ravel(), basis).T.reshape(-1, *gap.shape)
    safe = np.where(close, 1.0, gap)
    out = np.where(close[None], dmid, (hw[:, :, None] - hw[:, None, :]) / safe[None])
    del dw
    return out


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
    g = (w0[:, None] + w0[None, :]) * _divided(cols, w0, basis)
    gn = np.sqrt(np.sum(g**2, axis=0))
    for idx in np.argsort(gn, axis=None)[::-1][:2]:
        i, j = divmod(int(idx), n)
        e = np.outer(v0[:, i], v0[:, j])
        starts.append((f"pair{i},{j}", e + e.T))
    while len(starts) < restarts + 6:
        e = rng.standard_normal((n, n))
        starts.append(("random", e + e.T))
    best = SearchResult(np.zeros((n, n)), 0.0, "none", ())
    for name, e in starts:
        e = _project(e, eps)
        hist = []
        for _ in range(iters):
            s_hat = s + e @ s + s @ e
            d = change_operator(s, s_hat, taps, basis)
            uu, sv, vt = np.linalg.svd(d)
            val = float(sv[0])
            hist.append(val)
            if val > best.change:
                best = SearchResult(e.copy(), val, name, tuple(hist))
            # Gradient of <u, D v> with respect to S_hat, then E.
            u = uu[:, 0].reshape(fout, n).T  # (N, F_out)
            x = vt[0].reshape(fin, n).T  # (N, F_in)
            w, v = np.linalg.eigh(s_hat)
            dd = _divided(cols, w, basis).reshape(fin, fout, n, n)
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
        val = measured_change(s, s + e @ s + s @ e, taps, basis)
        if val > best.change:
            best = SearchResult(e.copy(), val, name, tuple(hist + [val]))
    return best


def _project(e, eps):
    """Nearest point of the ball ``||E||_2 <= eps`` (clip eigenvalues)."""
    e = 0.5 * (e + e.T)
    lam, q = np.linalg.eigh(e)
    scale = np.max(np.abs(lam))
    if scale == 0:
        return e
    lam = np.clip(lam * (eps / scale) if scale > eps else lam, -eps, eps)
    return (q * lam) @ q.T


def _extreme(g, eps):
    """``argmax_{||E|| <= eps} <G, E> = eps Q sign(Lambda) Q^T``."""
    lam, q = np.linalg.eigh(g)
    return (q * (eps * np.where(lam >= 0, 1.0, -1.0))) @ q.T
