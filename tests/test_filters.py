"""Polynomial filters and banks: frequency responses against numpy.polynomial,
application to signals against ``V h(Lambda) V^T X`` from numpy.linalg.eigh,
on the float64 numpy path and the float32 JAX path, under jit, grad and vmap."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import networkx as nx
import numpy as np
import pytest
from numpy.polynomial import chebyshev as npcheb
from numpy.polynomial import polynomial as nppoly
from reference import bank_response, derivative, filter_matrices, response

import stablefilt as sf
from stablefilt._filters import basis_values
from stablefilt._sparse import shift_product

BASES = [("monomial", None), ("chebyshev", (-0.5, 2.5)), ("chebyshev", (-3.0, -1.0))]


def _basis(kind, interval):
    return sf.make_basis(kind, interval)


def _rel(a, b):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(b), 1e-300))


# ---------------------------------------------------------------------------
# Frequency response and derivative.


@pytest.mark.parametrize("kind,interval", BASES)
@pytest.mark.parametrize("k", [1, 2, 5, 8])
def test_response_single_filter_matches_numpy_polynomial(kind, interval, k):
    rng = np.random.default_rng(100 + k)
    c = rng.standard_normal(k)
    lam = rng.uniform(-3.5, 3.0, size=(7, 5))
    basis = _basis(kind, interval)
    # reference: numpy.polynomial.polynomial.polyval / chebyshev.chebval
    np.testing.assert_allclose(sf.frequency_response(c, lam, basis), response(c, lam, kind, interval),
                               rtol=1e-10, atol=1e-10 * np.abs(c).sum())
    # reference: numpy.polynomial.polynomial.polyder / chebyshev.chebder
    np.testing.assert_allclose(sf.response_derivative(c, lam, basis), derivative(c, lam, kind, interval),
                               rtol=1e-10, atol=1e-10 * np.abs(c).sum() * k * k)


@pytest.mark.parametrize("kind,interval", BASES)
def test_response_bank_matches_numpy_polynomial(kind, interval):
    rng = np.random.default_rng(7)
    taps = rng.standard_normal((5, 3, 2))
    lam = rng.uniform(-3.0, 3.0, size=11)
    basis = _basis(kind, interval)
    h = sf.frequency_response(taps, lam, basis)
    d = sf.response_derivative(taps, lam, basis)
    assert h.shape == d.shape == (11, 3, 2)
    for f in range(3):
        for g in range(2):
            # reference: numpy.polynomial polyval/chebval and polyder/chebder, filter by filter
            np.testing.assert_allclose(h[:, f, g], response(taps[:, f, g], lam, kind, interval), rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(d[:, f, g], derivative(taps[:, f, g], lam, kind, interval), rtol=1e-10,
                                       atol=1e-11)


@pytest.mark.parametrize("kind,interval", BASES)
def test_basis_values_match_vandermonde(kind, interval):
    lam = np.linspace(-3.0, 3.0, 13)
    basis = _basis(kind, interval)
    got = basis_values(lam, 6, basis)
    if kind == "monomial":
        ref = nppoly.polyvander(lam, 5)  # reference: numpy.polynomial.polynomial.polyvander
    else:
        a, b = interval
        ref = npcheb.chebvander((2 * lam - a - b) / (b - a), 5)  # reference: numpy.polynomial.chebyshev.chebvander
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("kind,interval", BASES)
def test_response_jax_float32_matches_numpy(kind, interval):
    rng = np.random.default_rng(8)
    taps = rng.standard_normal((4, 2, 3)).astype(np.float32)
    lam = rng.uniform(-2.0, 2.0, size=17)
    basis = _basis(kind, interval)
    got = sf.frequency_response(jnp.asarray(taps), jnp.asarray(lam, dtype=jnp.float32), basis, xp=jnp)
    assert got.dtype == jnp.float32
    ref = bank_response(taps, lam, kind, interval)  # reference: numpy.polynomial, float64
    assert _rel(got, ref) < 1e-5
    gd = sf.response_derivative(jnp.asarray(taps[:, 0, 0]), jnp.asarray(lam, dtype=jnp.float32), basis, xp=jnp)
    assert _rel(gd, derivative(taps[:, 0, 0], lam, kind, interval)) < 1e-5


# ---------------------------------------------------------------------------
# Application to signals.


def _graphs():
    g = nx.karate_club_graph()  # bundled with networkx (Zachary 1977)
    a = nx.to_numpy_array(g)
    return {
        "karate-normalized": sf.shift_operator(a, "normalized-laplacian"),
        "karate-scaled": sf.shift_operator(a, "scaled-adjacency"),
        "florentine-laplacian": sf.shift_operator(nx.to_numpy_array(nx.florentine_families_graph()), "laplacian"),
    }


GRAPHS = _graphs()


def _cheb_for(op):
    lam = np.linalg.eigvalsh(op.dense())
    return ("chebyshev", (float(lam[0]) - 0.1, float(lam[-1]) + 0.1))


@pytest.mark.parametrize("gname", sorted(GRAPHS))
@pytest.mark.parametrize("which", ["monomial", "chebyshev"])
@pytest.mark.parametrize("shape", [(1,), (4,), (5, 3, 2)])
def test_run_filter_numpy_float64_matches_eigh(gname, which, shape):
    op = GRAPHS[gname]
    s = op.dense()
    kind, interval = ("monomial", None) if which == "monomial" else _cheb_for(op)
    basis = _basis(kind, interval)
    rng = np.random.default_rng(sum(shape))
    taps = rng.standard_normal(shape)
    if gname.endswith("laplacian") and kind == "monomial":
        taps = taps / (8.0 ** np.arange(shape[0])).reshape((-1,) + (1,) * (len(shape) - 1))
    n = op.nodes
    fin = shape[1] if len(shape) == 3 else 3
    x = rng.standard_normal((n, fin))
    y = sf.run_filter(lambda z: op.matrix @ z, taps, x, basis)
    h = filter_matrices(s, taps, kind, interval)  # reference: V h(Lambda) V^T from numpy.linalg.eigh
    ref = h @ x if len(shape) == 1 else np.einsum("fgij,jf->ig", h, x)
    assert y.shape == ref.shape
    assert _rel(y, ref) < 1e-10


@pytest.mark.parametrize("gname", ["karate-normalized", "karate-scaled"])
@pytest.mark.parametrize("which", ["monomial", "chebyshev"])
@pytest.mark.parametrize("shape,xshape", [((4,), "vector"), ((4,), "matrix"), ((5, 3, 2), "matrix")])
def test_apply_filter_jax_float32_matches_eigh(gname, which, shape, xshape):
    op = GRAPHS[gname]
    kind, interval = ("monomial", None) if which == "monomial" else _cheb_for(op)
    basis = _basis(kind, interval)
    rng = np.random.default_rng(3)
    taps = rng.standard_normal(shape).astype(np.float32)
    n = op.nodes
    x = rng.standard_normal(n if xshape == "vector" else (n, shape[1] if len(shape) == 3 else 4)).astype(np.float32)
    jop = sf.jax_operator(op)
    y = sf.apply_filter(jop, jnp.asarray(taps), jnp.asarray(x), basis)
    assert y.dtype == jnp.float32
    h = filter_matrices(op.dense(), taps, kind, interval)  # reference: numpy.linalg.eigh, float64
    ref = h @ x if len(shape) == 1 else np.einsum("fgij,jf->ig", h, x)
    assert y.shape == ref.shape
    assert _rel(y, ref) < 1e-5


def test_apply_filter_jit_equals_no_jit():
    op = GRAPHS["karate-normalized"]
    jop = sf.jax_operator(op)
    basis = sf.make_basis("chebyshev", (0.0, 2.0))
    rng = np.random.default_rng(4)
    taps = jnp.asarray(rng.standard_normal((5, 3, 2)), dtype=jnp.float32)
    x = jnp.asarray(rng.standard_normal((op.nodes, 3)), dtype=jnp.float32)
    plain = sf.apply_filter(jop, taps, x, basis)
    jitted = jax.jit(sf.apply_filter, static_argnums=(3,))(jop, taps, x, basis)
    np.testing.assert_allclose(np.asarray(jitted), np.asarray(plain), rtol=1e-6, atol=1e-6)  # common practice


def test_apply_filter_second_call_does_not_retrace():
    op = GRAPHS["karate-scaled"]
    jop = sf.jax_operator(op)
    traces = []

    @jax.jit
    def f(o, taps, x):
        traces.append(1)
        return sf.apply_filter(o, taps, x, sf.make_basis())

    rng = np.random.default_rng(5)
    for _ in range(3):
        taps = jnp.asarray(rng.standard_normal((4, 2, 2)), dtype=jnp.float32)
        x = jnp.asarray(rng.standard_normal((op.nodes, 2)), dtype=jnp.float32)
        f(jop, taps, x).block_until_ready()
    assert len(traces) == 1  # common practice (optax tests the same for its updates)


def test_apply_filter_gradients_match_dense_reference():
    # d/dX 0.5 ||Y||^2 with Y = sum_k p_k(S) X c_k is sum_k p_k(S) Y c_k^T, and
    # d/dc_k is (p_k(S) X)^T Y: the symmetric custom backward of the sparse
    # product must reproduce these (reference: numpy.linalg.eigh on dense S).
    op = GRAPHS["karate-scaled"]
    jop = sf.jax_operator(op)
    basis = sf.make_basis("chebyshev", (-1.0, 1.0))
    rng = np.random.default_rng(6)
    taps = rng.standard_normal((4, 3, 2)).astype(np.float32)
    x = rng.standard_normal((op.nodes, 3)).astype(np.float32)

    def loss(c, z):
        return 0.5 * jnp.sum(sf.apply_filter(jop, c, z, basis) ** 2)

    gc, gx = jax.grad(loss, argnums=(0, 1))(jnp.asarray(taps), jnp.asarray(x))
    s = op.dense()
    w, v = np.linalg.eigh(s)
    pk = [(v * npcheb.chebval(w, np.eye(4)[j])) @ v.T for j in range(4)]  # T_j(S), interval [-1, 1]
    y = sum(pk[j] @ x @ taps[j] for j in range(4))
    ref_gx = sum(pk[j] @ y @ taps[j].T for j in range(4))
    ref_gc = np.stack([(pk[j] @ x).T @ y for j in range(4)])
    assert _rel(gx, ref_gx) < 1e-5
    assert _rel(gc, ref_gc) < 1e-5


def test_apply_filter_vmap_over_signals_and_taps():
    op = GRAPHS["karate-normalized"]
    jop = sf.jax_operator(op)
    basis = sf.make_basis()
    rng = np.random.default_rng(9)
    taps = jnp.asarray(rng.standard_normal((3, 4)), dtype=jnp.float32)  # 3 filters of K = 4
    xs = jnp.asarray(rng.standard_normal((3, op.nodes, 2)), dtype=jnp.float32)
    batched = jax.vmap(lambda c, z: sf.apply_filter(jop, c, z, basis))(taps, xs)
    h = [filter_matrices(op.dense(), np.asarray(taps[i])) for i in range(3)]  # reference: numpy.linalg.eigh
    for i in range(3):
        assert _rel(batched[i], h[i] @ np.asarray(xs[i])) < 1e-5


def test_jax_operator_matches_scipy_product():
    op = GRAPHS["florentine-laplacian"]
    jop = sf.jax_operator(op)
    x = np.random.default_rng(10).standard_normal((op.nodes, 3)).astype(np.float32)
    # reference: scipy.sparse CSR product in float64
    assert _rel(jop @ jnp.asarray(x), op.matrix @ x.astype(np.float64)) < 1e-6
    assert _rel(shift_product(jop, jnp.asarray(x[:, 0])), op.matrix @ x[:, 0].astype(np.float64)) < 1e-6


# ---------------------------------------------------------------------------
# Corner cases by hand.


def test_k1_filter_is_a_scalar_multiple():
    op = GRAPHS["karate-scaled"]
    x = np.random.default_rng(11).standard_normal((op.nodes, 2))
    for basis in (sf.make_basis(), sf.make_basis("chebyshev", (-1.0, 1.0))):
        y = sf.run_filter(lambda z: op.matrix @ z, np.array([2.5]), x, basis)
        np.testing.assert_allclose(y, 2.5 * x, rtol=1e-15)  # h = c_0 p_0 = c_0 (by hand)
        assert np.all(sf.response_derivative(np.array([2.5]), np.linspace(-1, 1, 5), basis) == 0)


def test_one_node_and_no_edges_by_hand():
    # One node with S = [[s]]: H(S) = [[h(s)]]; no edges (S = 0): H(S) = h(0) I.
    c = np.array([1.0, -2.0, 0.5])
    one = sf.jax_operator(sf.shift_operator(np.array([[3.0]])))
    y = sf.apply_filter(one, jnp.asarray(c, dtype=jnp.float32), jnp.array([2.0]))
    np.testing.assert_allclose(np.asarray(y), [2.0 * (1 - 6 + 4.5)], rtol=1e-6)  # by hand
    zero = sf.shift_operator(np.zeros((4, 4)))
    assert zero.matrix.nnz == 0
    x = np.arange(4.0)
    y0 = sf.run_filter(lambda z: zero.matrix @ z, c, x, sf.make_basis())
    np.testing.assert_allclose(y0, c[0] * x, rtol=1e-15)  # by hand: h(0) = c_0
    cheb = sf.make_basis("chebyshev", (-1.0, 1.0))
    y1 = sf.run_filter(lambda z: zero.matrix @ z, c, x, cheb)
    np.testing.assert_allclose(y1, (c[0] - c[2]) * x, rtol=1e-15)  # by hand: T_0(0) = 1, T_1(0) = 0, T_2(0) = -1


@pytest.mark.parametrize("shape", [(5, 3, 2), (4, 2, 3)])
def test_large_signal_loop_matches_eigh_with_gradients(monkeypatch, shape):
    """Above ``LOOP_MIN_ELEMENTS`` a monomial bank runs as an XLA loop
    (stablefilt._looped, Horner's rule from the last tap when F_out <= F_in,
    powers from the first tap otherwise); with the threshold lowered to 0 the
    loop must give the values and gradients of the dense reference
    (numpy.linalg.eigh: Y = sum_k S^k X c_k, dY/dX = sum_k S^k G c_k^T,
    dY/dc_k = (S^k X)^T G for G = Y), under jit and vmap, and the traced
    program must contain the loop."""
    from stablefilt import _filters

    monkeypatch.setattr(_filters, "_loop_threshold", lambda: 0)
    op = GRAPHS["karate-scaled"]
    jop = sf.jax_operator(op)
    basis = sf.make_basis()
    rng = np.random.default_rng(11)
    taps = rng.standard_normal(shape).astype(np.float32)
    x = rng.standard_normal((op.nodes, shape[1])).astype(np.float32)

    def loss(c, z):
        return 0.5 * jnp.sum(sf.apply_filter(jop, c, z, basis) ** 2)

    assert "scan[" in str(jax.make_jaxpr(loss)(jnp.asarray(taps), jnp.asarray(x)))  # fori_loop with fixed bounds
    y = jax.jit(lambda c, z: sf.apply_filter(jop, c, z, basis))(jnp.asarray(taps), jnp.asarray(x))
    gc, gx = jax.jit(jax.grad(loss, argnums=(0, 1)))(jnp.asarray(taps), jnp.asarray(x))
    s = op.dense()
    pk = [np.linalg.matrix_power(s, j) for j in range(shape[0])]
    ref = sum(pk[j] @ x @ taps[j] for j in range(shape[0]))
    assert _rel(y, ref) < 1e-5
    assert _rel(gx, sum(pk[j] @ ref @ taps[j].T for j in range(shape[0]))) < 1e-5
    assert _rel(gc, np.stack([(pk[j] @ x).T @ ref for j in range(shape[0])])) < 1e-5
    xs = np.stack([x, 2 * x])
    batched = jax.vmap(lambda z: sf.apply_filter(jop, jnp.asarray(taps), z, basis))(jnp.asarray(xs))
    assert _rel(batched[1], 2 * ref) < 1e-5


def test_no_loop_under_malloc_huge_pages(monkeypatch):
    """With glibc's malloc huge pages (``GLIBC_TUNABLES`` holding
    ``glibc.malloc.hugetlb=1``) the written-out bank was the faster
    (benchmarks/README.md), so no loop is traced; without the tunable, the
    same call above the threshold traces the loop (measured, common practice
    for tunables: glibc.malloc.hugetlb takes 0, 1 or 2)."""
    from stablefilt import _looped

    monkeypatch.setattr(_looped, "LOOP_MIN_ELEMENTS", 0)
    op = GRAPHS["karate-scaled"]
    jop = sf.jax_operator(op)
    taps = jnp.ones((4, 3, 2), jnp.float32)
    x = jnp.ones((op.nodes, 3), jnp.float32)

    def traced():
        return str(jax.make_jaxpr(lambda t, z: sf.apply_filter(jop, t, z, sf.make_basis()))(taps, x))

    monkeypatch.setenv("GLIBC_TUNABLES", "glibc.malloc.trim_threshold=1000")
    assert "scan[" in traced()
    monkeypatch.setenv("GLIBC_TUNABLES", "glibc.malloc.trim_threshold=1000:glibc.malloc.hugetlb=1")
    assert "scan[" not in traced()
