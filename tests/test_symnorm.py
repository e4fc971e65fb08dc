"""The proved upper bound on a symmetric matrix's 2-norm
(stablefilt._symnorm, docs/theory.md s. 2): never below ``numpy.linalg.norm
(M, 2)`` and within 1e-8 of it, on matrices whose extreme eigenvalue is the
largest or the smallest, and exact when it falls back to ``eigvalsh``."""

from __future__ import annotations

import numpy as np
import pytest

from stablefilt import _symnorm
from stablefilt._symnorm import norm2_upper


def _cases():
    rng = np.random.default_rng(3)
    a = rng.standard_normal((120, 120))
    sym = a + a.T
    q, _ = np.linalg.qr(rng.standard_normal((80, 80)))
    lam = np.linspace(-1.0, 0.4, 80)  # the extreme eigenvalue is the smallest
    return {"gaussian": sym, "negative-end": (q * lam) @ q.T, "positive-definite": sym @ sym + np.eye(120),
            "tiny": 1e-30 * sym}


@pytest.mark.parametrize("name", sorted(_cases()))
def test_upper_bound_against_numpy(name):
    m = _cases()[name]
    true = np.linalg.norm(m, 2)  # numpy's SVD-based 2-norm
    if name == "tiny":
        # ||c M|| = c ||M|| (a norm is homogeneous): numpy's SVD of the tiny
        # matrix itself was seen 7e-8 off in one numpy build.
        true = 1e-30 * np.linalg.norm(_cases()["gaussian"], 2)
    got, how = norm2_upper(m)
    assert how == "lanczos+cholesky" or name == "tiny"
    assert true <= got <= true * (1 + 1e-8)


def test_fallback_is_the_eigenvalue_norm(monkeypatch):
    """Margins below the norm make every Cholesky factorisation fail (the
    shifted matrix is indefinite): the result is then numpy's norm."""
    m = _cases()["gaussian"]
    monkeypatch.setattr(_symnorm, "MARGINS", (-0.5,))
    got, how = norm2_upper(m)
    assert how == "eigvalsh"
    assert got == pytest.approx(np.linalg.norm(m, 2), rel=1e-12)


def test_zero_and_small_matrices():
    assert norm2_upper(np.zeros((4, 4))) == (0.0, "eigvalsh")
    m = np.array([[0.0, 2.0], [2.0, 1.0]])
    assert norm2_upper(m)[0] == pytest.approx(np.linalg.norm(m, 2), rel=1e-14)
