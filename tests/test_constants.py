"""Frequency-response constants.

Certified float64 constants (``filter_constants``) are never below the same
quantity maximised on a very fine grid and not much above it; the remainder is
never below the true second-order remainder. The JAX training constants equal
the float64 grid maxima, have gradients that match finite differences, and
give the same values under jit."""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import networkx as nx
import numpy as np
import pytest
from numpy.polynomial import Chebyshev, Polynomial
from numpy.polynomial import chebyshev as npcheb
from reference import (
    bank_response,
    daleckii_krein,
    derivative,
    filter_operator,
    gamma,
    random_symmetric,
    relative,
    response,
)

import stablefilt as sf
from stablefilt._filterbounds import remainder

FINE = 20001  # points of the fine 1-D reference grid
FINE_2D = 1201  # per side of the 2-D grid for the pairwise constant
SLACK = 1.02  # certified constants may exceed the fine-grid maximum by at most 2%

INTERVALS = [(0.0, 2.0), (-1.0, 1.0), (0.0, 12.0), (-3.0, 5.0), (0.4, 0.7)]


def _basis_for(kind, interval):
    a, b = interval
    return sf.make_basis() if kind == "monomial" else sf.make_basis("chebyshev", (a - 0.25, b + 0.5))


def _taps(rng, shape, kind, interval):
    """Random taps, scaled so monomial responses on wide intervals stay O(1)."""
    t = rng.standard_normal(shape)
    if kind == "monomial":
        r = max(abs(interval[0]), abs(interval[1]), 1.0)
        t = t / (r ** np.arange(shape[0])).reshape((-1,) + (1,) * (len(shape) - 1))
    return t


def _abs_psd(m):
    w, v = np.linalg.eigh(0.5 * (m + m.T))
    return (v * np.abs(w)) @ v.T


def _kernel_monomial(c, basis):
    """Monomial-split kernel matrix from the closed form of theory.md s.4, with
    monomial coefficients from numpy.polynomial's conversion."""
    k = len(c)
    if basis.kind == "monomial":
        p = np.asarray(c, float)
    else:
        p = Chebyshev(c, domain=list(basis.interval)).convert(kind=Polynomial).coef
    p = np.concatenate([p, np.zeros(k)])[:k]
    m = np.zeros((k, k))
    for a in range(k):
        for b in range(k):
            if 1 <= a + b <= k - 1:
                m[a, b] = p[a + b] * (2 - (a == 0) - (b == 0))
    return m


def _kernel_chebyshev(c, basis, interval):
    """Chebyshev-split kernel matrix of ``interval``, by interpolating Gamma at
    a K x K grid of Chebyshev nodes (reference: numpy.polynomial.chebyshev.chebvander)."""
    k = len(c)
    a, b = interval
    nodes = np.cos(np.pi * (np.arange(k) + 0.5) / k)
    lam = 0.5 * (a + b) + 0.5 * (b - a) * nodes
    li, mj = np.meshgrid(lam, lam, indexing="ij")
    g = gamma(c, li, mj, basis.kind, basis.interval)
    vinv = np.linalg.inv(npcheb.chebvander(nodes, k - 1))
    m = vinv @ g @ vinv.T
    return 0.5 * (m + m.T)


def _kernel_reference(c, basis, interval, x):
    """``min over splits of max_x phi^T |M| phi`` (|M| = M_plus + M_minus):
    with ``Gamma_ij = <u_i, w_j>`` and ``||u_i||^2 = ||w_i||^2 = phi_i^T |M| phi_i``,
    ``||Gamma o A|| <= max_i ||u_i|| max_j ||w_j|| ||A||`` (Horn & Johnson,
    Topics in Matrix Analysis 1991, ch. 5, from memory)."""
    a, b = interval
    k = len(c)
    mm = _abs_psd(_kernel_monomial(c, basis))
    pm = np.vander(x, k, increasing=True)
    km = np.einsum("ia,ab,ib->i", pm, mm, pm).max()
    mc = _abs_psd(_kernel_chebyshev(c, basis, interval))
    pc = npcheb.chebvander((2 * x - a - b) / (b - a), k - 1)
    kc = np.einsum("ia,ab,ib->i", pc, mc, pc).max()
    return min(km, kc)


def _pairwise_reference(c, basis, interval):
    """``(1/2) max |Gamma|`` on a fine 2-D grid plus the fine diagonal."""
    a, b = interval
    x = np.linspace(a, b, FINE_2D)
    li, mj = np.meshgrid(x, x, indexing="ij")
    off = np.abs(gamma(c, li, mj, basis.kind, basis.interval)).max()
    xd = np.linspace(a, b, FINE)
    diag = np.abs(2 * xd * derivative(c, xd, basis.kind, basis.interval)).max()
    return 0.5 * max(off, diag)


def _between(certified, grid_value, name):
    assert certified >= grid_value * (1 - 1e-12), f"{name}: certified {certified!r} below the grid {grid_value!r}"
    assert certified <= SLACK * grid_value + 1e-12, f"{name}: certified {certified!r} far above the grid {grid_value!r}"


@pytest.mark.parametrize("interval", INTERVALS)
@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("k", [1, 2, 4, 6])
def test_certified_constants_bracket_fine_grid(interval, kind, k):
    rng = np.random.default_rng(1000 * k + int(10 * interval[1]))
    basis = _basis_for(kind, interval)
    c = _taps(rng, (k,), kind, interval)
    fc = sf.filter_constants(c, basis, interval)
    a, b = interval
    x = np.linspace(a, b, FINE)
    h = response(c, x, kind, basis.interval)  # reference: numpy.polynomial polyval / chebval
    d = derivative(c, x, kind, basis.interval)  # reference: numpy.polynomial polyder / chebder
    _between(fc.sup, np.abs(h).max(), "sup")
    _between(fc.bank_sup, np.abs(h).max(), "bank_sup")
    if k == 1:
        for name in ("lipschitz", "integral_lipschitz", "pairwise", "kernel"):
            assert 0.0 <= getattr(fc, name) <= 1e-10, name
        return
    _between(fc.lipschitz, np.abs(d).max(), "lipschitz")
    _between(fc.integral_lipschitz, np.abs(x * d).max(), "integral_lipschitz")
    _between(fc.pairwise, _pairwise_reference(c, basis, interval), "pairwise")
    _between(fc.kernel, _kernel_reference(c, basis, interval, x), "kernel")
    # theory.md s.5 item 2: C2 <= kappa / 2
    assert fc.pairwise <= fc.kernel / 2 * (1 + 1e-12)


@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
def test_certified_constants_of_a_bank(kind):
    interval = (-1.0, 3.0)
    rng = np.random.default_rng(41)
    basis = _basis_for(kind, interval)
    taps = _taps(rng, (5, 2, 3), kind, interval)
    fc = sf.filter_constants(taps, basis, interval)
    assert fc.sup.shape == fc.kernel.shape == fc.pairwise.shape == (2, 3)
    x = np.linspace(*interval, FINE)
    hb = bank_response(taps, x, kind, basis.interval)  # (G, 2, 3)
    for f in range(2):
        for g in range(3):
            c = taps[:, f, g]
            _between(fc.sup[f, g], np.abs(hb[:, f, g]).max(), "sup")
            d = derivative(c, x, kind, basis.interval)
            _between(fc.integral_lipschitz[f, g], np.abs(x * d).max(), "integral_lipschitz")
            _between(fc.lipschitz[f, g], np.abs(d).max(), "lipschitz")
            _between(fc.kernel[f, g], _kernel_reference(c, basis, interval, x), "kernel")
    # reference: numpy.linalg.norm(ord=2) of the response matrix on the fine grid
    _between(fc.bank_sup, np.linalg.norm(hb, ord=2, axis=(1, 2)).max(), "bank_sup")


@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
def test_constants_over_eigenvalues(kind):
    a = nx.to_numpy_array(nx.florentine_families_graph())  # bundled with networkx
    s = sf.shift_operator(a, "laplacian").dense()
    lam = np.linalg.eigvalsh(s)
    interval = (float(lam[0]) - 1e-9, float(lam[-1]) + 1e-9)
    rng = np.random.default_rng(42)
    basis = _basis_for(kind, interval)
    for k in (2, 3, 5):
        c = _taps(rng, (k,), kind, interval)
        fc = sf.filter_constants(c, basis, interval, eigenvalues=lam)
        li, mj = np.meshgrid(lam, lam, indexing="ij")
        g = gamma(c, li, mj, kind, basis.interval)
        # theory.md s.5 item 3: the worst pair attains max |Gamma_ij|, so no valid bound is below it
        assert fc.kernel_spectrum >= np.abs(g).max() * (1 - 1e-12)
        assert fc.kernel_spectrum <= fc.kernel * (1 + 1e-12)
        # theory.md s.5 item 4: aligned first order 2 max |lam h'(lam)| (reference: polyder / chebder)
        ref = 2 * np.abs(lam * derivative(c, lam, kind, basis.interval)).max()
        assert ref <= fc.aligned_spectrum <= ref * (1 + 1e-8) + 1e-11


# ---------------------------------------------------------------------------
# The second-order remainder.


@pytest.mark.parametrize("kind", ["monomial", "chebyshev"])
def test_remainder_never_below_true_remainder(family, kind):
    name, op = family
    s = op.dense()
    n = op.nodes
    iv = sf.spectral_interval(op)
    interval = (iv.lower, iv.upper)
    rng = np.random.default_rng(50 + len(name))
    basis = _basis_for(kind, interval)
    worst = 0.0
    for shape, eps in [((2,), 0.1), ((3,), 1e-2), ((4,), 0.1), ((5,), 0.3), ((6,), 1e-4), ((4, 2, 2), 0.1),
                       ((3, 2, 2), 1e-2)]:
        c = _taps(rng, shape, kind, interval)
        rem = np.asarray(remainder(c, basis, interval, eps))
        # a bank combines per-filter bounds by the spectral norm (theory.md s.5 item 6)
        bound = float(np.linalg.norm(rem, 2)) if rem.ndim else float(rem)
        for e in (eps * np.eye(n), -eps * np.eye(n), random_symmetric(rng, n, eps)):
            s_hat = relative(s, e)
            # true remainder: change minus the Daleckii-Krein first-order term (Bhatia 1997, ch. V)
            d = filter_operator(s_hat, c, kind, basis.interval) - filter_operator(s, c, kind, basis.interval)
            true = float(np.linalg.norm(d - daleckii_krein(s, e, c, kind, basis.interval), 2))
            assert true <= bound, (name, shape, eps, true, bound)
            worst = max(worst, true / bound if bound > 0 else 0.0)
    assert worst > 0.05  # the bound is not vacuous on these graphs


def test_remainder_by_hand():
    # K <= 2 is linear in S: no second-order term. h = lam^2 on [-1, 1] with
    # E = eps I: S_hat = (1 + 2 eps) S and the exact remainder is 4 eps^2 S^2,
    # equal to the origin form sum |c_k| R^k ((1 + 2 eps)^k - 1 - 2 k eps) (by hand).
    basis = sf.make_basis()
    assert remainder(np.array([1.0, -3.0]), basis, (-1.0, 1.0), 0.1) <= 1e-10  # only the round-off allowance
    r = remainder(np.array([0.0, 0.0, 1.0]), basis, (-1.0, 1.0), 0.1)
    assert r == pytest.approx(4 * 0.1**2, rel=1e-8)


# ---------------------------------------------------------------------------
# JAX constants (training penalties).

JAX_FUNCS = ["sup_norm", "lipschitz", "integral_lipschitz", "pairwise_constant", "kernel_bound", "bank_sup_norm"]


def _grid_reference(name, taps, interval, basis, grid):
    """The float64 grid maxima each JAX constant estimates."""
    x = sf.spectral_grid(interval, grid)
    np.testing.assert_allclose(x, np.linspace(interval[0], interval[1], grid), rtol=0, atol=0)
    taps = np.asarray(taps, dtype=np.float64)
    kind, biv = basis.kind, basis.interval
    if name == "bank_sup_norm":
        hb = bank_response(taps, x, kind, biv)
        if taps.ndim == 1:
            return np.abs(hb).max()
        return np.linalg.norm(hb, ord=2, axis=(1, 2)).max()  # reference: numpy.linalg.norm(ord=2)
    out = np.empty(taps.shape[1:])
    for idx in np.ndindex(*taps.shape[1:]):
        c = taps[(slice(None),) + idx]
        if name == "sup_norm":
            v = np.abs(response(c, x, kind, biv)).max()
        elif name == "lipschitz":
            v = np.abs(derivative(c, x, kind, biv)).max()
        elif name == "integral_lipschitz":
            v = np.abs(x * derivative(c, x, kind, biv)).max()
        elif name == "pairwise_constant":
            li, mj = np.meshgrid(x, x, indexing="ij")
            v = 0.5 * np.abs(gamma(c, li, mj, kind, biv)).max()
        else:  # kernel_bound: theory.md s.5 item 2 with the Chebyshev split of the interval
            m = _kernel_chebyshev(c, basis, interval)
            w, q = np.linalg.eigh(m)
            phi = npcheb.chebvander((2 * x - interval[0] - interval[1]) / (interval[1] - interval[0]), len(c) - 1)
            plus = np.einsum("ia,ab,ib->i", phi, (q * np.maximum(w, 0)) @ q.T, phi).max()
            minus = np.einsum("ia,ab,ib->i", phi, (q * np.maximum(-w, 0)) @ q.T, phi).max()
            v = plus + minus
        out[idx] = v
    return out


def _grid_for(name):
    return sf._constants.PAIR_GRID if name == "pairwise_constant" else 301


CASES = [((0.0, 2.0), "chebyshev", (4, 2, 3)), ((-1.0, 1.0), "monomial", (5,)), ((0.0, 6.0), "chebyshev", (3,)),
         ((-2.0, 3.0), "monomial", (4, 3, 2))]


@pytest.mark.parametrize("name", JAX_FUNCS)
@pytest.mark.parametrize("interval,kind,shape", CASES)
def test_jax_constants_match_float64_grid(name, interval, kind, shape):
    rng = np.random.default_rng(60 + len(shape) + int(interval[1]))
    basis = _basis_for(kind, interval)
    taps = _taps(rng, shape, kind, interval).astype(np.float32)
    grid = _grid_for(name)
    got = getattr(sf, name)(jnp.asarray(taps), interval, basis, grid=grid)
    assert got.dtype == jnp.float32
    ref = _grid_reference(name, taps, interval, basis, grid)
    assert np.shape(got) == np.shape(ref)
    np.testing.assert_allclose(np.asarray(got), ref, rtol=1e-5, atol=1e-6 * np.abs(ref).max())  # float32


@pytest.mark.parametrize("name", JAX_FUNCS)
def test_jax_constants_match_float64_grid_in_x64(x64, name):
    interval, kind, shape = (0.0, 2.0), "chebyshev", (5, 2, 2)
    basis = _basis_for(kind, interval)
    taps = np.random.default_rng(70).standard_normal(shape)
    grid = _grid_for(name)
    got = getattr(sf, name)(jnp.asarray(taps), interval, basis, grid=grid)
    assert got.dtype == jnp.float64
    np.testing.assert_allclose(np.asarray(got), _grid_reference(name, taps, interval, basis, grid), rtol=1e-10)


@pytest.mark.parametrize("name", JAX_FUNCS)
@pytest.mark.parametrize("interval,kind,shape", CASES[:2])
def test_jax_constant_gradients_match_finite_differences(x64, name, interval, kind, shape):
    rng = np.random.default_rng(80 + len(shape))
    basis = _basis_for(kind, interval)
    taps = _taps(rng, shape, kind, interval)
    fn = getattr(sf, name)
    weights = rng.uniform(0.5, 1.5, size=np.shape(fn(jnp.asarray(taps), interval, basis)))

    @jax.jit
    def objective(t):
        return jnp.sum(jnp.asarray(weights) * fn(t, interval, basis))

    grad = np.asarray(jax.jit(jax.grad(objective))(jnp.asarray(taps)))
    assert np.all(np.isfinite(grad))
    step = 1e-6
    fd = np.zeros_like(taps)
    for idx in np.ndindex(*taps.shape):
        up, down = taps.copy(), taps.copy()
        up[idx] += step
        down[idx] -= step
        fd[idx] = (float(objective(jnp.asarray(up))) - float(objective(jnp.asarray(down)))) / (2 * step)
    # common practice: central differences, error O(step^2) away from kinks of the max
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


@pytest.mark.parametrize("name", JAX_FUNCS)
def test_jax_constants_jit_equals_no_jit(name):
    interval, basis = (0.0, 2.0), sf.make_basis("chebyshev", (0.0, 2.0))
    taps = jnp.asarray(np.random.default_rng(90).standard_normal((4, 3, 2)), dtype=jnp.float32)
    fn = getattr(sf, name)
    plain = fn(taps, interval, basis)
    jitted = jax.jit(functools.partial(fn, interval=interval, basis=basis))(taps)
    np.testing.assert_allclose(np.asarray(jitted), np.asarray(plain), rtol=1e-6, atol=1e-7)  # common practice
    if name in ("sup_norm", "integral_lipschitz"):  # the eager gradient of the others takes seconds to trace
        g_plain = jax.grad(lambda t: jnp.sum(fn(t, interval, basis)))(taps)
        g_jit = jax.jit(jax.grad(lambda t: jnp.sum(fn(t, interval, basis))))(taps)
        np.testing.assert_allclose(np.asarray(g_jit), np.asarray(g_plain), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("taps", [
    np.array([0.7]),  # K = 1: the kernel matrix is 0
    np.zeros(4),  # zero taps: every eigenvalue of M repeated (0)
    np.array([1.3, 0.0, 0.0, 0.0]),  # a constant filter with K = 4: M = 0 again
    np.zeros((3, 2, 2)),
], ids=["K1", "zeros", "constant", "zero-bank"])
def test_kernel_bound_gradient_finite_at_repeated_eigenvalues(taps):
    for basis, interval in ((sf.make_basis(), (-1.0, 1.0)), (sf.make_basis("chebyshev", (0.0, 2.0)), (0.0, 2.0))):
        t = jnp.asarray(taps, dtype=jnp.float32)
        v = sf.kernel_bound(t, interval, basis)
        assert np.all(np.asarray(v) == 0)  # a constant filter does not change (by hand)
        g = jax.jit(jax.grad(lambda c, iv=interval, b=basis: jnp.sum(sf.kernel_bound(c, iv, b))))(t)
        assert np.all(np.isfinite(np.asarray(g)))
        gp = jax.jit(jax.grad(lambda c, iv=interval, b=basis: jnp.sum(sf.pairwise_constant(c, iv, b))))(t)
        assert np.all(np.isfinite(np.asarray(gp)))


def test_kernel_bound_gradient_near_repeated_eigenvalues(x64):
    # Taps a tiny distance from the constant filter: every eigenvalue of M is
    # within 1e-6 of the others; the gradient must stay finite and match a
    # finite difference taken on the scale of the taps.
    interval, basis = (0.0, 2.0), sf.make_basis("chebyshev", (0.0, 2.0))
    taps = np.array([1.0, 1e-7, 2e-7, -1e-7])
    value = jax.jit(lambda c: sf.kernel_bound(c, interval, basis))
    g = np.asarray(jax.jit(jax.grad(value))(jnp.asarray(taps)))
    assert np.all(np.isfinite(g))
    step = 1e-13
    fd = np.array([(float(value(jnp.asarray(taps + step * e))) - float(value(jnp.asarray(taps - step * e)))) / (2 * step)
                   for e in np.eye(4)])
    np.testing.assert_allclose(g, fd, rtol=1e-4, atol=1e-6)
