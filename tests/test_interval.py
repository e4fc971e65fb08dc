"""Certified spectral intervals: every eigenvalue (numpy.linalg.eigvalsh) lies
inside, for every kind, on the exact path and on the large-graph path
(Lanczos + inertia, construction, Gershgorin); inertia counts against
eigvalsh."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

import stablefilt as sf
from stablefilt._interval import count_above, gershgorin

GRAPHS = {
    # bundled with networkx
    "karate": nx.karate_club_graph,
    "les-miserables": nx.les_miserables_graph,
    "florentine": nx.florentine_families_graph,
    # generators; complete, cycle and star attain the row-sum (Gershgorin) bound
    "path": lambda: nx.path_graph(30),
    "star": lambda: nx.star_graph(20),
    "complete": lambda: nx.complete_graph(15),
    "cycle": lambda: nx.cycle_graph(20),
    "bipartite": lambda: nx.complete_bipartite_graph(5, 9),
    "geometric": lambda: nx.random_geometric_graph(120, 0.2, seed=1),
    "disconnected": lambda: nx.disjoint_union(nx.path_graph(10), nx.cycle_graph(9)),
}

EXPECTED_LARGE = {
    # large-graph path: which method proves each end (theory.md section 7)
    "as-is": ({"lanczos+inertia", "gershgorin"}, {"lanczos+inertia", "gershgorin"}),
    "laplacian": ({"construction"}, {"lanczos+inertia", "gershgorin"}),
    "normalized-laplacian": ({"construction"}, {"construction"}),
    "scaled-adjacency": ({"construction"}, {"construction"}),
}


def _contains(iv, lam):
    return iv.lower <= lam[0] and lam[-1] <= iv.upper


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("kind", sf.KINDS)
def test_exact_interval_contains_every_eigenvalue_and_is_tight(name, kind):
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()), kind)
    lam = np.linalg.eigvalsh(op.dense())  # reference: numpy.linalg.eigvalsh
    iv = sf.spectral_interval(op)
    assert iv.lower_method == iv.upper_method == "exact"
    assert _contains(iv, lam), (iv, lam[0], lam[-1])
    scale = max(abs(lam[0]), abs(lam[-1]), 1.0)
    assert lam[0] - iv.lower <= 1e-8 * scale and iv.upper - lam[-1] <= 1e-8 * scale
    np.testing.assert_allclose(iv.eigenvalues, lam, atol=1e-10 * scale)
    assert iv.radius >= np.abs(lam).max()


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("kind", sf.KINDS)
def test_large_graph_interval_contains_every_eigenvalue(name, kind):
    # exact_limit=5 forces the path used for N > 2000 on a moderate graph.
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()), kind)
    lam = np.linalg.eigvalsh(op.dense())  # reference: numpy.linalg.eigvalsh
    iv = sf.spectral_interval(op, exact_limit=5)
    assert iv.eigenvalues is None
    assert _contains(iv, lam), (iv, lam[0], lam[-1])
    lo_ok, hi_ok = EXPECTED_LARGE[kind]
    assert iv.lower_method in lo_ok and iv.upper_method in hi_ok
    # The row-sum bound is always valid (Gershgorin); a Lanczos end is only
    # kept when it is tighter.
    g_lo, g_hi = gershgorin(op.matrix)
    assert g_lo <= lam[0] and lam[-1] <= g_hi
    if iv.lower_method == "lanczos+inertia":
        assert iv.lower > g_lo
    if iv.upper_method == "lanczos+inertia":
        assert iv.upper < g_hi
    if kind == "normalized-laplacian":
        # Chung, Spectral Graph Theory 1997: [0, 2]
        assert iv.lower == pytest.approx(0.0, abs=1e-8) and iv.upper == pytest.approx(2.0, abs=1e-8)


@pytest.mark.parametrize("name", ["karate", "les-miserables", "florentine", "geometric", "bipartite", "path"])
def test_lanczos_ends_are_proved_and_tight(name):
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()))
    lam = np.linalg.eigvalsh(op.dense())
    iv = sf.spectral_interval(op, exact_limit=5)
    # These graphs do not attain the row-sum bound, so the inertia proof must carry both ends.
    assert iv.method == "lanczos+inertia"
    scale = np.abs(lam).max()
    assert lam[0] - iv.lower <= 1e-4 * scale and iv.upper - lam[-1] <= 1e-4 * scale


def test_laplacian_upper_end_by_lanczos():
    op = sf.shift_operator(nx.to_numpy_array(nx.karate_club_graph()), "laplacian")
    iv = sf.spectral_interval(op, exact_limit=5)
    assert (iv.lower_method, iv.upper_method) == ("construction", "lanczos+inertia")
    assert iv.method == "construction/lanczos+inertia"
    lam = np.linalg.eigvalsh(op.dense())
    assert iv.lower <= lam[0] and lam[-1] <= iv.upper <= lam[-1] * (1 + 1e-4)


def test_bipartite_interval_is_symmetric():
    # Eigenvalues of a bipartite adjacency come in +/- pairs (common practice).
    op = sf.shift_operator(nx.to_numpy_array(nx.complete_bipartite_graph(4, 9)))
    iv = sf.spectral_interval(op)
    assert iv.lower == pytest.approx(-iv.upper, rel=1e-12)
    assert iv.upper == pytest.approx(6.0, rel=1e-8)  # sqrt(4 * 9): K_{m,n} has eigenvalues +/- sqrt(mn), from memory


# ---------------------------------------------------------------------------
# Inertia counts.


@pytest.mark.parametrize("name", ["karate", "les-miserables", "geometric", "path", "disconnected"])
@pytest.mark.parametrize("kind", ["as-is", "laplacian", "normalized-laplacian"])
def test_count_above_matches_eigvalsh(name, kind):
    # Sylvester's law of inertia (common practice): the number of positive
    # pivots of S - sigma I equals the number of eigenvalues above sigma.
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()), kind)
    lam = np.linalg.eigvalsh(op.dense())  # reference: numpy.linalg.eigvalsh
    scale = np.abs(lam).max()
    distinct = np.unique(np.round(lam / scale, 9)) * scale
    rng = np.random.default_rng(21)
    mids = (distinct[1:] + distinct[:-1]) / 2
    shifts = list(rng.choice(mids, size=min(8, mids.size), replace=False))
    # both sides of each end of the spectrum
    gap = 1e-3 * scale
    shifts += [lam[-1] + gap, lam[-1] - gap, lam[0] + gap, lam[0] - gap]
    counted = 0
    for sigma in shifts:
        c = count_above(op.matrix, float(sigma))
        if c is not None:
            counted += 1
            assert c == int(np.sum(lam > sigma)), (sigma, c)
    # beyond the ends the shifted matrix is definite: the count must be proved
    assert count_above(op.matrix, float(lam[-1] + gap)) == 0
    assert count_above(op.matrix, float(lam[0] - gap)) == lam.size
    assert counted >= len(shifts) - 2


# ---------------------------------------------------------------------------
# Corner cases by hand.


@pytest.mark.parametrize("limit", [0, 2000])
def test_one_node(limit):
    iv = sf.spectral_interval(sf.shift_operator(np.array([[3.0]])), exact_limit=limit)
    assert iv.lower <= 3.0 <= iv.upper and iv.upper - iv.lower <= 1e-8  # by hand


@pytest.mark.parametrize("limit", [0, 2000])
@pytest.mark.parametrize("kind", sf.KINDS)
def test_no_edges(limit, kind):
    # The zero matrix (every kind of an edgeless graph is 0): spectrum {0}.
    op = sf.shift_operator(np.zeros((5, 5)), kind)
    assert op.matrix.nnz == 0
    iv = sf.spectral_interval(op, exact_limit=limit)
    assert iv.lower <= 0.0 <= iv.upper and iv.upper - iv.lower <= 2.0 + 1e-8


def test_complete_graph_repeated_eigenvalues():
    # Complete graph K_n: Laplacian eigenvalues 0 (once) and n (n - 1 times) (common practice).
    op = sf.shift_operator(nx.to_numpy_array(nx.complete_graph(9)), "laplacian")
    iv = sf.spectral_interval(op)
    np.testing.assert_allclose(iv.eigenvalues, [0.0] + [9.0] * 8, atol=1e-12)
    assert iv.lower <= 0.0 and iv.upper >= 9.0


def test_widened_holds_perturbed_spectrum():
    # Weyl's inequality (common practice): ||D|| <= r moves each eigenvalue by at most r.
    rng = np.random.default_rng(22)
    op = sf.shift_operator(nx.to_numpy_array(nx.karate_club_graph()), "normalized-laplacian")
    iv = sf.spectral_interval(op)
    d = rng.standard_normal((34, 34))
    d = d + d.T
    d *= 0.05 / np.linalg.norm(d, 2)
    lam = np.linalg.eigvalsh(op.dense() + d)
    w = iv.widened(0.05)
    assert w.lower <= lam[0] and lam[-1] <= w.upper
