"""The stability penalty on a user's own pytree, and the optax transformation.

Expected values come from float64 numpy references (numpy.polynomial
polyder/polyval, chebder/chebval; numpy.linalg.eigh/lstsq) on the same grid:
``np.linspace(a, b, grid)``, ends included, as the penalty documents.
"""

from __future__ import annotations

import helpers as H
import jax
import jax.numpy as jnp
import numpy as np
import optax
import pytest

from stablefilt import Basis, ConfigError, find_taps, model_penalty, penalty, stability_penalty

GRID = 101
PAIR = 40  # below the pairwise grid cap, so the reference grid is the same


@pytest.fixture
def float64_jax():
    """JAX in float64 for the body of one test; restored afterwards."""
    with jax.enable_x64(True):
        yield


def user_tree(seed=0, k=4, dtype=jnp.float32):
    """A user's nested params, not the library's layout."""
    rng = np.random.default_rng(seed)

    def a(*shape):
        return jnp.asarray(0.5 * rng.standard_normal(shape), dtype)

    return {"encoder": {"conv1": {"taps": a(k, 2, 3), "bias": a(3)}, "conv2": {"taps": a(k, 3, 1)}},
            "head": {"w": a(1, 2)}}


def bank_list(tree):
    return [np.asarray(tree["encoder"]["conv1"]["taps"], np.float64),
            np.asarray(tree["encoder"]["conv2"]["taps"], np.float64)]


# ---------------------------------------------------------------------------
# numpy references, per filter.


def ref_constants(taps, interval, mode, kind, grid):
    """Per-filter constant of ``taps (K, F_in, F_out)`` on ``grid`` points."""
    a, b = interval
    binterval = interval if kind == "chebyshev" else None
    if mode == "pairwise":
        lam = np.linspace(a, b, grid)
    else:
        lam = np.linspace(a, b, grid)
    h = H.bank_response(taps, lam, kind, binterval)  # (G, F_in, F_out)
    d = H.bank_derivative(taps, lam, kind, binterval)
    if mode == "integral_lipschitz":  # C = max |lam h'(lam)| (Gama, Bruna, Ribeiro 2020)
        return np.max(np.abs(lam[:, None, None] * d), axis=0)
    if mode == "lipschitz":  # C0 = max |h'|
        return np.max(np.abs(d), axis=0)
    gamma = ref_gamma(lam, h, d)  # (G, G, F_in, F_out)
    if mode == "pairwise":  # C2 = (1/2) max |Gamma| (theory s.3)
        return 0.5 * np.max(np.abs(gamma), axis=(0, 1))
    if mode == "kernel":
        return ref_kappa(taps, interval, kind, lam)
    raise AssertionError(mode)


def ref_gamma(lam, h, d):
    """``Gamma(l, m) = (l + m)(h(l) - h(m))/(l - m)``, ``2 l h'(l)`` on the
    diagonal, by the defining divided difference (theory s.3)."""
    gap = lam[:, None] - lam[None, :]
    safe = np.where(gap == 0, 1.0, gap)
    dd = (h[:, None] - h[None, :]) / safe[:, :, None, None]
    idx = np.arange(len(lam))
    dd[idx, idx] = d
    return (lam[:, None] + lam[None, :])[:, :, None, None] * dd


def ref_kappa(taps, interval, kind, lam):
    """``kappa = max_grid phi^T M_+ phi + max_grid phi^T M_- phi`` with
    ``phi`` the Chebyshev polynomials of the interval (the penalty's split
    basis, documented in stablefilt._constants.split_basis) and ``M`` the
    kernel matrix recovered from ``Gamma`` by least squares on 3K points
    (``Gamma`` is a polynomial of degree K-1 in each argument, so the fit is
    exact; numpy.linalg.lstsq and eigh)."""
    a, b = interval
    k = taps.shape[0]
    binterval = interval if kind == "chebyshev" else None
    pts = np.linspace(a, b, 3 * k) + 1e-3 * (b - a) * np.sin(np.arange(3 * k))  # distinct fit points
    hp = H.bank_response(taps, pts, kind, binterval)
    dp = H.bank_derivative(taps, pts, kind, binterval)
    gam = ref_gamma(pts, hp, dp)
    phi_fit = np.polynomial.chebyshev.chebvander((2 * pts - a - b) / (b - a), k - 1)
    pinv = np.linalg.pinv(phi_fit)
    phi = np.polynomial.chebyshev.chebvander((2 * lam - a - b) / (b - a), k - 1)
    out = np.empty(taps.shape[1:])
    for f, g in np.ndindex(*taps.shape[1:]):
        m = pinv @ gam[:, :, f, g] @ pinv.T
        m = 0.5 * (m + m.T)
        w, q = np.linalg.eigh(m)
        plus = (q * np.maximum(w, 0)) @ q.T
        minus = (q * np.maximum(-w, 0)) @ q.T
        out[f, g] = (np.max(np.einsum("ga,ab,gb->g", phi, plus, phi))
                     + np.max(np.einsum("ga,ab,gb->g", phi, minus, phi)))
    return out


def ref_penalty(banks, interval, mode, reduce, target, weights, kind, grid):
    ws = [weights] * len(banks) if np.isscalar(weights) else list(weights)
    total = 0.0
    for w, taps in zip(ws, banks):
        c = ref_constants(taps, interval, mode, kind, grid)
        if reduce == "max":
            r = np.max(c)
        elif reduce == "mean":
            r = np.mean(c)
        else:  # hinge: mean of max(c - target, 0)^2
            r = np.mean(np.maximum(c - target, 0.0) ** 2)
        total += w * r
    return total


def _basis(kind, interval):
    return Basis("chebyshev", tuple(interval)) if kind == "chebyshev" else Basis()


# ---------------------------------------------------------------------------
# Values.

MODES = ("integral_lipschitz", "lipschitz", "pairwise", "kernel")
INTERVALS = ((0.0, 2.0), (-1.5, 3.0))


@pytest.mark.parametrize("interval", INTERVALS)
@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("mode", MODES)
def test_penalty_value_matches_numpy_reference(float64_jax, mode, kind, interval):
    tree = user_tree(seed=1, dtype=jnp.float64)
    grid = PAIR if mode == "pairwise" else GRID
    got = float(penalty(tree, interval, mode=mode, basis=_basis(kind, interval), grid=grid))
    want = ref_penalty(bank_list(tree), interval, mode, "max", 0.0, 1.0, kind, grid)
    # float64 inside, returned as float32: ~1e-7 relative.
    assert got == pytest.approx(want, rel=1e-6)


@pytest.mark.parametrize("mode", MODES)
def test_penalty_float32_agrees_with_reference(mode):
    """The training path in float32: ~1e-5 relative (house style; the kernel
    mode goes through a float32 eigh, allowed 1e-4)."""
    tree = user_tree(seed=2)
    interval = (0.0, 2.0)
    grid = PAIR if mode == "pairwise" else GRID
    got = float(penalty(tree, interval, mode=mode, basis=_basis("chebyshev", interval), grid=grid))
    want = ref_penalty(bank_list(tree), interval, mode, "max", 0.0, 1.0, "chebyshev", grid)
    assert got == pytest.approx(want, rel=1e-4 if mode == "kernel" else 1e-5)


@pytest.mark.parametrize("reduce,target", [("max", 0.0), ("mean", 0.0), ("hinge", 0.5), ("hinge", 100.0)])
@pytest.mark.parametrize("weights", [1.0, 0.3, [2.0, 0.0], [0.25, 1.5]])
def test_reductions_and_weights(float64_jax, reduce, target, weights):
    tree = user_tree(seed=3, dtype=jnp.float64)
    interval = (0.0, 2.0)
    got = float(penalty(tree, interval, basis=Basis(), reduce=reduce, target=target, weights=weights, grid=GRID))
    want = ref_penalty(bank_list(tree), interval, "integral_lipschitz", reduce, target, weights, "monomial", GRID)
    assert got == pytest.approx(want, rel=1e-6, abs=1e-12)
    if reduce == "hinge" and target == 100.0:
        assert got == 0.0  # every constant below the target: nothing to pay (hinge definition)


def test_single_filter_closed_form():
    """``h(lam) = lam^2`` on ``[0, 2]``: ``max |lam h'| = max 2 lam^2 = 8``
    and ``max |h'| = 4`` (closed form, by hand)."""
    taps = jnp.asarray([0.0, 0.0, 1.0], jnp.float32)
    assert float(penalty(taps, (0.0, 2.0), basis=Basis())) == pytest.approx(8.0, rel=1e-6)
    assert float(penalty(taps, (0.0, 2.0), basis=Basis(), mode="lipschitz")) == pytest.approx(4.0, rel=1e-6)
    # A constant filter has no derivative.
    assert float(penalty(jnp.asarray([3.0], jnp.float32), (0.0, 2.0), basis=Basis())) == 0.0


# ---------------------------------------------------------------------------
# jit and grad on a user's pytree.


@pytest.mark.parametrize("mode", MODES)
def test_penalty_under_jit_and_grad(mode):
    tree = user_tree(seed=4)
    interval = (0.0, 2.0)
    grid = PAIR if mode == "pairwise" else GRID

    def fn(p):
        return penalty(p, interval, basis=Basis(), mode=mode, grid=grid)

    eager = fn(tree)
    jitted = jax.jit(fn)(tree)
    assert jnp.shape(jitted) == () and jitted.dtype == jnp.float32
    np.testing.assert_allclose(float(jitted), float(eager), rtol=1e-5)
    g = jax.jit(jax.grad(fn))(tree)
    assert jax.tree_util.tree_structure(g) == jax.tree_util.tree_structure(tree)
    # Leaves that are not taps get exactly zero gradient.
    assert np.all(np.asarray(g["encoder"]["conv1"]["bias"]) == 0)
    assert np.all(np.asarray(g["head"]["w"]) == 0)
    for taps in (g["encoder"]["conv1"]["taps"], g["encoder"]["conv2"]["taps"]):
        assert np.all(np.isfinite(np.asarray(taps)))
    assert np.any(np.asarray(g["encoder"]["conv1"]["taps"]) != 0) or np.any(
        np.asarray(g["encoder"]["conv2"]["taps"]) != 0)
    if mode == "integral_lipschitz":
        # jit(grad) equals grad without jit (op by op is slow: one mode).
        g2 = jax.grad(fn)(tree)
        for a, b in zip(jax.tree_util.tree_leaves(g), jax.tree_util.tree_leaves(g2)):
            np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-5, atol=1e-6)


def ref_il_gradient(banks, interval, grid):
    """Gradient of ``sum_l max_{f, lam} |lam h_f'(lam)|`` (monomials): at the
    maximiser ``(f*, lam*)`` it is ``sign(lam* h') lam* d/dlam lam^k`` for tap
    ``k`` of filter ``f*`` and zero elsewhere (numpy.polynomial.polyder)."""
    lam = np.linspace(*interval, grid)
    out = []
    for taps in banks:
        d = H.bank_derivative(taps, lam, "monomial")
        v = lam[:, None, None] * d
        gi, fi, go = np.unravel_index(np.argmax(np.abs(v)), v.shape)
        g = np.zeros_like(taps)
        for k in range(taps.shape[0]):
            unit = np.zeros(taps.shape[0])
            unit[k] = 1.0
            g[k, fi, go] = np.sign(v[gi, fi, go]) * lam[gi] * H.derivative(unit, lam[gi])
        out.append(g)
    return out


def test_penalty_gradient_matches_analytic(float64_jax):
    tree = user_tree(seed=5, dtype=jnp.float64)
    interval = (-1.5, 3.0)
    g = jax.jit(jax.grad(lambda p: penalty(p, interval, basis=Basis(), grid=GRID)))(tree)
    want = ref_il_gradient(bank_list(tree), interval, GRID)
    np.testing.assert_allclose(np.asarray(g["encoder"]["conv1"]["taps"]), want[0], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(np.asarray(g["encoder"]["conv2"]["taps"]), want[1], rtol=1e-6, atol=1e-9)


def test_select_chooses_leaves():
    """A pytree whose filters are not named ``taps``: ``select`` picks them."""
    rng = np.random.default_rng(6)
    conv = jnp.asarray(rng.standard_normal((3, 2, 2)), jnp.float32)
    other = jnp.asarray(rng.standard_normal((3, 2, 1)), jnp.float32)
    tree = {"blocks": [{"kernel": conv, "scale": jnp.float32(2.0)}, {"kernel": other}],
            "out": jnp.ones((4, 3), jnp.float32)}
    with pytest.raises(ConfigError, match="no taps"):
        penalty(tree, (0.0, 2.0), basis=Basis())

    def by_ndim(path, leaf):
        return jnp.ndim(leaf) == 3

    def first_block(path, leaf):
        return jnp.ndim(leaf) == 3 and getattr(path[1], "idx", None) == 0

    assert len(find_taps(tree, by_ndim)) == 2
    got = float(penalty(tree, (0.0, 2.0), basis=Basis(), select=by_ndim, grid=GRID))
    want = ref_penalty([np.asarray(conv, np.float64), np.asarray(other, np.float64)], (0.0, 2.0),
                       "integral_lipschitz", "max", 0.0, 1.0, "monomial", GRID)
    assert got == pytest.approx(want, rel=1e-5)
    one = float(penalty(tree, (0.0, 2.0), basis=Basis(), select=first_block, grid=GRID))
    assert one == pytest.approx(ref_penalty([np.asarray(conv, np.float64)], (0.0, 2.0), "integral_lipschitz",
                                            "max", 0.0, 1.0, "monomial", GRID), rel=1e-5)
    g = jax.jit(jax.grad(lambda p: penalty(p, (0.0, 2.0), basis=Basis(), select=first_block)))(tree)
    assert np.all(np.asarray(g["blocks"][1]["kernel"]) == 0) and np.any(np.asarray(g["blocks"][0]["kernel"]) != 0)
    assert float(g["blocks"][0]["scale"]) == 0.0 and np.all(np.asarray(g["out"]) == 0)


def test_penalty_errors():
    tree = user_tree()
    with pytest.raises(ConfigError, match="no taps"):
        penalty({"head": {"w": jnp.ones((2, 2))}}, (0.0, 2.0), basis=Basis())
    with pytest.raises(ConfigError, match="no taps"):
        penalty(tree, (0.0, 2.0), basis=Basis(), select=lambda path, leaf: False)
    with pytest.raises(ConfigError, match="weights"):
        penalty(tree, (0.0, 2.0), basis=Basis(), weights=[1.0, 2.0, 3.0])
    with pytest.raises(ConfigError, match="mode"):
        penalty(tree, (0.0, 2.0), basis=Basis(), mode="spectral")
    with pytest.raises(ConfigError, match="reduction"):
        penalty(tree, (0.0, 2.0), basis=Basis(), reduce="median")
    with pytest.raises(ConfigError, match="model_penalty"):
        penalty(tree, (0.0, 2.0), basis=Basis(), mode="model")


# ---------------------------------------------------------------------------
# The model penalty (differentiable surrogate of theory s.5 item 6).


def test_model_penalty_matches_reference(float64_jax):
    """``||W||_2 sum_l (prod_{m != l} B_m) ||kappa_l||_2`` with grid
    ``kappa`` (reference above) and ``B_m = max_grid ||H_m(lam)||_2``
    (numpy.linalg.norm(., 2))."""
    rng = np.random.default_rng(8)
    params = {"layers": [{"taps": jnp.asarray(0.4 * rng.standard_normal((3, 1, 3))), "bias": jnp.zeros(3)},
                         {"taps": jnp.asarray(0.4 * rng.standard_normal((3, 3, 2))), "bias": jnp.zeros(2)}],
              "readout": {"weight": jnp.asarray(rng.standard_normal((2, 3))), "bias": jnp.zeros(3)}}
    interval = (0.0, 2.0)
    basis = Basis("chebyshev", interval)
    got = float(jax.jit(lambda p: model_penalty(p, interval, basis=basis, grid=GRID))(params))
    lam = np.linspace(*interval, GRID)
    banks = [np.asarray(layer["taps"]) for layer in params["layers"]]
    kap = [ref_kappa(t, interval, "chebyshev", lam) for t in banks]
    sups = [np.max(np.linalg.norm(H.bank_response(t, lam, "chebyshev", interval), 2, axis=(1, 2))) for t in banks]
    want = np.linalg.norm(np.asarray(params["readout"]["weight"]), 2) * (
        sups[1] * np.linalg.norm(kap[0], 2) + sups[0] * np.linalg.norm(kap[1], 2))
    assert got == pytest.approx(want, rel=1e-6)
    g = jax.jit(jax.grad(lambda p: model_penalty(p, interval, basis=basis, grid=GRID)))(params)
    assert all(np.all(np.isfinite(np.asarray(x))) for x in jax.tree_util.tree_leaves(g))
    assert np.all(np.asarray(g["layers"][0]["bias"]) == 0)


# ---------------------------------------------------------------------------
# The optax transformation.


@pytest.mark.parametrize("weight", [0.0, 2.5])
def test_stability_penalty_adds_weighted_gradient(weight):
    """``chain(stability_penalty(w, f), sgd(lr))`` moves the params by
    ``-lr (g + w grad f)``: compared with that sum done by hand, and, for
    the penalty, with the analytic gradient (numpy.polynomial)."""
    tree = user_tree(seed=9)
    interval = (0.0, 2.0)
    lr = 0.05

    def pen(p):
        return penalty(p, interval, basis=Basis(), grid=GRID)

    tx = optax.chain(stability_penalty(weight, pen), optax.sgd(lr))
    state = tx.init(tree)
    rng = np.random.default_rng(10)
    grads = jax.tree_util.tree_map(lambda a: jnp.asarray(rng.standard_normal(a.shape), jnp.float32), tree)
    updates, _ = jax.jit(tx.update)(grads, state, tree)
    manual = jax.tree_util.tree_map(lambda g, p: -lr * (g + weight * p), grads, jax.jit(jax.grad(pen))(tree))
    for a, b in zip(jax.tree_util.tree_leaves(updates), jax.tree_util.tree_leaves(manual)):
        np.testing.assert_allclose(np.asarray(a), np.asarray(b), rtol=1e-6, atol=1e-7)
    ref = ref_il_gradient(bank_list(tree), interval, GRID)
    for got, g, r in ((updates["encoder"]["conv1"]["taps"], grads["encoder"]["conv1"]["taps"], ref[0]),
                      (updates["encoder"]["conv2"]["taps"], grads["encoder"]["conv2"]["taps"], ref[1])):
        np.testing.assert_allclose(np.asarray(got), -lr * (np.asarray(g, np.float64) + weight * r),
                                   rtol=1e-5, atol=1e-6)
    # Non-tap leaves: exactly the optimiser's own update.
    np.testing.assert_allclose(np.asarray(updates["head"]["w"]), -lr * np.asarray(grads["head"]["w"]), rtol=1e-7)
    with pytest.raises(ValueError, match="params"):
        tx.update(grads, state)
