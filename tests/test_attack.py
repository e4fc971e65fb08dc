"""Adversarial search over relative perturbations, and the soundness sweep:
no measured or attacked change ever exceeds its certificate.

Sources of the check values:
- every change is re-measured here in float64 by an independent dense
  forward pass on ``S + E S + S E`` (Gama, Bruna, Ribeiro, "Stability
  Properties of Graph Neural Networks", IEEE TSP 2020, for the model; the GNN
  ``x_l = sigma(H_l(S) x_{l-1} + b_l)`` from docs/theory.md s. 1), with the
  filters applied by their polynomial recurrences on dense numpy matrices;
- the worst-pair construction ``E = eps (v_i v_j^T + v_j v_i^T)`` (or
  ``eps v_i v_i^T``) with ``(i, j)`` maximising ``|Gamma_ij|``, ``Gamma`` from
  ``numpy.polynomial`` divided differences and filters on the graph as
  ``V h(Lambda) V^T`` from ``numpy.linalg.eigh`` (docs/theory.md s. 5 item 3,
  derived from the Daleckii-Krein formula, Bhatia, "Matrix Analysis", 1997);
- ``||E||_2`` by ``numpy.linalg.norm(., 2)``.
Tolerances: the search runs in float32, so comparisons of a found change with
a constructed one allow 1e-5 relative; re-measurements are float64 (1e-10).
"""

from __future__ import annotations

import helpers as H
import jax.numpy as jnp
import networkx as nx
import numpy as np
import pytest
from numpy.polynomial import chebyshev as npcheb
from numpy.polynomial import polynomial as nppoly

import stablefilt as sf
from stablefilt import _attack as atk
from stablefilt import stress as st
from stablefilt._sparse import jax_operator

# ---------------------------------------------------------------------------
# Independent float64 reference.


def ref_change(params, spec, s, e, x):
    """``||Phi(S + E S + S E) x - Phi(S) x||_F``, ``E`` dense or its diagonal."""
    e = np.diag(e) if np.ndim(e) == 1 else np.asarray(e)
    s_hat = s + e @ s + s @ e
    return float(np.linalg.norm(H.ref_forward(params, spec, s_hat, x) - H.ref_forward(params, spec, s, x)))


def _response(c, lam, basis):
    if basis.kind == "monomial":
        return nppoly.polyval(lam, c)
    a, b = basis.interval
    return npcheb.chebval((2 * lam - a - b) / (b - a), c)


def _derivative(c, lam, basis):
    if basis.kind == "monomial":
        return nppoly.polyval(lam, nppoly.polyder(c))
    a, b = basis.interval
    return (2 / (b - a)) * npcheb.chebval((2 * lam - a - b) / (b - a), npcheb.chebder(c))


def _filter(m, c, basis):
    """``H(M) = V h(Lambda) V^T`` (numpy.linalg.eigh)."""
    w, v = np.linalg.eigh(m)
    return (v * _response(c, w, basis)) @ v.T


def _gamma(c, w, basis):
    """``Gamma_ij = (w_i + w_j)(h(w_i) - h(w_j)) / (w_i - w_j)``, ``2 w h'(w)``
    on (near) ties (theory.md s. 3)."""
    li, lj = np.meshgrid(w, w, indexing="ij")
    close = np.abs(li - lj) <= 1e-9 * max(1.0, np.max(np.abs(w)))
    dd = (_response(c, li, basis) - _response(c, lj, basis)) / np.where(close, 1.0, li - lj)
    return (li + lj) * np.where(close, _derivative(c, 0.5 * (li + lj), basis), dd)


# ---------------------------------------------------------------------------
# Graphs and models.


def _weighted(g, seed):
    rng = np.random.default_rng(seed)
    a = nx.to_numpy_array(g, weight=None)
    w = np.triu(rng.uniform(0.2, 2.0, a.shape), 1)
    return a * (w + w.T)


KARATE = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977, bundled with networkx

FAMILIES = {
    "karate-normalized": lambda: sf.shift_operator(KARATE, "normalized-laplacian"),
    "geometric-laplacian": lambda: sf.shift_operator(_weighted(nx.random_geometric_graph(24, 0.35, seed=3), 4),
                                                     "laplacian"),
    "path-scaled": lambda: sf.shift_operator(nx.to_numpy_array(nx.path_graph(12)), "scaled-adjacency"),
    "bipartite-adjacency": lambda: sf.shift_operator(_weighted(nx.bipartite.random_graph(6, 8, 0.5, seed=5), 6)),
}
OPS = {k: f() for k, f in FAMILIES.items()}


def _basis(kind, op):
    if kind == "monomial":
        return sf.Basis()
    lam = np.linalg.eigvalsh(op.dense())
    return sf.make_basis("chebyshev", (float(lam[0]) - 0.05, float(lam[-1]) + 0.05))


def _model(op, basis_kind, depth, seed):
    """Depth 1: a linear bank (no bias, no nonlinearity, no readout);
    depth 2: relu, node readout; depth 3: tanh, mean readout. Non-zero biases."""
    basis = _basis(basis_kind, op)
    feats = (2,) + (3,) * depth
    if depth == 1:
        spec = sf.ModelSpec(feats, taps=4, basis=basis, nonlinearity="none", bias=False, readout="none")
    elif depth == 2:
        spec = sf.ModelSpec(feats, taps=4, basis=basis, nonlinearity="relu", readout="node", outputs=2)
    else:
        spec = sf.ModelSpec(feats, taps=4, basis=basis, nonlinearity="tanh", readout="mean", outputs=2)
    params = sf.init_params(spec, seed)
    rng = np.random.default_rng(seed)
    if spec.bias:
        for layer in params["layers"]:
            layer["bias"] = jnp.asarray(rng.uniform(-0.3, 0.3, layer["bias"].shape), jnp.float32)
        params["readout"]["bias"] = jnp.asarray(rng.uniform(-0.3, 0.3, params["readout"]["bias"].shape),
                                                jnp.float32)
    return spec, params


def _signals(n, f, count, seed):
    return np.random.default_rng(seed).standard_normal((count, n, f))


def test_reference_forward_agrees_with_library():
    """The test's dense reference and ``forward_np`` compute the same model
    (otherwise the checks below would compare different things)."""
    for basis_kind in ("monomial", "chebyshev"):
        for depth in (1, 2, 3):
            op = OPS["karate-normalized"]
            spec, params = _model(op, basis_kind, depth, 1)
            x = _signals(op.nodes, 2, 2, 0)
            got = sf.forward_np(params, op.matrix, x, spec)
            for b in range(2):
                want = H.ref_forward(params, spec, op.dense(), x[b])
                assert np.max(np.abs(got[b] - want)) <= 1e-10 * max(1.0, np.max(np.abs(want)))


# ---------------------------------------------------------------------------
# The attack's result.


@pytest.fixture(scope="module")
def small_case():
    op = OPS["karate-normalized"]
    spec, params = _model(op, "chebyshev", 2, 3)
    x = _signals(op.nodes, 2, 1, 4)[0]
    return op, spec, params, x


@pytest.mark.parametrize("mode", ["dense", "diagonal"])
@pytest.mark.parametrize("free", [False, True])
def test_attack_change_is_remeasured_and_in_the_ball(small_case, mode, free):
    op, spec, params, x = small_case
    eps = 0.02
    rho = 1.7
    r = st.attack(params, spec, op, x, eps, mode=mode, free_input=free, rho=rho if free else None, restarts=3,
                   iters=15, seed=0)
    assert r.mode == mode and r.free_input == free and len(r.history) > 0
    if mode == "dense":
        assert r.e.shape == (op.nodes, op.nodes)
        assert np.array_equal(r.e, r.e.T)
        assert np.linalg.norm(r.e, 2) <= eps * (1 + 1e-9)
    else:
        assert r.e.shape == (op.nodes,)
        assert np.max(np.abs(r.e)) <= eps * (1 + 1e-9)
    if free:
        assert np.linalg.norm(r.x) == pytest.approx(rho, rel=1e-12)
    else:
        assert np.array_equal(r.x, x)
    want = ref_change(params, spec, op.dense(), r.e, r.x)
    assert r.change == pytest.approx(want, rel=1e-10)
    assert r.change > 0


def test_attack_is_seeded(small_case):
    op, spec, params, x = small_case
    for mode in ("dense", "diagonal"):
        a = st.attack(params, spec, op, x, 0.01, mode=mode, restarts=3, iters=8, seed=5)
        b = st.attack(params, spec, op, x, 0.01, mode=mode, restarts=3, iters=8, seed=5)
        assert a.change == b.change and a.start == b.start
        assert np.array_equal(a.e, b.e)


def test_attack_beats_random_perturbations(small_case):
    """The search does at least as well as random points of the ball."""
    op, spec, params, x = small_case
    eps = 0.02
    r = st.attack(params, spec, op, x, eps, mode="dense", restarts=3, iters=15, seed=0)
    s = op.dense()
    rnd = max(ref_change(params, spec, s, st.relative(op, eps, k).e, x) for k in range(5))
    assert r.change >= rnd


def test_auto_mode_picks_lowrank_above_the_limit(small_case, monkeypatch):
    """Above the dense limit the low-rank attack runs (it returns the
    diagonal attack's winner when nothing beat it), never a dense E."""
    op, spec, params, x = small_case
    monkeypatch.setattr(atk, "DENSE_ATTACK_LIMIT", 10)
    r = st.attack(params, spec, op, x, 0.01, restarts=2, iters=3, seed=0)
    d = st.attack(params, spec, op, x, 0.01, mode="diagonal", restarts=2, iters=3, seed=0)
    assert r.mode in ("lowrank", "diagonal") and r.change >= d.change
    if r.mode == "diagonal":
        assert r.e.shape == (op.nodes,)
    else:
        assert r.e.u.shape == (op.nodes, atk.LOWRANK_RANK) and r.e.bound <= 0.01


# ---------------------------------------------------------------------------
# Worst-pair construction for one linear filter.


def _linear_filter(c, basis):
    k = len(c)
    spec = sf.ModelSpec((1, 1), taps=k, basis=basis, nonlinearity="none", bias=False, readout="none")
    params = {"layers": [{"taps": jnp.asarray(np.reshape(c, (k, 1, 1)), jnp.float32)}]}
    return spec, params, np.asarray(params["layers"][0]["taps"], dtype=np.float64).ravel()


def _pair_cases():
    n = 8
    # Complete graph K_8, Laplacian eigenvalues {0, 8}; h the cubic smoothstep
    # from 0 to 8 (h' = 0 at both eigenvalues): Gamma vanishes on the diagonal,
    # so scaling moves the output only at second order and the worst pair is
    # (0-eigenvector, 8-eigenvector) with Gamma = 1.
    yield ("complete-smoothstep", sf.shift_operator(nx.to_numpy_array(nx.complete_graph(n)), "laplacian"),
           np.array([0.0, 0.0, 3.0 / n**2, -2.0 / n**3]), sf.Basis())
    op = sf.shift_operator(KARATE, "normalized-laplacian")
    rng = np.random.default_rng(2)
    yield ("karate-chebyshev", op, rng.standard_normal(5) / np.arange(1, 6), sf.make_basis("chebyshev", (-0.1, 2.1)))
    op = sf.shift_operator(_weighted(nx.gnp_random_graph(20, 0.3, seed=4), 1), "laplacian")
    lam = np.linalg.eigvalsh(op.dense())
    yield ("random-laplacian-chebyshev", op, rng.standard_normal(5) / np.arange(1, 6),
           sf.make_basis("chebyshev", (lam[0] - 0.1, lam[-1] + 0.1)))


PAIR_CASES = {name: (op, c, basis) for name, op, c, basis in _pair_cases()}


@pytest.mark.parametrize("name", sorted(PAIR_CASES))
@pytest.mark.parametrize("eps", [1e-3, 1e-2])
def test_attack_at_least_worst_pair(name, eps):
    """For one linear filter, the attack's change is at least the change of the
    worst-pair construction ``E = eps (v_i v_j^T + v_j v_i^T)`` on ``x = v_j``
    (theory.md s. 5 item 3), with the input fixed at ``v_j`` and with the input
    free on the sphere ``||x|| = 1`` from a random start."""
    op, c, basis = PAIR_CASES[name]
    spec, params, c = _linear_filter(c, basis)
    s = op.dense()
    w, v = np.linalg.eigh(s)
    g = np.abs(_gamma(c, w, basis))
    i, j = np.unravel_index(np.argmax(g), g.shape)
    if name == "complete-smoothstep":
        assert w[i] != pytest.approx(w[j])  # the worst pair is off-diagonal here
    if i == j:
        e = eps * np.outer(v[:, i], v[:, i])
    else:
        e = eps * (np.outer(v[:, i], v[:, j]) + np.outer(v[:, j], v[:, i]))
    assert np.linalg.norm(e, 2) == pytest.approx(eps, rel=1e-12)
    d = _filter(s + e @ s + s @ e, c, basis) - _filter(s, c, basis)
    pair = float(np.linalg.norm(d @ v[:, j]))
    # The construction realises the first-order value eps |Gamma_ij| (theory s. 5 item 3).
    assert pair == pytest.approx(eps * g[i, j], rel=20 * eps)
    fixed = st.attack(params, spec, op, v[:, [j]], eps, mode="dense", restarts=4, iters=20, seed=0)
    assert fixed.change >= pair * (1 - 1e-5)
    x0 = np.random.default_rng(9).standard_normal((op.nodes, 1))
    free = st.attack(params, spec, op, x0, eps, mode="dense", free_input=True, rho=1.0, restarts=4, iters=20,
                      seed=0)
    assert free.change >= pair * (1 - 1e-5)
    for r in (fixed, free):
        assert r.change == pytest.approx(ref_change(params, spec, s, r.e, r.x), rel=1e-10)


# ---------------------------------------------------------------------------
# Soundness sweep: every measured and attacked change below its certificate.

EPS = [1e-3, 1e-2, 0.1]


@pytest.mark.parametrize("depth", [1, 2, 3])
@pytest.mark.parametrize("basis_kind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_soundness_sweep(family, basis_kind, depth):
    """Random relative, diagonal and scaling perturbations and the attack
    (fixed and free input, dense and diagonal ``E``), each re-measured here in
    float64, never exceed ``certify_model(...).certified`` (inputs with
    ``||x||_F <= rho``) nor ``certify_inputs`` for their own signal."""
    op = OPS[family]
    seed = 10 * depth + (basis_kind == "chebyshev")
    spec, params = _model(op, basis_kind, depth, seed)
    s = op.dense()
    n = op.nodes
    xs = _signals(n, 2, 3, seed)
    rho = float(np.max(np.linalg.norm(xs.reshape(3, -1), axis=1)))
    iv = sf.spectral_interval(op)
    lam = iv.eigenvalues
    cert = sf.certify_model(params, spec, iv, n, EPS, rho=rho, eigenvalues=lam)
    worst = 0.0
    for eps in EPS:
        c_op = cert.at(eps).certified
        c_in = sf.certify_inputs(params, spec, op.matrix, iv, xs, eps, lam)
        assert np.all(np.isfinite(c_in)) and np.isfinite(c_op)
        assert np.all(c_in <= c_op * (1 + 1e-9))  # every signal has ||x|| <= rho
        es = [st.relative(op, eps, k).e for k in range(2)] + [st.diagonal(op, eps, k).e for k in range(2)]
        es += [st.scaling(op, eps, k).e for k in range(2)]
        for e in es:
            for b in range(len(xs)):
                ch = ref_change(params, spec, s, e, xs[b])
                assert ch <= c_in[b], (eps, b, ch, c_in[b])
                assert ch <= c_op, (eps, b, ch, c_op)
                worst = max(worst, ch / c_in[b])
        b = int(np.argmax(c_in))
        # Few iterations keep the sweep fast; dense starts include the worst pairs.
        # Compilation dominates the cost, so diagonal E (a second compiled
        # objective) is attacked at depth 2 only; random diagonal draws run everywhere.
        for mode, restarts in (("dense", 4), ("diagonal", 2))[:1 + (depth == 2)]:
            r = st.attack(params, spec, op, xs[b], eps, mode=mode, restarts=restarts, iters=8, seed=0)
            ch = ref_change(params, spec, s, r.e, xs[b])
            assert ch == pytest.approx(r.change, rel=1e-9)
            assert ch <= c_in[b], (eps, mode, ch, c_in[b])
            assert ch <= c_op
        r = st.attack(params, spec, op, xs[b], eps, mode="dense", free_input=True, rho=rho, restarts=4, iters=8)
        ch = ref_change(params, spec, s, r.e, r.x)
        assert ch == pytest.approx(r.change, rel=1e-9)
        assert ch <= c_op, (eps, "free", ch, c_op)
    assert worst > 0


# ---------------------------------------------------------------------------
# The free-input block ascent against the previous free-input search.


def _previous_free_search(params, spec, op, x, eps, rho, restarts, iters, seed):
    """The free-input search as it was before the block ascent: projected
    gradient ascent from the same restarts, the clean output held at its
    starting input (stablefilt._attack._ascent with a free input)."""
    rng = np.random.default_rng(seed)
    sop = jax_operator(op)
    x0 = jnp.asarray(x, jnp.float32)
    x0 = x0 * (rho / jnp.linalg.norm(x0))
    y0 = atk._forward(params, sop, x0[None], spec)
    starts = atk._starts(op, params, spec, eps, True, restarts, rng, None)
    return atk._ascent(params, spec, op, sop, x, x0, y0, eps, True, True, rho, starts, iters, "clip")


def _karate_relu_case():
    """A 2-layer relu model on the karate club's normalised Laplacian
    (networkx), one signal, ``rho = 1.5``, and the graph's dense matrix and
    certified interval: the free-input attacks' common case."""
    op = OPS["karate-normalized"]
    spec, params = _model(op, "chebyshev", 2, 7)
    x = _signals(op.nodes, 2, 1, 8)[0]
    return op, spec, params, op.dense(), x, 1.5, sf.spectral_interval(op)


def test_free_block_ascent_beats_previous_search_and_stays_certified():
    """On the same budget (restarts x iterations, one objective-and-gradient
    evaluation each), the block ascent's free-input change is at least the
    previous projected-gradient search's; both re-measured here in float64
    by the independent dense reference (Gama, Bruna, Ribeiro, IEEE TSP 2020,
    model of docs/theory.md s. 1), with ``||E||_2`` from numpy.linalg.norm
    and ``||x||_F = rho``; and both stay below the operator-level
    certificate ``certify_model(...).certified`` for inputs of norm at most
    rho (a change above it is a bug: the certificate is an upper bound)."""
    op, spec, params, s, x, rho, iv = _karate_relu_case()
    for eps in (1e-3, 1e-2):
        old = _previous_free_search(params, spec, op, x, eps, rho, 4, 15, 0)
        new = st.attack(params, spec, op, x, eps, mode="dense", free_input=True, rho=rho, restarts=4, iters=15,
                        seed=0)
        c_op = sf.certify_model(params, spec, iv, op.nodes, [eps], rho=rho, eigenvalues=iv.eigenvalues).at(eps)
        for r in (old, new):
            assert np.linalg.norm(r.e, 2) <= eps * (1 + 1e-9)
            assert np.linalg.norm(r.x) == pytest.approx(rho, rel=1e-12)
            assert ref_change(params, spec, s, r.e, r.x) == pytest.approx(r.change, rel=1e-9)
            assert r.change <= c_op.certified, (eps, r.start, r.change, c_op.certified)
        assert new.change >= old.change, (eps, old.change, new.change)


def test_free_block_ascent_skips_a_non_finite_gradient(monkeypatch):
    """A float32 gradient in E can overflow on a large model at a large eps
    while the objective stays finite: the ascent then makes no perturbation
    move (no NaN direction, no NaN arithmetic, which numpy warns about) and
    returns a point in the ball (common practice: guard non-finite steps)."""
    from stablefilt import _freeattack as fa

    op = OPS["karate-normalized"]
    spec, params = _model(op, "chebyshev", 2, 7)
    sop = jax_operator(op)
    real = fa.free_value_grad

    def overflowing(*args, **kwargs):
        val, (ge, gx) = real(*args, **kwargs)
        return val, (jnp.where(jnp.arange(ge.size).reshape(ge.shape) % 2 == 0, jnp.inf, -jnp.inf), gx)

    monkeypatch.setattr(fa, "free_value_grad", overflowing)
    e0 = np.zeros((op.nodes, op.nodes))
    x0 = _signals(op.nodes, 2, 1, 8)[0]
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # NaN arithmetic on the overflowed gradient would warn
        e, x, hist = fa.block_ascent(params, spec, sop, e0, x0, 1e-2, 1.5, 20)
    assert np.all(np.isfinite(e)) and np.all(np.isfinite(x)) and np.all(np.isfinite(hist))
    assert np.array_equal(e, e0)  # no perturbation move was possible
    assert np.linalg.norm(x) == pytest.approx(1.5, rel=1e-12)


def _check_free_point(params, spec, op, iv, s, found, eps, rho):
    """A free-input attack's point: in the ball (numpy's ``||E||_2``), with
    ``||x||_F = rho``, its change the dense float64 reference's, and below
    the operator-level certificate (a change above it is a bug)."""
    c_op = sf.certify_model(params, spec, iv, op.nodes, [eps], rho=rho, eigenvalues=iv.eigenvalues).at(eps)
    assert np.linalg.norm(found.e, 2) <= eps * (1 + 1e-9)
    assert np.linalg.norm(found.x) == pytest.approx(rho, rel=1e-12)
    assert ref_change(params, spec, s, found.e, found.x) == pytest.approx(found.change, rel=1e-9)
    assert found.change <= c_op.certified, (eps, found.change, c_op.certified)


def test_adam_polish_stays_in_the_ball_and_only_raises_the_change():
    """The Adam polish of the winner (stablefilt._freeattack.polish) against
    the same attack without it, same seed and budget:
    the polished point is in the ball (numpy's ``||E||_2``) with
    ``||x||_F = rho``, its change is the independent dense float64
    reference's, it is never below the unpolished change, it is above it on
    at least one eps here (a polish that never moves would fail), and
    neither exceeds the operator-level certificate."""
    op, spec, params, s, x, rho, iv = _karate_relu_case()
    gains = []
    for eps in (1e-3, 1e-2):
        new = st.attack(params, spec, op, x, eps, mode="dense", free_input=True, rho=rho, restarts=3, iters=20,
                        seed=0, polish=True)
        old = st.attack(params, spec, op, x, eps, mode="dense", free_input=True, rho=rho, restarts=3, iters=20,
                        seed=0)
        _check_free_point(params, spec, op, iv, s, new, eps, rho)
        assert new.change >= old.change
        gains.append(new.change / old.change)
    assert max(gains) > 1.0 + 1e-6, gains


def _karate_three_layer_relu(seed):
    """A 3-layer relu model (6 features a layer, node readout, non-zero
    biases) on the karate club's normalised Laplacian (networkx)."""
    op = OPS["karate-normalized"]
    spec = sf.ModelSpec((2, 6, 6, 6), taps=4, basis=_basis("chebyshev", op), nonlinearity="relu", readout="node",
                        outputs=2)
    params = sf.init_params(spec, seed)
    rng = np.random.default_rng(seed)
    for layer in params["layers"]:
        layer["bias"] = jnp.asarray(rng.uniform(-0.3, 0.3, layer["bias"].shape), jnp.float32)
    return op, spec, params


def test_adam_search_stays_in_the_ball_beats_block_ascent_and_stays_certified():
    """The free-input Adam search over the smoothed model
    (stablefilt._adamattack, ``search="adam"``) against the block ascent
    with the same starts count and iterations, on a 3-layer relu model:
    its point is in the ball (numpy's ``||E||_2``) with ``||x||_F = rho``,
    its change is the independent dense float64 reference's, it is never
    below the block ascent's (measured: 1.41 and 1.06 times at the two eps;
    1.02-1.07 on a second model, seed 7, left out for the suite's time), and
    above it by 5% somewhere (a search that only returned its first
    stage would fail), it stays below the operator-level certificate, and
    the progress count is :func:`adam_evaluations`' promise."""
    rho = 1.5
    gains = []
    for seed in (3,):
        op, spec, params = _karate_three_layer_relu(seed)
        s, iv = op.dense(), sf.spectral_interval(op)
        x = _signals(op.nodes, 2, 1, 8)[0]
        for eps in (1e-3, 1e-2):
            counted = []
            new = st.attack(params, spec, op, x, eps, mode="dense", free_input=True, rho=rho, restarts=8, iters=80,
                            seed=0, search="adam", progress=counted.append)
            old = st.attack(params, spec, op, x, eps, mode="dense", free_input=True, rho=rho, restarts=8, iters=80,
                            seed=0)
            _check_free_point(params, spec, op, iv, s, new, eps, rho)
            assert new.change >= old.change, (seed, eps, new.change, old.change)
            assert sum(counted) == atk.adam_evaluations(8, 80)
            gains.append(new.change / old.change)
    assert max(gains) > 1.05, gains


def test_smoothed_relu_lies_within_log2_over_beta_above_relu():
    """The Adam search's smoothed relu ``log(1 + exp(beta z)) / beta``
    against numpy's ``logaddexp(0, beta z) / beta`` and the handbook bounds
    ``max(t, 0) <= log(1 + e^t) <= max(t, 0) + log 2``; leaky relu
    ``0.1 z + 0.9`` times it; tanh untouched."""
    from stablefilt import _adamattack as aa

    z = np.linspace(-30.0, 30.0, 1201)
    for beta in (3.0, 50.0, 1e4):
        relu = sf.ModelSpec((1, 1), nonlinearity="relu")
        soft = np.asarray(aa._smooth(relu, beta)(jnp.asarray(z)), dtype=np.float64)
        assert soft == pytest.approx(np.logaddexp(0.0, beta * z) / beta, rel=1e-5, abs=1e-6)
        assert np.all(soft >= np.maximum(z, 0) - 1e-5)
        assert np.all(soft <= np.maximum(z, 0) + np.log(2) / beta + 1e-5)
        leaky = np.asarray(aa._smooth(sf.ModelSpec((1, 1), nonlinearity="leaky_relu"), beta)(jnp.asarray(z)))
        assert leaky == pytest.approx(0.1 * z + 0.9 * soft, rel=1e-5, abs=1e-6)
        tanh = np.asarray(aa._smooth(sf.ModelSpec((1, 1), nonlinearity="tanh"), beta)(jnp.asarray(z)))
        assert tanh == pytest.approx(np.tanh(z), rel=1e-5, abs=1e-6)


def test_adam_search_refuses_what_it_cannot_search():
    """A fixed input, the low-rank mode or an unknown search: a ValueError
    in one sentence before any work."""
    op, spec, params, s, x, rho, iv = _karate_relu_case()
    with pytest.raises(ValueError, match="free input"):
        st.attack(params, spec, op, x, 1e-3, mode="dense", search="adam")
    with pytest.raises(ValueError, match="free input"):
        st.attack(params, spec, op, x, 1e-3, mode="lowrank", free_input=True, rho=rho, search="adam")
    with pytest.raises(ValueError, match="unknown search"):
        st.attack(params, spec, op, x, 1e-3, free_input=True, rho=rho, search="sideways")
