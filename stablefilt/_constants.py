"""Frequency-response constants on a spectral grid, in JAX: differentiable in
the taps, one value per filter of a bank. These are the training penalties;
they are grid estimates, not bounds (the float64 certificates in
:mod:`stablefilt._certify` make them rigorous).

Every function takes taps ``(K,)`` or ``(K, F_in, F_out)``, a spectral
interval ``(a, b)`` and a grid size, and returns an array of shape
``taps.shape[1:]`` (a scalar for one filter). Definitions in
docs/theory.md section 3.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from ._exact import kernel_transform
from ._filters import Basis, basis_derivatives, basis_values

DEFAULT_GRID = 256
PAIR_GRID = 64


def spectral_grid(interval, grid: int = DEFAULT_GRID) -> np.ndarray:
    """``grid`` evenly spaced points over ``[a, b]``, ends included."""
    a, b = float(interval[0]), float(interval[1])
    return np.linspace(a, b, max(int(grid), 2))


def _response(taps, pts, basis, deriv=False):
    taps = jnp.asarray(taps)
    f = basis_derivatives if deriv else basis_values
    phi = jnp.asarray(f(pts, taps.shape[0], basis), dtype=taps.dtype)
    return jnp.tensordot(phi, taps, axes=([-1], [0]))


def sup_norm(taps, interval, basis: Basis = Basis(), grid: int = DEFAULT_GRID):
    """``max_grid |h(lam)|`` per filter."""
    return jnp.max(jnp.abs(_response(taps, spectral_grid(interval, grid), basis)), axis=0)


def lipschitz(taps, interval, basis: Basis = Basis(), grid: int = DEFAULT_GRID):
    """``max_grid |h'(lam)|`` per filter (the Lipschitz constant ``C0``)."""
    return jnp.max(jnp.abs(_response(taps, spectral_grid(interval, grid), basis, deriv=True)), axis=0)


def integral_lipschitz(taps, interval, basis: Basis = Basis(), grid: int = DEFAULT_GRID):
    """``max_grid |lam h'(lam)|`` per filter (the integral Lipschitz ``C``).

    Source: Gama, Bruna, Ribeiro, "Stability Properties of Graph Neural
    Networks", IEEE Trans. Signal Processing 68, 2020.
    """
    taps = jnp.asarray(taps)
    pts = spectral_grid(interval, grid)
    # lam folded into the constant (G, K) basis matrix, and the bank laid out
    # as (F_in F_out, G) with the maximum over the last axis: 2-3x faster
    # (value and gradient) than (G, F_in, F_out) with a maximum over the first
    # (benchmarks/bench_penalty.py).
    psi = jnp.asarray(pts[:, None] * basis_derivatives(pts, taps.shape[0], basis), dtype=taps.dtype)  # (G, K)
    d = taps.reshape(taps.shape[0], -1).T @ psi.T  # (F_in F_out, G)
    return jnp.max(jnp.abs(d), axis=-1).reshape(taps.shape[1:])


def bank_sup_norm(taps, interval, basis: Basis = Basis(), grid: int = DEFAULT_GRID):
    """``max_grid ||H(lam)||_2`` for a bank (spectral norm of the
    ``F_in x F_out`` response matrix); a scalar."""
    h = _response(taps, spectral_grid(interval, grid), basis)
    if h.ndim == 1:
        return jnp.max(jnp.abs(h))
    return jnp.max(one_by_one(lambda a: jnp.linalg.norm(a, ord=2), h))


def one_by_one(fn, x):
    """``fn`` on each matrix of ``x`` (``(..., n, m)``), one after another
    (``jax.lax.map``). A batched LAPACK routine splits its batch over XLA's
    CPU thread pool and waits for the pieces; two of them at once could each
    wait on the other for ever on a 2-core machine (seen with the ``model``
    penalty at 32 features: one thread in a batched eigenvalue routine, one
    in a batched SVD). One matrix per call never splits."""
    flat = x.reshape((-1,) + x.shape[-2:])
    out = jax.lax.map(fn, flat)
    return jax.tree_util.tree_map(lambda o: o.reshape(x.shape[:-2] + o.shape[1:]), out)


def split_basis(interval) -> Basis:
    """Chebyshev basis of the interval (monomials if it is a single point).
    Splitting in it was clearly tighter than in monomials on random graphs."""
    a, b = float(interval[0]), float(interval[1])
    return Basis("chebyshev", (a, b)) if a < b else Basis()


def _kernel(taps, interval, basis):
    taps = jnp.asarray(taps)
    split = split_basis(interval)
    t = jnp.asarray(kernel_transform(taps.shape[0], basis, split), dtype=taps.dtype)
    m = jnp.tensordot(t, taps, axes=([2], [0]))  # (K, K, ...)
    return jnp.moveaxis(m, (0, 1), (-2, -1)), split


def pairwise_constant(taps, interval, basis: Basis = Basis(), grid: int = PAIR_GRID):
    """``C2 = (1/2) max_{grid x grid} |Gamma(lam, mu)|`` per filter, with
    ``Gamma = (lam + mu)(h(lam) - h(mu))/(lam - mu)`` (docs/theory.md s. 3),
    computed as ``Phi M Phi^T`` from the kernel matrix, so no division."""
    m, split = _kernel(taps, interval, basis)
    pts = spectral_grid(interval, grid)
    phi = jnp.asarray(basis_values(pts, m.shape[-1], split), dtype=m.dtype)
    g = jnp.einsum("ia,...ab,jb->...ij", phi, m, phi)
    return 0.5 * jnp.max(jnp.abs(g), axis=(-2, -1))


@jax.custom_jvp
def psd_part(m):
    """``Q max(w, 0) Q^T`` for symmetric ``m = Q diag(w) Q^T`` (batched).

    Its derivative is the Daleckii-Krein formula with divided differences of
    ``max(., 0)``, bounded and defined at repeated eigenvalues, where the
    gradient of ``eigh`` itself is not (Bhatia, "Matrix Analysis", 1997, V.3).
    """
    w, q = one_by_one(jnp.linalg.eigh, m)
    return (q * jnp.maximum(w, 0)[..., None, :]) @ jnp.swapaxes(q, -1, -2)


@psd_part.defjvp
def _psd_part_jvp(primals, tangents):
    (m,), (dm,) = primals, tangents
    w, q = one_by_one(jnp.linalg.eigh, m)
    qt = jnp.swapaxes(q, -1, -2)
    f = jnp.maximum(w, 0)
    wi, wj = w[..., :, None], w[..., None, :]
    gap = wi - wj
    scale = jnp.max(jnp.abs(w), axis=-1, keepdims=True)[..., None] + 1e-30
    close = jnp.abs(gap) <= 1e-9 * scale
    mid = 0.5 * (wi + wj)
    dd = jnp.where(close, (mid > 0).astype(m.dtype),
                   (f[..., :, None] - f[..., None, :]) / jnp.where(close, 1.0, gap))
    out = (q * f[..., None, :]) @ qt
    dout = q @ (dd * (qt @ dm @ q)) @ qt
    return out, dout


def kernel_bound(taps, interval, basis: Basis = Basis(), grid: int = DEFAULT_GRID):
    """``kappa = max_grid phi^T M_+ phi + max_grid phi^T M_- phi`` per filter
    (docs/theory.md section 5 item 2): on the grid, an estimate of the
    first-order worst-case change per unit ``eps``."""
    m, split = _kernel(taps, interval, basis)
    k = m.shape[-1]
    m = 0.5 * (m + jnp.swapaxes(m, -1, -2))
    pts = spectral_grid(interval, grid)
    phi = jnp.asarray(basis_values(pts, k, split), dtype=m.dtype)  # (G, K)
    outer = (phi[:, :, None] * phi[:, None, :]).reshape(phi.shape[0], k * k)  # (G, K K)
    # One eigendecomposition: M_- = M_+ - M. Quadratic forms as (filters, G).
    plus = psd_part(m)
    total = 0.0
    for part in (plus, plus - m):
        total = total + jnp.max(part.reshape(-1, k * k) @ outer.T, axis=-1)
    return total.reshape(m.shape[:-2])
