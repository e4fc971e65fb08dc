"""Multi-start Adam search for the free-input attack, with the nonlinearity
smoothed and annealed back to the model's own.

The question is the operator-level one, ``max ||Phi(S + E S + S E) x -
Phi(S) x||_F`` over ``||E||_2 <= eps`` and ``||x||_F = rho``. Block ascent
(stablefilt._freeattack) jumps between extreme points of the ball and stalls
where a relu's kinks and flat pieces leave the gradient no direction; on
deeper models it found markedly less than this search (docs/theory.md 9).

Every start is a point of a parametrisation that lies in the ball, so Adam
(Kingma and Ba, ICLR 2015; optax) needs no projection:

- dense ``E = eps Q diag(sin theta) Q^T``, ``Q`` the orthogonal factor of a
  free matrix (QR); diagonal ``E = eps sin(theta)``;
- ``x = rho z / ||z||``.

The starts run together (``jax.vmap``; the shift is a dense array, so only
graphs of at most ``freeattack.POLISH_LIMIT`` nodes). The objective is
the squared change of the *smoothed* model, each relu replaced by
``softplus_beta(z) = log(1 + exp(beta z)) / beta`` (within ``log 2 / beta``
of ``relu(z)``; leaky relu ``0.1 z + 0.9 softplus_beta(z)``; tanh kept),
``beta`` growing geometrically from ``SHARPNESS[0]`` to ``SHARPNESS[1]``
over the steps: early on the gradient sees past the kinks, at the end the
model is the model (graduated optimisation; Blake and Zisserman, "Visual
Reconstruction", 1987, for the idea). Every ``CHECK`` steps each start's
change is evaluated on the model itself and its best point kept; the best
start's best point is re-measured by the caller in float64, so every figure
is the change of an actual perturbation and input.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np

from ._freeattack import angles, in_ball, squared_change
from ._model import ModelSpec
from ._perturb import project_ball

#: First and last sharpness ``beta`` of the smoothed relu. Measured on the
#: 3-layer demo run (40 epochs, eps 1e-3, 16 starts of 600 steps): starting
#: at 1, 3 and 10 found 3.09, 3.08 and 3.09; the plain relu (no smoothing)
#: 3.00; block ascent with its Adam polish 2.76.
SHARPNESS = (3.0, 1e4)
#: Adam's first rate (cosine decay to 0). Same run, 600 steps: 0.02 found
#: 3.08, 0.05 3.14, 0.1 3.20, 0.2 3.18, 0.4 3.19.
RATE = 0.1
#: Steps between evaluations of the model's own change at every start.
CHECK = 25


def _smooth(spec: ModelSpec, beta):
    """The model's nonlinearity with every relu smoothed to ``softplus_beta``."""
    def soft(z):
        return jax.nn.softplus(beta * z) / beta

    if spec.nonlinearity == "relu":
        return soft
    if spec.nonlinearity == "leaky_relu":
        return lambda z: 0.1 * z + 0.9 * soft(z)
    return lambda z: spec.activation(z)


def _change(params, s, m, theta, z, eps, rho, beta, spec: ModelSpec, dense: bool, smooth: bool):
    """Squared change at one start's point (``s`` the dense shift)."""
    x = rho * z / jnp.linalg.norm(z)
    return squared_change(params, s, in_ball(m, theta, eps, dense), x, spec, _smooth(spec, beta) if smooth else None)


@functools.partial(jax.jit, static_argnames=("spec", "dense"))
def _batch_grad(params, s, m, theta, z, eps, rho, beta, spec: ModelSpec, dense: bool):
    """Minus the smoothed squared change at every start, its gradient, and
    whether every entry of the gradient is finite (one flag, computed here:
    a check per array outside the compiled function cost 5 ms a step)."""
    def neg(m, theta, z):
        return -_change(params, s, m, theta, z, eps, rho, beta, spec, dense, True)

    vals, grads = jax.vmap(jax.value_and_grad(neg, argnums=(0, 1, 2)))(m, theta, z)
    finite = jnp.all(jnp.stack([jnp.all(jnp.isfinite(g)) for g in grads]))
    return vals, grads, finite


@functools.partial(jax.jit, static_argnames=("spec", "dense"))
def _batch_value(params, s, m, theta, z, eps, rho, spec: ModelSpec, dense: bool):
    """The model's own squared change at every start."""
    def val(m, theta, z):
        return _change(params, s, m, theta, z, eps, rho, 1.0, spec, dense, False)

    return jax.vmap(val)(m, theta, z)


def start_points(initial, eps: float, n: int, features: int, dense: bool):
    """``(M, theta, Z)`` of the starts ``initial``, a list of ``(E0, X0)``
    (``E0`` in the ball, dense ``(N, N)`` or diagonal ``(N,)``; ``X0`` any
    non-zero norm), ``(M, theta)`` by :func:`stablefilt._freeattack.angles`."""
    pairs = [angles(e0, eps, dense) for e0, _ in initial]
    z = np.stack([np.asarray(x0, dtype=np.float64).reshape(n, features) for _, x0 in initial])
    return np.stack([m for m, _ in pairs]), np.stack([t for _, t in pairs]), z


def random_starts(count: int, n: int, features: int, eps: float, dense: bool, inputs, rng):
    """``count`` starts ``(E0, X0)`` inside the ball: ``E0 = eps Q diag(sin
    theta) Q^T`` with ``Q`` the orthogonal factor of a Gaussian matrix and
    ``theta`` uniform in ``(-1.5, 1.5)`` (diagonal: ``eps sin(theta)``);
    ``X0`` the ``inputs`` in turn for every other start, Gaussian for the rest.
    Measured on the 3-layer demo run (40 epochs, eps 1e-3, 16 starts of 400
    steps): from these 3.139, from the block ascent's starts (extreme points)
    3.034."""
    out = []
    for k in range(max(count, 0)):
        theta = rng.uniform(-1.5, 1.5, n)
        e0 = np.asarray(in_ball(rng.standard_normal((n, n)), theta, eps, True, xp=np)) if dense else eps * np.sin(theta)
        x0 = inputs[(k // 2) % len(inputs)] if inputs and k % 2 == 0 else rng.standard_normal((n, features))
        out.append((e0, x0))
    return out


def search(params, spec: ModelSpec, s_dense, eps: float, rho: float, initial, *, steps: int, dense: bool = True,
           progress=None):
    """The multi-start smoothed Adam search (see the module docstring).

    Args:
      s_dense: the shift as a dense ``(N, N)`` array.
      initial: the starts, ``(E0, X0)`` pairs (:func:`start_points`).
      steps: Adam steps; the budget is ``len(initial) * steps`` evaluations
        of the smoothed change and its gradient, plus one evaluation of the
        model's own change per start every ``CHECK`` steps.
      dense: dense ``E``, else diagonal.
      progress: called with the number of starts after every step, or None.

    Returns:
      ``(E, x)``: the best point found by the float32 objective of the model
      itself, in float64, ``E`` projected onto the ball and ``||x|| = rho``.
    """
    import optax

    s_np = np.asarray(s_dense, dtype=np.float64)
    n = s_np.shape[0]
    starts = len(initial)
    pts = tuple(jnp.asarray(a, jnp.float32) for a in start_points(initial, eps, n, spec.features[0], dense))
    s = jnp.asarray(s_np, jnp.float32)
    opt = optax.adam(optax.cosine_decay_schedule(RATE, max(steps, 1)))
    state = opt.init(pts)
    best_val = np.full(starts, -np.inf)
    best = [np.array(a) for a in pts]
    lo, hi = SHARPNESS
    e32, r32 = jnp.float32(eps), jnp.float32(rho)

    def check(pts):
        vals = np.asarray(_batch_value(params, s, *pts, e32, r32, spec, dense), dtype=np.float64)
        better = np.isfinite(vals) & (vals > best_val)
        if np.any(better):
            best_val[better] = vals[better]
            for b, a in zip(best, pts):
                b[better] = np.asarray(a)[better]

    for k in range(steps):
        if k % CHECK == 0:
            check(pts)
        beta = jnp.float32(lo * (hi / lo) ** (k / max(steps - 1, 1)))
        _, grads, finite = _batch_grad(params, s, *pts, e32, r32, beta, spec, dense)
        if progress is not None:
            progress(starts)
        if not bool(finite):
            if progress is not None:
                progress(starts * (steps - k - 1))  # the count promised to the caller's bar
            break  # a float32 overflow: keep the best points so far
        updates, state = opt.update(grads, state, pts)
        pts = optax.apply_updates(pts, updates)
    check(pts)
    i = int(np.argmax(best_val))
    m, theta, z = (np.asarray(b[i], dtype=np.float64) for b in best)
    return project_ball(in_ball(m, theta, eps, dense, xp=np), eps), z * (rho / np.linalg.norm(z))
