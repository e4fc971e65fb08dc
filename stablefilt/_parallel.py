"""Data-parallel training: the batch of signals split over several devices.

A one-axis :class:`jax.sharding.Mesh` named ``signals`` spans the first
``D`` devices. Parameters, optimiser state and the shift operator are
replicated; each batch ``(B, N, F)`` is split on its first axis with
``NamedSharding(mesh, PartitionSpec("signals"))``. Inside
:func:`jax.shard_map` every device runs the model on its ``B / D`` signals
and returns the sum of its per-signal losses and the number of real signals;
one ``psum`` per step adds them up, so the loss is

    L = (sum_i m_i l_i) / (sum_i m_i) + penalty(params)

with ``l_i`` the loss of signal ``i`` and ``m_i = 1`` for real signals,
``0`` for padding. The gradient is taken outside the ``shard_map`` (its
transpose carries the cross-device sum), the optimiser update runs
replicated. ``L`` equals the single-device mean loss because every signal
has the same number of loss terms (nodes times outputs), so the mean over
all terms is the mean of the per-signal means; only the summation order, and
so the float round-off, differs.

Batches whose size ``B`` is not a multiple of ``D`` are padded with zero
signals of weight ``m_i = 0``: any batch size works with any device count,
and the padded signals change neither the loss nor its gradient.

Multi-process runs (one process per host, ``jax.distributed.initialize``)
use the same code: the mesh then spans devices of every process and each
process supplies the slices of the batch its own devices hold.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

from ._errors import ConfigError
from ._model import ModelSpec, forward
from ._optstep import loss_terms, optimiser_step

AXIS = "signals"


def check_devices(count) -> int:
    """``count`` as an int, refused unless ``1 <= count <= jax.device_count()``."""
    have = jax.device_count()
    if not isinstance(count, int) or isinstance(count, bool) or count < 1:
        raise ConfigError(f"train.devices = {count!r} is invalid; expected a positive integer.")
    if count > have:
        raise ConfigError(f"train.devices = {count} asks for more devices than the {have} JAX sees "
                          "(on CPU, set XLA_FLAGS=--xla_force_host_platform_device_count=N before starting).")
    return count


def signal_mesh(count: int) -> Mesh:
    """A one-axis mesh named ``signals`` over the first ``count`` devices."""
    from ._sharded import require_shard_map

    require_shard_map()
    return Mesh(np.array(jax.devices()[:check_devices(count)]), (AXIS,))


def per_signal_loss(out, y, task: str):
    """``l_i``: the task loss of each signal, shape ``(B,)``; its mean over
    the batch is the trainer's ``task_loss`` (softmax cross-entropy or the
    squared error, averaged over nodes and outputs)."""
    terms = loss_terms(out, y, task)
    return terms.reshape(terms.shape[0], -1).mean(axis=1)


def per_signal_metric(out, y, task: str):
    """Accuracy (classify) or mean squared error (regress) of each signal."""
    if task == "classify":
        terms = (jnp.argmax(out, axis=-1) == y).astype(jnp.float32)
    else:
        terms = ((out[..., 0] if y.ndim < out.ndim else out) - y) ** 2
    return terms.reshape(terms.shape[0], -1).mean(axis=1)


def pad_batch(xb, yb, devices: int):
    """``(x, y, m)``: the batch padded with zero signals to a multiple of
    ``devices`` signals, and the weights ``m`` (1 real, 0 padding)."""
    xb, yb = np.asarray(xb), np.asarray(yb)
    b = xb.shape[0]
    pad = (-b) % devices
    m = np.concatenate([np.ones(b, np.float32), np.zeros(pad, np.float32)])
    if pad:
        xb = np.concatenate([xb, np.zeros((pad,) + xb.shape[1:], xb.dtype)])
        yb = np.concatenate([yb, np.zeros((pad,) + yb.shape[1:], yb.dtype)])
    return xb, yb, m


def _split(a: np.ndarray, sharding: NamedSharding):
    """A global array split by ``sharding``; every process passes the same
    host array and keeps the slices of its own devices."""
    return jax.make_array_from_callback(a.shape, sharding, lambda idx: a[idx])


def parallel_functions(spec: ModelSpec, task: str, tx, pen_fn, active: bool, devices: int):
    """``(step, evaluate)`` with the trainer's signatures,
    ``step(params, opt_state, op, xb, yb) -> (params, opt_state, loss,
    task_loss, penalty)`` and ``evaluate(params, op, xb, yb) -> (loss,
    metric)``, running the batch split over ``devices`` devices (module
    docstring). The metric is accuracy, or the RMSE over every output."""
    mesh = signal_mesh(devices)
    rep, split = NamedSharding(mesh, P()), NamedSharding(mesh, P(AXIS))

    def sums(params, op, xb, yb, mb):
        def local(params, op, xb, yb, mb):
            out = forward(params, op, xb, spec)
            lo = jnp.sum(per_signal_loss(out, yb, task) * mb)
            me = jnp.sum(per_signal_metric(out, yb, task) * mb)
            return jax.lax.psum(lo, AXIS), jax.lax.psum(me, AXIS), jax.lax.psum(jnp.sum(mb), AXIS)

        return jax.shard_map(local, mesh=mesh, in_specs=(P(), P(), P(AXIS), P(AXIS), P(AXIS)),
                             out_specs=(P(), P(), P()))(params, op, xb, yb, mb)

    def loss_fn(params, op, xb, yb, mb):
        lo, _, n = sums(params, op, xb, yb, mb)
        tl = lo / n
        pen = pen_fn(params) if active else jnp.float32(0.0)
        return tl + pen, (tl, pen)

    _step = optimiser_step(loss_fn, tx)

    @jax.jit
    def _evaluate(params, op, xb, yb, mb):
        lo, me, n = sums(params, op, xb, yb, mb)
        metric = me / n if task == "classify" else jnp.sqrt(me / n)
        return lo / n, metric

    placed = {}

    def _replicated(tree):
        # Arrays already replicated on the mesh (the previous step's output) stay put.
        return jax.tree_util.tree_map(
            lambda a: a if isinstance(a, jax.Array) and a.sharding == rep else _split(np.asarray(a), rep), tree)

    def _place_op(op):
        # The operator is the same object every step: copy it to the devices once.
        key = id(op)
        if key not in placed:
            placed.clear()
            placed[key] = (op, _replicated(op))
        return placed[key][1]

    def _place(params, xb, yb):
        x, y, m = pad_batch(xb, yb, devices)
        return _replicated(params), _split(x, split), _split(y, split), _split(m, split)

    def step(params, opt_state, op, xb, yb):
        params, x, y, m = _place(params, xb, yb)
        return _step(params, _replicated(opt_state), _place_op(op), x, y, m)

    def evaluate(params, op, xb, yb):
        params, x, y, m = _place(params, xb, yb)
        return _evaluate(params, _place_op(op), x, y, m)

    return step, evaluate


def node_split_functions(spec: ModelSpec, task: str, tx, pen_fn, active: bool, devices: int, method: str):
    """``(step, evaluate)`` with the trainer's signatures that split the
    graph's nodes over ``devices`` devices instead of the batch
    (:func:`stablefilt._sharded.sharded_forward`), the partition found by
    ``method`` (``rcm`` or ``metis``) on the first call. The loss is the
    trainer's: the mean of the per-signal losses plus the penalty."""
    from ._partition import partition_plan
    from ._sharded import node_mesh, sharded_forward, sharded_operator

    check_devices(devices)
    mesh = node_mesh(devices)
    rep = NamedSharding(mesh, P())

    def outputs(params, sop, xb, yb):
        out = sharded_forward(params, sop, xb, spec, mesh)
        return per_signal_loss(out, yb, task), per_signal_metric(out, yb, task)

    def loss_fn(params, sop, xb, yb):
        tl = jnp.mean(outputs(params, sop, xb, yb)[0])
        pen = pen_fn(params) if active else jnp.float32(0.0)
        return tl + pen, (tl, pen)

    _step = optimiser_step(loss_fn, tx)

    @jax.jit
    def _evaluate(params, sop, xb, yb):
        lo, me = outputs(params, sop, xb, yb)
        return jnp.mean(lo), (jnp.mean(me) if task == "classify" else jnp.sqrt(jnp.mean(me)))

    placed = {}

    def _sharded(op):
        # The partition and the devices' rows, found once per operator.
        key = id(op)
        if key not in placed:
            import scipy.sparse as sp

            m = sp.csr_array((np.asarray(op.data, np.float64), np.asarray(op.indices), np.asarray(op.indptr)),
                             shape=op.shape)
            placed.clear()
            placed[key] = (op, sharded_operator(partition_plan(m, devices, method), mesh, dtype=op.data.dtype))
        return placed[key][1]

    def _replicated(tree):
        return jax.tree_util.tree_map(
            lambda a: a if isinstance(a, jax.Array) and a.sharding == rep else _split(np.asarray(a), rep), tree)

    def step(params, opt_state, op, xb, yb):
        return _step(_replicated(params), _replicated(opt_state), _sharded(op), _replicated(xb), _replicated(yb))

    def evaluate(params, op, xb, yb):
        return _evaluate(_replicated(params), _sharded(op), _replicated(xb), _replicated(yb))

    return step, evaluate
