"""Graph shift operators: construction from dense arrays, sparse matrices and
edge lists; the kinds against networkx; validation errors."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

import stablefilt as sf

NX_GRAPHS = {
    # bundled with networkx
    "karate": nx.karate_club_graph,
    "les-miserables": nx.les_miserables_graph,
    "florentine": nx.florentine_families_graph,
    # generators
    "path": lambda: nx.path_graph(9),
    "star": lambda: nx.star_graph(7),
    "complete": lambda: nx.complete_graph(6),
    "cycle": lambda: nx.cycle_graph(8),
    "bipartite": lambda: nx.complete_bipartite_graph(3, 5),
    "with-isolated": lambda: nx.disjoint_union(nx.path_graph(4), nx.empty_graph(2)),
}


def _adj(g):
    return nx.to_numpy_array(g, nodelist=list(g.nodes()))


@pytest.mark.parametrize("name", sorted(NX_GRAPHS))
def test_kinds_match_networkx(name):
    g = NX_GRAPHS[name]()
    nodes = list(g.nodes())
    a = _adj(g)
    # reference: networkx.normalized_laplacian_matrix (I - D^-1/2 A D^-1/2, isolated nodes 0)
    ref_nl = nx.normalized_laplacian_matrix(g, nodelist=nodes).toarray()
    np.testing.assert_allclose(sf.shift_operator(a, "normalized-laplacian").dense(), ref_nl, rtol=0, atol=1e-12)
    # reference: networkx.laplacian_matrix (D - A)
    ref_l = nx.laplacian_matrix(g, nodelist=nodes).toarray()
    np.testing.assert_allclose(sf.shift_operator(a, "laplacian").dense(), ref_l, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(sf.shift_operator(a).dense(), a)


@pytest.mark.parametrize("name", sorted(NX_GRAPHS))
def test_normalized_laplacian_spectrum_in_0_2(name):
    g = NX_GRAPHS[name]()
    # Chung, Spectral Graph Theory 1997: eigenvalues of the normalized Laplacian lie in [0, 2]
    lam_nx = np.linalg.eigvalsh(nx.normalized_laplacian_matrix(g).toarray())
    lam = np.linalg.eigvalsh(sf.shift_operator(_adj(g), "normalized-laplacian").dense())
    for v in (lam_nx, lam):
        assert v.min() >= -1e-12 and v.max() <= 2 + 1e-12
    np.testing.assert_allclose(lam, lam_nx, atol=1e-12)
    # Chung 1997 (Lemma 1.7, number from memory): 2 is an eigenvalue iff some
    # non-trivial connected component is bipartite
    if name in ("bipartite", "path", "star", "cycle"):
        assert lam.max() == pytest.approx(2.0, abs=1e-12)


@pytest.mark.parametrize("name", sorted(NX_GRAPHS))
def test_scaled_adjacency_divides_by_a_bound_on_the_norm(name):
    a = _adj(NX_GRAPHS[name]())
    op = sf.shift_operator(a, "scaled-adjacency")
    norm = np.abs(np.linalg.eigvalsh(a)).max()  # reference: numpy.linalg.eigvalsh
    assert norm <= op.scale <= norm * (1 + 1e-8)
    np.testing.assert_allclose(op.dense() * op.scale, a, rtol=1e-14, atol=1e-14)
    lam = np.linalg.eigvalsh(op.dense())
    assert -1 <= lam.min() and lam.max() <= 1


def test_bipartite_adjacency_spectrum_is_symmetric():
    # Common practice (spectral graph theory): a bipartite adjacency has its
    # eigenvalues in +/- pairs.
    g = nx.bipartite.random_graph(6, 9, 0.4, seed=3)
    lam = np.linalg.eigvalsh(sf.shift_operator(_adj(g)).dense())
    np.testing.assert_allclose(lam, -lam[::-1], atol=1e-12)


def test_sparse_dense_and_edge_list_give_the_same_operator():
    g = nx.les_miserables_graph()
    a = _adj(g)
    dense = sf.shift_operator(a, "laplacian")
    sparse = sf.shift_operator(sp.csr_array(a), "laplacian")
    i, j = np.nonzero(np.triu(a, 1))
    edges = sf.shift_operator(sf.from_edges(i, j, a[i, j]), "laplacian")
    edges_rev = sf.shift_operator(sf.from_edges(j, i, a[i, j]), "laplacian")
    assert dense.fingerprint() == sparse.fingerprint() == edges.fingerprint() == edges_rev.fingerprint()
    assert dense.nodes == 77 and dense.edges == g.number_of_edges()  # networkx counts the edges


def test_from_edges_repeated_consistent_edge_and_isolated_nodes():
    m = sf.from_edges([0, 1, 0], [1, 0, 2], [2.0, 2.0, 1.0], nodes=5)
    ref = np.zeros((5, 5))
    ref[0, 1] = ref[1, 0] = 2.0
    ref[0, 2] = ref[2, 0] = 1.0  # by hand
    np.testing.assert_array_equal(m.toarray(), ref)
    unweighted = sf.from_edges([0, 1], [1, 2])
    np.testing.assert_array_equal(unweighted.toarray(), nx.to_numpy_array(nx.path_graph(3)))


def test_symmetrised_within_tolerance():
    a = np.array([[0.0, 1.0], [1.0 + 1e-13, 0.0]])
    op = sf.shift_operator(a)
    np.testing.assert_array_equal(op.dense(), op.dense().T)


def test_reorder_is_a_permutation_similarity():
    a = _adj(nx.random_geometric_graph(40, 0.3, seed=4))
    op = sf.shift_operator(a, "laplacian")
    new, perm = sf.reorder(op)
    assert sorted(perm.tolist()) == list(range(40))
    np.testing.assert_array_equal(new.dense(), op.dense()[np.ix_(perm, perm)])
    # reference: scipy.sparse.csgraph bandwidth of the reverse Cuthill-McKee order
    def bandwidth(m):
        r, c = np.nonzero(m)
        return int(np.max(np.abs(r - c)))
    assert bandwidth(new.dense()) <= bandwidth(op.dense())


# ---------------------------------------------------------------------------
# Validation: the library's own exception, one sentence.


def _one_sentence(exc):
    msg = str(exc.value)
    assert "\n" not in msg and msg.endswith(".") and 10 < len(msg) < 300, msg


BAD_GRAPHS = [
    ("non-square dense", lambda: sf.shift_operator(np.ones((2, 3)))),
    ("non-square sparse", lambda: sf.shift_operator(sp.csr_array(np.ones((2, 3))))),
    ("one-dimensional", lambda: sf.shift_operator(np.ones(3))),
    ("not numbers", lambda: sf.shift_operator([["a", "b"], ["c", "d"]])),
    ("non-symmetric", lambda: sf.shift_operator(np.array([[0.0, 1.0], [0.0, 0.0]]))),
    ("non-symmetric sparse", lambda: sf.shift_operator(sp.csr_array(np.array([[0.0, 1.0], [0.5, 0.0]])))),
    ("nan", lambda: sf.shift_operator(np.array([[np.nan]]))),
    ("inf sparse", lambda: sf.shift_operator(sp.csr_array(np.array([[0.0, np.inf], [np.inf, 0.0]])))),
    ("empty", lambda: sf.shift_operator(np.zeros((0, 0)))),
    ("empty sparse", lambda: sf.shift_operator(sp.csr_array((0, 0)))),
    ("unknown kind", lambda: sf.shift_operator(np.eye(2), "random-walk")),
    ("edges conflicting", lambda: sf.from_edges([0, 1], [1, 0], [1.0, 2.0])),
    ("edges conflicting same orientation", lambda: sf.from_edges([0, 0, 1], [1, 1, 2], [1.0, 3.0, 1.0])),
    ("edges out of range", lambda: sf.from_edges([0, 3], [1, 1], nodes=3)),
    ("edges negative id", lambda: sf.from_edges([0, -1], [1, 1])),
    ("edges fractional id", lambda: sf.from_edges([0, 1.5], [1, 1])),
    ("edges unequal columns", lambda: sf.from_edges([0, 1], [1])),
    ("edges none", lambda: sf.from_edges([], [])),
    ("edges nan weight", lambda: sf.from_edges([0], [1], [np.nan])),
]


@pytest.mark.parametrize("what,call", BAD_GRAPHS, ids=[b[0] for b in BAD_GRAPHS])
def test_bad_graph_raises_graph_error(what, call):
    with pytest.raises(sf.GraphError) as exc:
        call()
    _one_sentence(exc)


@pytest.mark.parametrize("kind", ["laplacian", "normalized-laplacian", "scaled-adjacency"])
def test_kinds_need_nonnegative_weights_and_no_self_loops(kind):
    neg = np.array([[0.0, -1.0], [-1.0, 0.0]])
    loop = np.array([[1.0, 1.0], [1.0, 0.0]])
    with pytest.raises(sf.GraphError, match="negative") as exc:
        sf.shift_operator(neg, kind)
    _one_sentence(exc)
    with pytest.raises(sf.GraphError, match="self-loop") as exc:
        sf.shift_operator(loop, kind)
    _one_sentence(exc)
    # As given, both are valid symmetric shift operators.
    assert sf.shift_operator(neg).nodes == sf.shift_operator(loop).nodes == 2


def test_errors_are_value_errors():
    # Common practice: bad arguments raise ValueError subclasses.
    assert issubclass(sf.GraphError, ValueError) and issubclass(sf.FilterError, ValueError)
