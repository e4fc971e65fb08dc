"""The eps-free parts of the input-specific bounds kept between sizes
(stablefilt._memo): the bounds are bit-identical with and without the memo,
at every size and in every form (eigenvectors, interval only with sparse
products), a memo never hands one input's parts to another, and it does
save the work. Graph: Zachary's karate club, bundled with networkx."""

from __future__ import annotations

import helpers as H
import networkx as nx
import numpy as np
import pytest

from stablefilt import Basis, ModelSpec, certify_inputs, model_constants, shift_operator, spectral_interval
from stablefilt._filterbounds import bank_remainder
from stablefilt._memo import InputMemo

EPS = (1e-3, 0.03, 1e-2, 1e-3)  # sizes out of order, one repeated, as a radius search asks


@pytest.fixture(scope="module")
def setting():
    op = shift_operator(nx.to_numpy_array(nx.karate_club_graph()), "normalized-laplacian")
    iv = spectral_interval(op)
    spec = ModelSpec((2, 6, 5), taps=4, basis=Basis("chebyshev", (iv.lower, iv.upper)), nonlinearity="relu",
                     bias=True, readout="node", outputs=3)
    rng = np.random.default_rng(3)
    params = {"layers": [{"taps": 0.5 * rng.standard_normal((4, 2, 6)), "bias": 0.3 * rng.standard_normal(6)},
                         {"taps": 0.5 * rng.standard_normal((4, 6, 5)), "bias": 0.3 * rng.standard_normal(5)}],
              "readout": {"weight": 0.5 * rng.standard_normal((5, 3)), "bias": rng.standard_normal(3)}}
    x = H.signals(rng, 4, op.nodes, 2, 1.5)
    return op, iv, spec, params, x


@pytest.mark.parametrize("form", ["interval", "eigenvectors"])
def test_memo_gives_identical_bounds_at_every_size(setting, form):
    op, iv, spec, params, x = setting
    n = op.nodes
    if form == "interval":  # as on graphs too large for eigh: sparse products (theory 9.2)
        mc = model_constants(params, spec, iv, n, matrix=op.matrix)
        lam, vecs = None, None
    else:
        lam, vecs = np.linalg.eigh(op.dense())
        mc = model_constants(params, spec, iv, n, lam, matrix=op.matrix)
    memo = InputMemo()
    for eps in EPS:
        plain = certify_inputs(params, spec, op.matrix, iv, x, eps, lam, vecs, mc)
        kept = certify_inputs(params, spec, op.matrix, iv, x, eps, lam, vecs, mc, memo=memo)
        assert np.array_equal(plain, kept), (form, eps, plain, kept)


def test_memo_never_reuses_another_inputs_parts(setting):
    op, iv, spec, params, x = setting
    mc = model_constants(params, spec, iv, op.nodes, matrix=op.matrix)
    memo = InputMemo()
    first = certify_inputs(params, spec, op.matrix, iv, x, 1e-2, constants=mc, memo=memo)
    other = 3.0 * x[::-1]  # another array: every kept entry is stale for it
    fresh = certify_inputs(params, spec, op.matrix, iv, other, 1e-2, constants=mc)
    reused = certify_inputs(params, spec, op.matrix, iv, other, 1e-2, constants=mc, memo=memo)
    assert np.array_equal(fresh, reused)
    assert not np.allclose(first, reused)  # the two inputs' bounds do differ, so a mix-up would show


def test_memo_computes_each_part_once(setting):
    op, iv, spec, params, x = setting
    memo = InputMemo()
    calls = []

    def layer(i, z):
        calls.append(i)
        return z + i, z * i

    z = np.asarray(x, dtype=np.float64)
    a = memo.layer(0, z, layer)
    b = memo.layer(0, z, layer)
    assert a is b and calls == [0]
    memo.layer(0, z.copy(), layer)  # equal content, another array: recomputed (entries go by identity)
    assert calls == [0, 0]
    # A subset of the signals (a refinement) is computed but never displaces the kept full array.
    memo.layer(0, z[[1]], layer)
    assert memo.layer(0, z, layer) is a and calls == [0, 0, 0]
    # Remainder norms: kept for equal coefficients, recomputed for other ones; checked against numpy.
    taps = np.asarray(params["layers"][0]["taps"])
    br = bank_remainder(taps, spec.basis, (iv.lower, iv.upper), 1e-2)
    norms = memo.norms(z, br)
    expect = np.array([[np.linalg.norm(z[b] @ g) for b in range(z.shape[0])] for g in br.coefficients])
    np.testing.assert_allclose(norms, expect, rtol=1e-12)
    again = bank_remainder(taps, spec.basis, (iv.lower, iv.upper), 0.03)  # same coefficients, other eps
    assert memo.norms(z, again) is norms
    other = bank_remainder(2.0 * taps, spec.basis, (iv.lower, iv.upper), 1e-2)
    np.testing.assert_allclose(memo.norms(z, other), 2.0 * expect, rtol=1e-12)
