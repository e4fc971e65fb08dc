"""How far apart two versions of a graph are, in the relative model.

With known node correspondence, the relative error matrix solves the
Sylvester equation ``S E + E S = S_hat - S``; in the eigenbasis of ``S``,
``Et_ij = Dt_ij / (lam_i + lam_j)`` (docs/theory.md section 2). Where
``lam_i + lam_j`` is (near) zero the change cannot be expressed there; the part
of ``S_hat - S`` that falls on those entries is reported as a residual, never
divided. With unknown correspondence the graphs are first aligned by
``scipy.optimize.quadratic_assignment``; the distance found is then an upper
bound on the true distance modulo permutation.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import numpy as np
from scipy.optimize import linear_sum_assignment, quadratic_assignment

from ._errors import GraphError
from ._graph import ShiftOperator

#: Largest graph decomposed densely for a distance.
DISTANCE_LIMIT = 3000
#: ``|lam_i + lam_j| <= SINGULAR_TOL * R`` counts as zero.
SINGULAR_TOL = 1e-10


@dataclasses.dataclass(frozen=True)
class Distance:
    """Distance between ``S`` and ``S_hat``.

    Attributes:
      relative: ``||E||_2`` of the Sylvester solution (zero on the
        non-expressible entries). Equals the relative distance when the
        change is expressible and ``lam_i + lam_j`` never vanishes;
        otherwise an upper bound on the part that is expressible.
      residual: ``||S E + E S - (S_hat - S)||_2``: zero (to round-off) when
        the change is a relative perturbation.
      expressible: ``residual <= 1e-8 * ||S_hat - S||_2``.
      delta: eigenvector misalignment ``(||U - V||_2 + 1)^2 - 1`` of ``E``
        against ``S`` (columns matched by assignment, signs fixed).
      additive: ``||S_hat - S||_2`` for contrast.
      aligned: whether nodes were aligned first (then an upper bound).
      perm: the alignment, ``S_hat`` was compared as ``S_hat[perm][:, perm]``.
      singular_pairs: how many ``(i, j)`` had ``lam_i + lam_j`` near zero.
      e: the relative error matrix.
    """

    relative: float
    residual: float
    expressible: bool
    delta: float
    additive: float
    aligned: bool
    perm: np.ndarray | None
    singular_pairs: int
    e: np.ndarray = dataclasses.field(repr=False)

    def as_dict(self) -> dict:
        return {
            "relative": self.relative, "residual": self.residual, "expressible": self.expressible,
            "delta": self.delta, "additive": self.additive, "aligned": self.aligned,
            "upper_bound": self.aligned or self.singular_pairs > 0,
            "singular_pairs": self.singular_pairs,
            "model": "S_hat = S + E S + S E" + (" after aligning nodes (an upper bound)" if self.aligned else ""),
        }


def misalignment(s: np.ndarray, e: np.ndarray, vs=None) -> float:
    """``delta = (||U - V||_2 + 1)^2 - 1`` with ``V`` eigenvectors of ``S``
    and ``U`` of ``E``, columns of ``U`` matched to ``V`` by a linear
    assignment on ``|V^T U|`` and signs fixed (Gama, Bruna, Ribeiro 2020).
    Any valid decomposition gives a valid bound."""
    if vs is None:
        _, vs = np.linalg.eigh(s)
    w, u = np.linalg.eigh(0.5 * (e + e.T))
    # Within a repeated eigenvalue of E any orthonormal basis is valid: rotate
    # it onto the eigenvectors of S lying closest to that eigenspace
    # (orthogonal Procrustes), so E = c I gives U = V.
    tol = 1e-10 * max(float(np.max(np.abs(w))) if w.size else 0.0, np.finfo(float).tiny)
    start = 0
    for i in range(1, len(w) + 1):
        if i == len(w) or w[i] - w[i - 1] > tol:
            m = i - start
            if m > 1:
                uc = u[:, start:i]
                proj = uc.T @ vs  # (m, N)
                pick = np.sort(np.argsort(-np.sum(proj**2, axis=0))[:m])
                a, _, bt = np.linalg.svd(proj[:, pick])
                u[:, start:i] = uc @ (a @ bt)
            start = i
    overlap = vs.T @ u
    rows, cols = linear_sum_assignment(-np.abs(overlap))
    um = np.empty_like(u)
    um[:, rows] = u[:, cols]
    signs = np.sign(np.sum(vs * um, axis=0))
    signs[signs == 0] = 1.0
    um = um * signs
    # ||U - V||_2 <= 2 for orthogonal U, V; round-off can put the computed
    # norm a few ulps above, which would put delta above its range [0, 8].
    gap = min(float(np.linalg.norm(um - vs, 2)), 2.0)
    return float((gap + 1) ** 2 - 1)


class SylvesterSolution(NamedTuple):
    """The relative error ``E`` of a change of ``S`` (docs/theory.md s.2).

    Attributes:
      e: symmetric ``(N, N)`` with ``S E + E S`` closest to ``S_hat - S``.
      residual: ``||S E + E S - (S_hat - S)||_2``.
      singular_pairs: eigenvalue pairs with ``lam_i + lam_j`` near zero
        (``E`` set to zero there).
      eigenvectors: of ``S`` (``numpy.linalg.eigh``).
    """

    e: np.ndarray
    residual: float
    singular_pairs: int
    eigenvectors: np.ndarray


def sylvester_relative(s: np.ndarray, s_hat: np.ndarray) -> SylvesterSolution:
    """Solve ``S E + E S = S_hat - S`` in the eigenbasis of ``S``:
    ``Et_ij = Dt_ij / (lam_i + lam_j)``; ``E`` is zero on pairs with
    ``lam_i + lam_j`` near zero. Returns a :class:`SylvesterSolution`."""
    lam, v = np.linalg.eigh(s)
    d = s_hat - s
    dt = v.T @ d @ v
    denom = lam[:, None] + lam[None, :]
    r = max(np.max(np.abs(lam)), np.finfo(float).tiny)
    sing = np.abs(denom) <= SINGULAR_TOL * r
    et = np.where(sing, 0.0, dt / np.where(sing, 1.0, denom))
    e = v @ et @ v.T
    e = 0.5 * (e + e.T)
    resid = float(np.linalg.norm(s @ e + e @ s - d, 2))
    return SylvesterSolution(e, resid, int(np.count_nonzero(sing)), v)


def align(a: ShiftOperator, b: ShiftOperator, seed: int = 0) -> np.ndarray:
    """Node order of ``b`` matched to ``a`` by ``scipy.optimize.quadratic_assignment``
    (FAQ method, maximising ``trace(A P B P^T)``); returns ``perm`` with
    ``b[perm][:, perm]`` aligned to ``a``."""
    am = a.dense()
    bm = b.dense()
    best, best_val = None, -np.inf
    for k in range(3):
        res = quadratic_assignment(am, bm, method="faq",
                                   options={"maximize": True, "rng": np.random.default_rng(seed + k), "P0": "randomized" if k else "barycenter"})
        val = float(np.sum(am * bm[res.col_ind][:, res.col_ind]))
        if val > best_val:
            best, best_val = res.col_ind, val
    return np.asarray(best)


def distance(a: ShiftOperator, b: ShiftOperator, *, align_nodes: bool = False, seed: int = 0) -> Distance:
    """Relative and additive distances from ``a`` (``S``) to ``b`` (``S_hat``).

    Raises:
      GraphError: the graphs differ in size or are too large to decompose.
    """
    if a.nodes != b.nodes:
        raise GraphError(f"the two graphs have {a.nodes} and {b.nodes} nodes; a distance needs the same node count.")
    if a.nodes > DISTANCE_LIMIT:
        raise GraphError(f"distances need dense eigendecompositions, at most {DISTANCE_LIMIT} nodes; got {a.nodes}.")
    perm = align(a, b, seed) if align_nodes else None
    s = a.dense()
    s_hat = b.dense() if perm is None else b.dense()[perm][:, perm]
    sol = sylvester_relative(s, s_hat)
    e, resid, nsing, v = sol.e, sol.residual, sol.singular_pairs, sol.eigenvectors
    add = float(np.linalg.norm(s_hat - s, 2))
    ok = resid <= 1e-8 * max(add, np.finfo(float).tiny) or add == 0.0
    return Distance(float(np.linalg.norm(e, 2)), resid, bool(ok), misalignment(s, e, v), add, align_nodes, perm,
                    nsing, e)
