"""The relative enclosure of the perturbed spectra (docs/theory.md 9.1) and
the gain over it, against numpy.linalg.eigvalsh of ``S + E S + S E`` and
numpy's 2-norm of the frequency response. Sources: Ostrowski's theorem
(Horn and Johnson, "Matrix Analysis", 2nd ed., 2013, Thm 4.5.9) and Weyl's
inequality (the same book, Cor. 4.3.15), on the networkx graph families of
conftest.py, for random, scaling, eigenvector-pair and constructed ``E`` at
eps up to 0.3. Two weakened forms (without the ``eps^2 R`` term, and with
``(1 +- eps)`` in place of its square) are shown to be exceeded, so the
checks can fail."""

from __future__ import annotations

import numpy as np
import pytest
from reference import random_symmetric, relative

from stablefilt._compose import perturbed_cover, widened
from stablefilt._enclosure import bands, interval_band
from stablefilt._filters import Basis, frequency_response
from stablefilt._joint import band_cover, cover_gain, eigen_cover
from stablefilt._kernel import eigenvalue_slack

EPS = (1e-3, 0.05, 0.3)


def _errors(s, eps, rng):
    """``E`` with ``||E||_2 = eps``: random, +-eps I, and eigenvector pairs
    (lowest with highest, lowest with the next)."""
    n = s.shape[0]
    _, v = np.linalg.eigh(s)
    out = [random_symmetric(rng, n, eps) for _ in range(3)] + [eps * np.eye(n), -eps * np.eye(n)]
    for i, j in ((0, n - 1), (0, 1)):
        pair = np.outer(v[:, i], v[:, j]) + np.outer(v[:, j], v[:, i])
        out.append(eps * pair / np.linalg.norm(pair, 2))
    return out


def _inside(mu, lo, hi) -> bool:
    return bool(np.all(mu >= lo) and np.all(mu <= hi))


@pytest.mark.parametrize("eps", EPS)
def test_perturbed_eigenvalues_lie_in_their_bands(family, eps):
    name, op = family
    s = op.dense()
    lam = np.linalg.eigvalsh(s)
    slack = eigenvalue_slack(lam)
    radius = float(np.max(np.abs(lam))) + slack
    lo, hi = bands(lam, eps, radius, slack)
    rng = np.random.default_rng(7)
    for e in _errors(s, eps, rng):
        for t in (0.5, 1.0):  # along the path S + t (E S + S E) too
            mu = np.linalg.eigvalsh(relative(s, t * e))
            assert _inside(mu, lo, hi), name
            a, b = interval_band((lam[0], lam[-1]), eps, radius)
            assert a <= mu[0] and mu[-1] <= b, name
    # Never wider than Weyl's inequality alone (+- 2 eps R, with the slack and the rounding pad).
    pad = 16 * np.finfo(float).eps * (np.abs(lam) + slack + radius)
    assert np.all(lo >= lam - slack - 2 * eps * radius - pad) and np.all(hi <= lam + slack + 2 * eps * radius + pad)


def test_an_eigenvalue_at_zero_stays_within_eps_squared():
    # S = diag(0, 1), E = eps [[0, 1], [1, 0]]: S_hat = [[0, eps], [eps, 1]], lowest
    # eigenvalue (1 - sqrt(1 + 4 eps^2)) / 2, about -eps^2 (worked by hand).
    for eps in EPS:
        s = np.diag([0.0, 1.0])
        e = eps * np.array([[0.0, 1.0], [1.0, 0.0]])
        mu = np.linalg.eigvalsh(relative(s, e))
        np.testing.assert_allclose(mu[0], (1 - np.sqrt(1 + 4 * eps * eps)) / 2, rtol=1e-9, atol=1e-15)
        lo, hi = bands(np.array([0.0, 1.0]), eps, 1.0)
        assert _inside(mu, lo, hi)
        assert lo[0] > -2 * eps * 1.0  # much narrower than Weyl's -2 eps R at 0
        # Weakened: no eps^2 R term. The lowest eigenvalue falls below it.
        assert mu[0] < min((1 - eps) ** 2 * 0.0, (1 + eps) ** 2 * 0.0)


def test_scaling_reaches_the_squared_factor():
    # E = eps I: S_hat = (1 + 2 eps) S, so the top eigenvalue exceeds (1 + eps) lam + eps^2 R
    # (the weakened form with (1 + eps) in place of its square) but not (1 + eps)^2 lam + eps^2 R.
    s = np.diag([0.0, 0.5, 1.0])
    for eps in EPS:
        mu = np.linalg.eigvalsh(relative(s, eps * np.eye(3)))
        assert mu[-1] > (1 + eps) * 1.0 + eps * eps
        lo, hi = bands(np.diag(s), eps, 1.0)
        assert _inside(mu, lo, hi)


def test_band_cover_covers_every_point(family):
    _, op = family
    lam = np.linalg.eigvalsh(op.dense())
    radius = float(np.max(np.abs(lam)))
    for eps in EPS:
        lo, hi = bands(lam, eps, radius)
        cover = band_cover(lo, hi)
        a, b = cover.split.interval
        pts = np.concatenate([np.linspace(l, h, 7) for l, h in zip(lo, hi)])
        t = (2 * pts - a - b) / (b - a)
        dist = np.min(np.abs(t[:, None] - cover.t[None, :]), axis=1)
        assert np.all(dist <= cover.gap * (1 + 1e-9)), eps


def test_gain_over_the_enclosure_bounds_the_perturbed_gain(family):
    """``cover_gain`` is above ``||H(mu)||_2`` (numpy) at points of every band and
    above ``||H(S_hat)||_2`` for the perturbations of the first test, and within
    0.1% of the largest sampled value (a missing square root or a wrong
    layout would miss one side)."""
    name, op = family
    s = op.dense()
    lam = np.linalg.eigvalsh(s)
    slack = eigenvalue_slack(lam)
    radius = float(np.max(np.abs(lam))) + slack
    rng = np.random.default_rng(3)
    basis = Basis("chebyshev", (float(lam[0]) - 0.05, float(lam[-1]) + 0.05))
    taps = rng.standard_normal((4, 2, 3))
    for eps in (0.05, 0.3):
        cover = perturbed_cover(lam, (lam[0], lam[-1]), eps, radius, slack)
        g = cover_gain(taps, basis, cover)
        lo, hi = bands(lam, eps, radius, slack)
        pts = np.concatenate([np.linspace(l, h, 9) for l, h in zip(lo, hi)])
        sampled = max(np.linalg.norm(m, 2) for m in frequency_response(taps, pts, basis))
        assert sampled <= g <= sampled * 1.001 + 1e-9, name
        for e in _errors(s, eps, rng):
            mu = np.linalg.eigvalsh(relative(s, e))
            assert max(np.linalg.norm(m, 2) for m in frequency_response(taps, mu, basis)) <= g
        # The cover of the unperturbed eigenvalues alone gives a smaller figure that
        # the perturbed spectra exceed: the check above can fail.
        at_s = cover_gain(taps, basis, eigen_cover(lam, slack))
        assert at_s < sampled, name


def test_enclosure_of_the_interval_is_inside_weyl_and_holds_the_bands():
    lam = np.array([-1.2, -0.3, 0.0, 0.4, 1.5])
    for eps in EPS:
        lo, hi = bands(lam, eps, 1.5)
        a, b = widened((lam[0], lam[-1]), eps, 1.5)
        assert a <= lo.min() and hi.max() <= b
        assert a >= lam[0] - 2 * eps * 1.5 - 1e-12 and b <= lam[-1] + 2 * eps * 1.5 + 1e-12
        # The deployed graph's interval clips it.
        assert widened((0.0, 1.5), eps, 1.5, (0.0, 2.0))[0] == 0.0
