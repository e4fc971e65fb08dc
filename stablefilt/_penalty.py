"""The stability penalty, pluggable into any JAX loss.

``penalty(params, interval, ...)`` finds the taps in a pytree (leaves under a
key named ``taps``, or chosen by ``select``), computes a constant of each
filter's frequency response on a spectral grid (:mod:`stablefilt._constants`),
reduces over the filters of each bank and sums over banks with weights.
:func:`stability_penalty` wraps it as an optax gradient transformation that
adds the penalty's gradient to the updates, for training loops that are not
ours.
"""

from __future__ import annotations

from typing import Callable, NamedTuple, Sequence

import jax
import jax.numpy as jnp
import optax

from . import _constants as C
from ._errors import ConfigError
from ._filters import Basis

MODES = ("integral_lipschitz", "pairwise", "kernel", "lipschitz", "model", "certified")
#: Modes that need the whole model, not only its taps.
MODEL_MODES = ("model", "certified")
REDUCTIONS = ("max", "mean", "hinge")


def _is_taps_path(path) -> bool:
    for k in path:
        name = getattr(k, "key", getattr(k, "name", None))
        if name == "taps":
            return True
    return False


def find_taps(tree, select: Callable | None = None) -> list:
    """The tap arrays of a pytree, in tree order.

    Args:
      tree: an array of taps, or any pytree.
      select: ``select(path, leaf) -> bool``; default: leaves whose key path
        holds a key or attribute named ``taps``.
    """
    if isinstance(tree, (jnp.ndarray, jax.Array)) or hasattr(tree, "__array__"):
        return [jnp.asarray(tree)]
    leaves = jax.tree_util.tree_flatten_with_path(tree)[0]
    sel = select or (lambda path, leaf: _is_taps_path(path))
    found = [leaf for path, leaf in leaves if sel(path, leaf)]
    if not found:
        raise ConfigError("no taps found in the parameters; name the leaves 'taps' or pass select=.")
    return found


def _per_filter(taps, interval, mode, basis, grid):
    if mode == "integral_lipschitz":
        return C.integral_lipschitz(taps, interval, basis, grid)
    if mode == "lipschitz":
        return C.lipschitz(taps, interval, basis, grid)
    if mode == "pairwise":
        return C.pairwise_constant(taps, interval, basis, min(grid, C.PAIR_GRID))
    if mode == "kernel":
        return C.kernel_bound(taps, interval, basis, grid)
    raise ConfigError(f"unknown penalty mode {mode!r}; expected one of {', '.join(MODES)}.")


def _reduce(values, reduce, target):
    if reduce == "max":
        return jnp.max(values)
    if reduce == "mean":
        return jnp.mean(values)
    if reduce == "hinge":
        return jnp.mean(jax.nn.relu(values - target) ** 2)
    raise ConfigError(f"unknown penalty reduction {reduce!r}; expected one of {', '.join(REDUCTIONS)}.")


def penalty(params, interval, *, basis: Basis, mode: str = "integral_lipschitz", reduce: str = "max",
            target: float = 0.0, weights: float | Sequence[float] = 1.0, grid: int = C.DEFAULT_GRID,
            select: Callable | None = None):
    """Stability penalty of every filter bank in ``params``: a scalar.

    ``sum_l w_l reduce_f(c_{l,f})`` with ``c_{l,f}`` the constant ``mode`` of
    filter ``f`` of bank ``l`` on a ``grid``-point grid over ``interval``:
    ``integral_lipschitz`` (``max |lam h'|``, the default), ``lipschitz``
    (``max |h'|``), ``pairwise`` (``C2``) or ``kernel`` (``kappa``).
    Reductions: ``max``, ``mean``, or ``hinge`` (mean of
    ``max(c - target, 0)^2``). Differentiable; works under ``jit``.

    Args:
      params: taps, or a pytree holding them.
      interval: ``(a, b)``, the spectral interval of the training graph.
      basis: the filters' basis, required: the same taps are a different
        filter in another basis (``Basis()`` for monomials,
        ``Basis("chebyshev", (a, b))``), so it is never guessed.
      weights: one weight for all banks, or one per bank.
      select: chooses tap leaves (see :func:`find_taps`).
    """
    if not isinstance(basis, Basis):
        raise ConfigError(f"penalty basis must be a stablefilt.Basis (the taps' basis); got {basis!r}.")
    if mode in MODEL_MODES:
        raise ConfigError(f"penalty mode {mode!r} needs the whole model; use "
                          f"{'model_penalty' if mode == 'model' else 'certified_penalty'}.")
    banks = find_taps(params, select)
    ws = [float(weights)] * len(banks) if isinstance(weights, (int, float)) else [float(w) for w in weights]
    if len(ws) != len(banks):
        raise ConfigError(f"penalty weights list {len(ws)} values for {len(banks)} filter banks.")
    total = 0.0
    for w, taps in zip(ws, banks):
        if w == 0.0:
            continue
        total = total + w * _reduce(_per_filter(taps, interval, mode, basis, grid), reduce, target)
    return jnp.asarray(total, dtype=jnp.float32)


def model_penalty(params, interval, *, basis: Basis, grid: int = C.DEFAULT_GRID, readout: str = "node",
                  reduce: str = "max", target: float = 0.0):
    """Differentiable surrogate of the certified model bound per unit
    ``eps`` (first order, bias-free): ``||W||_2 sum_l (prod_{m != l} B_m)
    ||kappa_l||_2`` with ``kappa_l`` the grid kernel bounds of bank ``l``
    (``F_in x F_out``) and ``B_m`` the grid sup of ``||H_m(lam)||_2``
    (docs/theory.md section 5 item 6). ``readout`` scales as in the
    certificate is left out (the node count is not known here)."""
    banks = find_taps(params)
    kap = [C.kernel_bound(t, interval, basis, grid) for t in banks]
    sups = [C.bank_sup_norm(t, interval, basis, grid) for t in banks]
    total = 0.0
    for i, k in enumerate(kap):
        prod = 1.0
        for j, s in enumerate(sups):
            if j != i:
                prod = prod * s
        kn = jnp.linalg.norm(k, ord=2) if k.ndim == 2 else jnp.abs(k)
        total = total + prod * kn
    if isinstance(params, dict) and "readout" in params and readout != "none":
        total = total * jnp.linalg.norm(params["readout"]["weight"], ord=2)
    if reduce == "hinge":
        return jax.nn.relu(total - target) ** 2
    return total


class StabilityPenaltyState(NamedTuple):
    """No state is kept; the penalty is recomputed from the params."""


def stability_penalty(weight: float, penalty_fn: Callable) -> optax.GradientTransformation:
    """An optax transformation adding ``weight * grad(penalty_fn)(params)`` to
    the updates (chain it before the optimiser, as with
    ``optax.add_decayed_weights``).

    Example::

        tx = optax.chain(
            stability_penalty(0.1, lambda p: penalty(p, (0.0, 2.0), basis=Basis("chebyshev", (0.0, 2.0)))),
            optax.adam(1e-2),
        )
    """
    grad_fn = jax.grad(penalty_fn)

    def init(params):
        del params
        return StabilityPenaltyState()

    def update(updates, state, params=None):
        if params is None:
            raise ValueError("stability_penalty needs the params: call tx.update(grads, state, params).")
        g = grad_fn(params)
        updates = jax.tree_util.tree_map(lambda u, gi: u + weight * gi, updates, g)
        return updates, state

    return optax.GradientTransformation(init, update)
