"""Rigorous float64 constants of a filter or filter bank over a spectral
interval, and its per-eps bounds under a relative perturbation
(docs/theory.md, sections 3-6): the constants are computed once
(:func:`filter_constants`) and reused for every eps (:func:`filter_bounds`).
"""

from __future__ import annotations

import dataclasses
import functools
from math import comb
from typing import NamedTuple

import numpy as np

from ._checks import check_eps, check_interval
from ._exact import UNIT, power_map, product_error, response_map
from ._filters import Basis, basis_values, check_taps, response_derivative
from ._kernel import abs_kernel, direct_split, eigenvalue_slack, kernel_matrices, product_tensor, quad_upper
from ._series import SUP_GRID, flat_taps, response_coefficients, sup_chebyshev, with_allowance

#: Largest ``N * filters`` for the direct ``N x N`` PSD split of ``Gamma``.
DIRECT_SPLIT_LIMIT = 20000


def usable_interval(interval) -> tuple[float, float]:
    """``interval = (a, b)``, checked, and widened around a single point so a
    Chebyshev basis of it exists (a superset stays valid)."""
    a, b = check_interval(interval)
    if a < b:
        return float(a), float(b)
    w = 1e-6 * max(1.0, abs(a))
    return float(a) - w, float(b) + w


@dataclasses.dataclass(frozen=True)
class FilterConstants:
    """Rigorous frequency-response constants, one value per filter
    (arrays of shape ``taps.shape[1:]``).

    Attributes:
      interval: ``(a, b)`` the suprema are over.
      integral_lipschitz: ``C = sup |lam h'(lam)|``.
      lipschitz: ``C0 = sup |h'|``.
      sup: ``B = sup |h|``.
      pairwise: ``C2 = (1/2) sup |Gamma(lam, mu)|`` (bounded by ``kappa / 2``).
      kernel: ``kappa`` over the interval: bound on the first-order change
        per unit ``eps`` for every graph with spectrum in the interval.
      kernel_spectrum: ``kappa`` over the eigenvalues of one graph, or None.
      aligned_spectrum: ``2 max_i |lam_i h'(lam_i)|``, or None.
      bank_sup: ``sup ||H(lam)||_2`` over the interval (a bank), or ``sup``.
      method: how suprema were made rigorous.
    """

    interval: tuple[float, float]
    integral_lipschitz: np.ndarray
    lipschitz: np.ndarray
    sup: np.ndarray
    pairwise: np.ndarray
    kernel: np.ndarray
    kernel_spectrum: np.ndarray | None
    aligned_spectrum: np.ndarray | None
    bank_sup: float
    method: str = ("grid of 4097 points + Markov remainder, exact changes of basis and float64 error bounds "
                   "(theory s.6)")

    def as_dict(self) -> dict:
        def arr(x):
            return None if x is None else np.asarray(x).tolist()

        return {
            "interval": list(self.interval),
            "integral_lipschitz": arr(self.integral_lipschitz),
            "lipschitz": arr(self.lipschitz),
            "sup": arr(self.sup),
            "bank_sup": float(self.bank_sup),
            "pairwise": arr(self.pairwise),
            "kernel": arr(self.kernel),
            "kernel_spectrum": arr(self.kernel_spectrum),
            "aligned_spectrum": arr(self.aligned_spectrum),
            "method": self.method,
        }


def bank_sup(cols, shape, basis, a, b, grid=SUP_GRID):
    """Rigorous ``sup_[a,b] ||H(lam)||_2`` for a bank: the spectral norm of
    the matrix of per-filter grid values, plus the per-filter Markov terms
    bound it (``||A + D||_2 <= ||A||_2 + ||D||_F``)."""
    k = cols.shape[0]
    coef, cerr = response_coefficients(k, basis, a, b, "h", cols)  # (F, K)
    if len(shape) != 2:
        return float(sup_chebyshev(coef, err=cerr).max())
    t = np.linspace(-1.0, 1.0, grid)
    v = np.polynomial.chebyshev.chebvander(t, k - 1)
    vals = (v @ coef.T).reshape(grid, *shape)
    top = float(np.max(np.linalg.norm(vals, ord=2, axis=(1, 2))))
    k2 = np.arange(k) ** 2
    markov = np.sum(k2 * np.abs(coef), axis=-1) / (grid - 1) + np.sum(cerr, axis=-1)
    l1 = np.sum(np.abs(coef), axis=-1)
    return float(with_allowance(top + np.linalg.norm(markov), np.linalg.norm(l1)))


def gain_constants(taps, basis: Basis, interval) -> tuple[float, np.ndarray]:
    """Rigorous ``(sup ||H(lam)||_2, sup |h'| per filter)`` over
    ``interval``: the two constants the model composition needs over the
    widened interval holding ``spec(S_hat)``, without the kernel work of
    :func:`filter_constants`."""
    taps = check_taps(taps)
    cols, shape = flat_taps(taps)
    k = cols.shape[0]
    a, b = usable_interval(interval)
    sup_d = sup_chebyshev(*response_coefficients(k, basis, a, b, "deriv", cols))
    sup_d = sup_d.reshape(shape) if shape else float(sup_d[0])
    return bank_sup(cols, shape, basis, a, b), sup_d


def filter_constants(taps, basis: Basis, interval, eigenvalues=None, *, pairwise: bool = True) -> FilterConstants:
    """Rigorous constants of a filter or bank over ``interval`` (and, when
    ``eigenvalues`` are given, the forms over them).

    Args:
      taps: ``(K,)`` or ``(K, F_in, F_out)``.
      basis: the filter's :class:`Basis`.
      interval: ``(a, b)``, ``a <= b``.
      eigenvalues: optional array of the graph's eigenvalues.
      pairwise: compute ``C2`` (skipped, reported as ``kappa / 2``, when
        false: the cheap form used every training epoch).

    Returns:
      :class:`FilterConstants`.
    """
    taps = check_taps(taps)
    cols, shape = flat_taps(taps)
    k = cols.shape[0]
    a, b = usable_interval(interval)
    sup_h = sup_chebyshev(*response_coefficients(k, basis, a, b, "h", cols))
    sup_d = sup_chebyshev(*response_coefficients(k, basis, a, b, "deriv", cols))
    sup_c = sup_chebyshev(*response_coefficients(k, basis, a, b, "lam_deriv", cols))

    # The kernel bound (docs/theory.md section 5 item 2) in two splits, the
    # Chebyshev basis of [a, b] and monomials, keeping the smaller. Every
    # float64 step carries an error bound (docs/theory.md section 6): the
    # monomial split of a filter on an interval far from 0 cancels badly and
    # its allowance then makes it lose the minimum instead of being trusted.
    splits = [Basis("chebyshev", (a, b)), Basis()]
    kernels = kernel_matrices(cols, basis, splits)
    pk = product_tensor(k)
    big_r = max(abs(a), abs(b))
    kappa = None
    kappa_spec = None
    aligned = None
    lam = None if eigenvalues is None else np.asarray(eigenvalues, dtype=np.float64)
    slack = 0.0 if lam is None else eigenvalue_slack(lam)
    for split, (m, dm) in zip(splits, kernels):
        absm, aerr = abs_kernel(m, dm)  # Gamma_ij = <x_i, y_j> with ||x_i||^2 = phi^T |M| phi
        fro = np.linalg.norm(absm, axis=(1, 2))
        if split.kind == "chebyshev":
            # phi^T |M| phi as a Chebyshev series of [a, b]; ||phi||^2 <= K there.
            coef = np.einsum("fab,abn->fn", absm, pk)
            cerr = 2.0 * k * k * UNIT * np.einsum("fab,abn->fn", np.abs(absm), pk)
            kap = sup_chebyshev(coef, err=cerr) + (aerr + 2.0 * k * k * UNIT * fro) * k
        else:
            qmap = np.zeros((2 * k - 1 if k > 1 else 1, k, k))
            for i in range(k):
                for j in range(k):
                    qmap[i + j, i, j] = 1.0
            p = np.einsum("mab,fab->fm", qmap, absm)  # power coefficients
            perr = 2.0 * k * UNIT * np.einsum("mab,fab->fm", qmap, np.abs(absm))
            conv = response_map(qmap.shape[0], Basis(), a, b, "h")
            coef = p @ conv.T
            cerr = product_error(conv, p.T).T + perr @ np.abs(conv).T
            phi2 = float(np.sum(big_r ** (2.0 * np.arange(k))))  # sup ||phi||^2 on [a, b]
            kap = sup_chebyshev(coef, err=cerr) + (aerr + 2.0 * k * k * UNIT * fro) * phi2
        kappa = kap if kappa is None else np.minimum(kappa, kap)
        if lam is not None:
            ks = quad_upper(basis_values(lam, k, split), absm, aerr, split, lam, slack).max(axis=1)
            ks = with_allowance(ks, np.abs(m).sum(axis=(1, 2)))
            kappa_spec = ks if kappa_spec is None else np.minimum(kappa_spec, ks)
    if lam is not None:
        n, f = lam.size, cols.shape[1]
        if n * f <= DIRECT_SPLIT_LIMIT and n <= 400:
            kappa_spec = np.minimum(kappa_spec, direct_split(lam, k, splits[0], *kernels[0], slack))
        d = response_derivative(cols, lam, basis)  # (N, F)
        aligned = with_allowance(2 * np.max(np.abs(lam[:, None] * d), axis=0), 1.0)
        # Over the eigenvalues can never need more than over the interval.
        kappa_spec = np.minimum(kappa_spec, kappa)

    # C2 <= kappa / 2 (docs/theory.md section 5 item 2) and a 2-D grid bound:
    # max_grid |Gamma| plus the smaller of two grid-gap terms, with h the
    # spacing in t. First order (Markov, |T_a'| <= a^2): (h/2) sum |M_ab| (a^2 + b^2).
    # Second order: at a maximiser of |Gamma| over the square the gradient
    # is zero along every coordinate not at an end, and the nearest grid point
    # differs only in those, so the gap is at most (h/2)^2/2 times
    # sup|G_tt| + 2 sup|G_ts| + sup|G_ss|, with |T_a''| <= a^2 (a^2 - 1)/3
    # (Markov brothers' inequality). The second-order term alone took C2 from
    # up to 20% to within 1% of a fine-grid maximum at K = 7.
    m, dm = kernels[0]
    grid = 129
    t = np.linspace(-1, 1, grid)
    v = np.polynomial.chebyshev.chebvander(t, k - 1)
    pair = np.full(cols.shape[1], np.inf)
    ka = np.arange(k, dtype=np.float64)
    k2 = (ka**2)[:, None]
    curv = (ka**2 * (ka**2 - 1) / 3.0)[:, None] + np.outer(ka**2, ka**2)
    h = 2.0 / (grid - 1)
    for f0 in range(0, cols.shape[1] if pairwise else 0, 64):
        mf = np.abs(m[f0:f0 + 64])
        g = np.einsum("ia,fab,jb->fij", v, m[f0:f0 + 64], v, optimize=True)
        markov = h * np.sum(k2 * mf, axis=(1, 2))
        second = (h * h / 4.0) * np.sum(curv * mf, axis=(1, 2))
        pair[f0:f0 + 64] = np.abs(g).max(axis=(1, 2)) + np.minimum(markov, second)
    # |phi^T dM psi| <= K ||dM||_F for Chebyshev values in [-1, 1].
    pair = pair + k * np.linalg.norm(dm, axis=(1, 2))
    pair = np.minimum(with_allowance(pair, np.abs(m).sum(axis=(1, 2))), kappa) * 0.5

    def shaped(x):
        return None if x is None else np.asarray(x).reshape(shape) if shape else float(np.asarray(x).ravel()[0])

    return FilterConstants(
        interval=(a, b),
        integral_lipschitz=shaped(sup_c),
        lipschitz=shaped(sup_d),
        sup=shaped(sup_h),
        pairwise=shaped(pair),
        kernel=shaped(kappa),
        kernel_spectrum=shaped(kappa_spec),
        aligned_spectrum=shaped(aligned),
        bank_sup=bank_sup(cols, shape, basis, a, b),
    )


def _tails(x: float, y: float, k: int) -> np.ndarray:
    """``(x + y)^j - x^j - j y x^(j-1) = sum_{i>=2} C(j, i) y^i x^(j-i)`` for
    ``j < k``, summed term by term (no cancellation)."""
    return np.array([sum(comb(j, i) * y**i * x ** (j - i) for i in range(2, j + 1)) for j in range(k)])


def remainder(taps, basis: Basis, interval, eps: float) -> np.ndarray:
    """Non-asymptotic bound on ``||H(S_hat) - H(S) - first-order term||``
    per filter, for every ``S`` with spectrum in ``interval`` and
    ``||E|| <= eps`` (docs/theory.md section 5 item 5). The smaller of

    - origin form: ``sum_k |c_k| ((R + d)^k - R^k - k d R^(k-1))``, ``c`` the
      monomial coefficients, ``R = max(|a|, |b|)``, ``d = 2 eps R``;
    - centred form: the same with ``g_k``, coefficients in powers of
      ``(lam - m)``, ``m`` the midpoint, and ``r = (b - a)/2`` for ``R``.

    (For the origin form ``(R + d)^k - ... = R^k ((1 + 2 eps)^k - 1 - 2 k eps)``.)
    """
    taps = check_taps(taps)
    eps = check_eps(eps)
    cols, shape = flat_taps(taps)
    k = cols.shape[0]
    a, b = check_interval(interval)
    big_r = max(abs(a), abs(b))
    mid = 0.5 * (a + b)
    half = max(b - mid, mid - a) * (1 + 4 * UNIT)  # covers [a, b] around the rounded midpoint
    d = 2.0 * eps * big_r

    def coefficient_bound(centre):
        """Upper bounds on |coefficients| in powers of (lam - centre), (K, F)."""
        cmap = power_map(k, basis, centre)
        return np.abs(cmap @ cols) + product_error(cmap, cols)

    c = coefficient_bound(0.0)
    g = coefficient_bound(mid)
    origin = _tails(big_r, d, k) @ c
    centred = _tails(half, d, k) @ g
    scale = ((half + d) ** np.arange(k)) @ g
    out = with_allowance(np.minimum(origin, centred), scale)
    return out.reshape(shape) if shape else float(out[0])


@dataclasses.dataclass(frozen=True)
class BankRemainder:
    """The whole bank's second-order remainder (docs/theory.md 9.7):
    ``||rho(X)||_F <= sum_j t_j ||X g_j||_F`` with ``g_j`` the bank's
    coefficient matrices in powers of ``(lam - m)`` and
    ``t_j = (r + d)^j - r^j - j d r^(j-1)``.

    Attributes:
      tails: ``t_j``, ``(K,)``.
      coefficients: ``g_j`` in float64, ``(K, F_in, F_out)``.
      errors: entrywise bounds on their float64 error, same shape.
      powers: ``(r + d)^j``, the size of the terms summed, for the absolute
        round-off allowance (as in :func:`remainder`).
    """

    tails: np.ndarray
    coefficients: np.ndarray
    errors: np.ndarray
    powers: np.ndarray

    @functools.cached_property
    def _coefficient_norms(self) -> np.ndarray:
        """``||g_j||_2 + ||err_j||_F`` per ``j``: eps-free, computed once per
        record (the certificates of many signals and radii ask for it)."""
        return np.array([np.linalg.norm(g, 2) + np.linalg.norm(e) for g, e in zip(self.coefficients, self.errors)])

    def operator(self) -> float:
        """``sum_j t_j (||g_j||_2 + ||err_j||_F)``: for every ``||X||_F <= 1``."""
        norms = self._coefficient_norms
        return float(with_allowance(float(np.dot(self.tails, norms)), float(np.dot(self.powers, norms))))

    def input_norms(self, x) -> np.ndarray:
        """``||X g_j||_F`` per coefficient ``j`` and signal of ``x``
        ``(B, N, F_in)``, ``(K, B)``: the eps-free part of :meth:`inputs`
        (the coefficients do not depend on eps)."""
        x = np.asarray(x, dtype=np.float64)
        return np.stack([np.sqrt(np.sum(np.einsum("bnf,fg->bng", x, g) ** 2, axis=(1, 2)))
                         for g in self.coefficients])

    def inputs(self, x, norms=None) -> np.ndarray:
        """Per signal of ``x`` ``(B, N, F_in)``: ``sum_j t_j (||X g_j||_F + ||X||_F ||err_j||_F)``;
        ``norms``: :meth:`input_norms` of ``x`` for these coefficients, when already computed."""
        x = np.asarray(x, dtype=np.float64)
        xn = np.sqrt(np.sum(x**2, axis=(1, 2)))
        norms = self.input_norms(x) if norms is None else norms
        out, scale = np.zeros(x.shape[0]), np.zeros(x.shape[0])
        for t, p, gx, e in zip(self.tails, self.powers, norms, self.errors):
            term = gx + xn * np.linalg.norm(e)
            out += t * term
            scale += p * term
        return with_allowance(out, scale)


def bank_remainder(taps, basis: Basis, interval, eps: float) -> BankRemainder:
    """The :class:`BankRemainder` of a bank ``(K, F_in, F_out)`` (or one
    filter) for every ``S`` with spectrum in ``interval`` and ``||E|| <= eps``
    (docs/theory.md 9.7)."""
    t = np.asarray(taps, dtype=np.float64)
    if t.ndim == 1:
        t = t[:, None, None]
    eps = check_eps(eps)
    a, b = check_interval(interval)
    k = t.shape[0]
    mid = 0.5 * (a + b)
    half = max(b - mid, mid - a) * (1 + 4 * UNIT)
    d = 2.0 * eps * max(abs(a), abs(b))
    cmap = power_map(k, basis, mid)
    cols = t.reshape(k, -1)
    g = (cmap @ cols).reshape(t.shape)
    err = product_error(cmap, cols).reshape(t.shape)
    return BankRemainder(_tails(half, d, k), g, err, (half + d) ** np.arange(k))


def combine(per_filter) -> float:
    """Bank bound from per-filter bounds ``beta`` (``F_in x F_out``): the
    spectral norm ``||beta||_2`` (docs/theory.md section 5 item 6); a single
    filter's bound is returned as is."""
    b = np.asarray(per_filter, dtype=np.float64)
    if b.ndim == 0:
        return float(b)
    return float(with_allowance(np.linalg.norm(b, ord=2), 0.0))


class FilterBound(NamedTuple):
    """Per-filter bounds at one ``eps`` (arrays of the bank's shape, or
    floats): ``first_order + remainder`` is the per-filter certificate."""

    first_order: np.ndarray
    remainder: np.ndarray

    @property
    def total(self) -> np.ndarray:
        return self.first_order + self.remainder


def filter_bounds(taps, basis: Basis, interval, eps: float, constants: FilterConstants | None = None,
                  eigenvalues=None) -> FilterBound:
    """Per-filter first-order and remainder bounds at ``eps``
    (docs/theory.md section 5 items 2 and 5). Uses the tighter of the kernel
    bound over the interval and over the eigenvalues (when given); pass the
    ``constants`` of :func:`filter_constants` to reuse them across eps."""
    if constants is None:
        constants = filter_constants(taps, basis, interval, eigenvalues)
    kap = np.asarray(constants.kernel)
    if constants.kernel_spectrum is not None:
        kap = np.minimum(kap, np.asarray(constants.kernel_spectrum))
    first = with_allowance(kap * eps, 0.0)
    rem = np.asarray(remainder(taps, basis, interval, eps))
    return FilterBound(first, rem)
