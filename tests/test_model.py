"""The GNN model (float32 JAX and float64 numpy paths) and its certificate.

Every expected value comes from an independent float64 reference in
tests/helpers.py (numpy.linalg.eigh and numpy.polynomial); the graphs
are networkx's bundled and seeded generators.
"""

from __future__ import annotations

import dataclasses
import itertools

import helpers as H
import jax
import jax.numpy as jnp
import networkx as nx
import numpy as np
import pytest

from stablefilt import (
    Basis,
    ConfigError,
    ModelSpec,
    certify_inputs,
    certify_model,
    forward,
    forward_np,
    init_params,
    jax_operator,
    model_constants,
    shift_operator,
    spectral_interval,
)

NONLINS = ("relu", "leaky_relu", "tanh", "none")
READOUTS = ("node", "mean", "sum", "flat", "none")


@pytest.fixture(scope="module")
def karate():
    """Zachary's karate club (bundled with networkx), normalised Laplacian."""
    op = shift_operator(nx.to_numpy_array(nx.karate_club_graph()), "normalized-laplacian")
    return op, spectral_interval(op)


def _basis(kind, iv):
    return Basis("chebyshev", (iv.lower, iv.upper)) if kind == "chebyshev" else Basis()


def _random_params(spec, seed, scale=0.5, bias_scale=0.3):
    """Float64 params in the layout of the _model docstring (checked against
    init_params in test_init_is_deterministic_and_laid_out_as_documented),
    every leaf from a seeded normal, so biases are non-zero."""
    rng = np.random.default_rng(seed)
    out = {"layers": []}
    for fin, fout in zip(spec.features[:-1], spec.features[1:]):
        layer = {"taps": scale * rng.standard_normal((spec.taps, fin, fout))}
        if spec.bias:
            layer["bias"] = bias_scale * rng.standard_normal(fout)
        out["layers"].append(layer)
    if spec.readout != "none":
        rows = spec.features[-1] * (spec.nodes if spec.readout == "flat" else 1)
        out["readout"] = {"weight": scale * rng.standard_normal((rows, spec.outputs)),
                          "bias": scale * rng.standard_normal(spec.outputs)}
    return out


def _f32(params):
    return jax.tree_util.tree_map(lambda a: jnp.asarray(a, jnp.float32), params)


# ---------------------------------------------------------------------------
# forward (float32 JAX) vs forward_np (float64) vs the eigh reference.


@pytest.mark.parametrize("basis", ["monomial", "chebyshev"])
@pytest.mark.parametrize("nonlinearity", NONLINS)
@pytest.mark.parametrize("readout", READOUTS)
def test_forward_float32_matches_float64(karate, basis, nonlinearity, readout):
    op, iv = karate
    spec = ModelSpec((2, 4, 3), taps=4, basis=_basis(basis, iv), nonlinearity=nonlinearity, readout=readout,
                     outputs=3, nodes=op.nodes if readout == "flat" else 0)
    params = _random_params(spec, seed=11)
    # Round the params to float32 first so both paths see the same numbers.
    p32 = _f32(params)
    rng = np.random.default_rng(5)
    x = rng.standard_normal((3, op.nodes, 2)).astype(np.float32)
    y32 = np.asarray(forward(p32, jax_operator(op), jnp.asarray(x), spec))
    y64 = forward_np(p32, op.matrix, x, spec)
    expected_shape = {"node": (3, op.nodes, 3), "mean": (3, 3), "sum": (3, 3), "flat": (3, 3),
                      "none": (3, op.nodes, 3)}[readout]
    assert y32.shape == y64.shape == expected_shape
    assert y32.dtype == np.float32 and y64.dtype == np.float64
    # float32 vs float64: ~1e-5 relative to the output's scale (house style).
    scale = float(np.max(np.abs(y64)))
    np.testing.assert_allclose(y32, y64, rtol=1e-5, atol=1e-5 * scale)
    # And forward_np against the numpy.linalg.eigh reference, float64 tolerance.
    ref = H.ref_forward(H.to_numpy(p32), spec, op.dense(), x)
    np.testing.assert_allclose(y64, ref, rtol=1e-10, atol=1e-10 * max(scale, 1.0))


@pytest.mark.parametrize("layers,basis,bias,final", [(1, "monomial", True, True), (2, "chebyshev", False, True),
                                                   (3, "monomial", True, False), (3, "chebyshev", True, True)])
def test_forward_np_matches_eigh_reference_on_adjacency(layers, basis, bias, final):
    """Deeper models on a random geometric graph (networkx, seeded) with the
    raw adjacency as shift operator (a spectrum not centred at 1)."""
    adj = nx.to_numpy_array(nx.random_geometric_graph(25, 0.35, seed=3))
    op = shift_operator(adj, "as-is")
    iv = spectral_interval(op)
    spec = ModelSpec(tuple([3] + [4] * layers), taps=3, basis=_basis(basis, iv), nonlinearity="tanh", bias=bias,
                     readout="node", outputs=2, final_nonlinearity=final)
    params = _random_params(spec, seed=layers, scale=0.3)
    x = np.random.default_rng(9).standard_normal((2, 25, 3))
    got = forward_np(params, op.matrix, x, spec)
    ref = H.ref_forward(params, spec, adj, x)
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-10 * np.max(np.abs(ref)))


@pytest.mark.parametrize("k", [1, 2, 5])
@pytest.mark.parametrize("basis", ["monomial", "chebyshev"])
def test_single_linear_filter_is_spectral_calculus(karate, k, basis):
    """One layer, no nonlinearity, no readout: ``y = V h(Lambda) V^T x``
    (numpy.linalg.eigh; numpy.polynomial polyval / chebval)."""
    op, iv = karate
    b = _basis(basis, iv)
    spec = ModelSpec((1, 1), taps=k, basis=b, nonlinearity="none", bias=False, readout="none")
    rng = np.random.default_rng(k)
    c = rng.standard_normal(k)
    params = {"layers": [{"taps": jnp.asarray(c.reshape(k, 1, 1), jnp.float32)}]}
    x = rng.standard_normal((2, op.nodes, 1))
    w, v = np.linalg.eigh(op.dense())
    c32 = np.asarray(params["layers"][0]["taps"], np.float64).ravel()
    h = H.response(c32, w, b.kind, b.interval)
    expected = np.stack([(v * h) @ v.T @ xi for xi in x])
    y32 = np.asarray(forward(params, jax_operator(op), jnp.asarray(x, jnp.float32), spec))
    y64 = forward_np(params, op.matrix, x, spec)
    scale = np.max(np.abs(expected))
    np.testing.assert_allclose(y64, expected, rtol=1e-10, atol=1e-10 * scale)
    np.testing.assert_allclose(y32, expected, rtol=1e-5, atol=1e-5 * scale)


def test_single_node_graph():
    """Corner case by hand: one node with a self-weight s; a filter is
    multiplication by h(s) (closed form)."""
    op = shift_operator(np.array([[0.5]]), "as-is")
    spec = ModelSpec((1, 1), taps=3, nonlinearity="none", bias=False, readout="none")
    params = {"layers": [{"taps": jnp.asarray([[[1.0]], [[2.0]], [[-4.0]]], jnp.float32)}]}
    y = forward_np(params, op.matrix, np.array([[[3.0]]]), spec)
    assert y.shape == (1, 1, 1)
    assert y[0, 0, 0] == pytest.approx(3.0 * (1 + 2 * 0.5 - 4 * 0.25), rel=1e-12)


# ---------------------------------------------------------------------------
# Permutation equivariance / invariance (common practice for GNNs).


@pytest.mark.parametrize("readout", ["node", "mean", "sum", "none"])
@pytest.mark.parametrize("basis", ["monomial", "chebyshev"])
def test_permutation_equivariance(karate, readout, basis):
    op, iv = karate
    spec = ModelSpec((2, 3, 3), taps=3, basis=_basis(basis, iv), nonlinearity="relu", readout=readout, outputs=2)
    params = _f32(_random_params(spec, seed=3))
    rng = np.random.default_rng(17)
    perm = rng.permutation(op.nodes)
    s = op.dense()
    op_p = shift_operator(s[np.ix_(perm, perm)], "as-is")  # node perm[i] renamed i
    x = rng.standard_normal((2, op.nodes, 2)).astype(np.float32)
    y = np.asarray(forward(params, jax_operator(op), jnp.asarray(x), spec))
    y_p = np.asarray(forward(params, jax_operator(op_p), jnp.asarray(x[:, perm]), spec))
    scale = np.max(np.abs(y))
    if readout in ("node", "none"):
        np.testing.assert_allclose(y_p, y[:, perm], rtol=1e-5, atol=1e-5 * scale)
    else:
        np.testing.assert_allclose(y_p, y, rtol=1e-5, atol=1e-5 * scale)
    # The float64 path, tighter.
    z = forward_np(params, op.matrix, x, spec)
    z_p = forward_np(params, op_p.matrix, x[:, perm], spec)
    np.testing.assert_allclose(z_p, z[:, perm] if readout in ("node", "none") else z, rtol=1e-10,
                               atol=1e-10 * scale)


# ---------------------------------------------------------------------------
# Initialisation.


def test_init_is_deterministic_and_laid_out_as_documented():
    spec = ModelSpec((2, 5, 3), taps=4, readout="node", outputs=6)
    a, b, c = init_params(spec, 7), init_params(spec, 7), init_params(spec, 8)
    la, lb, lc = (jax.tree_util.tree_leaves(t) for t in (a, b, c))
    assert all(np.array_equal(np.asarray(x), np.asarray(y)) for x, y in zip(la, lb))
    assert any(not np.array_equal(np.asarray(x), np.asarray(y)) for x, y in zip(la, lc))
    # A PRNG key gives the same as the integer seed it comes from.
    lk = jax.tree_util.tree_leaves(init_params(spec, jax.random.PRNGKey(7)))
    assert all(np.array_equal(np.asarray(x), np.asarray(y)) for x, y in zip(la, lk))
    # Layout from the module docstring (the tests' _random_params follows it).
    assert jax.tree_util.tree_structure(a) == jax.tree_util.tree_structure(_random_params(spec, 0))
    assert [np.shape(layer["taps"]) for layer in a["layers"]] == [(4, 2, 5), (4, 5, 3)]
    assert [np.shape(layer["bias"]) for layer in a["layers"]] == [(5,), (3,)]
    assert np.shape(a["readout"]["weight"]) == (3, 6) and np.shape(a["readout"]["bias"]) == (6,)
    assert all(np.asarray(x).dtype == np.float32 for x in la)
    assert all(np.all(np.asarray(layer["bias"]) == 0) for layer in a["layers"])
    no_bias = init_params(dataclasses.replace(spec, bias=False, readout="none"), 7)
    assert "readout" not in no_bias and all(set(layer) == {"taps"} for layer in no_bias["layers"])


@pytest.mark.parametrize("kw", [dict(features=(3,)), dict(features=(3, 0)), dict(taps=0),
                                dict(nonlinearity="sigmoid"), dict(readout="max"), dict(outputs=0),
                                dict(readout="flat")])
def test_model_spec_rejects_bad_architecture(kw):
    args = dict(features=(2, 3))
    args.update(kw)
    with pytest.raises(ConfigError):
        ModelSpec(**args)


# ---------------------------------------------------------------------------
# Certificate soundness: a measured output change never exceeds the certified
# bound (first-rank property). Perturbation model: Gama, Bruna, Ribeiro,
# "Stability Properties of Graph Neural Networks", IEEE TSP 2020,
# S_hat = P (S + E S + S E) P^T, ||E||_2 <= eps.

EPS = (1e-3, 1e-2, 0.1)
RHO = 1.5


def _graphs():
    """Small graphs from networkx: the bundled karate club, a seeded random
    geometric graph, a path, a complete bipartite graph (eigenvalues in
    +/- pairs)."""
    return {
        "karate": nx.to_numpy_array(nx.karate_club_graph()),
        "geometric": nx.to_numpy_array(nx.random_geometric_graph(24, 0.35, seed=4)),
        "path": nx.to_numpy_array(nx.path_graph(14)),
        "bipartite": nx.to_numpy_array(nx.complete_bipartite_graph(4, 7)),
    }


def _cases():
    rng = np.random.default_rng(2024)
    kinds = ("as-is", "normalized-laplacian", "laplacian", "scaled-adjacency")
    nonlins = ("relu", "tanh", "leaky_relu")
    cases = []
    for i, (g, basis, bias) in enumerate(itertools.product(sorted(_graphs()), ("monomial", "chebyshev"),
                                                           (True, False))):
        cases.append(dict(graph=g, kind=kinds[i % 4], basis=basis, bias=bias, nonlinearity=nonlins[i % 3],
                          layers=int(rng.integers(1, 4)), width=int(rng.integers(2, 5)), taps=int(rng.integers(2, 5)),
                          readout=("node", "mean", "sum", "none")[(i // 3) % 4], seed=i))
    # The flat readout (theory s.8.1) on every graph, with the node order kept.
    for i, g in enumerate(sorted(_graphs())):
        cases.append(dict(graph=g, kind=kinds[(i + 1) % 4], basis=("monomial", "chebyshev")[i % 2], bias=i % 2 == 0,
                          nonlinearity=nonlins[i % 3], layers=1 + i % 2, width=3, taps=3, readout="flat", seed=100 + i))
    return cases


CASES = _cases()


@pytest.fixture(scope="module")
def graph_ops():
    out = {}
    for name, adj in _graphs().items():
        for kind in ("as-is", "normalized-laplacian", "laplacian", "scaled-adjacency"):
            op = shift_operator(adj, kind)
            out[name, kind] = (op, spectral_interval(op))
    return out


def _perturbed_graphs(rng, s, eps, v):
    """``(label, S_hat, perm)``: random dense relative perturbations,
    scaling ``E = +-eps I`` (``S_hat = (1 +- 2 eps) S``), two eigenvector-pair
    perturbations, and a relabelled perturbed graph ``P^T S_hat P``."""
    n = s.shape[0]
    out = []
    for t in range(3):
        out.append((f"random{t}", H.relative(s, H.random_error(rng, n, eps)), None))
    for sign in (1.0, -1.0):
        out.append((f"scale{sign:+g}", (1 + 2 * sign * eps) * s, None))
    i, j = rng.choice(n, 2, replace=False)
    out.append(("pair", H.relative(s, H.pair_error(v, i, j, eps)), None))
    out.append(("pair-top", H.relative(s, H.pair_error(v, n - 1, n - 2, eps)), None))
    perm = rng.permutation(n)
    s_hat = H.relative(s, H.random_error(rng, n, eps))
    out.append(("relabelled", s_hat[np.ix_(perm, perm)], perm))
    return out


def _measure(params, spec, s_hat, perm, x):
    """Output on the perturbed graph in the original node order."""
    if perm is None:
        return H.ref_forward(params, spec, s_hat, x)
    y = H.ref_forward(params, spec, s_hat, x[:, perm])
    if spec.readout in ("node", "none"):
        inv = np.argsort(perm)
        y = y[:, inv]
    return y


def case_spec(case, iv, n) -> ModelSpec:
    """The :class:`ModelSpec` of one of :data:`CASES` on a graph of ``n`` nodes."""
    return ModelSpec(tuple([2] + [case["width"]] * case["layers"]), taps=case["taps"],
                     basis=_basis(case["basis"], iv), nonlinearity=case["nonlinearity"], bias=case["bias"],
                     readout=case["readout"], outputs=2, nodes=n if case["readout"] == "flat" else 0)


@pytest.mark.parametrize("case", CASES, ids=lambda c: f"{c['graph']}-{c['kind']}-{c['basis']}-"
                         f"{'bias' if c['bias'] else 'nobias'}-{c['nonlinearity']}-L{c['layers']}F{c['width']}"
                         f"-{c['readout']}")
def test_measured_change_never_exceeds_certificate(graph_ops, case):
    op, iv = graph_ops[case["graph"], case["kind"]]
    s = op.dense()
    n = op.nodes
    spec = case_spec(case, iv, n)
    params = _random_params(spec, seed=case["seed"], scale=0.6)
    cert = certify_model(params, spec, iv, n, EPS, rho=RHO, eigenvalues=iv.eigenvalues)
    cert_iv = certify_model(params, spec, iv, n, EPS, rho=RHO)  # interval only (the per-epoch form)
    interval_constants = model_constants(params, spec, iv, n, matrix=op.matrix)
    rng = np.random.default_rng(100 + case["seed"])
    w, v = np.linalg.eigh(s)
    # Random signals, and single eigenvectors (where the spectral form of the
    # input-specific bound is at its tightest), all of norm rho.
    eig_sig = np.stack([v[:, [0, 0]], v[:, [n - 1, 0]], v[:, [n // 2, n - 1]]]) * (RHO / np.sqrt(2))
    x = np.concatenate([H.signals(rng, 5, n, 2, RHO), eig_sig])
    y = H.ref_forward(params, spec, s, x)
    worst = 0.0
    for eps in EPS:
        bound = cert.at(eps).certified
        assert np.isfinite(bound) and bound <= cert_iv.at(eps).certified * (1 + 1e-12)
        per_norms = certify_inputs(params, spec, op.matrix, iv, x, eps, iv.eigenvalues)
        per_spec = certify_inputs(params, spec, op.matrix, iv, x, eps, w, v)  # as `stablefilt certify` calls it
        # Interval only, as on graphs too large for eigh: each bank's joint
        # bound for its input comes from sparse products (theory.md s. 9.2).
        per_sparse = certify_inputs(params, spec, op.matrix, iv, x, eps, constants=interval_constants)
        assert per_norms.shape == per_spec.shape == per_sparse.shape == (len(x),)
        assert np.all(per_sparse <= cert_iv.at(eps).certified * (1 + 1e-9))
        # Input-specific bounds use measured norms: never above the
        # operator-level one for inputs of norm rho.
        assert np.all(per_norms <= bound * (1 + 1e-9)) and np.all(per_spec <= per_norms * (1 + 1e-9))
        for label, s_hat, perm in _perturbed_graphs(rng, s, eps, v):
            if perm is not None and spec.readout == "flat":
                continue  # the flat readout's certificate assumes the node order is kept (P = I)
            d = H.change_norms(y, _measure(params, spec, s_hat, perm, x))
            assert d.max() <= bound, (label, eps, d.max(), bound)
            assert np.all(d <= per_norms), (label, eps, d, per_norms)
            assert np.all(d <= per_spec), (label, eps, d, per_spec)
            assert np.all(d <= per_sparse), (label, eps, d, per_sparse)
            worst = max(worst, float(np.max(d / per_spec)))
    # The check has teeth: the perturbations move the output.
    assert worst > 1e-3


@pytest.mark.parametrize("graph,kind,basis,layers,bias", [
    ("karate", "as-is", "monomial", 1, True),
    ("path", "normalized-laplacian", "chebyshev", 1, False),
    ("bipartite", "as-is", "chebyshev", 2, False),
    ("geometric", "laplacian", "monomial", 2, False),
])
def test_linear_models_worst_input_stays_below_certificate(graph_ops, graph, kind, basis, layers, bias):
    """For a model linear in its input (no nonlinearity; biases only where
    they cancel), the largest change over all inputs of norm rho is rho times
    the spectral norm of the dense change operator (numpy.linalg.norm(., 2)).
    Checked for every eigenvector-pair perturbation ``eps (v_i v_j^T + v_j
    v_i^T)`` of the top and bottom of the spectrum and random ones: the
    closest the property test gets to the worst case (theory s.5 item 3)."""
    op, iv = graph_ops[graph, kind]
    s = op.dense()
    n = op.nodes
    spec = ModelSpec(tuple([1] + [2] * layers), taps=4, basis=_basis(basis, iv), nonlinearity="none",
                     bias=bias, readout="none")
    params = _random_params(spec, seed=layers, scale=0.6)
    eye = np.eye(n).reshape(n, n, 1)  # every unit input signal

    def operator(m):
        return H.ref_forward(params, spec, m, eye).reshape(n, -1)  # rows: inputs

    base = operator(s)
    w, v = np.linalg.eigh(s)
    idx = sorted(set([0, 1, 2, n // 2, n - 3, n - 2, n - 1]))
    rng = np.random.default_rng(7)
    cert = certify_model(params, spec, iv, n, EPS, rho=RHO, eigenvalues=iv.eigenvalues)
    tightest = 0.0
    for eps in EPS:
        bound = cert.at(eps).certified
        errors = [H.pair_error(v, i, j, eps) for i, j in itertools.combinations_with_replacement(idx, 2)]
        errors += [H.random_error(rng, n, eps) for _ in range(3)] + [eps * np.eye(n), -eps * np.eye(n)]
        for e in errors:
            change = RHO * np.linalg.norm(operator(H.relative(s, e)) - base, 2)
            assert change <= bound, (eps, change, bound)
            tightest = max(tightest, change / bound)
    # Within an order of magnitude of the certificate: the perturbations
    # probe the bound, not only its neighbourhood of zero.
    print(f"tightest change / certificate: {tightest:.3f}")
    assert tightest > 0.1


def test_flat_readout_factor_is_the_weight_spectral_norm(karate):
    """theory s.8.1: the flat readout is linear in vec(x_L), so its factor is
    ||W_flat||_2 (numpy.linalg.norm(., 2), the reference; within the
    round-off allowance, about 1e-9), and the worst change of the readout alone
    (the top right singular vector of W_flat as Delta x_L) attains it."""
    from stablefilt._modelcert import readout_factor

    op, iv = karate
    spec = ModelSpec((2, 3), taps=3, basis=_basis("chebyshev", iv), readout="flat", outputs=4, nodes=op.nodes)
    params = _random_params(spec, seed=21)
    w = params["readout"]["weight"]
    assert w.shape == (op.nodes * 3, 4)
    ref = np.linalg.norm(w, 2)
    got = readout_factor(params, spec, op.nodes)
    assert ref <= got <= ref * (1 + 1e-8)  # the allowance covers the float64 norm's round-off
    _, sv, vt = np.linalg.svd(w.T)
    dx = vt[0].reshape(op.nodes, 3)  # unit Frobenius norm, node-major as the readout reads it
    change = np.linalg.norm(dx.reshape(-1) @ w)
    assert change == pytest.approx(ref, rel=1e-12) and change <= got
