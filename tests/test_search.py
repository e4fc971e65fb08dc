"""The worst-perturbation search and its dense change operator, against the
Kronecker operator built here from numpy.linalg.eigh."""

from __future__ import annotations

import numpy as np
import pytest
from reference import change, filter_operator, random_symmetric, relative, wider_interval

import stablefilt as sf
from stablefilt._search import change_operator, measured_change
from stablefilt.stress import worst_perturbation


@pytest.mark.parametrize("shape", [(4,), (3, 2, 3)], ids=["single", "bank"])
@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
def test_change_operator_matches_kronecker_reference(family_ops, shape, kind):
    op = family_ops["random-normalized"]
    s = op.dense()
    rng = np.random.default_rng(500 + len(shape))
    basis = sf.make_basis() if kind == "monomial" else sf.make_basis("chebyshev", wider_interval(s, rng))
    taps = rng.standard_normal(shape)
    s_hat = relative(s, random_symmetric(rng, op.nodes, 0.05))
    # reference: V h(Lambda) V^T per filter (numpy.linalg.eigh), bank as a block (Kronecker) operator
    ref = filter_operator(s_hat, taps, kind, basis.interval) - filter_operator(s, taps, kind, basis.interval)
    got = change_operator(s, s_hat, taps, basis)
    np.testing.assert_allclose(got, ref, atol=1e-12 * max(1.0, np.abs(ref).max()))
    assert measured_change(s, s_hat, taps, basis) == pytest.approx(np.linalg.norm(ref, 2), rel=1e-12)
    if len(shape) == 3:
        # The operator acts on the column-stacked vec(X): Y = sum_k p_k(S) X c_k
        # by dense products (common practice: vec(A X B) = (B^T kron A) vec(X)).
        x = rng.standard_normal((op.nodes, 2))
        w0, v0 = np.linalg.eigh(s)
        w1, v1 = np.linalg.eigh(s_hat)
        y = np.zeros((op.nodes, 3))
        for j in range(shape[0]):
            e = np.eye(shape[0])[j]
            p0 = (v0 * sf.frequency_response(e, w0, basis)) @ v0.T
            p1 = (v1 * sf.frequency_response(e, w1, basis)) @ v1.T
            y += (p1 - p0) @ x @ taps[j]
        np.testing.assert_allclose((got @ x.T.ravel()).reshape(3, op.nodes).T, y, atol=1e-10)


@pytest.mark.parametrize("shape", [(4,), (3, 2, 2)], ids=["single", "bank"])
@pytest.mark.parametrize("eps", [1e-3, 0.1])
def test_worst_perturbation_is_feasible_and_measured(family, shape, eps):
    name, op = family
    s = op.dense()
    n = op.nodes
    rng = np.random.default_rng(600 + len(name))
    basis = sf.make_basis("chebyshev", wider_interval(s, rng))
    taps = rng.standard_normal(shape)
    res = worst_perturbation(s, taps, basis, eps, restarts=2, iters=10, seed=3)
    e = res.e
    np.testing.assert_allclose(e, e.T, atol=1e-14 * eps)
    assert np.linalg.norm(e, 2) <= eps * (1 + 1e-12)  # inside the ball ||E||_2 <= eps
    # the reported change is a change actually measured (reference: numpy.linalg.eigh)
    assert res.change == pytest.approx(change(s, relative(s, e), taps, "chebyshev", basis.interval), rel=1e-9)
    # it starts from scaling, so it finds at least what scaling gives
    scaling = max(change(s, relative(s, sg * eps * np.eye(n)), taps, "chebyshev", basis.interval) for sg in (1, -1))
    assert res.change >= scaling * (1 - 1e-9)
    # and at least what random perturbations of the same size give
    for _ in range(3):
        assert res.change >= change(s, relative(s, random_symmetric(rng, n, eps)), taps, "chebyshev", basis.interval)


def test_worst_perturbation_is_deterministic_under_a_seed(family_ops):
    op = family_ops["bipartite-adjacency"]
    taps = np.random.default_rng(7).standard_normal(4)
    a = worst_perturbation(op.dense(), taps, sf.make_basis(), 0.05, restarts=3, iters=5, seed=11)
    b = worst_perturbation(op.dense(), taps, sf.make_basis(), 0.05, restarts=3, iters=5, seed=11)
    np.testing.assert_array_equal(a.e, b.e)
    assert a.change == b.change and a.start == b.start
