"""One optimiser step, shared by the trainer on one device and on several."""

from __future__ import annotations

import jax
import optax


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
