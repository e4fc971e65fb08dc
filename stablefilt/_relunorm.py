"""A layer's clean output norm through the relu, ``sup ||relu(H x + c)||_F``
over ``||x||_F <= rho`` (docs/theory.md 9.10; ``rho`` the input norm for the
first layer, the previous layer's output bound ``n_{l-1}`` for the others).

``||relu(v)|| = max <w, v>`` over ``w >= 0``, ``||w|| <= 1``, so the
supremum is that of ``rho ||H^T w|| + <w, c>`` over the non-negative part of
the unit ball. For ``w >= 0`` the quadratic form of ``M = H H^T`` is at most
that of ``A = max(M, 0)`` (entrywise), the bias at most ``<w, relu(c)>``, and
``(a + b)^2 <= (1 + t) a^2 + (1 + 1/t) b^2``; the largest eigenvalue of the
non-negative matrix ``G_t = (1 + t) rho^2 A + (1 + 1/t) u u^T`` is at most
``max_i (G_t y)_i / y_i`` for any ``y > 0`` (Collatz-Wielandt; Horn and
Johnson, "Matrix Analysis", 2nd ed., Thm 8.1.26). Per ``y``, the vectors
``a = A y / y`` and ``q = (u^T y) u / y`` are computed once in float64; any
``rho`` then costs ``O(N F_1)``.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._filters import run_filter
from ._series import REL_ALLOW

#: Largest ``N F_1`` for which ``H`` and ``A`` are formed densely (``A``:
#: ``(N F_1)^2`` float64, 32 MB at the limit).
LIMIT = 2048
#: Weights ``s`` of the bias direction in the matrices whose Perron vectors
#: are tried, ``A + s (lambda_A / ||u||^2) u u^T``.
SCALES = (0.0, 0.03, 0.06, 0.1, 0.15, 0.2, 0.3, 0.45, 0.7, 1.0, 2.0, 4.0, 10.0)
#: The grid of ``t`` (geometric); every point gives a valid bound.
T_GRID = np.geomspace(1e-4, 1e4, 161)
#: Floor of the Perron vectors, relative to their largest entry (``y > 0``).
FLOOR = 1e-6


@dataclasses.dataclass(frozen=True)
class ReluNorm:
    """Collatz-Wielandt ratios for :func:`relu_norm`'s bound.

    Attributes:
      points: per tried ``y``, an ``(m, 2)`` array of the pairs
        ``(a_i, q_i)``, ``a_i = (A' y)_i / y_i`` (``A' >= A`` covering the
        round-off of ``A``) and ``q_i = (u^T y) u_i / y_i``, keeping only the
        pairs on the upper-right part of their convex hull (the others never
        attain the maximum over ``i`` of a combination with non-negative
        weights; :func:`maximal_pairs`).
    """

    points: tuple

    def bound(self, rho: float) -> float:
        """``sup ||relu(H x + c)||`` over ``||x||_F <= rho``, bounded above
        (docs/theory.md 9.10)."""
        r2 = float(rho) ** 2
        t = T_GRID[:, None]
        best = np.inf
        for pts in self.points:
            a, q = pts[:, 0], pts[:, 1]
            vals = np.max((1 + t) * r2 * a[None, :] + (1 + 1 / t) * q[None, :], axis=1)
            best = min(best, float(np.min(vals)))
            if not np.any(q):  # no positive bias: t -> 0 is the limit
                best = min(best, r2 * float(np.max(a)))
        return float(np.sqrt(max(best, 0.0)) * (1 + REL_ALLOW))


def maximal_pairs(a: np.ndarray, q: np.ndarray) -> np.ndarray:
    """The pairs ``(a_i, q_i)`` on the upper-right part of their convex hull,
    as an ``(m, 2)`` array: for weights ``w_a, w_q >= 0``,
    ``max_i w_a a_i + w_q q_i`` is attained among them (a linear function's
    maximum over a finite set is attained at a vertex of its hull, and with
    non-negative weights at one no other point exceeds in both coordinates).
    First the pairs no other exceeds in both, then Andrew's monotone chain
    (a handbook algorithm) over them; the cross products' rounding can drop
    a point above a chord by a relative ``1e-16``, which the bound's ``1e-9``
    allowance covers."""
    order = np.lexsort((-q, -a))  # a descending, then q descending
    keep, top = [], -np.inf
    for i in order:
        if q[i] > top:
            keep.append(i)
            top = q[i]
    pts = np.stack([a[keep], q[keep]], axis=1)[::-1]  # a ascending, q descending
    hull: list = []
    for p in pts:
        while len(hull) >= 2:
            o, m = hull[-2], hull[-1]
            if (m[0] - o[0]) * (p[1] - o[1]) - (m[1] - o[1]) * (p[0] - o[0]) >= 0:
                hull.pop()  # m lies on or below the chord from o to p
            else:
                break
        hull.append(p)
    return np.asarray(hull)


def bank_matrix(taps, basis, matrix) -> np.ndarray:
    """The bank ``X -> sum_k p_k(S) X c_k`` as an ``(N F_out) x (N F_in)``
    float64 matrix, rows and columns ordered node-major (node ``i``, feature
    ``f`` at ``i F + f``), from the recurrence applied to every unit input."""
    taps = np.asarray(taps, dtype=np.float64)
    n = matrix.shape[0]
    f_in, f_out = taps.shape[1], taps.shape[2]
    eye = np.zeros((n, n * f_in, f_in))
    for f in range(f_in):
        eye[np.arange(n), np.arange(n) * f_in + f, f] = 1.0
    out = run_filter(lambda z: (matrix @ z.reshape(n, -1)).reshape(z.shape), taps, eye, basis)  # (N, N F_in, F_out)
    return np.ascontiguousarray(np.transpose(out, (0, 2, 1)).reshape(n * f_out, n * f_in))


def _perron(amat: np.ndarray, u: np.ndarray, weight: float) -> np.ndarray:
    """A positive approximation of the Perron vector of the symmetric
    non-negative matrix ``A + weight u u^T`` (Lanczos on its product, floored)."""
    from scipy.sparse.linalg import LinearOperator, eigsh

    n = amat.shape[0]
    op = LinearOperator((n, n), matvec=lambda v: amat @ v + weight * u * (u @ v), dtype=np.float64)
    try:
        _, v = eigsh(op, k=1, which="LA", tol=1e-4, maxiter=20 * n, v0=np.ones(n))  # a fixed start: same figures every run
        y = np.abs(v[:, 0])
    except Exception:  # no convergence: the all-ones vector is a valid (looser) choice
        y = np.ones(n)
    if not np.all(np.isfinite(y)) or np.max(y) <= 0:
        y = np.ones(n)
    return np.maximum(y, FLOOR * np.max(y))


def relu_norm(taps, bias, basis, matrix) -> ReluNorm | None:
    """The :class:`ReluNorm` of the bank ``taps`` with ``bias`` (or None) on
    the graph ``matrix``; None above ``LIMIT`` output units. Candidate
    vectors ``y``: the Perron vectors of ``SCALES``' matrices, and the
    all-ones vector."""
    taps = np.asarray(taps, dtype=np.float64)
    n = matrix.shape[0]
    units = n * taps.shape[2]
    if units > LIMIT:
        return None
    h = bank_matrix(taps, basis, matrix)
    habs = np.abs(h)
    m = h.shape[1]
    unit_round = np.finfo(np.float64).eps / 2
    gamma = m * unit_round / (1 - m * unit_round)
    amat = np.maximum(h @ h.T, 0.0)
    b = np.zeros(taps.shape[2]) if bias is None else np.asarray(bias, dtype=np.float64).reshape(-1)
    u = np.maximum(np.tile(b, n), 0.0)
    lam_a = float(np.max(amat @ np.ones(units)))  # a Collatz-Wielandt bound (row sums), for the scale only
    uu = float(u @ u)
    points = []
    candidates = [_perron(amat, u, s * lam_a / uu if s > 0 else 0.0) for s in (SCALES if uu > 0 else (0.0,))]
    for y in candidates + [np.ones(units)]:  # all ones: the row sums, never undone by a poor Perron vector
        ay = amat @ y + gamma * (habs @ (habs.T @ y))  # A' y with A' = fl(A) + gamma |H| |H|^T >= A
        points.append(maximal_pairs(ay / y, float(u @ y) * u / y))
    return ReluNorm(tuple(points))
