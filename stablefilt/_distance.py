"""How far apart two versions of a graph are, in the relative model.

With known node correspondence, the relative error matrix solves the
Sylvester equation ``S E + E S = S_hat - S``; in the eigenbasis of ``S``,
``Et_ij = Dt_ij / (lam_i + lam_j)`` (docs/theory.md section 2). Where
``lam_i + lam_j`` is (near) zero the change cannot be expressed there; the part
of ``S_hat - S`` that falls on those entries is reported as a residual, never
divided. With unknown correspondence the graphs are first aligned by
``scipy.optimize.quadratic_assignment``; the distance found is then an upper
bound on the true distance modulo permutation.

Every path has a bounded cost (docs/theory.md section 2, "At scale"): the
eigenbasis solve up to :data:`DISTANCE_LIMIT` nodes (two dense
eigendecompositions, ``O(N^3)``); above it, no dense eigendecomposition: the
change is first fitted with a diagonal ``E`` (sparse least squares, any
size), then, up to :data:`ITERATIVE_LIMIT` nodes, solved by MINRES on the
Kronecker sum with a budget of iterations and time
(:mod:`stablefilt._sylvester`); beyond, a change that no diagonal ``E``
explains is refused in one sentence. Alignment (quadratic assignment) is
refused above :data:`ALIGN_LIMIT` nodes.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
from scipy.optimize import linear_sum_assignment, quadratic_assignment

from ._errors import GraphError
from ._graph import ShiftOperator
from ._memory import dense_bytes, require
from ._sylvester import diagonal_sylvester, minres_sylvester
from ._symnorm import norm2_upper

#: Largest graph decomposed densely for a distance.
DISTANCE_LIMIT = 3000
#: Largest graph whose dense ``E`` is solved for by MINRES (above
#: :data:`DISTANCE_LIMIT`); beyond it only a diagonal ``E`` is fitted.
ITERATIVE_LIMIT = 8000
#: Largest graph whose eigenvector misalignment ``delta`` is computed (an
#: eigendecomposition of ``E`` and a dense linear assignment); above it
#: ``delta`` is None.
MISALIGNMENT_LIMIT = 1500
#: Largest graph aligned by quadratic assignment (dense ``O(N^3)`` steps).
ALIGN_LIMIT = 1000
#: Largest graph whose residual and additive change are measured as exact
#: 2-norms (a dense ``eigvalsh`` each, ``O(N^3)``). Above it the residual is
#: its Frobenius norm (an upper bound on the 2-norm, ``O(N^2)``) and the
#: additive change a Lanczos value of the sparse ``S_hat - S``.
EXACT_NORM_LIMIT = 1500
#: Relative residual ``||S E + E S - D||_F / ||D||_F`` below which an
#: iterative solution counts as expressing the change (common practice for
#: a float64 iterative solve stopped at 1e-10).
ITERATIVE_RTOL = 1e-8
#: Budget of the iterative solves.
ITERATIVE_SECONDS = 60.0
ITERATIVE_MAXITER = 3000
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
      residual: ``||S E + E S - (S_hat - S)||``: zero (to round-off) when
        the change is a relative perturbation; the 2-norm, or above
        :data:`EXACT_NORM_LIMIT` nodes and on the iterative paths the
        Frobenius norm (``residual_norm``), an upper bound on it.
      expressible: ``residual <= tolerance`` (:func:`roundoff_tolerance`).
      delta: eigenvector misalignment ``(||U - V||_2 + 1)^2 - 1`` of the
        eigenvectors ``U`` of ``E`` against those ``V`` of ``S`` (columns
        matched by assignment, signs fixed); in ``[0, 8]``, and near 8 for a
        generic ``E`` however small, since ``E``'s eigenvectors owe nothing
        to ``S``'s.
      additive: ``||S_hat - S||_2`` for contrast.
      aligned: whether nodes were aligned first (then an upper bound).
      perm: the alignment, ``S_hat`` was compared as ``S_hat[perm][:, perm]``.
      singular_pairs: how many ``(i, j)`` had ``lam_i + lam_j`` near zero.
      e: the relative error matrix.
      tolerance: the round-off allowance on the residual.
      alignment: the :class:`Alignment` when nodes were aligned.
      pairs: spectrum of ``S``, smallest relative ``|lam_i + lam_j|`` that
        carries the change, additive change over ``||S||_2``.
      method: ``eigenbasis`` (dense, exact), ``diagonal`` (a diagonal ``E``
        fitted by sparse least squares; ``relative = max |e_i|`` exactly)
        or ``minres`` (dense ``E`` by MINRES; ``relative`` is a Lanczos
        estimate of ``||E||_2`` and ``relative_upper = ||E||_F`` bounds it).
      residual_norm: ``"2"`` or ``"F"`` (Frobenius, iterative paths).
      relative_upper: an upper bound on ``||E||_2`` where ``relative`` is
        an estimate, else None.
      solve: iterations, convergence and seconds of an iterative solve; on
        the eigenbasis path, how ``||E||_2`` (``norm_of_e``: ``eigh``, or
        above :data:`MISALIGNMENT_LIMIT` nodes ``lanczos+cholesky``, a proved
        upper bound within about 1e-9 of it, or ``eigvalsh``) and the
        additive change (``eigvalsh`` or ``lanczos``) were measured.
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
    tolerance: float = 0.0
    alignment: "Alignment | None" = None
    pairs: dict = dataclasses.field(default_factory=dict)
    method: str = "eigenbasis"
    residual_norm: str = "2"
    relative_upper: float | None = None
    solve: dict = dataclasses.field(default_factory=dict)

    @property
    def amplified(self) -> bool:
        """Whether eigenvalue pairs summing to about zero drive the distance:
        ``S`` is indefinite and ``||E||`` is over 3 times the additive change
        relative to ``||S||_2`` (the figure a definite ``S`` would give)."""
        p = self.pairs
        return bool(p.get("indefinite") and p.get("additive_over_norm", 0) > 0
                    and self.relative > 3 * p["additive_over_norm"])

    def as_dict(self) -> dict:
        out = {
            "relative": self.relative, "residual": self.residual, "tolerance": self.tolerance,
            "expressible": self.expressible,
            "delta": self.delta, "delta_of": "eigenvectors of E against eigenvectors of S (graph_a)",
            "additive": self.additive, "aligned": self.aligned,
            # A diagonal E is one solution; the distance is the least ||E||_2 over all.
            "upper_bound": self.aligned or self.singular_pairs > 0 or self.method == "diagonal",
            "singular_pairs": self.singular_pairs,
            "model": "S_hat = S + E S + S E" + (" after aligning nodes (an upper bound)" if self.aligned else ""),
            "spectrum_a": self.pairs.get("eigenvalues"),
            "smallest_pair_sum_over_norm": self.pairs.get("smallest_pair_sum"),
            "driven_by_pairs_near_zero": self.amplified,
            "method": self.method, "residual_norm": self.residual_norm, "relative_upper": self.relative_upper,
            "solve": self.solve,
        }
        if self.alignment is not None:
            al = self.alignment
            out["alignment"] = {"mismatch_before": al.mismatch_before, "mismatch_after": al.mismatch_after,
                                "start": al.start, "perm": [int(i) for i in al.perm],
                                "perm_meaning": "graph_b node perm[i] is matched to graph_a node i"}
        return out


def misalignment(s: np.ndarray, e: np.ndarray, vs=None, eig_e=None) -> float:
    """``delta = (||U - V||_2 + 1)^2 - 1`` with ``V`` eigenvectors of ``S``
    and ``U`` of ``E``, columns of ``U`` matched to ``V`` by a linear
    assignment on ``|V^T U|`` and signs fixed (Gama, Bruna, Ribeiro 2020).
    Any valid decomposition gives a valid bound. ``eig_e = (w, U)`` of
    ``E`` when already computed."""
    if vs is None:
        _, vs = np.linalg.eigh(s)
    w, u = np.linalg.eigh(0.5 * (e + e.T)) if eig_e is None else (eig_e[0], eig_e[1].copy())
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
    # ||A||_2 = sqrt(lam_max(A^T A)): one product and eigvalsh, several times
    # faster than the SVD behind numpy.linalg.norm(A, 2).
    g = um - vs
    gap = min(float(np.sqrt(max(np.linalg.eigvalsh(g.T @ g)[-1], 0.0))), 2.0)
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


def sym_norm2(m: np.ndarray) -> float:
    """``||M||_2`` of a symmetric matrix as ``max |eigvalsh(M)|`` (its
    symmetric part), several times faster than the SVD behind
    ``numpy.linalg.norm(M, 2)`` and equal to it for symmetric ``M``."""
    if m.size == 0:
        return 0.0
    w = np.linalg.eigvalsh(0.5 * (m + m.T))
    return float(max(abs(w[0]), abs(w[-1])))


def sylvester_relative(s: np.ndarray, s_hat: np.ndarray, eig=None) -> SylvesterSolution:
    """Solve ``S E + E S = S_hat - S`` in the eigenbasis of ``S``:
    ``Et_ij = Dt_ij / (lam_i + lam_j)``; ``E`` is zero on pairs with
    ``lam_i + lam_j`` near zero. ``eig = (lam, V)`` of ``S`` when already
    computed. Returns a :class:`SylvesterSolution`."""
    lam, v = np.linalg.eigh(s) if eig is None else eig
    d = s_hat - s
    e, nsing = eigenbasis_solve(lam, v, v.T @ d @ v)
    resid = sym_norm2(s @ e + e @ s - d)
    return SylvesterSolution(e, resid, nsing, v)


def eigenbasis_solve(lam: np.ndarray, v: np.ndarray, dt: np.ndarray) -> tuple[np.ndarray, int]:
    """``(E, singular pairs)``: ``E = V Et V^T`` with ``Et_ij = Dt_ij /
    (lam_i + lam_j)`` for ``Dt = V^T D V`` (docs/theory.md section 2), and
    ``Et_ij = 0`` where ``|lam_i + lam_j| <= SINGULAR_TOL max |lam|``; two
    dense products."""
    denom = lam[:, None] + lam[None, :]
    r = max(np.max(np.abs(lam)), np.finfo(float).tiny) if lam.size else 1.0
    sing = np.abs(denom) <= SINGULAR_TOL * r
    et = np.where(sing, 0.0, dt / np.where(sing, 1.0, denom))
    e = v @ et @ v.T
    e = 0.5 * (e + e.T)
    return e, int(np.count_nonzero(sing))


class Alignment(NamedTuple):
    """A node matching of ``S_hat`` to ``S``.

    Attributes:
      perm: ``S_hat[perm][:, perm]`` is compared with ``S``.
      mismatch_before: ``||S - S_hat||_F / ||S||_F`` in the given order.
      mismatch_after: the same after aligning (never above ``before``: the
        given order is one of the starts).
      start: which start gave ``perm`` (``identity``, ``signatures``,
        ``barycenter``, ``random``).
    """

    perm: np.ndarray
    mismatch_before: float
    mismatch_after: float
    start: str


def node_signatures(s: np.ndarray) -> np.ndarray:
    """``(N, 15)`` features of each node that a relabelling carries along and
    a small change moves little: ``S_ii``, ``(S^2)_ii`` and the diagonals of
    ``exp(t S / r)`` for ``t`` in 0.5, 1, 2, 4 and -0.5, -1, ..., -128 with
    ``r`` the spectral radius (heat-kernel signatures, common practice in
    graph matching; the long times see the low end of the spectrum, which
    on a Laplacian places a node in the large)."""
    lam, v = np.linalg.eigh(s)
    r = max(float(np.max(np.abs(lam))), np.finfo(float).tiny)
    v2 = v * v
    feats = [np.diag(s), np.sum(s * s, axis=1)]
    for t in (-128.0, -64.0, -32.0, -16.0, -8.0, -4.0, -2.0, -1.0, -0.5, 0.5, 1.0, 2.0, 4.0):
        feats.append(v2 @ np.exp(t * lam / r))
    return np.stack(feats, axis=1)


def _mismatch(s, s_hat, perm) -> float:
    return float(np.linalg.norm(s - s_hat[perm][:, perm]) / max(np.linalg.norm(s), np.finfo(float).tiny))


class _Objective:
    """``||S - P S_hat P^T||_F / ||S||_F`` in ``O(nnz(S))`` per matching,
    from ``||S||^2 + ||S_hat||^2 - 2 sum_ij S_ij S_hat[perm_i, perm_j]``;
    for ranking matchings (the reported figures use :func:`_mismatch`)."""

    def __init__(self, s, s_hat):
        self.s, self.s_hat = s, s_hat
        self.rows, self.cols = np.nonzero(s)
        self.vals = s[self.rows, self.cols]
        self.ns2 = max(float(np.sum(s * s)), np.finfo(float).tiny)
        self.nh2 = float(np.sum(s_hat * s_hat))
        off = self.rows != self.cols
        self.orows, self.ocols, self.ovals = self.rows[off], self.cols[off], np.abs(self.vals[off])
        self.oa = s - np.diag(np.diag(s))
        self.ob = s_hat - np.diag(np.diag(s_hat))

    def __call__(self, perm) -> float:
        inner = float(self.vals @ self.s_hat[perm[self.rows], perm[self.cols]])
        return float(np.sqrt(max(self.ns2 + self.nh2 - 2 * inner, 0.0) / self.ns2))

    def kept(self, perm) -> np.ndarray:
        """Share of each node's off-diagonal weight in ``S`` whose edges the
        matching maps onto edges of ``S_hat``."""
        hit = self.ob[perm[self.orows], perm[self.ocols]] != 0
        n = self.s.shape[0]
        total = np.bincount(self.orows, weights=self.ovals, minlength=n)
        total[total == 0] = 1.0
        return np.bincount(self.orows, weights=self.ovals * hit, minlength=n) / total


def _refine(f: _Objective, perm, rounds: int = 50):
    """Repeated linear assignment on the overlap ``S P S_hat^T`` (the
    gradient of ``trace(S P S_hat P^T)`` at ``P``) until the matching stops
    improving: a start that matches most nodes right pulls the rest in."""
    best, best_m = perm, f(perm)
    # The diagonals enter trace(S P S_hat P^T) as a pull towards the current
    # matching (with S = I - N, a P term): match on the off-diagonal parts.
    for _ in range(rounds):
        _, nxt = linear_sum_assignment(-(f.oa @ f.ob[:, perm].T))
        m = f(nxt)
        if m >= best_m:
            break
        best, best_m, perm = nxt, m, nxt
    return best


def _seeded(f: _Objective, perm, share: float, rounds: int = 60):
    """Repeated linear assignment on ``S_off[:, K] S_hat_off[:, perm[K]]^T``
    where ``K`` are the nodes whose edges the matching keeps best (all but
    the worst ``share`` of them): wrong matches no longer pull on the rest.
    Keeps the best matching seen."""
    best, best_m = perm, f(perm)
    for _ in range(rounds):
        kept = f.kept(perm)
        seeds = kept >= np.quantile(kept, share)
        _, perm = linear_sum_assignment(-(f.oa[:, seeds] @ f.ob[:, perm[seeds]].T))
        m = f(perm)
        if m < best_m:
            best, best_m = perm, m
    return best


def _swap_cost(s, b, i: int, j: int) -> float:
    """Change of ``||S - B||_F^2`` (symmetric ``S``, ``B``) when nodes
    ``i`` and ``j`` of ``B`` trade places: only rows and columns ``i, j``
    change, so it costs ``O(N)``."""
    idx = [i, j]
    cols = np.arange(b.shape[0])
    cols[i], cols[j] = j, i
    old = s[idx] - b[idx]
    new = s[idx] - b[[j, i]][:, cols]
    ob, nb = old[:, idx], new[:, idx]
    return float(2 * np.sum(new * new) - np.sum(nb * nb) - 2 * np.sum(old * old) + np.sum(ob * ob))


def _swaps(s, s_hat, perm, pairs, rounds: int = 5):
    """Trade places of matched nodes ``(i, j)`` in ``pairs`` while that
    lowers ``||S - P S_hat P^T||_F``: fixes near-twin nodes (same
    neighbours) that linear assignments leave crossed."""
    perm = perm.copy()
    b = s_hat[perm][:, perm]
    floor = 1e-12 * max(float(np.sum(s * s)), np.finfo(float).tiny)
    for _ in range(rounds):
        moved = False
        for i, j in pairs:
            if _swap_cost(s, b, i, j) < -floor:
                perm[[i, j]] = perm[[j, i]]
                b[[i, j]] = b[[j, i]]
                b[:, [i, j]] = b[:, [j, i]]
                moved = True
        if not moved:
            break
    return perm


def align(a: ShiftOperator, b: ShiftOperator, seed: int = 0, restarts: int = 1, progress=None) -> Alignment:
    """Node order of ``b`` matched to ``a``, minimising ``||S - P S_hat P^T||_F``
    (equivalently maximising ``trace(S P S_hat P^T)``) over permutations by
    keeping the best of several local searches (docs/theory.md section 2,
    "Alignment"). Starts: the given order; a linear assignment on node
    signatures (:func:`node_signatures`), grown from its surest matches,
    which lands near the answer when the graph also changed;
    ``scipy.optimize.quadratic_assignment`` (FAQ) from its barycenter and
    from ``restarts`` random starts (seeded). Each is refined by repeated
    linear assignment; the best then by swapping pairs of nodes. Returns an
    :class:`Alignment`, never worse than the given order.

    Cost: a fixed number of dense ``O(N^3)`` steps (at most 30 iterations of
    each quadratic assignment, 50 or 60 rounds of each refinement, 5 rounds
    of swaps); :func:`distance` refuses it above :data:`ALIGN_LIMIT` nodes.
    ``progress`` is called with a message before each stage, or None."""
    say = progress or (lambda m: None)
    s, s_hat = a.dense(), b.dense()
    n = a.nodes
    ident = np.arange(n)
    f = _Objective(s, s_hat)
    fa, fb = node_signatures(s), node_signatures(s_hat)
    scale = np.std(np.concatenate([fa, fb]), axis=0)
    scale[scale == 0] = 1.0
    fa, fb = fa / scale, fb / scale
    _, sig = linear_sum_assignment(np.sum((fa[:, None, :] - fb[None, :, :]) ** 2, axis=2))
    rng = np.random.default_rng(seed)
    cands = [("identity", ident), ("identity", _refine(f, ident)), ("signatures", sig)]
    say("aligning: refining from node signatures")
    cands += [("signatures", _refine(f, _seeded(f, sig, q))) for q in (0.1, 0.2, 0.3, 0.4)]
    for name, init in [("barycenter", "barycenter")] + [("random", "randomized")] * restarts:
        say(f"aligning: quadratic assignment from a {name} start")
        res = quadratic_assignment(f.oa, f.ob, method="faq",
                                   options={"maximize": True, "P0": init, "rng": rng, "maxiter": 30})
        cands.append((name, _refine(f, np.asarray(res.col_ind))))
    name, perm = min(cands, key=lambda c: f(c[1]))
    # Swap candidates: neighbours in S and nodes with close signatures.
    near = np.argsort(np.sum((fa[:, None, :] - fa[None, :, :]) ** 2, axis=2), axis=1)[:, 1:6]
    ii, jj = np.nonzero(np.triu(f.oa != 0, 1))
    pairs = sorted({(int(i), int(j)) for i, j in zip(ii, jj)}
                   | {(min(i, int(j)), max(i, int(j))) for i in range(n) for j in near[i]})
    say("aligning: swapping pairs of nodes")
    perm = _refine(f, _swaps(s, s_hat, perm, pairs))
    before = _mismatch(s, s_hat, ident)
    after = _mismatch(s, s_hat, perm)
    if after > before:  # round-off in the fast objective: the given order stands
        name, perm, after = "identity", ident, before
    return Alignment(np.asarray(perm), before, after, name)


def roundoff_tolerance(s: np.ndarray, s_hat: np.ndarray, e: np.ndarray) -> float:
    """The residual below which a change counts as expressible:
    ``8 N u (||S||_2 + ||S_hat||_2 + 2 ||S||_2 ||E||_2)`` with ``u`` the
    float64 unit round-off. The entries of ``S`` and ``S_hat`` are rounded to
    float64 on their own (error up to ``u ||S||`` in ``S_hat - S`` that no
    ``E`` explains), and the eigendecomposition and the products behind the
    residual add errors of order ``N u ||S|| ||E||`` (derived: see
    docs/theory.md section 2, "Round-off")."""
    u = np.finfo(np.float64).eps / 2
    ns = float(np.linalg.norm(s, 2))
    return 8 * s.shape[0] * u * (ns + float(np.linalg.norm(s_hat, 2)) + 2 * ns * float(np.linalg.norm(e, 2)))


def distance(a: ShiftOperator, b: ShiftOperator, *, align_nodes: bool = False, seed: int = 0,
             progress=None) -> Distance:
    """Relative and additive distances from ``a`` (``S``) to ``b`` (``S_hat``).

    Up to :data:`DISTANCE_LIMIT` nodes in the eigenbasis of ``S`` (exact);
    above, by the iterative paths of the module docstring. ``progress`` is
    called with a short message before each costly step, or None.

    Raises:
      GraphError: the graphs differ in size, alignment is asked above
        :data:`ALIGN_LIMIT` nodes, or the change cannot be measured at this
        size (see the module docstring).
      MemoryRefused: a dense step does not fit in the available memory.
    """
    say = progress or (lambda m: None)
    n = a.nodes
    if n != b.nodes:
        raise GraphError(f"the two graphs have {a.nodes} and {b.nodes} nodes; a distance needs the same node count.")
    if align_nodes and n > ALIGN_LIMIT:
        raise GraphError(f"aligning nodes takes dense O(N^3) steps and is done for at most {ALIGN_LIMIT} nodes; "
                         f"these graphs have {n}, so give them in the same node order and leave out --align.")
    if n > DISTANCE_LIMIT:
        return _distance_at_scale(a, b, say)
    # the dense S, eigenvectors, Dt, E, the residual and the products
    require(dense_bytes(n, 10), f"a dense distance on {n} nodes")
    if align_nodes:
        say(f"aligning {n} nodes")
    al = align(a, b, seed, progress=say) if align_nodes else None
    perm = None if al is None else al.perm
    s_sp = a.matrix
    d_sp = sp.csr_array((b.matrix if perm is None else b.matrix[perm][:, perm]) - s_sp)
    d_sp.sum_duplicates()
    say("eigenvectors of S")
    # One symmetric eigendecomposition (divide and conquer), reused below.
    lam, v = sla.eigh(a.dense(), driver="evd", overwrite_a=True, check_finite=False)
    say("solving S E + E S = S_hat - S in the eigenbasis")
    dt = v.T @ np.asarray(d_sp @ v)  # D is sparse: D V costs O(nnz(D) N), one dense product remains
    dt = 0.5 * (dt + dt.T)
    e, nsing = eigenbasis_solve(lam, v, dt)
    r = np.asarray(s_sp @ e)  # S sparse: S E + E S = S E + (S E)^T for symmetric E, O(nnz(S) N)
    r = r + r.T
    coo = d_sp.tocoo()
    r[coo.row, coo.col] -= coo.data  # canonical format: each (i, j) once
    exact = n <= EXACT_NORM_LIMIT
    say("norms and eigenvector misalignment" if n <= MISALIGNMENT_LIMIT else "norms")
    if n <= MISALIGNMENT_LIMIT:
        w_e, u_e = np.linalg.eigh(e)
        e_norm = float(max(abs(w_e[0]), abs(w_e[-1]))) if n else 0.0
        how = "eigh"
    else:  # the misalignment's eigenvectors of E and assignment are left out at this size
        w_e = u_e = None
        e_norm, how = norm2_upper(e)  # never below ||E||_2
    if exact:
        resid, add = sym_norm2(r), (sym_norm2(d_sp.toarray()) if d_sp.nnz else 0.0)
    else:
        resid = float(np.linalg.norm(r))  # ||R||_2 <= ||R||_F
        add = _norm_estimate(d_sp) if d_sp.nnz else 0.0
    s_norm = float(max(abs(lam[0]), abs(lam[-1]))) if n else 0.0
    # ||S_hat||_2 <= ||S||_2 + ||S_hat - S||_2 (triangle inequality): a larger allowance, never a smaller one.
    tol = _tolerance(n, s_norm, s_norm + add, e_norm)
    ok = resid <= tol or add == 0.0
    delta = misalignment(None, e, v, (w_e, u_e)) if w_e is not None else None
    return Distance(e_norm, resid, bool(ok), delta, add, align_nodes, perm,
                    nsing, e, tol, al, _pair_sums(lam, dt, add), residual_norm="2" if exact else "F",
                    solve={"norm_of_e": how, "additive": "eigvalsh" if exact else "lanczos"})


def _tolerance(n: int, s_norm: float, s_hat_norm: float, e_norm: float) -> float:
    """:func:`roundoff_tolerance` from the norms."""
    u = np.finfo(np.float64).eps / 2
    return 8 * n * u * (s_norm + s_hat_norm + 2 * s_norm * e_norm)


def _norm_estimate(m, budget_products: int = 300) -> float:
    """``||M||_2`` of a symmetric ``M`` (sparse or dense) estimated by
    Lanczos (``eigsh(which="LM")``) within a budget of products; a Ritz
    value, so never above the true norm. Falls back to the Frobenius norm
    (an upper bound) when Lanczos does not converge."""
    import scipy.sparse.linalg as spla

    n = m.shape[0]
    fro = float(sp.linalg.norm(m)) if sp.issparse(m) else float(np.linalg.norm(m))
    if n < 3 or fro == 0.0:
        return float(np.max(np.abs(m.toarray() if sp.issparse(m) else m))) if n == 1 else fro
    try:
        ncv = min(n, 20)
        w = spla.eigsh(m, k=1, which="LM", maxiter=max(1, budget_products // ncv), ncv=ncv, tol=1e-8,
                       return_eigenvectors=False)
        return float(abs(w[0]))
    except (spla.ArpackNoConvergence, spla.ArpackError):
        return fro


def _distance_at_scale(a: ShiftOperator, b: ShiftOperator, say) -> Distance:
    """The iterative paths (no dense eigendecomposition): a diagonal ``E``
    by sparse least squares; if it leaves a residual, MINRES on the dense
    ``E`` up to :data:`ITERATIVE_LIMIT` nodes."""
    n = a.nodes
    s, s_hat = a.matrix, b.matrix
    d = (s_hat - s).tocsr()
    d_fro = float(np.sqrt(np.sum(d.data**2))) if d.nnz else 0.0
    add = _norm_estimate(d) if d.nnz else 0.0
    say(f"fitting a diagonal E ({n} nodes, sparse least squares)")
    diag = diagonal_sylvester(s, d, seconds=ITERATIVE_SECONDS, maxiter=ITERATIVE_MAXITER)
    solve = {"iterations": diag.iterations, "converged": diag.converged, "seconds": round(diag.seconds, 4),
             "rhs_norm": d_fro, "relative_residual_tolerance": ITERATIVE_RTOL}
    if diag.residual <= ITERATIVE_RTOL * d_fro or d_fro == 0.0:
        return Distance(float(np.max(np.abs(diag.e))) if n else 0.0, diag.residual, True, None, add, False, None,
                        0, sp.diags_array(diag.e), ITERATIVE_RTOL * d_fro, None, {}, "diagonal", "F", None,
                        {**solve, "solver": "lsqr"})
    if n > ITERATIVE_LIMIT:
        raise GraphError(f"this change is not an entry-wise rescaling S_ij (1 + e_i + e_j) (the diagonal fit leaves "
                         f"{diag.residual / d_fro:.3g} of it), and a general relative error E is solved for at most "
                         f"{ITERATIVE_LIMIT} nodes (a dense N x N matrix); these graphs have {n}")
    say(f"solving S E + E S = S_hat - S by MINRES ({n} nodes)")
    it = minres_sylvester(s, d, tol=1e-10, maxiter=ITERATIVE_MAXITER, seconds=ITERATIVE_SECONDS)
    e = it.e
    est = _norm_estimate(e)
    upper = float(np.linalg.norm(e))
    ok = it.residual <= ITERATIVE_RTOL * d_fro
    solve = {"iterations": it.iterations, "converged": it.converged, "seconds": round(it.seconds, 4),
             "rhs_norm": d_fro, "relative_residual_tolerance": ITERATIVE_RTOL, "solver": "minres",
             "budget": {"iterations": ITERATIVE_MAXITER, "seconds": ITERATIVE_SECONDS}}
    return Distance(est, it.residual, bool(ok), None, add, False, None, 0, e, ITERATIVE_RTOL * d_fro, None, {},
                    "minres", "F", upper, solve)


def _pair_sums(lam, dt, add: float) -> dict:
    """What drives ``||E||``: the eigenvalue range of ``S`` and the smallest
    ``|lam_i + lam_j|`` (relative to ``||S||_2``) among the pairs that carry
    the change ``D = S_hat - S``, from the eigenvalues ``lam`` of ``S`` and
    ``Dt = V^T D V`` in its eigenbasis. On an indefinite ``S`` such pairs
    divide ``Dt_ij`` by a near-zero number (docs/theory.md section 2)."""
    r = max(float(np.max(np.abs(lam))), np.finfo(float).tiny)
    dt = np.abs(dt)
    denom = np.abs(lam[:, None] + lam[None, :])
    live = (dt > 1e-12 * max(float(dt.max()), np.finfo(float).tiny)) & (denom > SINGULAR_TOL * r)
    smallest = float(np.min(denom[live]) / r) if np.any(live) else None
    add_rel = add / r
    return {"eigenvalues": [float(lam[0]), float(lam[-1])], "indefinite": bool(lam[0] < -1e-12 * r < 1e-12 * r < lam[-1]),
            "smallest_pair_sum": smallest, "additive_over_norm": add_rel}
