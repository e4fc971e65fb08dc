"""The shift product, filter banks and the GNN with the graph's nodes split
over devices: each device holds ``R`` rows of ``S`` and of every signal.

One product ``y = S x`` on device ``d`` (plan in :mod:`stablefilt._partition`):

1. ``p_d = x_d[send_d]``: the rows other devices read;
2. ``P``: the rows device ``d`` reads from others, received by one
   ``jax.lax.ppermute`` per shift with traffic (or one ``all_gather`` of
   every device's boundary rows), inside :func:`jax.shard_map`;
3. ``y_d = L_d [x_d ; P]``, with ``L_d`` the device's rows of ``S`` as a
   CSR matrix whose columns index the extended vector (the BCSR kernel of
   the single-device path, :mod:`stablefilt._sparse`).

Only ``x`` (``R x M`` per device) and the published rows ever sit on a
device, never the whole signal, so a graph too large for one device's
memory fits on several. The backward pass is sharded the same way: the
cotangent of ``L_d e`` is ``L_d^T g`` (a stored transposed CSR, one more
local product) and the exchange transposes to the reverse exchange
(``ppermute`` backwards, ``all_gather`` to a reduce-scatter), which sends
each halo row's cotangent back to its owner. The filter recursions and the layers are those of
:func:`stablefilt._filters.run_filter` and :func:`stablefilt._model.forward`,
with this product in place of the single-device one.
"""

from __future__ import annotations

import dataclasses
import functools
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp
from jax.experimental import sparse as jsparse
from jax.sharding import Mesh, NamedSharding
from jax.sharding import PartitionSpec as P

from ._errors import ConfigError
from ._filters import Basis, run_filter
from ._model import ModelSpec, apply_readout, forward
from ._partition import HaloPlan

AXIS = "nodes"


def require_shard_map() -> None:
    """Refuse, in one sentence, a JAX without ``jax.shard_map`` (added to
    the public API in JAX 0.7)."""
    if not hasattr(jax, "shard_map"):
        raise ConfigError(f"several devices need JAX 0.7 or later (jax.shard_map); this is JAX {jax.__version__}.")


def node_mesh(devices: int) -> Mesh:
    """A one-axis mesh named ``nodes`` over the first ``devices`` devices."""
    require_shard_map()
    have = jax.device_count()
    if not isinstance(devices, int) or devices < 1 or devices > have:
        raise ConfigError(f"the graph can be split over 1 to {have} devices (the ones JAX sees); got {devices!r}.")
    return Mesh(np.array(jax.devices()[:devices]), (AXIS,))


class ShardedShift(NamedTuple):
    """A :class:`HaloPlan` on the devices of a mesh (a pytree).

    ``local`` holds ``(D, ...)`` arrays split on their first axis (device
    ``d`` holds row ``d``): ``send`` and the CSR arrays ``(data, indices,
    indptr)`` of each device's rows ``L_d`` (``R x E``, columns in the
    extended vector of ``E`` rows, :attr:`HaloPlan.extended`) and of their transpose ``L_d^T``, padded to equal
    lengths with zero entries in the last row. ``position`` is ``(N,)``,
    replicated. ``block`` (``R``), ``devices`` and ``shifts`` are static."""

    local: tuple
    position: jax.Array
    block: int
    devices: int
    shifts: tuple  # (s, W_s) of a permute exchange; () for gather


jax.tree_util.register_pytree_node(
    ShardedShift,
    lambda s: ((s.local, s.position), (s.block, s.devices, s.shifts)),
    lambda aux, ch: ShardedShift(*ch, *aux),
)


def _padded_csr(m: sp.csr_array, nnz: int):
    """``(data, indices, indptr)`` of ``m`` with zero entries (column 0)
    appended to its last row up to ``nnz`` entries."""
    k = m.nnz
    data = np.concatenate([m.data, np.zeros(nnz - k)])
    indices = np.concatenate([m.indices, np.zeros(nnz - k, np.int64)])
    indptr = m.indptr.astype(np.int64).copy()
    indptr[-1] = nnz
    return data, indices, indptr


def sharded_operator(plan: HaloPlan, mesh: Mesh, dtype=jnp.float32) -> ShardedShift:
    """Copy ``plan`` to the devices of ``mesh`` (its size must be the
    plan's device count)."""
    if mesh.size != plan.devices:
        raise ConfigError(f"the partition has {plan.devices} parts but the mesh {mesh.size} devices.")
    split, rep = NamedSharding(mesh, P(AXIS)), NamedSharding(mesh, P())

    def put(a, sharding, dt):
        a = np.asarray(a, dt)
        return jax.make_array_from_callback(a.shape, sharding, lambda idx: a[idx])

    r, ext = plan.block, plan.extended
    z = max(1, int(plan.nnz.max()))
    fwd, bwd = [], []
    for d in range(plan.devices):
        k = int(plan.nnz[d])
        m = sp.csr_array((plan.vals[d, :k], (plan.rows[d, :k], plan.cols[d, :k])), shape=(r, ext))
        m.sum_duplicates()
        fwd.append(_padded_csr(m, z))
        bwd.append(_padded_csr(sp.csr_array(m.T), z))
    arrays = [plan.send] + [np.stack([c[i] for c in fwd]) for i in range(3)] + [
        np.stack([c[i] for c in bwd]) for i in range(3)]
    kinds = [np.int32, dtype, np.int32, np.int32, dtype, np.int32, np.int32]
    local = tuple(put(a, split, k) for a, k in zip(arrays, kinds))
    shifts = tuple((int(a), int(w)) for a, w in plan.shifts) if plan.exchange == "permute" else ()
    return ShardedShift(local, put(plan.position, rep, np.int32), int(plan.block), int(plan.devices), shifts)


def _varying(y, like):
    """``y`` marked as varying over the devices wherever ``like`` is (the
    sparse kernel's output carries no such mark inside ``shard_map``)."""
    want, have = _varying_axes(like), _varying_axes(y)
    missing = tuple(a for a in want if a not in have)
    return jax.lax.pcast(y, missing, to="varying") if missing else y


def _varying_axes(a) -> frozenset:
    t = jax.typeof(a)
    kind = getattr(t, "manual_axis_type", None)  # jax 0.10; older versions call it vma
    return frozenset(kind.varying) if kind is not None else frozenset(getattr(t, "vma", ()))


@functools.partial(jax.custom_vjp, nondiff_argnums=(0, 1))
def _csr_product(shape, tshape, fwd, bwd, x):
    return _varying(jsparse.BCSR(fwd, shape=shape) @ x, x)


def _csr_product_fwd(shape, tshape, fwd, bwd, x):
    return _csr_product(shape, tshape, fwd, bwd, x), (fwd, bwd)


def _csr_product_bwd(shape, tshape, res, g):
    fwd, bwd = res
    # The cotangent of L x with respect to x is L^T g, one more CSR product
    # (L_d is not symmetric, so its transpose is stored); the entries of L
    # get no gradient (the graph is fixed while training).
    return None, None, _csr_product(tshape, shape, bwd, fwd, g)


_csr_product.defvjp(_csr_product_fwd, _csr_product_bwd)


def _local_product(op: ShardedShift, local, x):
    """``S x`` on one device's rows (inside ``shard_map``); ``x`` is
    ``(R, M)``, the device's rows of the signal."""
    send, data, indices, indptr, tdata, tindices, tindptr = (a[0] for a in local)
    out = x[send]
    if op.shifts:  # permute: each shift's rows straight to the device that reads them
        d, pieces, off = op.devices, [x], 0
        for s, w in op.shifts:
            pieces.append(jax.lax.ppermute(out[off:off + w], AXIS, perm=[(i, (i + s) % d) for i in range(d)]))
            off += w
        ext = jnp.concatenate(pieces, axis=0)
    else:  # gather: every device receives all published rows, (D W, M)
        ext = jnp.concatenate([x, jax.lax.all_gather(out, AXIS, tiled=True)], axis=0)
    block = op.block
    shape = (block, ext.shape[0])
    return _csr_product(shape, shape[::-1], (data.astype(x.dtype), indices, indptr),
                        (tdata.astype(x.dtype), tindices, tindptr), ext)


def _to_slots(op: ShardedShift, x, devices: int, axis: int):
    """``x`` with its node axis (``axis``, length ``N``) spread over the
    ``D R`` padded slots (zero rows in the padding)."""
    x = jnp.moveaxis(x, axis, 0)
    out = jnp.zeros((devices * op.block,) + x.shape[1:], x.dtype).at[op.position].set(x)
    return jnp.moveaxis(out, 0, axis)


def _from_slots(op: ShardedShift, y, axis: int):
    return jnp.take(y, op.position, axis=axis)


def slot_product(op: ShardedShift, xs, mesh: Mesh):
    """``S x`` for ``xs`` of shape ``(D R, M)`` already in slot order (split
    over ``mesh``; what the layers of :func:`sharded_forward` pass along):
    the exchange and the local products only."""

    def body(local, xl):
        return _local_product(op, local, xl)

    spec = P(AXIS)
    return jax.shard_map(body, mesh=mesh, in_specs=(spec, spec), out_specs=spec)(op.local, xs)


def sharded_product(op: ShardedShift, x, mesh: Mesh):
    """``S x`` for ``x`` of shape ``(N,)`` or ``(N, M)`` in the graph's node
    order, computed with the nodes split over ``mesh``. Equals the
    single-device product up to float round-off."""
    x = jnp.asarray(x)
    vec = x.ndim == 1
    y = _from_slots(op, slot_product(op, _to_slots(op, x[:, None] if vec else x, mesh.size, 0), mesh), 0)
    return y[:, 0] if vec else y


def sharded_filter(op: ShardedShift, taps, x, basis: Basis, mesh: Mesh):
    """``sum_k p_k(S) x c_k`` (shapes as :func:`stablefilt._filters.run_filter`)
    with the nodes split over ``mesh``: ``K - 1`` sharded products, each
    with one exchange of boundary rows."""
    x = jnp.asarray(x)
    vec = x.ndim == 1
    xs = _to_slots(op, x[:, None] if vec else x, mesh.size, 0)

    def body(local, c, xl):
        return run_filter(lambda z: _local_product(op, local, z), c, xl, basis, xp=jnp)

    spec = P(AXIS)
    y = jax.shard_map(body, mesh=mesh, in_specs=(spec, P(), spec), out_specs=spec)(op.local, jnp.asarray(taps), xs)
    y = _from_slots(op, y, 0)
    return y[:, 0] if vec else y


def sharded_forward(params: dict, op: ShardedShift, x, spec: ModelSpec, mesh: Mesh):
    """:func:`stablefilt._model.forward` for ``x`` of shape ``(B, N, F_0)``
    with the nodes split over ``mesh``: the layers run sharded, the readout
    (a pooling or a linear map per node) on the gathered last features."""
    inner = dataclasses.replace(spec, readout="none", nodes=0)
    xs = _to_slots(op, jnp.asarray(x), mesh.size, 1)

    def body(local, layers, xl):
        return forward({"layers": layers}, lambda v: _local_product(op, local, v), xl, inner)

    nodes = P(None, AXIS)
    h = jax.shard_map(body, mesh=mesh, in_specs=(P(AXIS), P(), nodes), out_specs=nodes)(
        op.local, params["layers"], xs)
    return apply_readout(params, _from_slots(op, h, 1), spec, jnp)
