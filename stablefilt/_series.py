"""Chebyshev series on an interval and their rigorous suprema, and the
round-off allowance every float64 certificate adds (docs/theory.md,
sections 4 and 6). The exact changes of basis behind the series are in
:mod:`stablefilt._exact`.
"""

from __future__ import annotations

import numpy as np
from numpy.polynomial import Chebyshev, Polynomial

from ._exact import product_error, response_map
from ._filters import Basis

#: Relative and absolute allowance added to every rigorous supremum, far above
#: the float64 round-off in evaluating a short series (common practice).
REL_ALLOW = 1e-9
ABS_ALLOW = 1e-12


def with_allowance(x, scale=1.0):
    """``x (1 + REL_ALLOW) + ABS_ALLOW scale``: a computed upper bound ``x``
    made safe against the round-off in computing it (``scale``: the size of
    the terms summed, for the absolute part)."""
    return np.asarray(x) * (1 + REL_ALLOW) + ABS_ALLOW * scale


def as_series(taps_1d, basis: Basis):
    """The filter ``h`` as a numpy series: ``Polynomial`` (monomial basis) or
    ``Chebyshev`` with ``domain=basis.interval`` (numpy maps the domain onto
    ``[-1, 1]`` exactly as :class:`Basis` does)."""
    c = np.asarray(taps_1d, dtype=np.float64)
    if basis.kind == "monomial":
        return Polynomial(c)
    return Chebyshev(c, domain=list(basis.interval))


#: Grid for the rigorous grid-plus-Markov suprema (docs/theory.md section 6).
SUP_GRID = 4097

def response_coefficients(k, basis, a, b, what, cols):
    """Chebyshev-on-``[a, b]`` coefficients ``(F, deg + 1)`` of ``h``,
    ``h'`` or ``lam h'`` (``what``) for each column of taps, and a bound on
    their float64 error (exact change of basis: :mod:`stablefilt._exact`)."""
    m = response_map(k, basis, float(a), float(b), what)
    return (m @ cols).T, product_error(m, cols).T


def sup_chebyshev(coef: np.ndarray, err=None, grid: int = SUP_GRID) -> np.ndarray:
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
    return with_allowance(vals.max(axis=-1) + markov + extra, l1)


def flat_taps(taps):
    """Taps ``(K, F...)`` as ``(K, F)`` columns and the bank shape."""
    taps = np.asarray(taps, dtype=np.float64)
    return taps.reshape(taps.shape[0], -1), taps.shape[1:]
