"""One optimiser step and the task loss's terms, shared by the trainer on
one device and on several."""

from __future__ import annotations

import jax
import optax


def loss_terms(out, y, task: str):
    """The task loss before averaging: per output position the softmax
    cross-entropy (classify) or the squared error (regress; a single
    output's targets carry no output axis).

    Classification takes one-hot targets, not integer labels: the integer
    form gathers with index arrays that XLA constant-folds at compile time,
    for seconds and with a warning on the terminal at 10^5 nodes."""
    if task == "classify":
        return optax.softmax_cross_entropy(out, jax.nn.one_hot(y, out.shape[-1], dtype=out.dtype))
    return ((out[..., 0] if y.ndim < out.ndim else out) - y) ** 2


def optimiser_step(loss_fn, tx: optax.GradientTransformation):
    """A jitted ``step(params, opt_state, *batch) -> (params, opt_state, loss,
    task_loss, penalty)`` for ``loss_fn(params, *batch) -> (loss, (task_loss,
    penalty))``: the gradient of the loss, then ``tx``'s update (optax)."""

    @jax.jit
    def step(params, opt_state, *batch):
        (loss, (tl, pen)), grads = jax.value_and_grad(loss_fn, has_aux=True)(params, *batch)
        updates, opt_state = tx.update(grads, opt_state, params)
        params = optax.apply_updates(params, updates)
        return params, opt_state, loss, tl, pen

    return step
