"""Certified spectral intervals ``[a, b]`` holding every eigenvalue of ``S``.

Methods, tried in this order for each end (see docs/theory.md, section 7);
every step has a bounded cost:

``exact``
  ``scipy.linalg.eigvalsh`` on the dense matrix, for ``N <= exact_limit``
  (default :data:`EXACT_LIMIT`), widened by a rounding pad; refused before
  it starts when the dense matrix does not fit in memory.
``construction``
  ends known from the kind: normalised Laplacian ``[0, 2]`` (Chung, "Spectral
  Graph Theory", 1997), scaled adjacency ``[-1, 1]``, combinatorial Laplacian
  lower end 0 (positive semidefinite; common practice).
``gershgorin``
  the row-sum bound ``|lam - S_ii| <= sum_{j != i} |S_ij|``, always valid.
  It is kept without any iteration when a Rayleigh quotient already lies
  within :data:`TIGHT` of it (then no end can be more than that tighter:
  ``lam_min <= x^T S x / x^T x``), as for a Laplacian given as a matrix,
  whose all-ones vector has quotient 0 = its Gershgorin lower end.
``lanczos+inertia``
  a Lanczos Ritz value ``theta`` with residual ``r`` (``eigsh``, within a
  :class:`LanczosBudget` of restarts, basis size and wall time) only says
  that some eigenvalue lies within ``||r||`` of ``theta`` (Parlett, "The
  Symmetric Eigenvalue Problem", 1980). The end ``sigma = theta + ||r|| +
  tau`` is then proved by Sylvester's law of inertia: ``S - sigma I``
  factored by sparse LU with symmetric permutation and no pivoting must have
  no positive pivot. The factorisation runs under a wall-time budget
  (:func:`stablefilt._budget.call_within`). Past any budget the end falls
  back to Gershgorin.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from typing import TYPE_CHECKING

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ._budget import call_within
from ._memory import dense_bytes, require

if TYPE_CHECKING:  # only op.matrix and op.kind are read; _graph imports this module
    from ._graph import ShiftOperator

#: Relative outward widening of every computed end, far above float64
#: round-off in the eigenvalues of a stored matrix (common practice).
PAD = 1e-9

#: Largest ``N`` decomposed densely by default (about 1-2 s and 32 MB at
#: this size); above it no dense eigendecomposition is made.
EXACT_LIMIT = 2000

#: A Gershgorin end within this share of ``max |end|`` of a Rayleigh
#: quotient is kept without Lanczos: no method could tighten it by more.
TIGHT = 1e-6


@dataclasses.dataclass(frozen=True)
class LanczosBudget:
    """The most one Lanczos end may cost.

    Attributes:
      maxiter: implicit restarts of ARPACK (``eigsh(maxiter=...)``).
      ncv: Lanczos basis size (``eigsh(ncv=...)``); a restart costs at most
        ``ncv`` products with ``S``, so one end makes at most
        ``maxiter * ncv`` products.
      seconds: wall time of the Lanczos iteration, checked at every product.
      inertia_seconds: wall time of one inertia factorisation.
    """

    maxiter: int = 300
    ncv: int = 20
    seconds: float = 8.0
    inertia_seconds: float = 10.0

    @property
    def products(self) -> int:
        return self.maxiter * self.ncv


DEFAULT_BUDGET = LanczosBudget()


@dataclasses.dataclass(frozen=True)
class SpectralInterval:
    """An interval ``[lower, upper]`` proved to hold every eigenvalue.

    Attributes:
      lower, upper: the ends.
      lower_method, upper_method: which method proved each end.
      eigenvalues: all eigenvalues (ascending, float64) when computed
        exactly, else ``None``.
      lower_seconds, upper_seconds: wall time spent proving each end (the
        dense decomposition is counted once, on the lower end).
      notes: why an end fell back, if it did (``{"lower": "...", ...}``).
    """

    lower: float
    upper: float
    lower_method: str
    upper_method: str
    eigenvalues: np.ndarray | None = dataclasses.field(default=None, repr=False, compare=False)
    lower_seconds: float = dataclasses.field(default=0.0, compare=False)
    upper_seconds: float = dataclasses.field(default=0.0, compare=False)
    notes: dict = dataclasses.field(default_factory=dict, compare=False)

    def ends(self) -> dict:
        """Each end with its method and time, as recorded in outputs."""
        out = {}
        for side in ("lower", "upper"):
            out[side] = {"value": float(getattr(self, side)), "method": getattr(self, f"{side}_method"),
                         "seconds": round(float(getattr(self, f"{side}_seconds")), 4)}
            if side in self.notes:
                out[side]["note"] = self.notes[side]
        return out

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
        return SpectralInterval(self.lower - by, self.upper + by, self.lower_method, self.upper_method,
                                lower_seconds=self.lower_seconds, upper_seconds=self.upper_seconds,
                                notes=self.notes)


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


def count_above(m: sp.csr_array, sigma: float, seconds: float | None = None) -> int | None:
    """Number of eigenvalues of ``m`` above ``sigma``, by inertia.

    Factors ``m - sigma I = P^T L U P`` with a symmetric fill-reducing
    permutation and no pivoting; by Sylvester's law of inertia the count of
    positive pivots of ``U`` equals the count of eigenvalues above ``sigma``.
    Returns ``None`` when the factorisation fails, pivots off the diagonal or
    meets an exact zero pivot (the count would not be proved), or, with
    ``seconds`` given, when it does not finish within that wall time (it
    then runs in a child process that is ended at the budget).
    """
    if seconds is not None:
        got = call_within(_count_above, (m, sigma), seconds)
        return got.value if got.status in ("done", "unbounded") else None
    return _count_above(m, sigma)


def _count_above(m: sp.csr_array, sigma: float) -> int | None:
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


class _OutOfTime(Exception):
    pass


def _timed_operator(m: sp.csr_array, seconds: float, budget_products: int):
    """``m`` as a LinearOperator that raises once ``seconds`` have passed or
    ``budget_products`` products were made (ARPACK calls back into Python
    for every product, so the exception ends ``eigsh`` there)."""
    t0 = time.perf_counter()
    count = [0]

    def mv(x):
        count[0] += 1
        if count[0] > budget_products or time.perf_counter() - t0 > seconds:
            raise _OutOfTime
        return m @ x

    return spla.LinearOperator(m.shape, matvec=mv, dtype=np.float64), count


def _lanczos_end(m: sp.csr_array, which: str, scale: float,
                 budget: LanczosBudget = DEFAULT_BUDGET) -> tuple[float | None, str]:
    """``(end, note)``: a proved end (upper for ``'LA'``, lower for
    ``'SA'``), or ``(None, why not)``, within ``budget``."""
    n = m.shape[0]
    if n < 2:  # ARPACK needs k < N; scipy would hand a 1 x 1 sparse matrix to a dense solver and fail
        return None, "one node"
    ncv = int(min(max(budget.ncv, 3), n))
    if ncv <= 1:
        return None, "too few nodes for Lanczos"
    op, count = _timed_operator(m, budget.seconds, budget.products + ncv)
    try:
        vals, vecs = spla.eigsh(op, k=1, which=which, tol=1e-6, maxiter=budget.maxiter, ncv=ncv,
                                v0=np.ones(n) / np.sqrt(n) + np.linspace(0, 1e-3, n))
    except _OutOfTime:
        return None, (f"Lanczos stopped at its budget ({count[0] - 1} products, "
                      f"{budget.seconds:g} s)")
    except spla.ArpackNoConvergence:
        return None, f"Lanczos did not converge in {budget.maxiter} restarts of {ncv} vectors"
    except (spla.ArpackError, ValueError) as exc:
        return None, f"Lanczos failed ({type(exc).__name__})"
    theta = float(vals[0])
    v = vecs[:, 0] / np.linalg.norm(vecs[:, 0])
    res = float(np.linalg.norm(m @ v - theta * v))
    for tries in range(4):
        tau = (1e-6 * 10.0**tries) * scale
        if which == "LA":
            sigma = theta + res + tau
            c = count_above(m, sigma, budget.inertia_seconds)
        else:
            sigma = theta - res - tau
            c = count_above(-m, -sigma, budget.inertia_seconds)
        if c == 0:
            return sigma, ""
        if c is None:
            return None, (f"the inertia factorisation failed or took over {budget.inertia_seconds:g} s")
    return None, "the inertia count did not prove the Lanczos end"


def _rayleigh_tight(m: sp.csr_array, side: str, g: float, scale: float) -> bool:
    """Whether a Rayleigh quotient ``x^T S x / x^T x`` of a cheap vector
    (all ones; ones on the rows that attain the bound) lies within
    ``TIGHT * scale`` of the Gershgorin end ``g``. Since ``lam_min <= q <=
    lam_max`` for every quotient ``q``, no proved end can then be tighter
    than ``g`` by more than that."""
    n = m.shape[0]
    d = m.diagonal()
    r = np.asarray(abs(m).sum(axis=1)).ravel() - np.abs(d)
    ends = d - r if side == "lower" else d + r
    tries = [np.ones(n)]
    hit = np.abs(ends - (ends.min() if side == "lower" else ends.max())) <= TIGHT * max(scale, 1e-300)
    tries.append(hit.astype(np.float64))
    for x in tries:
        xx = float(x @ x)
        if xx == 0:
            continue
        q = float(x @ (m @ x)) / xx
        if abs(q - g) <= TIGHT * scale:
            return True
    return False


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


def spectral_interval(op: ShiftOperator, *, exact_limit: int = EXACT_LIMIT,
                      budget: LanczosBudget = DEFAULT_BUDGET, progress=None) -> SpectralInterval:
    """A certified interval holding every eigenvalue of ``op``.

    Args:
      op: the shift operator.
      exact_limit: largest ``N`` decomposed densely.
      budget: the most each Lanczos end and inertia proof may cost.
      progress: called with a short message before each costly step, or None.

    Returns:
      :class:`SpectralInterval`, with the method and time of each end
      recorded.

    Raises:
      MemoryRefused: the dense decomposition (``N <= exact_limit``) would not
        fit in the available memory.
    """
    m = op.matrix
    n = m.shape[0]
    t0 = time.perf_counter()
    g_lo, g_hi = gershgorin(m)
    t_rows = time.perf_counter() - t0  # the row sums, counted on the lower end
    scale = max(abs(g_lo), abs(g_hi))
    if n <= exact_limit:
        # the matrix, its copy inside LAPACK and the workspace
        require(dense_bytes(n, 3), f"a dense eigendecomposition of {n} nodes")
        if progress:
            progress(f"spectral interval: dense eigenvalues of {n} nodes")
        lam = sla.eigvalsh(m.toarray())
        s = max(abs(lam[0]), abs(lam[-1]))
        lo = float(lam[0]) - _pad(lam[0], s)
        hi = float(lam[-1]) + _pad(lam[-1], s)
        # Never looser than what is known without computing.
        lo, hi = max(lo, g_lo), min(hi, g_hi)
        return SpectralInterval(float(lo), float(hi), "exact", "exact", lam,
                                lower_seconds=time.perf_counter() - t0)
    known = construction_interval(op.kind)
    ends, notes, times = {}, {}, {}
    for side, which, g in (("lower", "SA", g_lo), ("upper", "LA", g_hi)):
        t1 = time.perf_counter()
        k = known[0] if side == "lower" else known[1]
        if k is not None:
            ends[side] = (k - _pad(k, scale) if side == "lower" else k + _pad(k, scale), "construction")
        elif scale == 0 or _rayleigh_tight(m, side, g, scale):
            ends[side] = (g, "gershgorin")
            notes[side] = "a Rayleigh quotient lies within 1e-6 of the row-sum end: it is tight"
        else:
            if progress:
                progress(f"spectral interval: {side} end by Lanczos and inertia ({n} nodes)")
            e, why = _lanczos_end(m, which, scale, budget)
            if e is not None and ((side == "upper" and e < g) or (side == "lower" and e > g)):
                ends[side] = (e, "lanczos+inertia")
            else:
                ends[side] = (g, "gershgorin")
                notes[side] = why or "the Lanczos end was not tighter than the row-sum end"
        times[side] = time.perf_counter() - t1
    return SpectralInterval(ends["lower"][0], ends["upper"][0], ends["lower"][1], ends["upper"][1],
                            lower_seconds=times["lower"] + t_rows,
                            upper_seconds=times["upper"], notes=notes)
