"""Rebalancing a kernel factorisation ``M = A^T B`` to tighten the Schur
bound (docs/theory.md section 9.4).

For any invertible ``T``, ``M = (T A)^T (T^-T B)``, and the bound
``sqrt(sup_lam lambda_max(alpha^T T^T T alpha)) sqrt(sup_mu lambda_max(beta^T
T^-1 T^-T beta))`` (``alpha = A Phi(lam)``, ``beta = B Psi(mu)``) depends on
``T``: Haagerup's characterisation of the Schur multiplier norm is the
infimum over such factorisations (Paulsen, "Completely Bounded Maps and
Operator Algebras", 2002, ch. 8). ``T`` is found here by Adam on a smooth
surrogate (a p-norm over the points in place of the maximum); the result is
only a choice of factorisation: the certificate recomputes the bound for it
in float64 with every error term, so a poor optimum costs tightness, never
soundness.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import optax

#: Optimiser steps and the p of the p-norm standing in for the maximum.
STEPS = 150
POWER = 24.0
#: Points used by the optimiser (the bound is checked on all of them).
MAX_POINTS = 512


#: ``lambda_max(G)`` is stood in for by ``tr(G^p)^(1/p)``, ``p = 2^SQUARINGS``.
SQUARINGS = 5


def _lmax(x):
    """``tr(G^p)^(1/p)`` for ``G = x^T x`` per point (``x``: ``(..., T, r, F)``),
    between ``lambda_max(G)`` and ``F^(1/p)`` times it (``p = 32``: at most
    1.12x for ``F <= 40``): a smooth stand-in for the largest eigenvalue, by
    matrix products only. ``G / tr G`` has eigenvalues in ``[0, 1]`` summing
    to 1, so its powers neither overflow nor underflow. A batched
    eigenvalue routine here ran LAPACK on XLA's CPU thread pool, and two of
    them at once could each wait on the other's tasks: on a 2-core machine
    the rebalancing then never returned (tests/test_balance_hang.py). The
    optimiser only proposes ``T``; the bound is recomputed in float64."""
    g = jnp.swapaxes(x, -1, -2) @ x
    if g.shape[-1] == 1:
        return g[..., 0, 0]
    tr = jnp.trace(g, axis1=-2, axis2=-1)
    h = g / jnp.maximum(tr, 1e-300)[..., None, None]
    for _ in range(SQUARINGS):
        h = h @ h
    p = 2.0**SQUARINGS
    return tr * jnp.trace(h, axis1=-2, axis2=-1) ** (1.0 / p)


def _objective(t, alpha, beta):
    ta = jnp.einsum("rs,tsg->trg", t, alpha)
    tb = jnp.linalg.solve(t.T, jnp.moveaxis(beta, 0, 1).reshape(beta.shape[1], -1)).reshape(
        beta.shape[1], beta.shape[0], beta.shape[2])
    a = _lmax(ta)
    b = _lmax(jnp.moveaxis(tb, 1, 0))

    def pmax(v):
        v = jnp.maximum(v, 1e-300)
        lv = jnp.log(v)
        return jax.scipy.special.logsumexp(POWER * lv) / POWER

    return pmax(a) + pmax(b), (jnp.log(jnp.max(a)) + jnp.log(jnp.max(b)))


@functools.partial(jax.jit, static_argnames=("steps",))
def _run(alpha, beta, steps: int):
    tx = optax.adam(0.02)
    t0 = jnp.eye(alpha.shape[-2], dtype=alpha.dtype)

    def one(alpha, beta):
        state = tx.init(t0)

        def body(carry, _):
            t, state, best_t, best_v = carry
            (val, exact), g = jax.value_and_grad(_objective, has_aux=True)(t, alpha, beta)
            better = exact < best_v
            best_t = jnp.where(better, t, best_t)
            best_v = jnp.where(better, exact, best_v)
            upd, state = tx.update(g, state, t)
            return (optax.apply_updates(t, upd), state, best_t, best_v), None

        init = (t0, state, t0, jnp.asarray(jnp.inf, alpha.dtype))
        (t, state, best_t, best_v), _ = jax.lax.scan(body, init, None, length=steps)
        _, exact = _objective(t, alpha, beta)
        return jnp.where(exact < best_v, t, best_t)

    return jax.vmap(one)(alpha, beta)


def balance(alpha: np.ndarray, beta: np.ndarray, steps: int = STEPS) -> np.ndarray:
    """``T`` per batch entry (``(B, r, r)``) lowering ``max_t lambda_max(G_A)
    max_t lambda_max(G_B)`` for factors evaluated at points: ``alpha``
    ``(B, T, r, F_out)``, ``beta`` ``(B, T, r, F_in)``. Identity when the
    optimiser does not improve on it."""
    alpha = np.asarray(alpha, dtype=np.float64)
    beta = np.asarray(beta, dtype=np.float64)
    if alpha.shape[1] > MAX_POINTS:
        idx = np.unique(np.linspace(0, alpha.shape[1] - 1, MAX_POINTS).astype(int))
        alpha, beta = alpha[:, idx], beta[:, idx]
    with jax.enable_x64(True):
        t = np.array(_run(jnp.asarray(alpha), jnp.asarray(beta), steps))
    bad = ~np.all(np.isfinite(t), axis=(1, 2)) | (np.abs(np.linalg.det(t)) < 1e-12)
    t[bad] = np.eye(t.shape[-1])
    return t
