"""The first-order kernel ``Gamma(lam, mu) = phi(lam)^T M phi(mu)``
(theory.md section 4): ``Phi M Phi^T`` equals ``Gamma`` at the eigenvalues of
a graph, for both filter bases and both split bases, and the monomial ``M``
has the closed form given there."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
from numpy.polynomial import Chebyshev
from reference import gamma

import stablefilt as sf
from stablefilt._exact import kernel_transform
from stablefilt._filters import basis_values
from stablefilt._series import as_series


def _spectrum(kind):
    a = nx.to_numpy_array(nx.les_miserables_graph())  # bundled with networkx
    return np.linalg.eigvalsh(sf.shift_operator(a, kind).dense())


SPECTRA = {kind: _spectrum(kind) for kind in ("as-is", "normalized-laplacian", "scaled-adjacency")}


def _split(kind, lam):
    if kind == "monomial":
        return sf.make_basis()
    return sf.make_basis("chebyshev", (float(lam[0]) - 0.1, float(lam[-1]) + 0.1))


@pytest.mark.parametrize("graph", sorted(SPECTRA))
@pytest.mark.parametrize("fkind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("skind", ["monomial", "chebyshev"])
@pytest.mark.parametrize("k", [1, 2, 4, 6])
def test_kernel_reproduces_gamma_at_eigenvalues(graph, fkind, skind, k):
    lam = SPECTRA[graph]
    rng = np.random.default_rng(31 + k)
    c = rng.standard_normal(k)
    interval = (float(lam[0]) - 0.3, float(lam[-1]) + 0.2) if fkind == "chebyshev" else None
    basis = sf.make_basis(fkind, interval)
    split = _split(skind, lam)
    m = kernel_transform(k, basis, split) @ c
    assert m.shape == (k, k)
    np.testing.assert_allclose(m, m.T, atol=1e-12 * max(1.0, np.abs(m).max()))
    phi = basis_values(lam, k, split)
    got = phi @ m @ phi.T
    li, mj = np.meshgrid(lam, lam, indexing="ij")
    ref = gamma(c, li, mj, fkind, interval)  # reference: divided differences with numpy.polynomial
    assert np.abs(got - ref).max() <= 1e-12 * max(np.abs(ref).max(), 1e-300) + 1e-13


@pytest.mark.parametrize("k", [1, 2, 3, 6])
def test_monomial_kernel_closed_form(k):
    # theory.md section 4 [derived]: M_ab = c_{a+b} (2 - [a = 0] - [b = 0]) for 1 <= a + b <= K - 1
    c = np.random.default_rng(k).standard_normal(k)
    m = kernel_transform(k, sf.make_basis(), sf.make_basis()) @ c
    ref = np.zeros((k, k))
    for a in range(k):
        for b in range(k):
            if 1 <= a + b <= k - 1:
                ref[a, b] = c[a + b] * (2 - (a == 0) - (b == 0))
    np.testing.assert_allclose(m, ref, rtol=1e-14, atol=1e-14)


def test_kernel_by_hand_quadratic():
    # h = lam^2: Gamma = (lam + mu)^2 = 1 * lam^2 + 2 lam mu + mu^2 (by hand)
    m = kernel_transform(3, sf.make_basis(), sf.make_basis()) @ np.array([0.0, 0.0, 1.0])
    np.testing.assert_allclose(m, [[0, 0, 1], [0, 2, 0], [1, 0, 0]], atol=1e-15)


def test_series_matches_basis():
    # numpy's Chebyshev with domain [a, b] maps onto [-1, 1] as the Basis does
    # (reference: numpy.polynomial.Chebyshev).
    c = np.array([0.3, -1.0, 0.5, 0.25])
    basis = sf.make_basis("chebyshev", (-2.0, 5.0))
    lam = np.linspace(-2.0, 5.0, 9)
    q = as_series(c, basis)
    assert isinstance(q, Chebyshev)
    np.testing.assert_allclose(q(lam), sf.frequency_response(c, lam, basis), rtol=1e-13, atol=1e-13)
