"""Seeded perturbations of a shift operator, the ways measured graphs change.

Each generator returns a :class:`Perturbed` record: the perturbed operator
and, where it is defined by construction, the relative error matrix ``E`` (or
its diagonal) and ``||E||_2``. Definitions in docs/theory.md section 2.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from ._checks import check_eps
from ._errors import StablefiltError
from ._graph import ShiftOperator, symmetric

#: Largest graph for which a dense ``E`` is built.
DENSE_LIMIT = 3000


@dataclasses.dataclass(frozen=True)
class Perturbed:
    """A perturbed shift operator.

    Attributes:
      op: ``S_hat`` (in the original node order unless ``perm`` is set).
      kind: which generator made it.
      e: the relative error matrix (dense ``(N, N)``), its diagonal
        (``(N,)``, for diagonal and scaling kinds), or None if not built.
      e_norm: ``||E||_2`` when ``e`` is known, else None.
      perm: for relabelling, ``S_hat = P^T S P`` with ``S_hat[i, j] =
        S[perm[i], perm[j]]``; None otherwise.
    """

    op: ShiftOperator
    kind: str
    e: np.ndarray | None
    e_norm: float | None
    perm: np.ndarray | None = None


def _with(op: ShiftOperator, m, keep_kind: bool = False) -> ShiftOperator:
    """The perturbed operator. Its kind is ``as-is`` unless the change keeps
    the construction (a combinatorial Laplacian rebuilt from new edge weights):
    a perturbed normalised Laplacian is no longer one, and its spectral
    interval must not be taken from the construction's ``[0, 2]``."""
    return ShiftOperator(symmetric(m), op.kind, op.scale) if keep_kind else ShiftOperator(symmetric(m))


def random_symmetric(n: int, norm: float, rng) -> np.ndarray:
    """A random symmetric ``n x n`` matrix scaled to ``||E||_2 = norm``."""
    e = rng.standard_normal((n, n))
    e = 0.5 * (e + e.T)
    s = np.max(np.abs(np.linalg.eigvalsh(e)))
    return e * (norm / s) if s > 0 else e


def relative(op: ShiftOperator, eps: float, seed: int) -> Perturbed:
    """``S + E S + S E`` with a random dense symmetric ``E``, ``||E||_2 = eps``."""
    check_eps(eps)
    n = op.nodes
    if n > DENSE_LIMIT:
        raise StablefiltError(f"a dense relative perturbation needs N <= {DENSE_LIMIT}; this graph has {n} nodes "
                              "(use the diagonal kind).")
    e = random_symmetric(n, eps, np.random.default_rng(seed))
    return Perturbed(_with(op, relative_product(op.matrix, e, np.eye(n))), "relative", e, float(eps))


def diagonal(op: ShiftOperator, eps: float, seed: int) -> Perturbed:
    """``S_ij (1 + e_i + e_j)``: relative with ``E = diag(e)``, ``|e_i| <= eps``
    and ``max |e_i| = eps``; keeps the sparsity pattern and scales to large
    graphs."""
    check_eps(eps)
    rng = np.random.default_rng(seed)
    e = rng.uniform(-eps, eps, op.nodes)
    if op.nodes:
        e[rng.integers(op.nodes)] = eps * rng.choice([-1.0, 1.0])
    m = op.matrix.tocoo()
    w = m.data * (1 + e[m.row] + e[m.col])
    return Perturbed(_with(op, sp.coo_array((w, (m.row, m.col)), shape=m.shape)), "diagonal", e,
                     float(np.max(np.abs(e))) if e.size else 0.0)


def scaling(op: ShiftOperator, eps: float, seed: int = 0) -> Perturbed:
    """``(1 + 2 eps) S``: relative with ``E = eps I`` (docs/theory.md s. 2:
    ``(1 + t) S`` has ``E = (t / 2) I``). The sign follows ``seed``'s parity
    (odd: ``(1 - 2 eps) S``)."""
    check_eps(eps)
    sign = -1.0 if seed % 2 else 1.0
    e = np.full(op.nodes, sign * eps)
    return Perturbed(_with(op, op.matrix * (1 + 2 * sign * eps)), "scaling", e, float(eps))


def additive(op: ShiftOperator, eps: float, seed: int) -> Perturbed:
    """``S + E`` with a random dense symmetric ``E``, ``||E||_2 = eps``. Not a
    relative perturbation in general: ``e`` is the additive error."""
    check_eps(eps)
    n = op.nodes
    if n > DENSE_LIMIT:
        raise StablefiltError(f"a dense additive perturbation needs N <= {DENSE_LIMIT}; this graph has {n} nodes.")
    e = random_symmetric(n, eps, np.random.default_rng(seed))
    return Perturbed(_with(op, op.matrix.toarray() + e), "additive", None, None)


def _offdiag(op: ShiftOperator):
    """Upper off-diagonal entries ``(rows, cols, values)`` of ``S``."""
    u = sp.triu(op.matrix, k=1).tocoo()
    return u.row, u.col, u.data


def _rebuild(op: ShiftOperator, rows, cols, vals) -> ShiftOperator:
    """Operator with new off-diagonal entries. Combinatorial Laplacians get
    their diagonal recomputed (rows sum to zero); other kinds keep theirs."""
    n = op.nodes
    off = sp.coo_array((vals, (rows, cols)), shape=(n, n)).tocsr()
    off = off + off.T
    if op.kind == "laplacian":
        diag = -np.asarray(off.sum(axis=1)).ravel()
    else:
        diag = op.matrix.diagonal()
    # Non-negative new weights keep a combinatorial Laplacian one.
    keep = op.kind == "laplacian" and bool(np.all(off.data <= 0))
    return _with(op, off + sp.diags_array(diag), keep_kind=keep)


def jitter(op: ShiftOperator, size: float, seed: int) -> Perturbed:
    """Edge weights (off-diagonal entries) multiplied by ``1 + u``, ``u``
    uniform in ``[-size, size]``, independently per edge."""
    check_eps(size, "jitter size")
    r, c, v = _offdiag(op)
    u = np.random.default_rng(seed).uniform(-size, size, len(v))
    return Perturbed(_rebuild(op, r, c, v * (1 + u)), "jitter", None, None)


def delete(op: ShiftOperator, rate: float, seed: int) -> Perturbed:
    """Each edge removed with probability ``rate``."""
    if not 0 <= rate <= 1:
        raise StablefiltError(f"edge deletion rate must lie in [0, 1]; got {rate}.")
    r, c, v = _offdiag(op)
    keep = np.random.default_rng(seed).uniform(size=len(v)) >= rate
    return Perturbed(_rebuild(op, r[keep], c[keep], v[keep]), "delete", None, None)


def rewire(op: ShiftOperator, rate: float, seed: int) -> Perturbed:
    """Each edge, with probability ``rate``, moved to a random non-edge (its
    weight kept)."""
    if not 0 <= rate <= 1:
        raise StablefiltError(f"rewiring rate must lie in [0, 1]; got {rate}.")
    rng = np.random.default_rng(seed)
    r, c, v = (np.array(a) for a in _offdiag(op))
    n = op.nodes
    present = set(zip(r.tolist(), c.tolist()))
    for k in np.flatnonzero(rng.uniform(size=len(v)) < rate):
        for _ in range(20):
            a, b = sorted(rng.choice(n, 2, replace=False).tolist())
            if (a, b) not in present:
                present.discard((int(r[k]), int(c[k])))
                present.add((a, b))
                r[k], c[k] = a, b
                break
    return Perturbed(_rebuild(op, r, c, v), "rewire", None, None)


def relabel(op: ShiftOperator, seed: int) -> Perturbed:
    """``P^T S P`` for a random permutation: the same graph, nodes renamed."""
    perm = np.random.default_rng(seed).permutation(op.nodes)
    return Perturbed(op.permuted(perm), "relabel", None, 0.0, perm)


def relative_product(s, e, x):
    """``(S + E S + S E) x``, the product with a relatively perturbed
    operator (docs/theory.md section 2), without forming it.

    Args:
      s: ``S``: a matrix (anything with ``@``: numpy, scipy.sparse,
        :class:`~stablefilt._sparse.JaxShift`, jax) or a function ``v -> S v``.
      e: ``E``: a dense ``(N, N)`` matrix, its diagonal ``(N,)``, or a
        function ``v -> E v``.
      x: ``(N, ...)``, numpy or jax.

    The dense ``S_hat`` is ``relative_product(S, E, I)``.
    """
    s_mv = s if callable(s) else (lambda v: s @ v)
    if callable(e):
        e_mv = e
    elif np.ndim(e) == 1:
        ev = e.reshape((-1,) + (1,) * (np.ndim(x) - 1))

        def e_mv(v):
            return ev * v
    else:
        def e_mv(v):
            return e @ v
    sx = s_mv(x)
    return sx + e_mv(sx) + s_mv(e_mv(x))


def project_ball(e, eps: float, xp=np):
    """Nearest point of the ball ``||E||_2 <= eps`` of symmetric matrices:
    the symmetric part with its eigenvalues clipped to ``[-eps, eps]`` (the
    result symmetrised once more: the product is symmetric only to round-off).
    A diagonal ``e`` ``(N,)`` has its entries clipped. ``xp``: numpy or
    ``jax.numpy``."""
    if e.ndim == 1:
        return xp.clip(e, -eps, eps)
    e = 0.5 * (e + e.T)
    w, q = xp.linalg.eigh(e)
    out = (q * xp.clip(w, -eps, eps)) @ q.T
    return 0.5 * (out + out.T)
