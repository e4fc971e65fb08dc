"""Float64 polynomial tools behind the certificates: filters as numpy
polynomial series, the first-order kernel ``Gamma`` in a chosen basis, and
rigorous suprema of polynomials on an interval.

Derived: see docs/theory.md, sections 3, 4 and 6.
"""

from __future__ import annotations

import numpy as np
from numpy.polynomial import Chebyshev, Polynomial

from ._filters import Basis

#: Relative and absolute allowance added to every rigorous supremum, far above
#: the float64 round-off in evaluating a short series (common practice).
REL_ALLOW = 1e-9
ABS_ALLOW = 1e-12


def as_series(taps_1d, basis: Basis):
    """The filter ``h`` as a numpy series: ``Polynomial`` (monomial basis) or
    ``Chebyshev`` with ``domain=basis.interval`` (numpy maps the domain onto
    ``[-1, 1]`` exactly as :class:`Basis` does)."""
    c = np.asarray(taps_1d, dtype=np.float64)
    if basis.kind == "monomial":
        return Polynomial(c)
    return Chebyshev(c, domain=list(basis.interval))


def on_interval(q, a: float, b: float) -> Chebyshev:
    """``q`` as a Chebyshev series of ``[a, b]`` (for ``a < b``)."""
    return q.convert(kind=Chebyshev, domain=[a, b])


def monomial_coefficients(q) -> np.ndarray:
    """Coefficients of ``q`` in powers of ``lam``."""
    return q.convert(kind=Polynomial, domain=[-1, 1], window=[-1, 1]).coef


def shifted_coefficients(q, m: float) -> np.ndarray:
    """Coefficients ``g_k`` of ``q`` in powers of ``(lam - m)``."""
    return q.convert(kind=Polynomial, domain=[m - 1, m + 1], window=[-1, 1]).coef


def sup_abs(q, a: float, b: float) -> float:
    """Rigorous ``sup_{[a, b]} |q|`` for a numpy series ``q``.

    Exact maximisation (docs/theory.md section 6): the maximum of ``|q|`` is at
    an end or a root of ``q'``; roots come from ``numpy``'s companion matrix,
    near-real ones kept. Evaluations on a 257-point grid are added as
    candidates, and the result is raised by ``REL_ALLOW`` relative and
    ``ABS_ALLOW * sum |c_k|`` absolute (``c`` the Chebyshev coefficients on
    ``[a, b]``, whose sum bounds ``|q|`` there) to cover round-off.
    """
    if not a <= b:
        raise ValueError("need a <= b")
    if a == b:
        v = abs(float(q(a)))
        return v * (1 + REL_ALLOW) + ABS_ALLOW * max(v, 1.0)
    c = on_interval(q, a, b)
    c = c.trim(tol=0) if len(c.coef) > 1 else c
    pts = [a, b]
    if len(c.coef) > 2:
        r = c.deriv().roots()
        span = b - a
        r = r[np.abs(r.imag) <= 1e-7 * span]
        r = np.clip(r.real, a, b)
        pts.extend(r.tolist())
    pts.extend(np.linspace(a, b, 257).tolist())
    v = float(np.max(np.abs(c(np.asarray(pts)))))
    return v * (1 + REL_ALLOW) + ABS_ALLOW * float(np.sum(np.abs(c.coef)))


def gamma(q, lam, mu) -> np.ndarray:
    """``Gamma(lam, mu) = (lam + mu)(q(lam) - q(mu))/(lam - mu)``, and
    ``2 lam q'(lam)`` where ``lam == mu``; broadcasts."""
    lam, mu = np.broadcast_arrays(np.asarray(lam, float), np.asarray(mu, float))
    dq = q.deriv()
    same = lam == mu
    diff = np.where(same, 1.0, lam - mu)
    out = np.where(same, 2 * lam * dq(lam), (lam + mu) * (q(lam) - q(mu)) / diff)
    return out


def kernel_matrix(q, k: int, split: Basis) -> np.ndarray:
    """``M`` (``k x k``, symmetric) with ``Gamma(lam, mu) = phi(lam)^T M phi(mu)``.

    ``phi`` is the basis ``split``. With ``q(lam) = sum_k d_k t^k`` in the
    variable ``t = (lam - m)/r`` of the split (``m = 0, r = 1`` for
    monomials; the midpoint and half-width of the interval for Chebyshev),
    ``Gamma = (2m/r + t + s) sum_k d_k (t^k - s^k)/(t - s)``, so in powers of
    ``t`` and ``s``: ``N_ab = d_{a+b} (2 - [a = 0] - [b = 0]) + (2m/r) d_{a+b+1}``
    (derived: docs/theory.md section 4; the monomial case is the formula
    there). Chebyshev: ``M = C^T N C`` with ``t^a = sum_j C_aj T_j(t)``. No
    divided difference is formed, so close points lose nothing.
    """
    if split.kind == "monomial":
        m, r = 0.0, 1.0
        d = monomial_coefficients(q)
    else:
        lo, hi = split.interval
        m, r = 0.5 * (lo + hi), 0.5 * (hi - lo)
        d = q.convert(kind=Polynomial, domain=[lo, hi], window=[-1, 1]).coef
    dd = np.zeros(2 * k + 1)
    dd[: min(len(d), 2 * k + 1)] = d[: 2 * k + 1]
    a = np.arange(k)
    s = a[:, None] + a[None, :]
    w = 2.0 - (a[:, None] == 0) - (a[None, :] == 0)
    n = np.where(s <= k - 1, dd[s] * w, 0.0)
    if m != 0.0:
        n = n + np.where(s + 1 <= k - 1, (2.0 * m / r) * dd[s + 1], 0.0)
    if split.kind == "monomial":
        return n
    c = np.zeros((k, k))
    for i in range(k):
        e = np.zeros(i + 1)
        e[i] = 1.0
        c[i, : i + 1] = np.polynomial.chebyshev.poly2cheb(e)
    out = c.T @ n @ c
    return 0.5 * (out + out.T)


def psd_split(m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(M_plus, M_minus)``, both PSD, with ``M = M_plus - M_minus``."""
    w, v = np.linalg.eigh(0.5 * (m + m.T))
    plus = (v * np.maximum(w, 0)) @ v.T
    minus = (v * np.maximum(-w, 0)) @ v.T
    return plus, minus


def quadratic_series(m: np.ndarray, split: Basis):
    """The series ``phi(lam)^T M phi(lam)`` (degree ``2k - 2``)."""
    k = m.shape[0]
    if split.kind == "monomial":
        c = np.zeros(max(2 * k - 1, 1))
        for a in range(k):
            for b in range(k):
                c[a + b] += m[a, b]
        return Polynomial(c)
    out = Chebyshev([0.0], domain=list(split.interval))
    for a in range(k):
        ta = Chebyshev.basis(a, domain=list(split.interval))
        row = Chebyshev(m[a], domain=list(split.interval))
        out = out + ta * row
    return out
