"""Perturbation generators: seeding, sizes, the relative model they promise,
and the structure each keeps.

Sources of the check values:
- the relative model ``S_hat = S + E S + S E`` (Gama, Bruna, Ribeiro, "Stability
  Properties of Graph Neural Networks", IEEE TSP 2020), written out densely here;
- ``||E||_2`` by ``numpy.linalg.norm(., 2)``; spectra by ``numpy.linalg.eigvalsh``;
- scaling ``(1 + t) S`` is relative with ``E = (t / 2) I`` (docs/theory.md s. 2,
  derived: ``S + 2 (t/2) S``);
- diagonal ``E`` keeps the sparsity pattern and ``||diag(e)||_2 = max |e_i|``
  (docs/theory.md s. 2, derived);
- rows of a combinatorial Laplacian ``D - A`` sum to zero (common practice).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

import stablefilt as sf
from stablefilt import _perturb as pt
from stablefilt._distance import distance


def _weighted(g, seed):
    rng = np.random.default_rng(seed)
    a = nx.to_numpy_array(g, weight=None)
    w = np.triu(rng.uniform(0.2, 2.0, a.shape), 1)
    return a * (w + w.T)


def _graphs():
    karate = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977, bundled with networkx
    geo = _weighted(nx.random_geometric_graph(30, 0.3, seed=3), 4)
    return {
        "karate-normalized": sf.shift_operator(karate, "normalized-laplacian"),
        "karate-adjacency": sf.shift_operator(karate),
        "geometric-laplacian": sf.shift_operator(geo, "laplacian"),
        "path-scaled": sf.shift_operator(nx.to_numpy_array(nx.path_graph(12)), "scaled-adjacency"),
        "bipartite-adjacency": sf.shift_operator(nx.to_numpy_array(nx.complete_bipartite_graph(4, 6))),
    }


GRAPHS = _graphs()
EPS = [1e-3, 1e-2, 0.1]
PERTURBATIONS = ("relative", "diagonal", "scaling", "additive", "jitter", "delete", "rewire", "relabel")


def _perturb(op, kind, size, seed):
    """The generator named ``kind`` (``size``: eps, jitter size or rate;
    relabelling takes none)."""
    if kind == "relabel":
        return pt.relabel(op, seed)
    return getattr(pt, kind)(op, size, seed)


def _dense_e(p):
    return p.e if p.e.ndim == 2 else np.diag(p.e)


# ---------------------------------------------------------------------------
# Seeding.


@pytest.mark.parametrize("kind", PERTURBATIONS)
def test_same_seed_same_perturbation(kind):
    op = GRAPHS["geometric-laplacian"]
    size = 0.05 if kind not in ("delete", "rewire") else 0.3
    a = _perturb(op, kind, size, 7)
    b = _perturb(op, kind, size, 7)
    assert a.kind == b.kind
    assert np.array_equal(a.op.dense(), b.op.dense())
    if a.e is not None:
        assert np.array_equal(a.e, b.e)
    if a.perm is not None:
        assert np.array_equal(a.perm, b.perm)


@pytest.mark.parametrize("kind", ["relative", "diagonal", "additive", "jitter", "delete", "rewire", "relabel"])
def test_other_seed_other_perturbation(kind):
    op = GRAPHS["geometric-laplacian"]
    size = 0.05 if kind not in ("delete", "rewire") else 0.3
    a = _perturb(op, kind, size, 7)
    b = _perturb(op, kind, size, 8)
    assert not np.array_equal(a.op.dense(), b.op.dense())


# ---------------------------------------------------------------------------
# Sizes and the relative model.


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("eps", EPS)
@pytest.mark.parametrize("kind", ["relative", "diagonal", "scaling"])
def test_size_is_eps(name, eps, kind):
    """``||E||_2 = eps`` by numpy.linalg.norm(., 2), and the recorded norm agrees."""
    p = _perturb(GRAPHS[name], kind, eps, 3)
    e = _dense_e(p)
    assert np.allclose(e, e.T, rtol=0, atol=0)
    assert np.linalg.norm(e, 2) == pytest.approx(eps, rel=1e-12)
    assert p.e_norm == pytest.approx(eps, rel=1e-12)


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("kind", ["relative", "diagonal", "scaling"])
def test_perturbed_operator_is_the_relative_model(name, kind):
    """``S_hat == S + E S + S E`` with ``E`` dense or ``diag(e)`` (Gama et al. 2020),
    the product written out densely here."""
    op = GRAPHS[name]
    p = _perturb(op, kind, 0.05, 11)
    s = op.dense()
    e = _dense_e(p)
    want = s + e @ s + s @ e
    got = p.op.dense()
    assert np.max(np.abs(got - want)) <= 1e-13 * max(1.0, np.max(np.abs(s)))
    assert np.array_equal(got, got.T)


@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_diagonal_keeps_sparsity_pattern(name):
    """``S_ij (1 + e_i + e_j)``: zero entries stay zero (theory.md s. 2)."""
    op = GRAPHS[name]
    p = pt.diagonal(op, 0.05, 1)
    assert np.array_equal(op.dense() != 0, p.op.dense() != 0)
    s = op.dense()
    want = s * (1 + p.e[:, None] + p.e[None, :])
    assert np.max(np.abs(p.op.dense() - want)) <= 1e-14 * max(1.0, np.max(np.abs(s)))


@pytest.mark.parametrize("t", [2e-3, 0.02, 0.2])
def test_scaling_by_one_plus_t_has_e_t_half_identity(t):
    """``(1 + t) S`` is relative with ``E = (t / 2) I`` (theory.md s. 2, derived):
    directly from the generator, and through the Sylvester distance."""
    op = GRAPHS["geometric-laplacian"]
    s = op.dense()
    p = pt.scaling(op, t / 2, seed=0)
    assert np.max(np.abs(p.op.dense() - (1 + t) * s)) <= 1e-14 * np.max(np.abs(s))
    assert np.array_equal(p.e, np.full(op.nodes, t / 2))
    # Directly: S + E S + S E with E = (t/2) I is (1 + t) S.
    e = (t / 2) * np.eye(op.nodes)
    assert np.allclose(s + e @ s + s @ e, (1 + t) * s, rtol=0, atol=1e-14 * np.max(np.abs(s)))
    # Through the distance function on (1 + t) S built here, not by the generator.
    d = distance(op, sf.shift_operator((1 + t) * s))
    assert d.expressible
    assert d.relative == pytest.approx(t / 2, rel=1e-9)
    assert 0.0 <= d.delta <= 1e-8
    # This Laplacian has a null space (lam_i + lam_j = 0 there), where E is not
    # determined; on a positive definite shift the Sylvester solution is unique
    # and must be (t/2) I itself.
    pd = s + np.eye(op.nodes)
    d = distance(sf.shift_operator(pd), sf.shift_operator((1 + t) * pd))
    assert d.singular_pairs == 0
    assert np.max(np.abs(d.e - e)) <= 1e-9 * t


def test_scaling_sign_follows_seed_parity():
    op = GRAPHS["karate-adjacency"]
    s = op.dense()
    down = pt.scaling(op, 0.01, seed=1)
    assert np.allclose(down.op.dense(), (1 - 0.02) * s, rtol=0, atol=1e-15)
    assert np.array_equal(down.e, np.full(op.nodes, -0.01))
    assert down.e_norm == 0.01


@pytest.mark.parametrize("eps", EPS)
def test_additive_is_s_plus_e(eps):
    """``S + E``, ``||E||_2 = eps`` (numpy.linalg.norm); no relative matrix recorded."""
    op = GRAPHS["karate-normalized"]
    p = pt.additive(op, eps, 5)
    d = p.op.dense() - op.dense()
    assert np.allclose(d, d.T, rtol=0, atol=0)
    assert np.linalg.norm(d, 2) == pytest.approx(eps, rel=1e-12)
    assert p.e is None and p.e_norm is None


# ---------------------------------------------------------------------------
# Relabelling, deletion, rewiring, jitter.


@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_relabel_same_spectrum(name):
    """Same graph, nodes renamed: same spectrum (numpy.linalg.eigvalsh), and
    ``S_hat[i, j] = S[perm[i], perm[j]]`` exactly."""
    op = GRAPHS[name]
    p = pt.relabel(op, 4)
    assert sorted(p.perm.tolist()) == list(range(op.nodes))
    assert not np.array_equal(p.perm, np.arange(op.nodes))
    s = op.dense()
    assert np.array_equal(p.op.dense(), s[p.perm][:, p.perm])
    assert np.allclose(np.linalg.eigvalsh(p.op.dense()), np.linalg.eigvalsh(s), rtol=0, atol=1e-12)
    assert p.e_norm == 0.0


@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_delete_rate_zero_changes_nothing(name):
    op = GRAPHS[name]
    p = pt.delete(op, 0.0, 3)
    assert np.array_equal(p.op.dense(), op.dense())


@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_delete_rate_one_leaves_no_edges(name):
    op = GRAPHS[name]
    p = pt.delete(op, 1.0, 3)
    m = p.op.dense()
    assert p.op.edges == 0
    assert np.count_nonzero(m - np.diag(np.diag(m))) == 0
    if op.kind == "laplacian":
        assert np.count_nonzero(m) == 0  # D - A with A = 0
    else:
        assert np.array_equal(np.diag(m), np.diag(op.dense()))  # other kinds keep their diagonal


def _is_laplacian(m):
    off = m - np.diag(np.diag(m))
    return (np.max(np.abs(m.sum(axis=1))) <= 1e-12 * max(1.0, np.max(np.abs(m)))
            and np.all(off <= 0) and np.array_equal(m, m.T))


@pytest.mark.parametrize("kind,size", [("jitter", 0.3), ("delete", 0.3), ("rewire", 0.3), ("rewire", 1.0)])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_laplacian_stays_a_laplacian(kind, size, seed):
    """After jitter, deletion or rewiring of ``D - A``, rows still sum to zero,
    off-diagonals stay <= 0 and the matrix symmetric (common practice)."""
    op = GRAPHS["geometric-laplacian"]
    assert _is_laplacian(op.dense())
    p = _perturb(op, kind, size, seed)
    assert p.op.kind == "laplacian"
    assert _is_laplacian(p.op.dense())


def test_rewire_keeps_edge_count_and_weights():
    op = GRAPHS["geometric-laplacian"]
    p = pt.rewire(op, 0.5, 9)
    before = np.sort(-sp.triu(op.matrix, k=1).data)
    after = np.sort(-sp.triu(p.op.matrix, k=1).data)
    assert p.op.edges == op.edges
    assert np.array_equal(before, after)
    # Some edges did move.
    assert not np.array_equal(op.dense() != 0, p.op.dense() != 0)


def test_rewire_rate_zero_changes_nothing():
    op = GRAPHS["karate-adjacency"]
    assert np.array_equal(pt.rewire(op, 0.0, 1).op.dense(), op.dense())


@pytest.mark.parametrize("size", [0.0, 0.1, 0.5])
def test_jitter_keeps_pattern_and_bounds_ratio(size):
    """Each off-diagonal weight multiplied by ``1 + u``, ``|u| <= size``."""
    op = GRAPHS["karate-adjacency"]
    p = pt.jitter(op, size, 2)
    s, t = op.dense(), p.op.dense()
    assert np.array_equal(s != 0, t != 0)
    nz = s != 0
    ratio = t[nz] / s[nz]
    assert np.all(np.abs(ratio - 1) <= size + 1e-15)
    assert np.array_equal(t, t.T)


# ---------------------------------------------------------------------------
# The matrix-free product.


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("shape", [(), (3,)])
def test_relative_product_equals_dense_product(name, shape):
    """``(S + E S + S E) x`` matrix-free equals the dense product written here,
    for dense ``E`` and for ``E = diag(e)``."""
    op = GRAPHS[name]
    n = op.nodes
    rng = np.random.default_rng(0)
    x = rng.standard_normal((n,) + shape)
    s = op.dense()
    for e in (pt.random_symmetric(n, 0.07, rng), rng.uniform(-0.07, 0.07, n)):
        ed = e if e.ndim == 2 else np.diag(e)
        want = (s + ed @ s + s @ ed) @ x
        got = pt.relative_product(op.matrix, e, x)
        assert got.shape == want.shape
        assert np.max(np.abs(got - want)) <= 1e-12 * max(1.0, np.max(np.abs(want)))


def test_random_symmetric_norm():
    rng = np.random.default_rng(1)
    e = pt.random_symmetric(9, 0.3, rng)
    assert np.array_equal(e, e.T)
    assert np.linalg.norm(e, 2) == pytest.approx(0.3, rel=1e-12)


# ---------------------------------------------------------------------------
# Corner cases and bad input.


def test_one_node_and_no_edges():
    one = sf.shift_operator(np.array([[2.0]]))
    for kind in ("relative", "diagonal", "scaling"):
        p = _perturb(one, kind, 0.1, 0)
        e = _dense_e(p)
        assert p.op.dense() == pytest.approx(2.0 * (1 + 2 * e[0, 0]), rel=1e-14)
    empty = sf.shift_operator(np.zeros((5, 5)), "laplacian")
    for kind in PERTURBATIONS:
        p = _perturb(empty, kind, 0.1, 0)
        if kind != "additive":
            assert np.count_nonzero(p.op.dense()) == 0


@pytest.mark.parametrize("kind,size", [("relative", -0.1), ("diagonal", float("nan")), ("scaling", float("inf")),
                                       ("additive", -1.0), ("jitter", -0.1), ("delete", 1.5), ("rewire", -0.2)])
def test_bad_size_is_an_error(kind, size):
    with pytest.raises(sf.StablefiltError):
        _perturb(GRAPHS["path-scaled"], kind, size, 0)


def test_dense_kinds_refuse_large_graphs(monkeypatch):
    monkeypatch.setattr(pt, "DENSE_LIMIT", 10)
    op = GRAPHS["path-scaled"]
    for kind in ("relative", "additive"):
        with pytest.raises(sf.StablefiltError, match="nodes"):
            _perturb(op, kind, 0.1, 0)
    assert _perturb(op, "diagonal", 0.1, 0).e_norm == pytest.approx(0.1)


@pytest.mark.parametrize("shift", ["normalized-laplacian", "scaled-adjacency", "laplacian"])
@pytest.mark.parametrize("kind", ["relative", "diagonal", "scaling", "additive", "jitter", "delete", "rewire", "relabel"])
def test_perturbed_interval_holds_its_spectrum(shift, kind):
    """A perturbed operator keeps its construction's kind only where the
    construction still holds (relabelling; a combinatorial Laplacian rebuilt
    from new non-negative weights), so the interval proved for it without
    eigenvalues (construction ends, Lanczos + inertia or row sums) contains
    its spectrum (reference: numpy.linalg.eigvalsh). A scaled normalised
    Laplacian reaches 2 (1 + 2 eps) > 2, outside the construction's [0, 2]."""
    op = sf.shift_operator(_weighted(nx.karate_club_graph(), 3), shift)  # Zachary 1977, bundled with networkx
    size = 0.3 if kind in ("delete", "rewire") else 0.1
    p = _perturb(op, kind, size, 11)
    assert p.op.kind == (shift if kind == "relabel" or (shift == "laplacian" and kind in ("jitter", "delete", "rewire"))
                         else "as-is")
    iv = sf.spectral_interval(p.op, exact_limit=0)
    w = np.linalg.eigvalsh(p.op.dense())
    assert iv.lower <= w[0] and w[-1] <= iv.upper, (iv, w[0], w[-1])
