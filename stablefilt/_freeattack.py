"""The free-input attack: the strongest output change over the perturbation
and the input together, ``max ||Phi(S + E S + S E) x - Phi(S) x||_F`` over
``||E||_2 <= eps`` (dense symmetric ``E``, or diagonal ``|e_i| <= eps``) and
``||x||_F = rho``; the quantity the operator-level certificate bounds.

Objective ``f(E, x) = ||Phi(S_hat) x - Phi(S) x||_F^2``. Both outputs depend
on ``x``: its gradient in ``x`` is ``(J_hat - J)^T r`` (``J``, ``J_hat`` the
Jacobians of the clean and perturbed model at ``x``, ``r`` the change), not
``J_hat^T r`` as with a clean output held fixed.

Block ascent by linearise-and-jump moves, each accepted only if it increases
``f`` (so the objective never decreases along a start):

- input move: the target ``rho g_x / ||g_x||``, the maximiser of ``<g_x, z>``
  on the sphere; for a model linear in ``x`` (``f = ||D x||^2``,
  ``g_x = 2 D^T D x``) this is one step of power iteration on ``D^T D``
  (Golub and Van Loan, "Matrix Computations", 4th ed., s. 7.3);
- perturbation move: the target ``eps Q sign(Lambda) Q^T`` for the gradient
  ``G = Q Lambda Q^T`` in ``E``, the maximiser of ``<G, E>`` over the ball
  (``eps sign(g)`` for diagonal ``E``): the generalised power method
  (Journee, Nesterov, Richtarik, Sepulchre, JMLR 2010), which increases a
  convex objective at every step; here ``f`` is convex only approximately
  (its part linear in ``E`` dominates for small eps), hence the acceptance
  test;
- backtracking: when the full move does not increase ``f``, the points at
  ``t = 1/2`` and ``1/4`` of the way are tried (the segment stays in the ball
  by convexity; the input is rescaled onto the sphere).

``INPUT_MOVES`` input moves alternate with one perturbation move; a start
stops early when a whole cycle moved nothing (both blocks at a maximum of
their linearisations) or after ``iters`` evaluations of ``f`` and its
gradient (every trial point counts). The winner of each start is re-measured
in float64 on ``S + E S + S E`` with ``E`` projected onto the ball in float64
and ``x`` scaled to norm ``rho`` exactly, so every figure returned is the
change of an actual perturbation and input: a lower bound on the true worst
case.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np

from ._model import ModelSpec, forward
from ._perturb import project_ball, relative_product
from ._sparse import JaxShift, shift_product

#: Input moves per perturbation move (measured on 120-node two- and
#: three-layer models: 1 and 3 found about the same, 8 less).
INPUT_MOVES = 3

#: Fractions of a move tried, in order, until one increases the objective.
STEPS = (1.0, 0.5, 0.25)


@functools.partial(jax.jit, static_argnames=("spec",))
def free_value_grad(params, sop: JaxShift, e, x, spec: ModelSpec):
    """``||Phi(S + E S + S E) x - Phi(S) x||_F^2`` and its gradient in
    ``(E, x)``; ``E`` dense ``(N, N)`` or diagonal ``(N,)``, ``x`` ``(N, F)``."""
    def obj(e, x):
        def mv(v):
            return relative_product(functools.partial(shift_product, sop), e, v)

        y = forward(params, mv, x[None], spec)
        y0 = forward(params, sop, x[None], spec)
        return jnp.sum((y - y0) ** 2)

    return jax.value_and_grad(obj, argnums=(0, 1))(e, x)


def extreme_point(g, eps: float) -> np.ndarray:
    """``argmax_{||E||_2 <= eps} <G, E>``: ``eps Q sign(Lambda) Q^T`` for a
    dense ``G`` (symmetrised), ``eps sign(g)`` for a diagonal ``g`` (float64)."""
    g = np.asarray(g, dtype=np.float64)
    if g.ndim == 1:
        return eps * np.where(g >= 0, 1.0, -1.0)
    lam, q = np.linalg.eigh(0.5 * (g + g.T))
    out = (q * (eps * np.where(lam >= 0, 1.0, -1.0))) @ q.T
    return 0.5 * (out + out.T)


def _on_sphere(z, rho):
    nz = float(np.linalg.norm(z))
    return z * (rho / nz) if nz > 0 and np.isfinite(nz) else None


def block_ascent(params, spec: ModelSpec, sop: JaxShift, e0, x0, eps: float, rho: float, iters: int,
                 progress=None, move_input: bool = True):
    """One start of the free-input block ascent (see the module docstring).

    Args:
      e0: starting ``E`` in the ball, dense ``(N, N)`` or diagonal ``(N,)``.
      x0: starting input ``(N, F)``, any non-zero norm (rescaled to ``rho``).
      iters: evaluations of the objective and its gradient, at most.
      progress: called with a count of evaluations done (``iters`` in all).
      move_input: False keeps ``x`` fixed (``rho`` its norm): perturbation
        moves only, the generalised power method with acceptance.

    Returns:
      ``(E, x, history)``: the last accepted point (the best, the ascent
      being monotone) in float64 and the objective (float32 squared change)
      at each accepted point.
    """
    e = np.asarray(e0, dtype=np.float64)
    x = _on_sphere(np.asarray(x0, dtype=np.float64), rho)
    if x is None:
        raise ValueError("the free-input attack needs a non-zero starting input.")
    used = 0

    def evaluate(e, x):
        nonlocal used
        used += 1
        if progress is not None:
            progress(1)
        val, (ge, gx) = free_value_grad(params, sop, jnp.asarray(e, jnp.float32), jnp.asarray(x, jnp.float32),
                                        spec)
        return float(val), np.asarray(ge, dtype=np.float64), np.asarray(gx, dtype=np.float64)

    val, ge, gx = evaluate(e, x)
    history = [val]
    cycle = INPUT_MOVES + 1 if move_input else 1
    phase, still = (0, 0) if move_input else (INPUT_MOVES, 0)
    while used < iters and np.isfinite(val):
        moved = False
        if phase < INPUT_MOVES:
            target = _on_sphere(gx, rho)
            trials = [] if target is None else [(e, x + t * (target - x)) for t in STEPS]
        else:
            # A float32 gradient can overflow on a large model at a large eps:
            # then there is no direction to move in.
            target = extreme_point(ge, eps) if np.all(np.isfinite(ge)) else None
            trials = [] if target is None else [(e + t * (target - e), x) for t in STEPS]
        for en, xn in trials:
            if used >= iters:
                break
            xn = _on_sphere(xn, rho)
            if xn is None:
                continue
            v, gen, gxn = evaluate(en, xn)
            if v > val * (1 + 1e-6):
                e, x, val, ge, gx = en, xn, v, gen, gxn
                history.append(val)
                moved = True
                break
        still = 0 if moved else still + 1
        if still >= cycle:  # a whole cycle without a move
            break
        if move_input:
            phase = (phase + 1) % cycle
    if progress is not None and used < iters:
        progress(iters - used)
    return project_ball(e, eps), x * (rho / np.linalg.norm(x)), tuple(history)


def free_starts(starts, inputs):
    """Pair every start ``(name, E0, X0 or None)`` with an input: its own
    ``X0`` when it has one, else the ``inputs`` in turn."""
    out, k = [], 0
    for name, e0, x0 in starts:
        if x0 is None:
            x0 = inputs[k % len(inputs)]
            k += 1
        out.append((name, e0, x0))
    return out
