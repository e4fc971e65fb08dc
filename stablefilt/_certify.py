"""Certified bounds, in float64, on how much a polynomial filter or filter bank
can change under a relative perturbation of the graph.

Model: ``P^T S_hat P = S + E S + S E`` with ``E`` symmetric, ``||E||_2 <= eps``
and ``P`` a permutation (Gama, Bruna, Ribeiro, "Stability Properties of Graph
Neural Networks", IEEE Trans. Signal Processing 68, 2020; this is the form
without a factor 1/2). Bounds are on ``||H(S_hat) - P H(S) P^T||`` in the
operator 2-norm over signals (for a bank: from ``N x F_in`` to ``N x F_out``
signals, Frobenius norm on both). Every formula is in docs/theory.md,
sections 3-6.
"""

from __future__ import annotations

import dataclasses
from math import comb

import numpy as np

from ._errors import FilterError, StablefiltError
from ._exact import UNIT, kernel_transform, power_map, product_error, response_map
from ._filters import Basis, basis_values, check_taps, response_derivative, run_filter
from ._graph import ShiftOperator
from ._interval import SpectralInterval, spectral_interval
from ._kernel import ABS_ALLOW, REL_ALLOW

#: Grid for the rigorous grid-plus-Markov suprema (docs/theory.md section 6).
SUP_GRID = 4097
#: Largest graph for which eigenvectors are used to build worst-pair
#: perturbations for the ``lower`` figure.
LOWER_EIG_LIMIT = 600
#: Largest ``N * filters`` for the direct ``N x N`` PSD split of ``Gamma``.
DIRECT_SPLIT_LIMIT = 20000

MODEL = "relative: P^T S_hat P = S + E S + S E, E symmetric, ||E||_2 <= eps, P a permutation"
NORM = "operator 2-norm over signals (Frobenius over N x F for a bank)"


def _check_eps(eps) -> float:
    """``eps`` as a float; a negative or non-finite size would give a negative
    or NaN figure called certified."""
    try:
        e = float(eps)
    except (TypeError, ValueError):
        raise StablefiltError(f"eps must be a finite number >= 0; got {eps!r}.") from None
    if not np.isfinite(e) or e < 0:
        raise StablefiltError(f"eps must be a finite number >= 0; got {eps!r}.")
    return e


def _allow(x, scale=1.0):
    return np.asarray(x) * (1 + REL_ALLOW) + ABS_ALLOW * scale


def _check_interval(interval) -> tuple[float, float]:
    """``(a, b)`` as floats, both finite with ``a <= b``."""
    try:
        iv = np.asarray(interval, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        iv = np.zeros(0)
    if iv.shape != (2,) or not np.all(np.isfinite(iv)) or iv[0] > iv[1]:
        raise FilterError(f"the spectral interval must be two finite numbers a <= b; got {interval!r}.")
    return float(iv[0]), float(iv[1])


def usable_interval(interval) -> tuple[float, float]:
    """``interval = (a, b)``, checked, and widened around a single point so a
    Chebyshev basis of it exists (a superset stays valid)."""
    a, b = _check_interval(interval)
    if a < b:
        return float(a), float(b)
    w = 1e-6 * max(1.0, abs(a))
    return float(a) - w, float(b) + w


# ---------------------------------------------------------------------------
# Series on an interval, vectorised over the filters of a bank.


def _coefficients(k, basis, a, b, what, cols):
    """Chebyshev-on-``[a, b]`` coefficients ``(F, deg + 1)`` of ``h``,
    ``h'`` or ``lam h'`` (``what``) for each column of taps, and a bound on
    their float64 error (exact change of basis: :mod:`stablefilt._exact`)."""
    m = response_map(k, basis, float(a), float(b), what)
    return (m @ cols).T, product_error(m, cols).T


def sup_grid_markov(coef: np.ndarray, err=None, grid: int = SUP_GRID) -> np.ndarray:
    """Rigorous ``sup_{[a, b]} |q|`` for Chebyshev coefficients ``coef``
    (last axis) of the interval: ``max_grid |q| + (h/2) sup |q'|`` with
    ``sup |q'| <= (2/(b-a)) sum_k k^2 |c_k|`` (Markov's inequality per term;
    docs/theory.md section 6), i.e. ``+ sum_k k^2 |c_k| / (grid - 1)``, plus a
    round-off allowance. ``err`` (same shape as ``coef``) bounds how far the
    given coefficients may be from the exact ones; since ``|T_k| <= 1`` on the
    interval, ``sum_k err_k`` is added."""
    coef = np.asarray(coef, dtype=np.float64)
    d = coef.shape[-1]
    t = np.linspace(-1.0, 1.0, grid)
    v = np.polynomial.chebyshev.chebvander(t, d - 1)  # (G, d)
    vals = np.abs(np.tensordot(coef, v, axes=([-1], [1])))  # (..., G)
    k2 = np.arange(d) ** 2
    markov = np.sum(k2 * np.abs(coef), axis=-1) / (grid - 1)
    l1 = np.sum(np.abs(coef), axis=-1)
    extra = 0.0 if err is None else np.sum(err, axis=-1)
    return _allow(vals.max(axis=-1) + markov + extra, l1)


def _flat(taps):
    """Taps ``(K, F...)`` as ``(K, F)`` columns and the bank shape."""
    taps = np.asarray(taps, dtype=np.float64)
    return taps.reshape(taps.shape[0], -1), taps.shape[1:]


# ---------------------------------------------------------------------------
# Constants.


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


def _product_tensor(k: int) -> np.ndarray:
    """``P[a, b, n]``: ``T_a T_b = sum_n P[a, b, n] T_n``."""
    p = np.zeros((k, k, max(2 * k - 1, 1)))
    for a in range(k):
        for b in range(k):
            p[a, b, a + b] += 0.5
            p[a, b, abs(a - b)] += 0.5
    return p


def _kernels(cols, basis, splits):
    """Per split, ``(M, dM)``: the kernel matrices ``(F, K, K)`` of each
    column of taps (docs/theory.md section 4; exact change of basis) and an
    entrywise bound ``dM`` on their float64 error."""
    k = cols.shape[0]
    out = []
    for split in splits:
        t = kernel_transform(k, basis, split)
        m = np.einsum("abj,jf->fab", t, cols)
        dm = 2.0 * (k + 2) * UNIT * np.einsum("abj,jf->fab", np.abs(t), np.abs(cols))
        out.append((m, dm))
    return out


def _psd_parts(m):
    w, v = np.linalg.eigh(0.5 * (m + np.swapaxes(m, -1, -2)))
    plus = np.einsum("...ai,...i,...bi->...ab", v, np.maximum(w, 0), v)
    minus = np.einsum("...ai,...i,...bi->...ab", v, np.maximum(-w, 0), v)
    return plus, minus


def _abs_kernel(m, dm):
    """``|M| = M_+ + M_-`` ``(F, K, K)`` and, per filter, a bound on
    ``|| |M| - |M_exact| ||_2``: ``sqrt(2) ||dM||_F`` (the matrix absolute
    value is sqrt(2)-Lipschitz in the Frobenius norm: Araki and Yamagami,
    Comm. Math. Phys. 81, 1981) plus ``4 K^2 u ||M||_F`` for the
    eigendecomposition (backward stable; common practice)."""
    plus, minus = _psd_parts(m)
    k = m.shape[-1]
    err = np.sqrt(2.0) * np.linalg.norm(dm, axis=(1, 2)) + 4.0 * k * k * UNIT * np.linalg.norm(m, axis=(1, 2))
    return plus + minus, err


def eigenvalue_slack(lam) -> float:
    """How far computed eigenvalues of a symmetric matrix may be from the true
    ones: ``8 N u max |lam|`` (a backward-stable eigensolver returns the exact
    eigenvalues of ``S + dS`` with ``||dS||_2`` a modest multiple of
    ``N u ||S||_2``, and Weyl's inequality moves each by at most ``||dS||_2``;
    the constant 8 is common practice)."""
    lam = np.asarray(lam, dtype=np.float64)
    return 8.0 * lam.size * UNIT * float(np.max(np.abs(lam))) if lam.size else 0.0


def _basis_sizes(k, split, lam, slack):
    """Bounds ``(P, D)`` on ``|p_a|`` and ``|p_a'|`` within ``slack`` of the
    points ``lam``: Chebyshev of ``[a, b]``: ``|T_a'| <= a^2`` in the mapped
    variable (Markov), so ``D_a = 2 a^2 / (b - a)`` and ``P_a = 1`` inside;
    monomials: ``P_a = R^a``, ``D_a = a R^(a-1)``, ``R = max |lam| + slack``."""
    ka = np.arange(k, dtype=np.float64)
    if split.kind == "monomial":
        r = float(np.max(np.abs(lam))) + slack
        return r**ka, ka * r ** np.maximum(ka - 1, 0)
    lo, hi = split.interval
    d = 2.0 * ka**2 / (hi - lo)
    out = max(0.0, float(np.max(lam)) + slack - hi, lo - float(np.min(lam)) + slack)
    return 1.0 + d * out, d


def _quad_upper(phi, absm, err, split=None, lam=None, slack=0.0):
    """Upper bounds ``(F, N)`` on ``phi_i^T |M_exact| phi_i`` at points with
    basis values ``phi`` ``(N, K)``: the float value plus ``err ||phi_i||^2``,
    round-off in the sum (``2 K u |phi|^T |A| |phi|``) and in ``phi`` itself
    (``2 K^2 u ||A||_F ||phi_i||^2``), and, for points ``lam`` known only to
    within ``slack`` (computed eigenvalues), ``slack sup |q'| <= slack 2 D^T |A| P``."""
    k = phi.shape[-1]
    q = np.einsum("ia,fab,ib->fi", phi, absm, phi, optimize=True)
    aq = np.einsum("ia,fab,ib->fi", np.abs(phi), np.abs(absm), np.abs(phi), optimize=True)
    n2 = np.sum(phi**2, axis=-1)
    fro = np.linalg.norm(absm, axis=(1, 2))
    out = np.maximum(q, 0) + (err + 2.0 * k * k * UNIT * fro)[:, None] * n2[None] + 2.0 * k * UNIT * aq
    if slack > 0:
        pa, da = _basis_sizes(k, split, lam, slack)
        move = slack * 2.0 * np.einsum("a,fab,b->f", da, np.abs(absm), pa) + (err + 2.0 * k * k * UNIT * fro) * (
            2.0 * slack * float(np.linalg.norm(pa) * np.linalg.norm(da)))
        out = out + move[:, None]
    return out


def _bank_sup(cols, shape, basis, a, b, grid=SUP_GRID):
    """Rigorous ``sup_[a,b] ||H(lam)||_2`` for a bank: the spectral norm of
    the matrix of per-filter grid values, plus the per-filter Markov terms
    bound it (``||A + D||_2 <= ||A||_2 + ||D||_F``)."""
    k = cols.shape[0]
    coef, cerr = _coefficients(k, basis, a, b, "h", cols)  # (F, K)
    if len(shape) != 2:
        return float(sup_grid_markov(coef, err=cerr).max())
    t = np.linspace(-1.0, 1.0, grid)
    v = np.polynomial.chebyshev.chebvander(t, k - 1)
    vals = (v @ coef.T).reshape(grid, *shape)
    top = float(np.max(np.linalg.norm(vals, ord=2, axis=(1, 2))))
    k2 = np.arange(k) ** 2
    markov = np.sum(k2 * np.abs(coef), axis=-1) / (grid - 1) + np.sum(cerr, axis=-1)
    l1 = np.sum(np.abs(coef), axis=-1)
    return float(_allow(top + np.linalg.norm(markov), np.linalg.norm(l1)))


def gain_constants(taps, basis: Basis, interval) -> tuple[float, np.ndarray]:
    """Rigorous ``(sup ||H(lam)||_2, sup |h'| per filter)`` over
    ``interval``: the two constants the model composition needs over the
    widened interval holding ``spec(S_hat)``, without the kernel work of
    :func:`filter_constants`."""
    taps = check_taps(taps)
    cols, shape = _flat(taps)
    k = cols.shape[0]
    a, b = usable_interval(interval)
    sup_d = sup_grid_markov(*_coefficients(k, basis, a, b, "deriv", cols))
    sup_d = sup_d.reshape(shape) if shape else float(sup_d[0])
    return _bank_sup(cols, shape, basis, a, b), sup_d


def _direct_split(lam, k, split, m, dm, slack=0.0):
    """``max_i (|Gamma|)_ii`` per filter, ``|Gamma|`` the matrix absolute
    value of ``Gamma = Phi M Phi^T`` at the eigenvalues (the Schur argument of
    docs/theory.md section 5 item 2 applied to the ``N x N`` kernel itself),
    with ``Phi`` the Chebyshev basis of the interval (values in [-1, 1]; the
    monomial basis cancels badly away from 0), plus a bound on the float64
    error: ``||Gamma - Gamma_float||_F`` (``dM``, the sums, and ``Phi``) and
    ``8 N u ||Gamma||_F`` for the eigendecomposition. Since
    ``||E o D||_2 <= ||E||_2 ||D||_2`` for Hadamard products (Horn & Johnson,
    "Topics in Matrix Analysis", 1991, ch. 5; from memory), an error ``D``
    in ``Gamma`` moves the bound by at most ``||D||_2``. Eigenvalues known
    to within ``slack`` move each entry by at most ``2 slack D^T |M| P``
    (:func:`_basis_sizes`)."""
    phi = basis_values(lam, k, split)  # (N, K)
    n = lam.size
    g = np.einsum("ia,fab,jb->fij", phi, m, phi, optimize=True)
    ag = np.einsum("ia,fab,jb->fij", np.abs(phi), np.abs(m), np.abs(phi), optimize=True)
    gp, gm = _psd_parts(g)
    direct = np.diagonal(gp + gm, axis1=1, axis2=2).max(axis=1)
    n2 = float(np.sum(phi**2))
    scale_m = np.linalg.norm(dm, axis=(1, 2)) + 2.0 * k * k * UNIT * np.linalg.norm(m, axis=(1, 2))
    err = scale_m * n2 + 2.0 * k * UNIT * np.linalg.norm(ag, axis=(1, 2)) + 8.0 * n * UNIT * np.linalg.norm(g, axis=(1, 2))
    if slack > 0:
        pa, da = _basis_sizes(k, split, lam, slack)
        err = err + n * slack * 2.0 * np.einsum("a,fab,b->f", da, np.abs(m), pa)
    return _allow(np.maximum(direct, 0) + err, np.abs(g).max(axis=(1, 2)))


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
    cols, shape = _flat(taps)
    k = cols.shape[0]
    a, b = usable_interval(interval)
    sup_h = sup_grid_markov(*_coefficients(k, basis, a, b, "h", cols))
    sup_d = sup_grid_markov(*_coefficients(k, basis, a, b, "deriv", cols))
    sup_c = sup_grid_markov(*_coefficients(k, basis, a, b, "lam_deriv", cols))

    # The kernel bound (docs/theory.md section 5 item 2) in two splits, the
    # Chebyshev basis of [a, b] and monomials, keeping the smaller. Every
    # float64 step carries an error bound (docs/theory.md section 6): the
    # monomial split of a filter on an interval far from 0 cancels badly and
    # its allowance then makes it lose the minimum instead of being trusted.
    splits = [Basis("chebyshev", (a, b)), Basis()]
    kernels = _kernels(cols, basis, splits)
    pk = _product_tensor(k)
    big_r = max(abs(a), abs(b))
    kappa = None
    kappa_spec = None
    aligned = None
    lam = None if eigenvalues is None else np.asarray(eigenvalues, dtype=np.float64)
    slack = 0.0 if lam is None else eigenvalue_slack(lam)
    for split, (m, dm) in zip(splits, kernels):
        absm, aerr = _abs_kernel(m, dm)  # Gamma_ij = <x_i, y_j> with ||x_i||^2 = phi^T |M| phi
        fro = np.linalg.norm(absm, axis=(1, 2))
        if split.kind == "chebyshev":
            # phi^T |M| phi as a Chebyshev series of [a, b]; ||phi||^2 <= K there.
            coef = np.einsum("fab,abn->fn", absm, pk)
            cerr = 2.0 * k * k * UNIT * np.einsum("fab,abn->fn", np.abs(absm), pk)
            kap = sup_grid_markov(coef, err=cerr) + (aerr + 2.0 * k * k * UNIT * fro) * k
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
            kap = sup_grid_markov(coef, err=cerr) + (aerr + 2.0 * k * k * UNIT * fro) * phi2
        kappa = kap if kappa is None else np.minimum(kappa, kap)
        if lam is not None:
            ks = _quad_upper(basis_values(lam, k, split), absm, aerr, split, lam, slack).max(axis=1)
            ks = _allow(ks, np.abs(m).sum(axis=(1, 2)))
            kappa_spec = ks if kappa_spec is None else np.minimum(kappa_spec, ks)
    if lam is not None:
        n, f = lam.size, cols.shape[1]
        if n * f <= DIRECT_SPLIT_LIMIT and n <= 400:
            kappa_spec = np.minimum(kappa_spec, _direct_split(lam, k, splits[0], *kernels[0], slack))
        d = response_derivative(cols, lam, basis)  # (N, F)
        aligned = _allow(2 * np.max(np.abs(lam[:, None] * d), axis=0), 1.0)
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
    pair = np.minimum(_allow(pair, np.abs(m).sum(axis=(1, 2))), kappa) * 0.5

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
        bank_sup=_bank_sup(cols, shape, basis, a, b),
    )


# ---------------------------------------------------------------------------
# Second-order remainder.


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
    eps = _check_eps(eps)
    cols, shape = _flat(taps)
    k = cols.shape[0]
    a, b = _check_interval(interval)
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
    out = _allow(np.minimum(origin, centred), scale)
    return out.reshape(shape) if shape else float(out[0])


# ---------------------------------------------------------------------------
# Realised changes (the lower figure).


def _bank_apply(matvec, taps, x, basis, transpose=False):
    t = np.swapaxes(taps, 1, 2) if (transpose and taps.ndim == 3) else taps
    return run_filter(matvec, t, x, basis)


def realised_change(mv_a, mv_b, taps, basis: Basis, n: int, *, start=None, iters: int = 40, seed: int = 0) -> float:
    """A realised lower bound on ``||H_a - H_b||`` (operator 2-norm) by power
    iteration on ``D^T D`` with ``D = H_a - H_b``: every iterate gives
    ``||D x|| / ||x||``, the change of an actual signal ``x``.

    ``mv_a``, ``mv_b``: products with the two shift operators.
    """
    taps = np.asarray(taps, dtype=np.float64)
    fin = taps.shape[1] if taps.ndim == 3 else 1
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, fin)) if start is None else np.asarray(start, dtype=np.float64).reshape(n, fin)
    if taps.ndim == 1:
        x = x[:, 0]

    def d(z, tr=False):
        return _bank_apply(mv_a, taps, z, basis, tr) - _bank_apply(mv_b, taps, z, basis, tr)

    best = 0.0
    for _ in range(iters):
        nx = np.linalg.norm(x)
        if nx == 0 or not np.isfinite(nx):
            break
        x = x / nx
        y = d(x)
        best = max(best, float(np.linalg.norm(y)))
        x = d(y, True)
    return best


def relative_matvec(s_mv, e_mv):
    """Product with ``S + E S + S E`` given products with ``S`` and ``E``."""
    return lambda x: s_mv(x) + e_mv(s_mv(x)) + s_mv(e_mv(x))


def _worst_pairs(lam, vecs, taps, basis, count=3):
    """Eigenpair indices ``(i, j)`` with the largest first-order change
    ``|Gamma_ij|`` (Frobenius over the filters of a bank)."""
    cols, _ = _flat(taps)
    k = cols.shape[0]
    lo, hi = float(np.min(lam)), float(np.max(lam))
    split = Basis("chebyshev", (lo, hi)) if hi > lo else Basis()  # monomials cancel away from 0
    m = np.einsum("abj,jf->fab", kernel_transform(k, basis, split), cols)
    phi = basis_values(lam, k, split)
    g = np.einsum("ia,fab,jb->ij", phi, m, phi) if cols.shape[1] == 1 else np.sqrt(
        np.einsum("fij->ij", np.einsum("ia,fab,jb->fij", phi, m, phi) ** 2))
    g = np.abs(g)
    flat = np.argsort(g, axis=None)[::-1]
    out = []
    for idx in flat:
        i, j = divmod(int(idx), g.shape[0])
        if (j, i) not in out:
            out.append((i, j))
        if len(out) >= count:
            break
    return out


def lower_change(op: ShiftOperator, taps, basis: Basis, eps: float, *, eig=None, iters: int = 40) -> tuple[float, str]:
    """The largest change actually realised by perturbations built here:
    ``E = +-eps I`` (scaling) and, when eigenvectors are at hand,
    ``E = +-eps (v_i v_j^T + v_j v_i^T)`` (or ``+-eps v_i v_i^T``) for the
    pairs with the largest ``|Gamma_ij|`` (docs/theory.md section 5 item 3).

    Returns ``(value, description of the perturbation that attained it)``.
    """
    s = op.matrix
    n = s.shape[0]

    def s_mv(x):
        return s @ x

    best, how = 0.0, "none"
    for sign in (1.0, -1.0):
        e = sign * eps
        v = realised_change(relative_matvec(s_mv, lambda x, e=e: e * x), s_mv, taps, basis, n, iters=iters)
        if v > best:
            best, how = v, f"scaling E = {sign * eps:+g} I"
    if eig is not None:
        lam, vecs = eig
        for i, j in _worst_pairs(lam, vecs, taps, basis):
            vi, vj = vecs[:, i], vecs[:, j]
            for sign in (1.0, -1.0):
                e = sign * eps
                if i == j:
                    def e_mv(x, vi=vi, e=e):
                        return e * np.multiply.outer(vi, vi @ x)
                else:
                    def e_mv(x, vi=vi, vj=vj, e=e):
                        return e * (np.multiply.outer(vi, vj @ x) + np.multiply.outer(vj, vi @ x))
                fin = taps.shape[1] if np.ndim(taps) == 3 else 1
                start = np.repeat(vj[:, None], fin, axis=1) + 1e-3 * np.repeat(vi[:, None], fin, axis=1)
                v = realised_change(relative_matvec(s_mv, e_mv), s_mv, taps, basis, n, start=start, iters=iters)
                if v > best:
                    kind = f"v_{i} v_{i}^T" if i == j else f"(v_{i} v_{j}^T + v_{j} v_{i}^T)"
                    best, how = v, f"E = {sign * eps:+g} {kind}"
    return best, how


# ---------------------------------------------------------------------------
# The certificate.


@dataclasses.dataclass(frozen=True)
class EpsBound:
    """Bounds at one ``eps``. ``certified = first_order + remainder`` is
    rigorous; ``published`` and ``aligned`` are first-order figures (no
    remainder); ``lower`` is a change actually realised."""

    eps: float
    certified: float
    first_order: float
    remainder: float
    published: float
    aligned: float
    lower: float | None
    lower_perturbation: str | None = None

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


@dataclasses.dataclass(frozen=True)
class Certificate:
    """A filter's certificate on one graph, with its assumptions."""

    nodes: int
    interval: SpectralInterval
    basis: Basis
    delta: float
    constants: FilterConstants
    bounds: tuple[EpsBound, ...]
    assumptions: dict

    def as_dict(self) -> dict:
        return {
            "nodes": self.nodes,
            "interval": [self.interval.lower, self.interval.upper],
            "interval_method": self.interval.method,
            "basis": {"kind": self.basis.kind, "interval": None if self.basis.interval is None else list(self.basis.interval)},
            "constants": self.constants.as_dict(),
            "bounds": [b.as_dict() for b in self.bounds],
            "assumptions": self.assumptions,
        }


def combine(per_filter) -> float:
    """Bank bound from per-filter bounds ``beta`` (``F_in x F_out``): the
    spectral norm ``||beta||_2`` (docs/theory.md section 5 item 6); a single
    filter's bound is returned as is."""
    b = np.asarray(per_filter, dtype=np.float64)
    if b.ndim == 0:
        return float(b)
    return float(np.linalg.norm(b, ord=2)) * (1 + REL_ALLOW)


def filter_bounds(taps, basis: Basis, interval, eps: float, constants: FilterConstants | None = None,
                  eigenvalues=None) -> tuple[np.ndarray, np.ndarray]:
    """Per-filter ``(first_order, remainder)`` bounds at ``eps``; their sum
    is the per-filter certificate. Uses the tighter of the kernel bound over
    the interval and over the eigenvalues (when given)."""
    if constants is None:
        constants = filter_constants(taps, basis, interval, eigenvalues)
    kap = np.asarray(constants.kernel)
    if constants.kernel_spectrum is not None:
        kap = np.minimum(kap, np.asarray(constants.kernel_spectrum))
    first = _allow(kap * eps, 0.0)
    rem = np.asarray(remainder(taps, basis, interval, eps))
    return first, rem


def certify_filter(op: ShiftOperator, taps, basis: Basis, eps_list, *, delta: float = 8.0,
                   interval: SpectralInterval | None = None, use_eigenvalues: bool | None = None,
                   lower: bool = True) -> Certificate:
    """Certificate of a filter or bank on one graph for each ``eps``.

    Args:
      op: the shift operator ``S``.
      taps: ``(K,)`` or ``(K, F_in, F_out)``.
      basis: the filter's basis.
      eps_list: sizes of the relative perturbation, each ``>= 0``.
      delta: eigenvector misalignment in the published bound; 8 is the
        largest possible value (docs/theory.md section 2).
      interval: a certified spectral interval; computed when omitted.
      use_eigenvalues: also bound over the graph's eigenvalues (default:
        when the interval computed them).
      lower: compute the realised ``lower`` figure.

    Returns:
      :class:`Certificate`.
    """
    taps = check_taps(taps).astype(np.float64)
    eps_list = [_check_eps(e) for e in eps_list]
    if interval is None:
        interval = spectral_interval(op)
    lam = interval.eigenvalues if (use_eigenvalues or use_eigenvalues is None) else None
    iv = (interval.lower, interval.upper)
    consts = filter_constants(taps, basis, iv, lam)
    n = op.nodes
    eig = None
    if lower and lam is not None and n <= LOWER_EIG_LIMIT:
        w, v = np.linalg.eigh(op.dense())
        eig = (w, v)
    bounds = []
    for eps in eps_list:
        eps = float(eps)
        first, rem = filter_bounds(taps, basis, iv, eps, consts, lam)
        fo, rm = combine(first), combine(rem)
        published = combine(2 * np.asarray(consts.integral_lipschitz) * (1 + delta * np.sqrt(n)) * eps)
        al = consts.aligned_spectrum if consts.aligned_spectrum is not None else 2 * np.asarray(consts.integral_lipschitz)
        aligned = combine(np.asarray(al) * eps)
        low, how = (lower_change(op, taps, basis, eps, eig=eig) if lower else (None, None))
        bounds.append(EpsBound(eps, fo + rm, fo, rm, published, aligned, low, how))
    assumptions = {
        "perturbation_model": MODEL,
        "norm": NORM,
        "spectral_interval": [float(interval.lower), float(interval.upper)],
        "interval_method": {"lower": interval.lower_method, "upper": interval.upper_method},
        "first_order": "kernel (Schur) bound: PSD split of the Gamma kernel in Chebyshev and monomial bases, "
                       + ("min over the interval and the graph's eigenvalues" if lam is not None else "over the interval"),
        "remainder": "non-asymptotic second-order remainder, min of origin and centred forms (theory s.5 item 5)",
        "certified": "first_order + remainder, with a round-off allowance; bank: spectral norm of per-filter bounds",
        "published": f"2 C (1 + delta sqrt(N)) eps with delta = {delta:g}, first order only "
                     "(Gama, Bruna, Ribeiro 2020, Thm 2; exact form from memory)",
        "aligned": "2 max |lam h'(lam)| eps, first order, for E commuting with S",
        "lower": "largest change realised by constructed perturbations (power iteration on the change)",
        "suprema": consts.method,
    }
    return Certificate(n, interval, basis, float(delta), consts, tuple(bounds), assumptions)
