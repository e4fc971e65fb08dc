"""Independent float64 references for the tests, built from numpy and
numpy.polynomial only (nothing from stablefilt), so a check never compares the
library with itself.

- Frequency responses: ``numpy.polynomial.polynomial.polyval`` / ``polyder`` and
  ``numpy.polynomial.chebyshev.chebval`` / ``chebder`` on the mapped variable
  ``t = (2 lam - a - b) / (b - a)``.
- Filters on a graph: ``H(S) = V h(Lambda) V^T`` from ``numpy.linalg.eigh``.
- First-order change: the Daleckii-Krein formula ``V ((V^T E V) o Gamma) V^T``
  with ``Gamma_ij = (lam_i + lam_j) h^[1](lam_i, lam_j)`` (Bhatia, "Matrix
  Analysis", Springer 1997, ch. V).
"""

from __future__ import annotations

import numpy as np
from numpy.polynomial import chebyshev as npcheb
from numpy.polynomial import polynomial as nppoly


def response(c, lam, kind="monomial", interval=None):
    """``h(lam)`` for 1-D taps ``c``; reference: polyval / chebval."""
    lam = np.asarray(lam, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    if kind == "monomial":
        return nppoly.polyval(lam, c)
    a, b = interval
    return npcheb.chebval((2 * lam - a - b) / (b - a), c)


def derivative(c, lam, kind="monomial", interval=None):
    """``h'(lam)``; reference: polyder / chebder (times ``dt/dlam``)."""
    lam = np.asarray(lam, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    if kind == "monomial":
        return nppoly.polyval(lam, nppoly.polyder(c)) if c.size > 1 else np.zeros_like(lam)
    a, b = interval
    dc = npcheb.chebder(c) if c.size > 1 else np.zeros(1)
    return (2.0 / (b - a)) * npcheb.chebval((2 * lam - a - b) / (b - a), dc)


def second_derivative(c, lam, kind="monomial", interval=None):
    """``h''(lam)``; reference: polyder / chebder with ``m=2``."""
    lam = np.asarray(lam, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    if c.size < 3:
        return np.zeros_like(lam)
    if kind == "monomial":
        return nppoly.polyval(lam, nppoly.polyder(c, 2))
    a, b = interval
    return (2.0 / (b - a)) ** 2 * npcheb.chebval((2 * lam - a - b) / (b - a), npcheb.chebder(c, 2))


def _per_filter(fn, taps, lam, kind, interval):
    """``fn`` applied filter by filter of a bank: shape ``lam.shape + taps.shape[1:]``."""
    taps = np.asarray(taps, dtype=np.float64)
    lam = np.asarray(lam, dtype=np.float64)
    out = np.empty(lam.shape + taps.shape[1:])
    for idx in np.ndindex(*taps.shape[1:]):
        out[(...,) + idx] = fn(taps[(slice(None),) + idx], lam, kind, interval)
    return out


def bank_response(taps, lam, kind="monomial", interval=None):
    """``H(lam)`` of shape ``lam.shape + taps.shape[1:]``, filter by filter."""
    return _per_filter(response, taps, lam, kind, interval)


def bank_derivative(taps, lam, kind="monomial", interval=None):
    """``H'(lam)``, shapes as :func:`bank_response`."""
    return _per_filter(derivative, taps, lam, kind, interval)


def filter_matrices(s, taps, kind="monomial", interval=None):
    """``V h(Lambda) V^T`` per filter: ``(N, N)`` for taps ``(K,)``, else
    ``(F_in, F_out, N, N)``. Reference: numpy.linalg.eigh."""
    w, v = np.linalg.eigh(np.asarray(s, dtype=np.float64))
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        return (v * response(taps, w, kind, interval)) @ v.T
    hw = bank_response(taps, w, kind, interval)  # (N, F_in, F_out)
    return np.einsum("ia,afg,ja->fgij", v, hw, v)


def kron_operator(blocks):
    """The bank ``X -> Y``, ``Y[:, g] = sum_f H_fg X[:, f]``, as one matrix
    acting on the column-stacked ``vec(X)`` (``(F_out N, F_in N)``)."""
    fin, fout, n, _ = blocks.shape
    big = np.zeros((fout * n, fin * n))
    for f in range(fin):
        for g in range(fout):
            big[g * n:(g + 1) * n, f * n:(f + 1) * n] = blocks[f, g]
    return big


def filter_operator(s, taps, kind="monomial", interval=None):
    """The filter (or bank) on the graph as one dense matrix."""
    h = filter_matrices(s, taps, kind, interval)
    return h if np.ndim(taps) == 1 else kron_operator(h)


def change(s, s_hat, taps, kind="monomial", interval=None):
    """``||H(S_hat) - H(S)||_2`` (operator 2-norm over signals)."""
    d = filter_operator(s_hat, taps, kind, interval) - filter_operator(s, taps, kind, interval)
    return float(np.linalg.norm(d, 2))


def relative(s, e):
    """``S + E S + S E`` (Gama, Bruna, Ribeiro, IEEE TSP 2020)."""
    return s + e @ s + s @ e


def gamma(c, lam, mu, kind="monomial", interval=None):
    """``Gamma(lam, mu) = (lam + mu)(h(lam) - h(mu)) / (lam - mu)``, and
    ``(lam + mu) h'((lam + mu)/2)`` where the points (nearly) coincide (the
    error there is below ``|lam - mu| sup |h''|``)."""
    lam, mu = np.broadcast_arrays(np.asarray(lam, float), np.asarray(mu, float))
    scale = max(1.0, float(np.max(np.abs(lam))) if lam.size else 1.0)
    close = np.abs(lam - mu) <= 1e-9 * scale
    gap = np.where(close, 1.0, lam - mu)
    dd = (response(c, lam, kind, interval) - response(c, mu, kind, interval)) / gap
    mid = 0.5 * (lam + mu)
    return (lam + mu) * np.where(close, derivative(c, mid, kind, interval), dd)


def daleckii_krein(s, e, taps, kind="monomial", interval=None):
    """First-order change of ``H`` at ``S`` for ``S_hat = S + E S + S E``:
    ``V ((V^T E V) o Gamma) V^T`` per filter (Bhatia 1997, ch. V), as one
    matrix (a bank: the Kronecker operator)."""
    w, v = np.linalg.eigh(np.asarray(s, dtype=np.float64))
    et = v.T @ e @ v
    taps = np.asarray(taps, dtype=np.float64)
    lam, mu = np.meshgrid(w, w, indexing="ij")
    if taps.ndim == 1:
        return v @ (et * gamma(taps, lam, mu, kind, interval)) @ v.T
    fin, fout = taps.shape[1:]
    n = w.size
    blocks = np.empty((fin, fout, n, n))
    for f in range(fin):
        for g in range(fout):
            blocks[f, g] = v @ (et * gamma(taps[:, f, g], lam, mu, kind, interval)) @ v.T
    return kron_operator(blocks)


def random_symmetric(rng, n, eps):
    """A random dense symmetric ``E`` with ``||E||_2 = eps``."""
    e = rng.standard_normal((n, n))
    e = e + e.T
    return e * (eps / np.linalg.norm(e, 2))


def wider_interval(s, rng):
    """An interval a little wider than the spectrum of ``s`` (a Chebyshev
    filter designed for a range of graphs, not fitted to this one)."""
    lam = np.linalg.eigvalsh(np.asarray(s, dtype=np.float64))
    return float(lam[0] - rng.uniform(0.05, 0.5)), float(lam[-1] + rng.uniform(0.05, 0.5))
