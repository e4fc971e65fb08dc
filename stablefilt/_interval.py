"""Certified spectral intervals ``[a, b]`` holding every eigenvalue of ``S``.

Methods, tried in this order (see docs/theory.md, section 7):

``exact``
  ``scipy.linalg.eigvalsh`` on the dense matrix, for ``N <= exact_limit``,
  widened by a rounding pad.
``construction``
  ends known from the kind: normalised Laplacian ``[0, 2]`` (Chung, "Spectral
  Graph Theory", 1997), scaled adjacency ``[-1, 1]``, combinatorial Laplacian
  lower end 0 (positive semidefinite; common practice).
``lanczos+inertia``
  a Lanczos Ritz value ``theta`` with residual ``r`` (``eigsh``) only says that
  some eigenvalue lies within ``||r||`` of ``theta`` (Parlett, "The Symmetric
  Eigenvalue Problem", 1980). The end ``sigma = theta + ||r|| + tau`` is then
  proved by Sylvester's law of inertia: ``S - sigma I`` factored by sparse LU
  with symmetric permutation and no pivoting must have no positive pivot.
``gershgorin``
  the row-sum bound ``|lam - S_ii| <= sum_{j != i} |S_ij|``, always valid.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import TYPE_CHECKING

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

if TYPE_CHECKING:  # only op.matrix and op.kind are read; _graph imports this module
    from ._graph import ShiftOperator

#: Relative outward widening of every computed end, far above float64
#: round-off in the eigenvalues of a stored matrix (common practice).
PAD = 1e-9


@dataclasses.dataclass(frozen=True)
class SpectralInterval:
    """An interval ``[lower, upper]`` proved to hold every eigenvalue.

    Attributes:
      lower, upper: the ends.
      lower_method, upper_method: which method proved each end.
      eigenvalues: all eigenvalues (ascending, float64) when computed
        exactly, else ``None``.
    """

    lower: float
    upper: float
    lower_method: str
    upper_method: str
    eigenvalues: np.ndarray | None = dataclasses.field(default=None, repr=False, compare=False)

    @property
    def method(self) -> str:
        if self.lower_method == self.upper_method:
            return self.lower_method
        return f"{self.lower_method}/{self.upper_method}"

    @property
    def radius(self) -> float:
        """``R = max(|a|, |b|) >= ||S||_2``."""
        return max(abs(self.lower), abs(self.upper))

    def as_tuple(self) -> tuple[float, float]:
        return (self.lower, self.upper)

    def widened(self, by: float) -> "SpectralInterval":
        """``[a - by, b + by]``, as holds the spectrum of a perturbation of
        norm at most ``by`` (Weyl's inequality)."""
        return SpectralInterval(self.lower - by, self.upper + by, self.lower_method, self.upper_method)


def gershgorin(m: sp.csr_array) -> tuple[float, float]:
    """Row-sum bounds ``min_i (S_ii - r_i)`` and ``max_i (S_ii + r_i)``,
    widened outward by ``PAD`` times the largest absolute row sum: the sums
    are rounded in float64 and may land inside the true bound, which a
    regular graph attains with an eigenvalue."""
    d = m.diagonal()
    rows = np.asarray(abs(m).sum(axis=1)).ravel()
    r = rows - np.abs(d)
    pad = PAD * float(rows.max()) if rows.size else 0.0
    return float(np.min(d - r)) - pad, float(np.max(d + r)) + pad


def _pad(x: float, scale: float) -> float:
    return PAD * max(scale, abs(x))


def count_above(m: sp.csr_array, sigma: float) -> int | None:
    """Number of eigenvalues of ``m`` above ``sigma``, by inertia.

    Factors ``m - sigma I = P^T L U P`` with a symmetric fill-reducing
    permutation and no pivoting; by Sylvester's law of inertia the count of
    positive pivots of ``U`` equals the count of eigenvalues above ``sigma``.
    Returns ``None`` when the factorisation fails, pivots off the diagonal or
    meets an exact zero pivot (the count would not be proved).
    """
    n = m.shape[0]
    a = sp.csc_matrix(m - sigma * sp.eye_array(n, format="csr"))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            lu = spla.splu(
                a,
                permc_spec="MMD_AT_PLUS_A",
                diag_pivot_thresh=0.0,
                options={"SymmetricMode": True},
            )
    except (RuntimeError, Warning, MemoryError):
        return None
    if not np.array_equal(lu.perm_r, lu.perm_c):
        return None
    piv = lu.U.diagonal()
    if not np.all(np.isfinite(piv)) or np.any(piv == 0):
        return None
    return int(np.count_nonzero(piv > 0))


def _lanczos_end(m: sp.csr_array, which: str, scale: float) -> float | None:
    """A proved end (upper for ``'LA'``, lower for ``'SA'``), or None."""
    n = m.shape[0]
    if n < 2:  # ARPACK needs k < N; scipy would hand a 1 x 1 sparse matrix to a dense solver and fail
        return None
    try:
        vals, vecs = spla.eigsh(m, k=1, which=which, tol=1e-6, maxiter=max(1000, 20 * n),
                                v0=np.ones(n) / np.sqrt(n) + np.linspace(0, 1e-3, n))
    except (spla.ArpackNoConvergence, spla.ArpackError):
        return None
    theta = float(vals[0])
    v = vecs[:, 0] / np.linalg.norm(vecs[:, 0])
    res = float(np.linalg.norm(m @ v - theta * v))
    for tries in range(4):
        tau = (1e-6 * 10.0**tries) * scale
        if which == "LA":
            sigma = theta + res + tau
            c = count_above(m, sigma)
            if c == 0:
                return sigma
        else:
            sigma = theta - res - tau
            c = count_above(-m, -sigma)
            if c == 0:
                return sigma
        if c is None:
            return None
    return None


def construction_interval(kind: str) -> tuple[float | None, float | None]:
    """Ends known for every operator of ``kind`` (None where unknown):
    normalised Laplacian ``[0, 2]`` (Chung, "Spectral Graph Theory", 1997),
    scaled adjacency ``[-1, 1]``, combinatorial Laplacian lower end 0
    (positive semidefinite; common practice)."""
    return {
        "normalized-laplacian": (0.0, 2.0),
        "scaled-adjacency": (-1.0, 1.0),
        "laplacian": (0.0, None),
    }.get(kind, (None, None))


def spectral_interval(op: ShiftOperator, *, exact_limit: int = 2000) -> SpectralInterval:
    """A certified interval holding every eigenvalue of ``op``.

    Args:
      op: the shift operator.
      exact_limit: largest ``N`` decomposed densely.

    Returns:
      :class:`SpectralInterval`, with the method behind each end recorded.
    """
    m = op.matrix
    n = m.shape[0]
    g_lo, g_hi = gershgorin(m)
    scale = max(abs(g_lo), abs(g_hi))
    if n <= exact_limit:
        lam = sla.eigvalsh(m.toarray())
        s = max(abs(lam[0]), abs(lam[-1]))
        lo = float(lam[0]) - _pad(lam[0], s)
        hi = float(lam[-1]) + _pad(lam[-1], s)
        # Never looser than what is known without computing.
        lo, hi = max(lo, g_lo), min(hi, g_hi)
        return SpectralInterval(float(lo), float(hi), "exact", "exact", lam)
    known = construction_interval(op.kind)
    ends = {}
    for side, which, g in (("lower", "SA", g_lo), ("upper", "LA", g_hi)):
        k = known[0] if side == "lower" else known[1]
        if k is not None:
            ends[side] = (k - _pad(k, scale) if side == "lower" else k + _pad(k, scale), "construction")
            continue
        e = _lanczos_end(m, which, scale) if scale > 0 else None
        if e is not None and ((side == "upper" and e < g) or (side == "lower" and e > g)):
            ends[side] = (e, "lanczos+inertia")
        else:
            ends[side] = (g, "gershgorin")
    return SpectralInterval(ends["lower"][0], ends["upper"][0], ends["lower"][1], ends["upper"][1])
