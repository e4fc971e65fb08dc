"""The relative perturbation model ``S_hat = S + E S + S E`` (Gama, Bruna,
Ribeiro, "Stability Properties of Graph Neural Networks", IEEE TSP 2020, the
form without 1/2), its special cases from theory.md section 2, and the
library's product with the perturbed operator."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.linalg as sla
from reference import random_symmetric, relative

import stablefilt as sf
from stablefilt._perturb import relative_product


@pytest.mark.parametrize("eps", [1e-4, 1e-2, 0.1, -0.3])
def test_scaling_is_relative_with_half_eps_identity(family, eps):
    # theory.md s.2 [derived]: (1 + eps) S = S + E S + S E with E = (eps/2) I
    _, op = family
    s = op.dense()
    e = 0.5 * eps * np.eye(op.nodes)
    np.testing.assert_allclose(relative(s, e), (1 + eps) * s, rtol=0, atol=1e-15 * max(1.0, np.abs(s).max()))
    assert np.linalg.norm(e, 2) == pytest.approx(abs(eps) / 2, rel=1e-15)


def test_sylvester_recovers_e():
    # theory.md s.2: S E + E S = S_hat - S; reference: scipy.linalg.solve_sylvester.
    # Needs lam_i + lam_j != 0 for all i, j: a random weighted adjacency with a
    # positive diagonal shift keeps the spectrum away from the origin.
    rng = np.random.default_rng(700)
    a = nx.to_numpy_array(nx.gnp_random_graph(15, 0.4, seed=7)) * rng.uniform(0.5, 1.5, (15, 15))
    a = np.triu(a, 1)
    s = a + a.T + 8.0 * np.eye(15)
    lam = np.linalg.eigvalsh(s)
    assert np.abs(lam[:, None] + lam[None, :]).min() > 1.0
    e = random_symmetric(rng, 15, 0.05)
    s_hat = relative(s, e)
    got = sla.solve_sylvester(s, s, s_hat - s)
    np.testing.assert_allclose(got, e, atol=1e-12)
    # theory.md s.2: in the eigenbasis Et_ij = Dt_ij / (lam_i + lam_j)
    w, v = np.linalg.eigh(s)
    dt = v.T @ (s_hat - s) @ v
    np.testing.assert_allclose(v @ (dt / (w[:, None] + w[None, :])) @ v.T, e, atol=1e-12)


def test_diagonal_e_keeps_the_sparsity_pattern():
    # theory.md s.2 [derived]: E = diag(e) gives S_hat_ij = S_ij (1 + e_i + e_j), ||E||_2 = max |e_i|
    s = sf.shift_operator(nx.to_numpy_array(nx.karate_club_graph()), "laplacian").dense()
    e = np.random.default_rng(701).uniform(-0.1, 0.1, 34)
    s_hat = relative(s, np.diag(e))
    np.testing.assert_allclose(s_hat, s * (1 + e[:, None] + e[None, :]), atol=1e-13)
    np.testing.assert_array_equal(s_hat != 0, s != 0)
    assert np.linalg.norm(np.diag(e), 2) == pytest.approx(np.abs(e).max(), rel=1e-15)


def test_relative_product_matches_dense(family):
    _, op = family
    s = op.dense()
    rng = np.random.default_rng(702)
    e = random_symmetric(rng, op.nodes, 0.1)
    x = rng.standard_normal((op.nodes, 3))
    tol = 1e-13 * max(1.0, np.abs(s).max())
    # S as a sparse matrix or a function, E dense or a function: reference tests/reference.py::relative.
    for s_arg, e_arg in ((op.matrix, e), (lambda z: op.matrix @ z, lambda z: e @ z)):
        np.testing.assert_allclose(relative_product(s_arg, e_arg, x), relative(s, e) @ x, atol=tol)
    # A diagonal E as its vector, and the dense S_hat as the product with I.
    d = np.diag(e).copy()
    np.testing.assert_allclose(relative_product(op.matrix, d, x), relative(s, np.diag(d)) @ x, atol=tol)
    np.testing.assert_allclose(relative_product(s, e, np.eye(op.nodes)), relative(s, e), atol=tol)


def test_relative_perturbation_moves_spectrum_by_at_most_2_eps_r(family):
    # Weyl's inequality (common practice): ||E S + S E|| <= 2 eps ||S||, so the
    # spectrum of S_hat lies in the interval widened by 2 eps R (theory.md s.5 item 6).
    _, op = family
    s = op.dense()
    iv = sf.spectral_interval(op)
    rng = np.random.default_rng(703)
    for eps in (1e-2, 0.1):
        for e in (random_symmetric(rng, op.nodes, eps), eps * np.eye(op.nodes), -eps * np.eye(op.nodes)):
            lam = np.linalg.eigvalsh(relative(s, e))
            w = iv.widened(2 * eps * iv.radius)
            assert w.lower <= lam[0] and lam[-1] <= w.upper
