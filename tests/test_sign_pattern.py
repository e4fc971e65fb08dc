"""The relu sign term through the graph's quadratic form (docs/theory.md 9.9),
against dense references: the contraction ``|v|^T S |v| <= v^T S v`` for
matrices with non-positive off-diagonal entries (elementary; the contraction
property of Dirichlet forms, Fukushima, Oshima and Takeda 1994, s. 1.4) on
networkx graphs, and the sign-term bound against the first-order change of
``|V|`` from the Daleckii-Krein formula (numpy.linalg.eigh; Bhatia, "Matrix
Analysis", 1997, ch. V). A version without the bias's share is exceeded at
``x = 0``, so the check can fail."""

from __future__ import annotations

import dataclasses

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
from reference import daleckii_krein, filter_matrices, kron_operator, random_symmetric

from stablefilt._filters import Basis
from stablefilt._joint import eigen_cover, joint_factor
from stablefilt._kernel import eigenvalue_slack
from stablefilt._signterm import off_diagonal_sign, previous_bank, sign_term


def _quad(s, v):
    return float(np.sum(v * (s @ v)))


def test_contraction_on_laplacians_and_its_reverse_on_adjacency():
    rng = np.random.default_rng(0)
    for g in (nx.karate_club_graph(), nx.les_miserables_graph(), nx.path_graph(12)):
        a = nx.to_numpy_array(g)
        lap = np.diag(a.sum(1)) - a
        d = 1 / np.sqrt(a.sum(1))
        norm = np.eye(len(a)) - d[:, None] * a * d[None, :]
        assert off_diagonal_sign(sp.csr_matrix(lap)) == 1 and off_diagonal_sign(sp.csr_matrix(a)) == -1
        for _ in range(20):
            v = rng.standard_normal((len(a), 3))
            assert _quad(lap, np.abs(v)) <= _quad(lap, v) + 1e-9
            assert _quad(norm, np.abs(v)) <= _quad(norm, v) + 1e-9
            assert _quad(a, np.abs(v)) >= _quad(a, v) - 1e-9
        # The reverse fails on the adjacency matrix: |v|^T A |v| > v^T A v for a mixed-sign v.
        v = np.where(np.arange(len(a)) % 2 == 0, 1.0, -1.0)[:, None]
        assert _quad(a, np.abs(v)) > _quad(a, v)
    mixed = sp.csr_matrix(np.array([[0.0, 1.0, -1.0], [1.0, 0.0, 0.0], [-1.0, 0.0, 0.0]]))
    assert off_diagonal_sign(mixed) == 0


def _case(family, seed):
    name, op = family
    s = op.dense()
    rng = np.random.default_rng(seed)
    lam = np.linalg.eigvalsh(s)
    lo, hi = float(lam[0]), float(lam[-1])
    basis = Basis("chebyshev", (lo - 0.05 * (hi - lo) - 0.01, hi + 0.05 * (hi - lo) + 0.01))
    prev = rng.standard_normal((3, 2, 3))  # H': 2 -> 3 features
    taps = rng.standard_normal((3, 3, 2))  # H: 3 -> 2 features
    bias = rng.standard_normal(3)
    return name, op, s, lam, basis, prev, taps, bias, rng


@pytest.mark.parametrize("seed", [1, 2])
def test_sign_term_bounds_the_first_order_change_of_abs(family, seed):
    name, op, s, lam, basis, prev, taps, bias, rng = _case(family, seed)
    joint = joint_factor(taps, basis, eigen_cover(lam, eigenvalue_slack(lam)))
    term = sign_term(joint, previous_bank(prev, basis, bias, op.matrix, joint.cover))
    if off_diagonal_sign(op.matrix) == 0:
        assert term is None
        return
    n = s.shape[0]
    hp = kron_operator(filter_matrices(s, prev, "chebyshev", basis.interval))
    _, vecs = np.linalg.eigh(s)
    top = np.linalg.svd(hp)[2][0].reshape(2, n).T  # the input H' moves most
    no_bias = dataclasses.replace(term, cross=0 * term.cross, bias2=0 * term.bias2)
    missed = 0.0
    for x in (np.zeros((n, 2)), rng.standard_normal((n, 2)), top, vecs[:, [0, -1]]):
        v = (hp @ x.flatten(order="F")).reshape(3, n).T + bias[None, :]
        u = np.abs(v).flatten(order="F")
        nx_, nv = float(np.linalg.norm(x)), float(np.linalg.norm(v))
        bound = term.bound(1.0, nx_, nv, 0.0)
        for e in [random_symmetric(rng, n, 1.0) for _ in range(3)] + [np.eye(n), np.outer(vecs[:, 0], vecs[:, -1])
                                                                      + np.outer(vecs[:, -1], vecs[:, 0])]:
            e = e / np.linalg.norm(e, 2)
            got = float(np.linalg.norm(daleckii_krein(s, e, taps, "chebyshev", basis.interval) @ u))
            assert got <= bound * (1 + 1e-9) + 1e-12, (name, got, bound)
            if nx_ == 0.0:
                missed = max(missed, got - no_bias.bound(1.0, nx_, nv, 0.0))
    # Without the bias's share the bound at x = 0 is the residual term alone: exceeded.
    assert missed > 0, name
