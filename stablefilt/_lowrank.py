"""Relative perturbations in factored form, for attacks on large graphs:
``E = diag(d) + U diag(s) U^T`` with ``U`` ``(N, r)`` of orthonormal columns.

Nothing ``N x N`` is ever formed: ``E v = d * v + U (s * (U^T v))`` costs
``O(N r F)`` for ``v`` of shape ``(N, F)``, so the perturbed product

    S_hat x = S x + E (S x) + S (E x)

costs two sparse products and ``O(N r F)`` more (docs/theory.md s. 2).

The ball ``||E||_2 <= eps`` is replaced by the smaller convex set
``max |d_i| + max |s_j| <= eps``: with orthonormal ``U``, ``||U diag(s)
U^T||_2 = max |s_j|``, and ``||D + L||_2 <= ||D||_2 + ||L||_2`` (triangle
inequality), so every point of the set lies in the ball. It holds the
diagonal attack's set (``s = 0``) and the rank-``r`` part of the ball
(``d = 0``).
"""

from __future__ import annotations

import dataclasses

import numpy as np


@dataclasses.dataclass(frozen=True)
class LowRankE:
    """``E = diag(d) + U diag(s) U^T`` (float64).

    Attributes:
      d: ``(N,)`` the diagonal part.
      u: ``(N, r)`` orthonormal columns (to round-off; see ``bound``).
      s: ``(r,)`` the low-rank part's eigenvalues.
      bound: a float64 upper bound of ``||E||_2``:
        ``max|d| + max|s| (1 + ||U^T U - I||_F)`` (``||U||_2^2 <= 1 +
        ||U^T U - I||_2``), rounded up.
    """

    d: np.ndarray
    u: np.ndarray
    s: np.ndarray
    bound: float

    @property
    def nodes(self) -> int:
        return self.d.shape[0]

    @property
    def rank(self) -> int:
        return self.s.shape[0]

    def matvec(self, v):
        """``E v`` for ``v`` of shape ``(N,)`` or ``(N, ...)``."""
        v = np.asarray(v)
        flat = v.reshape(v.shape[0], -1)
        out = self.d[:, None] * flat + self.u @ (self.s[:, None] * (self.u.T @ flat))
        return out.reshape(v.shape)

    def dense(self) -> np.ndarray:
        """The ``N x N`` matrix (small graphs and tests only)."""
        return np.diag(self.d) + (self.u * self.s) @ self.u.T


def apply_e(d, u, s, v, xp=np):
    """``E v = d * v + U (s * (U^T v))`` for ``v`` of shape ``(N, M)``;
    numpy or ``jax.numpy`` (``xp``)."""
    return d[:, None] * v + u @ (s[:, None] * (u.T @ v))


def orthonormalise(u, s, xp=np):
    """The same ``U diag(s) U^T`` with orthonormal columns: ``U = Q R``
    (thin QR), ``R diag(s) R^T = W diag(s') W^T`` (an ``r x r`` eigh), and
    ``U' = Q W``. ``O(N r^2)``."""
    q, r = xp.linalg.qr(u)
    core = (r * s) @ r.T
    w, vecs = xp.linalg.eigh(0.5 * (core + core.T))
    return q @ vecs, w


def split_budget(d: np.ndarray, s: np.ndarray, eps: float) -> tuple[np.ndarray, np.ndarray]:
    """Euclidean projection of ``(d, s)`` onto ``max|d| + max|s| <= eps``.

    The set is the union over ``b in [0, eps]`` of the boxes ``|d| <= b``,
    ``|s| <= eps - b``; the distance to the box is convex in ``b`` with
    derivative ``-sum (|d_i| - b)_+ + sum (|s_j| - eps + b)_+`` (increasing),
    whose root is found by bisection (60 halvings, to round-off)."""
    d = np.asarray(d, dtype=np.float64)
    s = np.asarray(s, dtype=np.float64)
    ad, as_ = np.abs(d), np.abs(s)
    md = float(ad.max()) if ad.size else 0.0
    ms = float(as_.max()) if as_.size else 0.0
    if md + ms <= eps:
        return d, s
    lo, hi = 0.0, float(eps)
    for _ in range(60):
        b = 0.5 * (lo + hi)
        g = -np.sum(np.maximum(ad - b, 0.0)) + np.sum(np.maximum(as_ - (eps - b), 0.0))
        if g > 0:
            hi = b
        else:
            lo = b
    b = lo  # the lower end: clipping to it keeps max|d| + max|s| <= eps
    return np.clip(d, -b, b), np.clip(s, -(eps - b), eps - b)


def finalise(d, u, s, eps: float) -> LowRankE:
    """A :class:`LowRankE` inside the ball ``||E||_2 <= eps``, in float64:
    ``U`` re-orthonormalised, ``(d, s)`` projected by :func:`split_budget`,
    then ``s`` shrunk by ``1 + ||U^T U - I||_F`` (plus a relative margin of
    ``1e-12`` for the rounding of the bound itself) so the stated bound is
    at most ``eps``."""
    d = np.asarray(d, dtype=np.float64)
    u, s = orthonormalise(np.asarray(u, dtype=np.float64), np.asarray(s, dtype=np.float64))
    d, s = split_budget(d, s, eps)
    defect = float(np.linalg.norm(u.T @ u - np.eye(u.shape[1])))
    s = s / (1.0 + defect + 1e-12)
    md = float(np.max(np.abs(d))) if d.size else 0.0
    ms = float(np.max(np.abs(s))) if s.size else 0.0
    bound = (md + ms * (1.0 + defect)) * (1.0 + 1e-15)
    if bound > eps:  # only by round-off: shrink both parts a hair
        f = eps / bound
        d, s, bound = d * f, s * f, eps
    return LowRankE(d, u, s, float(bound))


def lowrank_product(s_mv, d, u, s, x, xp=np):
    """``(S + E S + S E) x`` with ``E = diag(d) + U diag(s) U^T`` and
    ``s_mv(v) = S v``, for ``x`` of shape ``(N, M)``."""
    sx = s_mv(x)
    return sx + apply_e(d, u, s, sx, xp) + s_mv(apply_e(d, u, s, x, xp))
