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
from ._sparse import JaxShift

#: Input moves per perturbation move (measured on 120-node two- and
#: three-layer models: 1 and 3 found about the same, 8 less).
INPUT_MOVES = 3

#: Fractions of a move tried, in order, until one increases the objective.
STEPS = (1.0, 0.5, 0.25)


@functools.partial(jax.jit, static_argnames=("spec",))
def free_value_grad(params, sop: JaxShift, e, x, spec: ModelSpec):
    """``||Phi(S + E S + S E) x - Phi(S) x||_F^2`` and its gradient in
    ``(E, x)``; ``E`` dense ``(N, N)`` or diagonal ``(N,)``, ``x`` ``(N, F)``."""
    return jax.value_and_grad(lambda e, x: squared_change(params, sop, e, x, spec), argnums=(0, 1))(e, x)


def squared_change(params, s, e, x, spec: ModelSpec, activation=None):
    """``||Phi(S + E S + S E) x - Phi(S) x||_F^2`` (JAX, traceable), ``S`` a
    :class:`JaxShift` or a dense array, ``E`` dense or its diagonal, ``x``
    ``(N, F)``; ``activation`` in place of the spec's nonlinearity, or None."""
    y = forward(params, lambda v: relative_product(s, e, v), x[None], spec, activation=activation)
    y0 = forward(params, s, x[None], spec, activation=activation)
    return jnp.sum((y - y0) ** 2)


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


#: Adam steps of the polish of a winner (``polish``), and their first rate
#: (cosine decay to 0). Measured on the 3-layer demo run (40 epochs) at eps
#: 1e-2: the free-input block ascent's winner 27.28 went to 29.68 in 300
#: steps at rate 0.01 (29.35 at rate 0.003); 24 Adam starts of 400 steps
#: from random and test inputs reached 29.41.
POLISH_STEPS = 300
POLISH_RATE = 0.01
#: Largest graph polished (each dense step factors an ``N x N`` matrix).
POLISH_LIMIT = 600
#: The starting angles are pulled this far inside ``(-pi/2, pi/2)``: at
#: ``+-pi/2`` (an extreme point, where block ascent ends) ``sin`` is flat and
#: the eigenvalues could not move.
POLISH_INSET = 0.98


def angles(e, eps: float, dense: bool):
    """``(M, theta)`` of a point ``E`` of the ball for :func:`in_ball`: its
    eigenvectors and the angles of its eigenvalues, pulled inside by
    ``POLISH_INSET`` (at ``+-pi/2`` ``sin`` is flat and an eigenvalue could
    not move); ``E`` dense or its diagonal (``M`` unused when not ``dense``)."""
    e = np.asarray(e, dtype=np.float64)
    if dense:
        w, m = np.linalg.eigh(np.diag(e) if e.ndim == 1 else 0.5 * (e + e.T))
    else:
        w, m = (np.diag(e) if e.ndim == 2 else e), np.zeros((1, 1))
    return m, np.arcsin(np.clip(w / eps, -1.0, 1.0)) * POLISH_INSET


def in_ball(m, theta, eps, dense: bool, xp=jnp):
    """The point ``E = eps Q diag(sin theta) Q^T`` of the ball (``Q`` the
    orthogonal factor of ``m``), or the diagonal ``eps sin(theta)`` when not
    ``dense``: ``||E||_2 <= eps`` for every ``(m, theta)`` (up to rounding)."""
    if not dense:
        return eps * xp.sin(theta)
    q, _ = xp.linalg.qr(m)
    return (q * (eps * xp.sin(theta))) @ q.T


@functools.partial(jax.jit, static_argnames=("spec", "dense"))
def _polish_value_grad(params, sop: JaxShift, m, theta, z, eps, rho, free, spec: ModelSpec, dense: bool):
    """Minus the squared change, and its gradient, at ``E = eps Q diag(sin
    theta) Q^T`` (``Q`` the orthogonal factor of ``m``; diagonal ``E = eps
    sin(theta)`` when not ``dense``) and ``x = rho z / ||z||`` (``x = z``
    when ``free`` is 0, a traced flag so that fixed and free inputs share one
    compilation): every point of the parametrisation lies in the ball, so
    Adam needs no projection."""
    def obj(m, theta, z):
        e = in_ball(m, theta, eps, dense)
        x = free * (rho * z / jnp.linalg.norm(z)) + (1 - free) * z
        return -squared_change(params, sop, e, x, spec)

    return jax.value_and_grad(obj, argnums=(0, 1, 2))(m, theta, z)


def polish(params, spec: ModelSpec, sop: JaxShift, e, x, eps: float, rho: float, steps: int = POLISH_STEPS,
           move_input: bool = True, progress=None):
    """A winner ``(E, x)`` moved on by Adam (optax; Kingma and Ba, ICLR 2015)
    over a parametrisation that stays in the ball: ``E = eps Q diag(sin theta)
    Q^T``, ``Q`` the orthogonal factor of a free matrix (diagonal ``E``:
    ``eps sin(theta)``), and ``x = rho z / ||z||`` (held fixed unless
    ``move_input``). Block ascent ends at extreme points of the ball; this
    reaches points inside it, where relu models' largest changes can lie.
    ``steps`` gradient evaluations, starting from ``E``'s eigenvectors and
    its eigenvalues pulled inside by ``POLISH_INSET``.

    Returns:
      ``(E, x)`` of the best iterate by the float32 objective, in float64,
      ``E`` projected onto the ball and ``x`` scaled to norm ``rho``; the
      caller re-measures it and keeps the larger.
    """
    import optax

    dense = np.ndim(e) == 2
    q, theta = angles(e, eps, dense)
    x = np.asarray(x, dtype=np.float64)
    params_j = (jnp.asarray(q, jnp.float32), jnp.asarray(theta, jnp.float32), jnp.asarray(x, jnp.float32))
    opt = optax.adam(optax.cosine_decay_schedule(POLISH_RATE, max(steps, 1)))
    state = opt.init(params_j)
    best_val, best = np.inf, params_j
    for used in range(1, steps + 1):
        val, grads = _polish_value_grad(params, sop, *params_j, jnp.float32(eps), jnp.float32(rho),
                                        jnp.float32(move_input), spec, dense)
        if progress is not None:
            progress(1)
        val = float(val)
        if not np.isfinite(val):
            if progress is not None and used < steps:
                progress(steps - used)  # the count promised to the caller's bar
            break
        if val < best_val:
            best_val, best = val, params_j
        if not move_input:
            grads = (grads[0], grads[1], jnp.zeros_like(grads[2]))
        updates, state = opt.update(grads, state, params_j)
        params_j = optax.apply_updates(params_j, updates)
    m, theta, z = (np.asarray(a, dtype=np.float64) for a in best)
    e_out = project_ball(in_ball(m, theta, eps, dense, xp=np), eps)
    z = z if move_input else x
    return e_out, z * (rho / np.linalg.norm(z))
