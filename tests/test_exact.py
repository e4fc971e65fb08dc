"""The exact change-of-basis maps behind the float64 certificates, against
numpy.polynomial's own conversions (``Chebyshev.convert``, ``deriv``) where
those are well conditioned, and their error bound where they are not."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.polynomial import Chebyshev, Polynomial
from reference import gamma

import stablefilt as sf
from stablefilt._exact import UNIT, kernel_transform, power_map, product_error, response_map
from stablefilt._filters import basis_values

BASES = [sf.make_basis(), sf.make_basis("chebyshev", (0.0, 2.0)), sf.make_basis("chebyshev", (-0.3, 2.4))]


def _series(e, basis):
    return Polynomial(e) if basis.kind == "monomial" else Chebyshev(e, domain=list(basis.interval))


@pytest.mark.parametrize("basis", BASES, ids=["monomial", "cheb-same", "cheb-wider"])
@pytest.mark.parametrize("what", ["h", "deriv", "lam_deriv"])
def test_response_map_matches_numpy_polynomial(basis, what):
    k, a, b = 6, 0.0, 2.0
    m = response_map(k, basis, a, b, what)
    lam_poly = Chebyshev([0.5 * (a + b), 0.5 * (b - a)], domain=[a, b])
    for j in range(k):
        e = np.zeros(k)
        e[j] = 1.0
        q = _series(e, basis).convert(kind=Chebyshev, domain=[a, b])  # reference: numpy.polynomial
        q = q if what == "h" else q.deriv() if what == "deriv" else lam_poly * q.deriv()
        ref = q.coef
        got = m[:, j]
        ref = np.pad(ref, (0, max(0, got.size - ref.size)))[: got.size]
        assert np.allclose(got, ref, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("basis", BASES, ids=["monomial", "cheb-same", "cheb-wider"])
@pytest.mark.parametrize("centre", [0.0, 1.0])
def test_power_map_matches_numpy_polynomial(basis, centre):
    k = 6
    m = power_map(k, basis, centre)
    for j in range(k):
        e = np.zeros(k)
        e[j] = 1.0
        ref = _series(e, basis).convert(kind=Polynomial, domain=[centre - 1, centre + 1], window=[-1, 1]).coef
        assert np.allclose(m[: ref.size, j], ref, rtol=1e-12, atol=1e-12)
        assert np.all(m[ref.size:, j] == 0)


@pytest.mark.parametrize("basis", BASES + [sf.make_basis("chebyshev", (2.49, 2.51))],
                         ids=["monomial", "cheb-same", "cheb-wider", "cheb-narrow-far"])
@pytest.mark.parametrize("split", [sf.make_basis(), sf.make_basis("chebyshev", (0.0, 2.0))], ids=["mono", "cheb"])
def test_kernel_transform_gives_gamma(basis, split):
    """``phi(lam)^T (T c) phi(mu) = Gamma(lam, mu)`` (theory.md s.4), Gamma
    from numpy.polynomial divided differences (reference.py)."""
    k = 5
    rng = np.random.default_rng(0)
    c = rng.standard_normal(k)
    m = kernel_transform(k, basis, split) @ c
    lo, hi = basis.interval if basis.interval else (0.0, 2.0)
    lam = np.linspace(lo, hi, 7)
    mu = lam[::-1] + 1e-3
    phi_l, phi_m = basis_values(lam, k, split), basis_values(mu, k, split)
    got = np.einsum("ia,ab,ib->i", phi_l, m, phi_m)
    ref = gamma(c, lam, mu, basis.kind, basis.interval)
    scale = np.einsum("ia,ab,ib->i", np.abs(phi_l), np.abs(m), np.abs(phi_m))
    assert np.all(np.abs(got - ref) <= 1e-9 * np.maximum(scale, 1.0))


def test_product_error_covers_float_rounding():
    """``product_error`` bounds ``|fl(M c) - M c|`` against exact rational
    arithmetic (``fractions``, standard library)."""
    from fractions import Fraction

    rng = np.random.default_rng(3)
    m = rng.standard_normal((6, 6)) * 10.0 ** rng.integers(-8, 8, (6, 6))
    c = rng.standard_normal((6, 2))
    got = m @ c
    err = product_error(m, c)
    for i in range(6):
        for f in range(2):
            exact = sum(Fraction(float(m[i, j])) * Fraction(float(c[j, f])) for j in range(6))
            assert abs(Fraction(float(got[i, f])) - exact) <= Fraction(float(err[i, f]))
    assert np.all(err <= 20 * UNIT * (np.abs(m) @ np.abs(c)))
