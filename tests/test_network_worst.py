"""The whole-network bound for one given input (docs/theory.md section 9.6).

- The switching lemma, checked by direct evaluation of relu and leaky relu on
  random and edge-case reals (derived in docs/theory.md 9.6).
- Soundness: on small GNNs over networkx graphs (all four shift kinds, depths
  1-3, relu / leaky relu / none, the readouts, with and without bias), no
  change measured with the numpy reference forward pass (tests/helpers.py) on
  randomly, pairwise and scaled perturbed graphs, nor found by the project's
  gradient attack, exceeds the bound, at eps from 1e-3 to 0.3.
- The residual terms are needed: the fixed-pattern linear part alone is
  exceeded by a measured change in some cases, so a version without them
  would fail this test.
"""

from __future__ import annotations

import dataclasses

import helpers as H
import numpy as np
import pytest
from test_model import _basis, _perturbed_graphs, _random_params, graph_ops  # noqa: F401

from stablefilt import ModelSpec, model_constants
from stablefilt._compose import layer_changes, network_bounds
from stablefilt._modelcert import _layer, layer_bounds
from stablefilt.stress import attack

EPS = (1e-3, 0.03, 0.3)

# (graph, kind, basis, features, taps, nonlinearity, readout, final, bias)
SPECS = [
    ("karate", "normalized-laplacian", "chebyshev", (2, 4, 4), 4, "relu", "node", True, True),
    ("geometric", "laplacian", "chebyshev", (2, 3, 3, 3), 3, "leaky_relu", "node", True, True),
    ("path", "as-is", "monomial", (2, 3), 3, "relu", "mean", True, False),
    ("bipartite", "scaled-adjacency", "monomial", (2, 3, 2), 4, "relu", "none", False, True),
    ("karate", "as-is", "chebyshev", (2, 3, 3), 3, "none", "sum", False, True),
    ("geometric", "normalized-laplacian", "monomial", (2, 3, 3), 3, "leaky_relu", "flat", True, False),
    ("path", "laplacian", "chebyshev", (2, 4, 3, 2), 4, "relu", "node", False, True),
]


def _slope_pair(alpha):
    def sigma(t):
        return np.where(t >= 0, t, alpha * t)
    return sigma


@pytest.mark.parametrize("alpha", [0.0, 0.1, 0.5])
def test_switching_error_has_a_known_sign(alpha):
    """g(0) = sigma(p + mu) - sigma(p) - d mu equals theta mu with theta
    between 0 and (1 - alpha) (1 - |p| / M) s, s = +1 where p <= 0 (slope
    alpha) and -1 where p > 0, whenever |mu| <= M (docs/theory.md 9.6); with
    the signs swapped it fails."""
    sigma = _slope_pair(alpha)
    rng = np.random.default_rng(8)
    p = np.concatenate([rng.normal(size=20000), np.zeros(500)])
    mu = rng.normal(size=p.size) * rng.choice([1e-2, 1.0, 5.0], size=p.size)
    big = np.abs(mu) * rng.uniform(1.0, 3.0, size=p.size)  # any M >= |mu|
    d = np.where(p > 0, 1.0, alpha)
    g0 = sigma(p + mu) - sigma(p) - d * mu
    w = np.maximum(1.0 - np.abs(p) / big, 0.0)
    s = np.where(p > 0, -1.0, 1.0)
    # theta s in [0, cap]  <=>  g0 s sign(mu) in [0, cap |mu|] (round-off: 1e-12 of the sizes).
    signed = g0 * s * np.sign(mu)
    cap = (1 - alpha) * w * np.abs(mu)
    tol = 1e-12 * (1 + np.abs(p) + np.abs(mu))
    assert np.all(signed >= -tol) and np.all(signed <= cap + tol)
    assert np.any(-signed < -tol - 1e-9)  # the swapped signs are wrong somewhere


@pytest.mark.parametrize("alpha", [0.0, 0.1, 0.5])
def test_switching_lemma(alpha):
    """|sigma(p + q) - sigma(p) - d q| <= (1 - alpha) (|q| - |p|)_+ for d a slope at p
    (docs/theory.md 9.6), including p = 0 with either one-sided slope."""
    sigma = _slope_pair(alpha)
    rng = np.random.default_rng(7)
    p = np.concatenate([rng.normal(size=20000), np.zeros(2000), rng.normal(size=2000) * 1e-12])
    q = rng.normal(size=p.size) * rng.choice([1e-3, 1.0, 10.0], size=p.size)
    for d in (np.where(p > 0, 1.0, alpha), np.where(p >= 0, 1.0, alpha)):
        lhs = np.abs(sigma(p + q) - sigma(p) - d * q)
        rhs = (1 - alpha) * np.maximum(np.abs(q) - np.abs(p), 0.0)
        assert np.all(lhs <= rhs + 1e-12 * (1 + np.abs(q)))
    # Tight where the sign flips: equality (direct computation).
    lhs = np.abs(sigma(np.array(-0.5)) - sigma(np.array(1.0)) - 1.0 * -1.5)
    assert lhs == pytest.approx((1 - alpha) * 0.5)


def _spec(row, iv, n):
    graph, kind, basis, feats, taps, nonlin, readout, final, bias = row
    return ModelSpec(feats, taps=taps, basis=_basis(basis, iv), nonlinearity=nonlin, bias=bias, readout=readout,
                     outputs=2, final_nonlinearity=final, nodes=n if readout == "flat" else 0)


@pytest.mark.parametrize("row", SPECS, ids=lambda r: f"{r[0]}-{r[1]}-{r[5]}-L{len(r[3]) - 1}-{r[6]}")
def test_network_bound_holds_and_needs_its_residual(graph_ops, row):  # noqa: F811
    op, iv = graph_ops[row[0], row[1]]
    s, n = op.dense(), op.nodes
    spec = _spec(row, iv, n)
    params = _random_params(spec, seed=len(row[3]) * 7 + row[4], scale=0.6)
    mc = model_constants(params, spec, iv, n, iv.eigenvalues, matrix=op.matrix)
    lam, vecs = np.linalg.eigh(s)
    rng = np.random.default_rng(11)
    x = H.signals(rng, 2, n, 2, 1.5)
    y = H.ref_forward(params, spec, s, x)
    p = mc.params

    def fl(i, z):
        return _layer(p, spec, op.matrix, i, z)

    exceeded_linear = 0
    for eps in EPS:
        bounds = layer_bounds(mc, eps)
        lc = layer_changes(mc, mc.composition, bounds, eps)
        recs = network_bounds(mc, mc.composition, bounds, lc, x, eps, vecs, fl)
        cert = np.array([r.certified for r in recs])
        linear = np.array([r.linear for r in recs])
        assert np.all(np.isfinite(cert))
        for label, s_hat, perm in _perturbed_graphs(rng, s, eps, vecs):
            if perm is not None:
                continue  # relabelling is covered by the operator-level tests; here P = I
            d = H.change_norms(y, H.ref_forward(params, spec, s_hat, x))
            assert np.all(d <= cert), (label, eps, d, cert)
            exceeded_linear += int(np.sum(d > linear * (1 + 1e-6)))
        found = attack(params, spec, op, x[0], eps, mode="dense", iters=10, restarts=2, seed=3)
        assert found.change <= cert[0], (eps, found.change, cert[0])
        exceeded_linear += int(found.change > linear[0] * (1 + 1e-6))
    if len(row[3]) > 2:
        # Second-order and switching terms are real: with two or more layers
        # the linear part alone is exceeded by some measured change (seeded
        # cases; 1 to 9 of the 27 checks per case).
        assert exceeded_linear > 0


def test_network_bound_is_not_applied_to_tanh(graph_ops):  # noqa: F811
    """The switching lemma is for piecewise-linear activations only: tanh gets no bound."""
    op, iv = graph_ops["karate", "normalized-laplacian"]
    spec = dataclasses.replace(_spec(SPECS[0], iv, op.nodes), nonlinearity="tanh")
    params = _random_params(spec, seed=1)
    mc = model_constants(params, spec, iv, op.nodes, iv.eigenvalues, matrix=op.matrix)
    bounds = layer_bounds(mc, 1e-2)
    lc = layer_changes(mc, mc.composition, bounds, 1e-2)
    _, vecs = np.linalg.eigh(op.dense())
    x = H.signals(np.random.default_rng(0), 1, op.nodes, 2, 1.0)
    rec = network_bounds(mc, mc.composition, bounds, lc, x, 1e-2, vecs,
                         lambda i, z: _layer(mc.params, spec, op.matrix, i, z))[0]
    assert rec.certified == float("inf")
