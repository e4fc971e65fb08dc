"""The clean path's norm through the relu (docs/theory.md 9.10):
``sup ||relu(H x + c)||_F`` over ``||x||_F <= rho`` against dense numpy
references on networkx graphs.

Sources of the checks:
- the bank as a matrix against ``V h(Lambda) V^T`` (numpy.linalg.eigh,
  ``helpers.ref_bank``);
- ``||relu(v)|| = max <w, v>`` over ``w >= 0, ||w|| <= 1`` (elementary, the
  norm of the projection onto the non-negative orthant), so the supremum is
  searched over ``w`` by the projected power step ``w <- relu(rho H H^T w /
  ||H^T w|| + c)``, normalised, from many starts; each ``w`` found gives the
  input ``x = rho H^T w / ||H^T w||`` whose ``||relu(H x + c)||`` is measured
  in float64 by the reference: a lower bound on the supremum that no bound
  may undercut;
- random inputs on the sphere.
A version that drops the ``(1 + t), (1 + 1/t)`` weights of (a + b)^2 (that is,
``(a + b)^2 <= a^2 + b^2``, false) is undercut by the search on these cases
(checked when the test was written), so the check can fail.
"""

from __future__ import annotations

import helpers as H
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

import stablefilt as sf
from stablefilt._compose import clean_norm
from stablefilt._relunorm import bank_matrix, relu_norm


def _graphs():
    out = {}
    for name, g in (("karate", nx.karate_club_graph()), ("path", nx.path_graph(14))):
        a = nx.to_numpy_array(g)
        d = 1 / np.sqrt(a.sum(1))
        out[name] = np.eye(len(a)) - d[:, None] * a * d[None, :]  # normalised Laplacian, spectrum in [0, 2]
    return out


GRAPHS = _graphs()


def _case(name, kind, f_in, seed):
    s = GRAPHS[name]
    rng = np.random.default_rng(seed)
    taps = rng.standard_normal((4, f_in, 5)) / 2
    bias = rng.uniform(-0.6, 0.6, 5)
    basis = sf.Basis() if kind == "monomial" else sf.Basis("chebyshev", (0.0, 2.0))
    return s, taps, bias, basis


def _searched(hmat, c, rho, starts, rng):
    """The largest ``||relu(H x + c)||`` found over ``||x|| = rho`` through ``w``."""
    best = 0.0
    for _ in range(starts):
        w = np.abs(rng.standard_normal(hmat.shape[0]))
        w /= np.linalg.norm(w)
        for _ in range(200):
            g = hmat.T @ w
            step = np.maximum(rho * hmat @ g / max(np.linalg.norm(g), 1e-300) + c, 0.0)
            if np.linalg.norm(step) == 0:
                break
            w = step / np.linalg.norm(step)
        g = hmat.T @ w
        x = rho * g / max(np.linalg.norm(g), 1e-300)
        best = max(best, float(np.linalg.norm(np.maximum(hmat @ x + c, 0.0))))
    return best


@pytest.mark.parametrize("name", ["karate", "path"])
@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("f_in", [1, 2])
def test_relu_norm_bound_holds_and_gains_on_the_plain_clean_path(name, kind, f_in):
    s, taps, bias, basis = _case(name, kind, f_in, seed=f_in + 3 * len(name))
    n = s.shape[0]
    hmat = bank_matrix(taps, basis, sp.csr_matrix(s))
    # The matrix is the bank: columns against the eigendecomposition reference.
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2, n, f_in))
    ref = H.ref_bank(s, taps, x, kind, (0.0, 2.0) if kind == "chebyshev" else None)
    np.testing.assert_allclose(np.einsum("uv,bv->bu", hmat, x.reshape(2, -1)), ref.reshape(2, -1), rtol=1e-10,
                               atol=1e-10)
    c = np.tile(bias, n)
    rn = relu_norm(taps, bias, basis, sp.csr_matrix(s))
    gains = []
    for rho in (0.3, 1.5, 6.0):
        bound = rn.bound(rho)
        found = _searched(hmat, c, rho, 12, rng)
        xs = rng.standard_normal((200, n * f_in))
        xs *= rho / np.linalg.norm(xs, axis=1, keepdims=True)
        sampled = float(np.max(np.linalg.norm(np.maximum(xs @ hmat.T + c, 0.0), axis=1)))
        assert bound >= found * (1 - 1e-12), (rho, bound, found)
        assert bound >= sampled * (1 - 1e-12), (rho, bound, sampled)
        # 9.3's bound, which ignores the relu, for the record of what the new one gains:
        plain = clean_norm(rho, np.linalg.norm(hmat, 2), np.linalg.norm(hmat.T @ c), np.linalg.norm(c))
        assert found <= plain * (1 + 1e-9)
        gains.append(bound / plain)
    assert min(gains) < 0.95, gains  # measured 0.60-0.96 at the best radius of each case


def test_relu_norm_without_bias_and_its_limit():
    """No bias: the bound is ``rho sqrt(max_i a_i)``, at least ``rho`` times
    the largest ``||relu(H x)||`` searched and at most ``rho`` times the
    Collatz-Wielandt ratio of the all-positive-part matrix for ``y = 1``
    (its row sums; Horn and Johnson, Thm 8.1.26), a valid but cruder bound."""
    s, taps, _, basis = _case("karate", "chebyshev", 1, seed=4)
    n = s.shape[0]
    rn = relu_norm(taps, None, basis, sp.csr_matrix(s))
    hmat = bank_matrix(taps, basis, sp.csr_matrix(s))
    a = np.maximum(hmat @ hmat.T, 0.0)
    bound = rn.bound(1.0)
    found = _searched(hmat, np.zeros(hmat.shape[0]), 1.0, 12, np.random.default_rng(1))
    assert found <= bound <= np.sqrt(np.max(a.sum(axis=1))) * (1 + 1e-9)
    assert rn.bound(2.0) == pytest.approx(2.0 * bound, rel=1e-12)
    assert n * 5 == hmat.shape[0]


def test_relu_norm_refuses_above_its_size_limit(monkeypatch):
    from stablefilt import _relunorm

    s, taps, bias, basis = _case("karate", "monomial", 1, seed=0)
    monkeypatch.setattr(_relunorm, "LIMIT", 5 * s.shape[0] - 1)
    assert relu_norm(taps, bias, basis, sp.csr_matrix(s)) is None


def test_maximal_pairs_keep_every_maximum_of_non_negative_combinations():
    """The pairs kept by ``maximal_pairs`` (the upper-right hull) attain
    ``max_i w_a a_i + w_q q_i`` for every ``w_a, w_q >= 0`` (checked against
    the maximum over all pairs, numpy), none of them is exceeded in both
    coordinates by another, and they are few (400 random pairs keep fewer
    than 15; a version that kept every point would pass the first check but
    fail this one)."""
    from stablefilt._relunorm import maximal_pairs

    rng = np.random.default_rng(5)
    a, q = rng.random(400), rng.random(400)
    a[:50] = a[50:100]  # ties in a
    kept = maximal_pairs(a, q)
    assert len(kept) < 15
    for w in rng.random((500, 2)):
        assert np.max(kept @ w) == pytest.approx(np.max(w[0] * a + w[1] * q), rel=1e-14)
    for i in range(len(kept)):
        others = np.delete(kept, i, axis=0)
        assert not np.any((others[:, 0] >= kept[i, 0]) & (others[:, 1] >= kept[i, 1]))


def test_model_certificate_uses_the_relu_norm_records_it_and_holds(monkeypatch):
    """A 2-layer relu model on the karate club's normalised Laplacian
    (networkx): with the eigenvalues at hand the operator-level certificate
    records 9.10 for layer 1 in its assumptions, is never above the one
    without it (the module's size limit set to 0), and stays above the
    largest change over random inputs of norm rho and random perturbations,
    measured by the dense float64 reference (a change above it is a bug)."""
    from stablefilt import _relunorm

    op = sf.shift_operator(nx.to_numpy_array(nx.karate_club_graph(), weight=None), "normalized-laplacian")
    spec = sf.ModelSpec((1, 6, 6), taps=4, basis=sf.Basis("chebyshev", (0.0, 2.0)), nonlinearity="relu",
                        readout="node", outputs=2)
    params = sf.init_params(spec, 2)
    iv = sf.spectral_interval(op)
    rho, eps = 1.5, 1e-2
    with_relu = sf.certify_model(params, spec, iv, op.nodes, [eps], rho=rho, eigenvalues=iv.eigenvalues,
                                 matrix=op.matrix)
    assert "s.9.10) for layers 1" in with_relu.assumptions["composition"]
    monkeypatch.setattr(_relunorm, "LIMIT", 0)
    without = sf.certify_model(params, spec, iv, op.nodes, [eps], rho=rho, eigenvalues=iv.eigenvalues,
                               matrix=op.matrix)
    assert "s.9.10" not in without.assumptions["composition"]
    assert with_relu.at(eps).certified <= without.at(eps).certified
    s = op.dense()
    rng = np.random.default_rng(3)
    worst = 0.0
    for _ in range(30):
        e = rng.standard_normal(s.shape)
        e = eps * (e + e.T) / np.linalg.norm(e + e.T, 2)
        x = rng.standard_normal((1, op.nodes, 1))
        x *= rho / np.linalg.norm(x)
        y0 = H.ref_forward(params, spec, s, x)
        y1 = H.ref_forward(params, spec, s + e @ s + s @ e, x)
        worst = max(worst, float(np.linalg.norm(y1 - y0)))
    assert 0 < worst <= with_relu.at(eps).certified
