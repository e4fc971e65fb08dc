"""The shift product, filter banks and the GNN with the graph's nodes split
over devices: each device holds ``R`` rows of ``S`` and of every signal.

One product ``y = S x`` on device ``d`` (plan in :mod:`stablefilt._partition`):

1. ``p_d = x_d[send_d]``: the boundary rows other devices read;
2. ``P = all_gather(p)``: every device receives all published rows
   (``jax.lax.all_gather`` inside :func:`jax.shard_map`);
3. ``y_d[i] = sum_(i, j) S_ij [x_d ; P]_j`` over the device's stored
   entries (``jax.ops.segment_sum``).

Only ``x`` (``R x M`` per device) and the published rows ever sit on a
device, never the whole signal, so a graph too large for one device's
memory fits on several. The gradient comes from JAX's transpose rules
(``all_gather`` transposes to a reduce-scatter), so the backward pass is
sharded the same way. The filter recursions and the layers are those of
:func:`stablefilt._filters.run_filter` and :func:`stablefilt._model.forward`,
with this product in place of the single-device one.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

from ._errors import ConfigError
from ._filters import Basis, run_filter
from ._model import ModelSpec, forward
from ._partition import HaloPlan

AXIS = "nodes"


def node_mesh(devices: int) -> Mesh:
    """A one-axis mesh named ``nodes`` over the first ``devices`` devices."""
    have = jax.device_count()
    if not isinstance(devices, int) or devices < 1 or devices > have:
        raise ConfigError(f"the graph can be split over 1 to {have} devices (the ones JAX sees); got {devices!r}.")
    return Mesh(np.array(jax.devices()[:devices]), (AXIS,))


class ShardedShift(NamedTuple):
    """A :class:`HaloPlan` on the devices of a mesh (a pytree).

    ``send, rows, cols, vals`` are ``(D, ...)`` arrays split on their first
    axis (device ``d`` holds row ``d``); ``position`` is ``(N,)``,
    replicated. ``block`` (``R``) is static."""

    send: jax.Array
    rows: jax.Array
    cols: jax.Array
    vals: jax.Array
    position: jax.Array
    block: int


jax.tree_util.register_pytree_node(
    ShardedShift,
    lambda s: ((s.send, s.rows, s.cols, s.vals, s.position), s.block),
    lambda block, ch: ShardedShift(*ch, block),
)


def sharded_operator(plan: HaloPlan, mesh: Mesh, dtype=jnp.float32) -> ShardedShift:
    """Copy ``plan`` to the devices of ``mesh`` (its size must be the
    plan's device count)."""
    if mesh.size != plan.devices:
        raise ConfigError(f"the partition has {plan.devices} parts but the mesh {mesh.size} devices.")
    split, rep = NamedSharding(mesh, P(AXIS)), NamedSharding(mesh, P())

    def put(a, sharding, dt):
        a = np.asarray(a, dt)
        return jax.make_array_from_callback(a.shape, sharding, lambda idx: a[idx])

    return ShardedShift(put(plan.send, split, np.int32), put(plan.rows, split, np.int32),
                        put(plan.cols, split, np.int32), put(plan.vals, split, dtype),
                        put(plan.position, rep, np.int32), int(plan.block))


def _local_product(send, rows, cols, vals, block: int, x):
    """``S x`` on one device's rows (inside ``shard_map``); ``x`` is
    ``(R, M)``, the device's rows of the signal."""
    published = jax.lax.all_gather(x[send[0]], AXIS, tiled=True)  # (D W, M)
    ext = jnp.concatenate([x, published], axis=0)
    terms = vals[0].astype(x.dtype)[:, None] * ext[cols[0]]
    return jax.ops.segment_sum(terms, rows[0], num_segments=block)


def _to_slots(op: ShardedShift, x, devices: int, axis: int):
    """``x`` with its node axis (``axis``, length ``N``) spread over the
    ``D R`` padded slots (zero rows in the padding)."""
    x = jnp.moveaxis(x, axis, 0)
    out = jnp.zeros((devices * op.block,) + x.shape[1:], x.dtype).at[op.position].set(x)
    return jnp.moveaxis(out, 0, axis)


def _from_slots(op: ShardedShift, y, axis: int):
    return jnp.take(y, op.position, axis=axis)


def _local_parts(op: ShardedShift):
    return op.send, op.rows, op.cols, op.vals


def sharded_product(op: ShardedShift, x, mesh: Mesh):
    """``S x`` for ``x`` of shape ``(N,)`` or ``(N, M)`` in the graph's node
    order, computed with the nodes split over ``mesh``. Equals the
    single-device product up to float round-off."""
    x = jnp.asarray(x)
    vec = x.ndim == 1
    xs = _to_slots(op, x[:, None] if vec else x, mesh.size, 0)

    def body(send, rows, cols, vals, xl):
        return _local_product(send, rows, cols, vals, op.block, xl)

    spec = P(AXIS)
    y = jax.shard_map(body, mesh=mesh, in_specs=(spec,) * 5, out_specs=spec)(*_local_parts(op), xs)
    y = _from_slots(op, y, 0)
    return y[:, 0] if vec else y


def sharded_filter(op: ShardedShift, taps, x, basis: Basis, mesh: Mesh):
    """``sum_k p_k(S) x c_k`` (shapes as :func:`stablefilt._filters.run_filter`)
    with the nodes split over ``mesh``: ``K - 1`` sharded products, each
    with one exchange of boundary rows."""
    x = jnp.asarray(x)
    vec = x.ndim == 1
    xs = _to_slots(op, x[:, None] if vec else x, mesh.size, 0)

    def body(send, rows, cols, vals, c, xl):
        return run_filter(lambda z: _local_product(send, rows, cols, vals, op.block, z), c, xl, basis, xp=jnp)

    spec = P(AXIS)
    y = jax.shard_map(body, mesh=mesh, in_specs=(spec,) * 4 + (P(), spec), out_specs=spec)(
        *_local_parts(op), jnp.asarray(taps), xs)
    y = _from_slots(op, y, 0)
    return y[:, 0] if vec else y


def sharded_forward(params: dict, op: ShardedShift, x, spec: ModelSpec, mesh: Mesh):
    """:func:`stablefilt._model.forward` for ``x`` of shape ``(B, N, F_0)``
    with the nodes split over ``mesh``: the layers run sharded, the readout
    (a pooling or a linear map per node) on the gathered last features."""
    inner = dataclasses.replace(spec, readout="none", nodes=0)
    xs = _to_slots(op, jnp.asarray(x), mesh.size, 1)

    def body(send, rows, cols, vals, layers, xl):
        def prod(v):
            return _local_product(send, rows, cols, vals, op.block, v)

        return forward({"layers": layers}, prod, xl, inner)

    nodes = P(None, AXIS)
    h = jax.shard_map(body, mesh=mesh, in_specs=(P(AXIS),) * 4 + (P(), nodes), out_specs=nodes)(
        *_local_parts(op), params["layers"], xs)
    h = _from_slots(op, h, 1)
    if spec.readout == "none":
        return h
    r = params["readout"]
    if spec.readout == "mean":
        h = jnp.mean(h, axis=1)
    elif spec.readout == "sum":
        h = jnp.sum(h, axis=1)
    elif spec.readout == "flat":
        h = h.reshape(h.shape[0], -1)
    return h @ r["weight"] + r["bias"]
