"""Adversarial search for the relative perturbation that moves a trained
model's output the most.

Projected gradient ascent in JAX over ``E`` in the ball ``||E||_2 <= eps``
(projection: clip the eigenvalues of ``E``), dense up to a few thousand nodes;
over diagonal ``E = diag(e)``, ``|e_i| <= eps`` (projection: clip entries),
matrix-free, beyond. Optionally the input moves too, on the sphere
``||x||_F = rho``. Restarts from scaling, the worst eigenvector pair of the
first layer's kernel, and random points. Every figure returned is measured in
float64 on an actually perturbed operator, so it brackets the true worst case
from below.
"""

from __future__ import annotations

import dataclasses
import functools

import jax
import jax.numpy as jnp
import numpy as np

from ._graph import ShiftOperator
from ._model import ModelSpec, forward, forward_np
from ._perturb import project_ball, relative_product
from ._search import change_operator, divided_differences, worst_perturbation
from ._sparse import JaxShift, jax_operator, shift_product

#: Largest ``F_in F_out N^2`` of the first bank for which its own strongest
#: perturbation is searched as a start (a dense SVD of the bank's change).
SEARCH_START_LIMIT = 400_000

#: Largest graph attacked with a dense ``E``.
DENSE_ATTACK_LIMIT = 2000


@dataclasses.dataclass(frozen=True)
class AttackResult:
    """The strongest perturbation found.

    Attributes:
      change: measured ``||Phi(S_hat) x - Phi(S) x||_F`` (float64).
      e: the perturbation (dense ``(N, N)`` or diagonal ``(N,)``).
      x: the input it was measured on ``(N, F)``.
      mode: ``dense`` or ``diagonal``; ``free_input`` whether ``x`` moved.
      start: the restart that won.
      history: objective per iteration of the winning restart (float32).
    """

    change: float
    e: np.ndarray
    x: np.ndarray
    mode: str
    free_input: bool
    start: str
    history: tuple


def measure(params, spec: ModelSpec, op: ShiftOperator, e: np.ndarray, x: np.ndarray) -> float:
    """``||Phi(S + E S + S E) x - Phi(S) x||_F`` in float64 (``x``: ``(N, F)``)."""
    s = op.matrix
    e = np.asarray(e, dtype=np.float64)

    xb = np.asarray(x, dtype=np.float64)[None]
    y0 = forward_np(params, s, xb, spec)
    y1 = forward_np(params, functools.partial(relative_product, s, e), xb, spec)
    return float(np.linalg.norm(y1 - y0))


@functools.partial(jax.jit, static_argnames=("spec",))
def _objective_grad(params, sop: JaxShift, e, x, y0, spec: ModelSpec):
    """``||Phi(S + E S + S E) x - y0||^2`` and its gradient in ``(E, x)``;
    ``E`` dense ``(N, N)`` or diagonal ``(N,)``."""
    def obj(e, x):
        def mv(v):
            return relative_product(functools.partial(shift_product, sop), e, v)

        y = forward(params, mv, x[None], spec)
        return jnp.sum((y - y0) ** 2)

    return jax.value_and_grad(obj, argnums=(0, 1))(e, x)


# The free-input loop needs the clean output at every iterate; eagerly that
# cost about 80 ms a call on a 34-node graph (custom_vjp traced per call).
_forward = jax.jit(forward, static_argnames=("spec",))


def _starts(op: ShiftOperator, params, spec: ModelSpec, eps: float, dense: bool, restarts: int, rng,
            x_fixed: np.ndarray | None = None):
    """``(name, E0, X0)`` per restart; ``X0`` is the input direction that goes
    with ``E0`` (unit norm, used when the input is free) or None.

    The pair starts are ranked by the first layer's first-order change
    (theory.md s. 4): with ``x_fixed`` given, on that input, whose spectral
    coefficients ``xt = V^T x`` decide which pair moves it (a pair that misses
    the input moves it only at second order, and with repeated eigenvalues
    many pairs tie on ``|Gamma_ij|`` alone); otherwise by ``|Gamma_ij|``
    (Frobenius norm over the bank), the input then being free to follow."""
    n = op.nodes
    out = [("scaling+", np.full(n, eps), None), ("scaling-", np.full(n, -eps), None)]
    if dense and n <= 600:
        w, v = np.linalg.eigh(op.dense())
        taps = np.asarray(params["layers"][0]["taps"], dtype=np.float64)
        cols = taps.reshape(taps.shape[0], -1)
        gam = (w[:, None] + w[None, :]) * divided_differences(cols, w, spec.basis)  # (F_in F_out, N, N)
        if x_fixed is None:
            g = np.sqrt(np.sum(gam**2, axis=0))
        else:
            # E~ = e_i e_j^T + e_j e_i^T moves row i of V^T Y by G_ij^T xt_j and
            # row j by G_ij^T xt_i (G symmetric in i, j); E~ = e_i e_i^T (norm 1,
            # half the pair's) moves row i by G_ii^T xt_i. Scores are per unit ||E||.
            xt = v.T @ np.asarray(x_fixed, dtype=np.float64)  # (N, F_in)
            t = np.einsum("foij,jf->ijo", gam.reshape(*taps.shape[1:], n, n), xt)
            t2 = np.sum(t**2, axis=2)
            g = np.sqrt(t2 + t2.T)
            g[np.diag_indices(n)] = np.sqrt(np.diag(t2))
        for idx in np.argsort(g, axis=None, kind="stable")[::-1][:2]:
            i, j = divmod(int(idx), n)
            e = np.outer(v[:, i], v[:, j])
            # The pair's construction acts on x = v_j u^T: the first layer's
            # first-order change is eps v_i (G^T u) with G = Gamma_ij per filter
            # (F_in x F_out), largest for u the top left singular vector of G.
            u = np.linalg.svd(gam[:, i, j].reshape(taps.shape[1:]))[0][:, 0]
            out.append((f"pair {i},{j}", eps * (e + e.T) / max(np.linalg.norm(e + e.T, 2), 1e-300),
                        np.outer(v[:, j], u)))
        if taps.shape[1] * taps.shape[2] * n * n <= SEARCH_START_LIMIT:
            # The strongest perturbation of the first bank alone (generalised
            # power method, stablefilt._search), with the input its change
            # moves most: the top right singular vector of H(S_hat) - H(S).
            s = op.dense()
            found = worst_perturbation(s, taps, spec.basis, eps, restarts=1, iters=10, seed=int(rng.integers(1 << 30)))
            d = change_operator(s, relative_product(lambda z: s @ z, found.e, np.eye(n)), taps, spec.basis)
            top = np.linalg.svd(d)[2][0].reshape(taps.shape[1], n).T  # vec(X) is column-stacked
            out.append(("first-bank search", found.e, top / max(np.linalg.norm(top), 1e-300)))
    while len(out) < restarts:
        if dense:
            e = rng.standard_normal((n, n))
            e = 0.5 * (e + e.T)
            out.append(("random", eps * e / np.max(np.abs(np.linalg.eigvalsh(e))), None))
        else:
            out.append(("random", rng.uniform(-eps, eps, n), None))
    return out


def attack(params, spec: ModelSpec, op: ShiftOperator, x, eps: float, *, mode: str = "auto", free_input: bool = False,
           rho: float | None = None, restarts: int = 5, iters: int = 40, seed: int = 0,
           progress=None) -> AttackResult:
    """Strongest relative perturbation found for one input ``x`` (``(N, F)``).

    Args:
      params, spec: the model.
      op: the unperturbed shift operator.
      x: the input signal; with ``free_input`` the starting point, rescaled
        to ``||x||_F = rho``.
      eps: radius of the ball.
      mode: ``dense``, ``diagonal``, or ``auto`` (dense up to
        ``DENSE_ATTACK_LIMIT`` nodes).
      progress: called with a count of iterations done (``restarts *
        iters`` in all), or None.
    """
    n = op.nodes
    dense = mode == "dense" or (mode == "auto" and n <= DENSE_ATTACK_LIMIT)
    rng = np.random.default_rng(seed)
    sop = jax_operator(op)
    x0 = jnp.asarray(x, jnp.float32)
    if free_input:
        rho = float(rho if rho is not None else np.linalg.norm(x))
        x0 = x0 * (rho / jnp.maximum(jnp.linalg.norm(x0), 1e-30))
    y0 = _forward(params, sop, x0[None], spec)
    best = None
    fixed = None if free_input else np.asarray(x, dtype=np.float64)
    for name, e0, xs in _starts(op, params, spec, eps, dense, restarts, rng, fixed):
        e = jnp.asarray(np.diag(e0) if (dense and e0.ndim == 1) else e0, jnp.float32)
        xc = jnp.asarray(rho * xs, jnp.float32) if (free_input and xs is not None) else x0
        hist = []
        top = None  # the best iterate: the ascent is not monotone
        step = 0.5 * eps
        done = 0
        for it in range(iters):
            if progress is not None:
                progress(1)
                done += 1
            y_ref = _forward(params, sop, xc[None], spec) if free_input else y0
            val, (ge, gx) = _objective_grad(params, sop, e, xc, y_ref, spec)
            hist.append(float(val))
            if top is None or hist[-1] > top[0]:
                top = (hist[-1], e, xc)
            gn = jnp.linalg.norm(ge)
            if not np.isfinite(float(gn)) or float(gn) == 0.0:
                break
            lr = step / (1 + 0.1 * it)
            e = project_ball(e + lr * ge / gn * np.sqrt(n), eps, xp=jnp)
            if free_input:
                gxn = jnp.linalg.norm(gx)
                if float(gxn) > 0:
                    xc = xc + 0.2 * rho * gx / gxn
                    xc = xc * (rho / jnp.linalg.norm(xc))
        if progress is not None and done < iters:  # the restart stopped early
            progress(iters - done)
        cands = [(e, xc)] + ([top[1:]] if top is not None and top[1] is not e else [])
        for ec, xcc in cands:
            e_np = project_ball(np.asarray(ec, dtype=np.float64), eps)
            if free_input:
                x_np = np.asarray(xcc, dtype=np.float64)
                x_np = x_np * (rho / np.linalg.norm(x_np))
            else:
                # Measure on the signal as given (float64), not its float32 copy:
                # callers compare with that signal's certificate.
                x_np = np.asarray(x, dtype=np.float64)
            val = measure(params, spec, op, e_np, x_np)
            if best is None or val > best.change:
                best = AttackResult(val, e_np, x_np, "dense" if dense else "diagonal", free_input, name, tuple(hist))
    return best
