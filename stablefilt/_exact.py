"""Exact (rational) change-of-basis matrices for the float64 certificates.

Converting a filter from its basis to another one (its Chebyshev basis on a
different interval, powers of ``lam`` or of ``lam - m``, the kernel matrix of
docs/theory.md section 4) can cancel badly in floating point: a Chebyshev
filter on a narrow interval far from 0 has huge monomial coefficients. Here the
linear maps taking taps to the coefficients we need are built with
``fractions.Fraction`` from the exact values of the float64 interval ends, then
rounded once to float64 (relative error at most ``2^-53`` per entry). The only
floating-point step left is the product ``map @ taps``, whose error is at most
``gamma_K |map| @ |taps|`` (Higham, "Accuracy and Stability of Numerical
Algorithms", 2nd ed., 2002, section 3.5), which :func:`product_error` returns.

Polynomials are lists of ``Fraction`` coefficients in powers of a variable.
"""

from __future__ import annotations

import functools
from fractions import Fraction

import numpy as np

from ._filters import Basis

#: Unit round-off of float64.
UNIT = 2.0**-53


def gamma(k: float) -> float:
    """``gamma_k = k u / (1 - k u)``, the bound on the relative error of
    ``k`` float64 operations in a row (Higham, "Accuracy and Stability of
    Numerical Algorithms", 2002, ch. 3)."""
    return k * UNIT / (1.0 - k * UNIT)


def _mul(p, q):
    out = [Fraction(0)] * (len(p) + len(q) - 1)
    for i, a in enumerate(p):
        if a:
            for j, b in enumerate(q):
                out[i + j] += a * b
    return out


def _add(p, q):
    n = max(len(p), len(q))
    return [(p[i] if i < len(p) else 0) + (q[i] if i < len(q) else 0) for i in range(n)]


def _scale(p, c):
    return [c * a for a in p]


def _affine_basis(k: int, kind: str, lin, off):
    """Basis functions ``p_j(lin * t + off)`` for ``j < k`` as polynomials in
    ``t`` (``kind`` ``monomial`` or ``chebyshev``, three-term recurrence)."""
    x = [off, lin]
    out = [[Fraction(1)]]
    if k > 1:
        out.append(x)
    for _ in range(2, k):
        nxt = _mul(x, out[-1])
        out.append(nxt if kind == "monomial" else _add(_scale(nxt, 2), _scale(out[-2], -1)))
    return out[:k]


def _basis_in(basis: Basis, k: int, mid: Fraction, half: Fraction):
    """The filter's basis functions as polynomials in ``t``, ``lam = mid + half t``."""
    if basis.kind == "monomial":
        return _affine_basis(k, "monomial", half, mid)
    lo, hi = (Fraction(float(v)) for v in basis.interval)
    # s = (2 lam - lo - hi) / (hi - lo) = (2 half / (hi - lo)) t + (2 mid - lo - hi) / (hi - lo)
    return _affine_basis(k, "chebyshev", 2 * half / (hi - lo), (2 * mid - lo - hi) / (hi - lo))


@functools.lru_cache(maxsize=256)
def _power_to_chebyshev(n: int):
    """``C`` with ``t^i = sum_j C[i][j] T_j(t)``, ``i, j < n``
    (``t T_0 = T_1``, ``t T_j = (T_{j+1} + T_{j-1}) / 2``)."""
    rows = [[Fraction(1)] + [Fraction(0)] * (n - 1)]
    for _ in range(1, n):
        prev, cur = rows[-1], [Fraction(0)] * n
        for j, c in enumerate(prev):
            if not c:
                continue
            if j == 0:
                if n > 1:
                    cur[1] += c
            else:
                if j + 1 < n:
                    cur[j + 1] += c / 2
                cur[j - 1] += c / 2
        rows.append(cur)
    return tuple(tuple(r) for r in rows)


def _to_chebyshev(p, n: int):
    """Chebyshev coefficients (length ``n``) of a polynomial in ``t`` of degree < n."""
    c = _power_to_chebyshev(n)
    out = [Fraction(0)] * n
    for i, a in enumerate(p):
        if a:
            for j in range(n):
                if c[i][j]:
                    out[j] += a * c[i][j]
    return out


def _derivative(p):
    return [i * a for i, a in enumerate(p)][1:] or [Fraction(0)]


def _to_float(rows) -> np.ndarray:
    out = np.array([[float(v) for v in r] for r in rows], dtype=np.float64)
    out.setflags(write=False)
    return out


def _ends(a: float, b: float):
    fa, fb = Fraction(float(a)), Fraction(float(b))
    return (fa + fb) / 2, (fb - fa) / 2


@functools.lru_cache(maxsize=512)
def response_map(k: int, basis: Basis, a: float, b: float, what: str) -> np.ndarray:
    """``(deg + 1, k)`` matrix taking taps to the Chebyshev-on-``[a, b]``
    coefficients of ``h`` (``what="h"``), ``h'`` (``"deriv"``) or
    ``lam h'`` (``"lam_deriv"``); ``a < b``."""
    mid, half = _ends(a, b)
    cols = []
    for p in _basis_in(basis, k, mid, half):  # p_j as a polynomial in t
        if what == "h":
            q = p
        else:
            q = _scale(_derivative(p), 1 / half)  # d/dlam = (1/half) d/dt
            if what == "lam_deriv":
                q = _mul([mid, half], q)
        cols.append(q)
    n = max(len(q) for q in cols)
    cheb = [_to_chebyshev(q + [Fraction(0)] * (n - len(q)), n) for q in cols]
    return _to_float([[cheb[j][i] for j in range(k)] for i in range(n)])


@functools.lru_cache(maxsize=512)
def power_map(k: int, basis: Basis, centre: float) -> np.ndarray:
    """``(k, k)`` matrix taking taps to coefficients in powers of ``(lam - centre)``."""
    cols = _basis_in(basis, k, Fraction(float(centre)), Fraction(1))
    return _to_float([[(cols[j][i] if i < len(cols[j]) else 0) for j in range(k)] for i in range(k)])


def _transform(k: int, basis: Basis, split: Basis, entries) -> np.ndarray:
    """``T`` of shape ``(k, k, k)`` with ``T[:, :, j]`` the kernel matrix of
    basis function ``j``: ``entries(d, mid, half)`` gives its ``k x k`` matrix
    ``N`` in powers of ``t`` and ``s`` (``lam = mid + half t``; ``d`` the
    function's coefficients in powers of ``t``), and a Chebyshev split takes
    ``C^T N C`` with ``t^a = sum_j C_aj T_j(t)``."""
    if split.kind == "monomial":
        mid, half = Fraction(0), Fraction(1)
    else:
        mid, half = _ends(*split.interval)
    conv = _power_to_chebyshev(k)
    out = np.zeros((k, k, k))
    for j, d in enumerate(_basis_in(basis, k, mid, half)):
        n = entries(d + [Fraction(0)] * (k + 1 - len(d)), mid, half)
        if split.kind != "monomial":
            n = _congruence(conv, n, k)
        out[:, :, j] = [[float(v) for v in row] for row in n]
    out.setflags(write=False)
    return out


@functools.lru_cache(maxsize=512)
def kernel_transform(k: int, basis: Basis, split: Basis) -> np.ndarray:
    """``T`` of shape ``(k, k, k)``: the kernel matrix ``M`` of a filter with
    taps ``c`` (in ``basis``), with ``Gamma(lam, mu) = phi(lam)^T M phi(mu)``
    and ``phi`` the basis ``split``, is ``T @ c`` (docs/theory.md section 4).

    With ``lam = m + r t`` (``m = 0, r = 1`` for a monomial split) and
    ``q(lam) = sum_n d_n t^n``: ``N_ab = d_{a+b} (2 - [a = 0] - [b = 0]) +
    (2 m / r) d_{a+b+1}`` in powers of ``t`` and ``s``; a Chebyshev split
    takes ``M = C^T N C`` with ``t^a = sum_j C_aj T_j(t)``.
    """
    def entries(d, mid, half):
        n = [[Fraction(0)] * k for _ in range(k)]
        for a in range(k):
            for b in range(k):
                if a + b <= k - 1:
                    n[a][b] = d[a + b] * (2 - (a == 0) - (b == 0))
                    if mid != 0 and a + b + 1 <= k - 1:
                        n[a][b] += (2 * mid / half) * d[a + b + 1]
        return n

    return _transform(k, basis, split, entries)


@functools.lru_cache(maxsize=512)
def divided_transform(k: int, basis: Basis, split: Basis) -> np.ndarray:
    """``T`` of shape ``(k, k, k)``: the kernel matrix ``M1`` of the divided
    difference ``h^[1](lam, mu) = (h(lam) - h(mu)) / (lam - mu) =
    phi(lam)^T M1 phi(mu)`` of a filter with taps ``c`` is ``T @ c``
    (docs/theory.md section 9.1).

    With ``lam = m + r t`` and ``h = sum_n d_n t^n``: ``(t^n - s^n) / (t - s) =
    sum_{a + b = n - 1} t^a s^b``, so ``N1_ab = d_{a+b+1} / r``; a Chebyshev
    split takes ``M1 = C^T N1 C``.
    """
    def entries(d, mid, half):
        return [[(d[a + b + 1] / half if a + b + 1 <= k - 1 else Fraction(0)) for b in range(k)] for a in range(k)]

    return _transform(k, basis, split, entries)


def _congruence(c, n, k):
    """``C^T N C`` for ``k x k`` nested lists, skipping zeros of ``C``."""
    nz = [[(j, v) for j, v in enumerate(row) if v] for row in c]  # row a of C: (j, C_aj)
    nc = [[Fraction(0)] * k for _ in range(k)]  # N C
    for a in range(k):
        for b in range(k):
            if n[a][b]:
                for j, v in nz[b]:
                    nc[a][j] += n[a][b] * v
    out = [[Fraction(0)] * k for _ in range(k)]
    for a in range(k):
        for i, v in nz[a]:
            for j in range(k):
                if nc[a][j]:
                    out[i][j] += v * nc[a][j]
    return out


def product_error(mat: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Bound on ``|fl(mat @ cols) - exact(mat) @ cols|`` where ``mat`` is the
    float64 rounding of an exact matrix: ``(K + 2) u |mat| @ |cols|`` (one
    rounding of each entry, then a length-``K`` dot product), doubled for
    safety."""
    k = np.shape(mat)[-1]
    return 2.0 * (k + 2) * UNIT * (np.abs(mat) @ np.abs(cols))


@functools.lru_cache(maxsize=128)
def second_transform(k: int, basis: Basis, split: Basis) -> np.ndarray:
    """``T`` of shape ``(k, k, k, k)``: the three-variable Chebyshev
    coefficients (on ``split``) of ``K(lam, mu, nu) = (lam + mu)(mu + nu)
    h^[2](lam, mu, nu)`` for each basis function of ``basis``:
    ``K_j = sum_{s,b,t} T[s, b, t, j] phi_s(lam) phi_b(mu) phi_t(nu)``
    (docs/theory.md 9.8).

    With ``lam = m + r t`` and ``h = sum_n d_n t^n``: ``h^[2] = r^-2 sum_n d_n
    sum_{a+b+c=n-2} t^a s^b u^c`` and ``lam + mu = 2 m + r (t + s)``; the
    product has degree at most ``k - 1`` in each variable, and each variable
    is taken to Chebyshev form with ``t^a = sum_j C_aj T_j(t)``.
    """
    if split.kind != "chebyshev":
        raise ValueError("the second-order kernel is built on a Chebyshev split")
    mid, half = _ends(*split.interval)
    conv = _power_to_chebyshev(k)
    out = np.zeros((k, k, k, k))
    for j, d in enumerate(_basis_in(basis, k, mid, half)):
        d = d + [Fraction(0)] * (k - len(d))
        poly = {}
        for n in range(2, k):
            if not d[n]:
                continue
            c = d[n] / (half * half)
            for a in range(n - 1):
                for b in range(n - 1 - a):
                    key = (a, b, n - 2 - a - b)
                    poly[key] = poly.get(key, Fraction(0)) + c
        # times (2m + r t + r s), then (2m + r s + r u)
        for factor in ((((0, 0, 0), 2 * mid), ((1, 0, 0), half), ((0, 1, 0), half)),
                       (((0, 0, 0), 2 * mid), ((0, 1, 0), half), ((0, 0, 1), half))):
            nxt = {}
            for (a, b, c), v in poly.items():
                for (da, db, dc), f in factor:
                    if f:
                        key = (a + da, b + db, c + dc)
                        nxt[key] = nxt.get(key, Fraction(0)) + v * f
            poly = nxt
        cheb = {}
        for (a, b, c), v in poly.items():
            for s_, ca in enumerate(conv[a]):
                if not ca:
                    continue
                for b_, cb in enumerate(conv[b]):
                    if not cb:
                        continue
                    for t_, cc in enumerate(conv[c]):
                        if cc:
                            key = (s_, b_, t_)
                            cheb[key] = cheb.get(key, Fraction(0)) + v * ca * cb * cc
        for (s_, b_, t_), v in cheb.items():
            out[s_, b_, t_, j] = float(v)
    out.setflags(write=False)
    return out
