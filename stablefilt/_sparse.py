"""The shift operator on the JAX training path: a BCSR sparse product with a
backward pass that reuses the forward kernel.

Measured on this machine (docs in benchmarks/): ``jax.experimental.sparse``
BCSR times a dense block runs a native CPU kernel, faster than scipy's CSR
product; its default gradient with respect to the dense operand takes a slow
gather/scatter path. Because ``S`` is symmetric, the cotangent of ``S x`` with
respect to ``x`` is ``S g``, so the backward is one more forward product. The
gradient with respect to the edge weights is dropped (the graph is fixed while
training).
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
from jax.experimental import sparse as jsparse

from ._filters import Basis, run_filter
from ._graph import ShiftOperator


@jax.tree_util.register_pytree_node_class
class JaxShift:
    """A symmetric shift operator as BCSR arrays, a JAX pytree.

    Pass it to jitted functions as an argument, not a closure: a closed-over
    sparse matrix is constant-folded at great compile cost.

    Attributes:
      data, indices, indptr: CSR arrays (indices int32).
      shape: ``(N, N)``, static.
    """

    def __init__(self, data, indices, indptr, shape):
        self.data = data
        self.indices = indices
        self.indptr = indptr
        self.shape = tuple(shape)

    def tree_flatten(self):
        return (self.data, self.indices, self.indptr), self.shape

    @classmethod
    def tree_unflatten(cls, shape, children):
        return cls(*children, shape)

    @property
    def nodes(self) -> int:
        return self.shape[0]

    def __matmul__(self, x):
        return shift_product(self, x)


def jax_operator(op: ShiftOperator, dtype=jnp.float32) -> JaxShift:
    """Copy a :class:`ShiftOperator` to the JAX path (float32 by default)."""
    m = op.matrix
    return JaxShift(
        jnp.asarray(np.asarray(m.data), dtype=dtype),
        jnp.asarray(np.asarray(m.indices, dtype=np.int32)),
        jnp.asarray(np.asarray(m.indptr, dtype=np.int32)),
        m.shape,
    )


@functools.partial(jax.custom_vjp, nondiff_argnums=(3,))
def _product(data, indices, indptr, shape, x):
    return jsparse.BCSR((data, indices, indptr), shape=shape) @ x


def _product_fwd(data, indices, indptr, shape, x):
    return _product(data, indices, indptr, shape, x), (data, indices, indptr)


def _product_bwd(shape, res, g):
    data, indices, indptr = res
    # S symmetric: d(S x)/dx applied to g is S^T g = S g.
    return None, None, None, _product(data, indices, indptr, shape, g)


_product.defvjp(_product_fwd, _product_bwd)


def shift_product(op: JaxShift, x):
    """``S @ x`` for ``x`` of shape ``(N,)`` or ``(N, F)``; fold batches of
    signals into the feature axis (vmap falls back to a slow kernel)."""
    x = jnp.asarray(x)
    data = op.data.astype(x.dtype) if op.data.dtype != x.dtype else op.data
    if x.ndim == 1:
        return _product(data, op.indices, op.indptr, op.shape, x[:, None])[:, 0]
    return _product(data, op.indices, op.indptr, op.shape, x)


def apply_filter(op: JaxShift, taps, x, basis: Basis = Basis()):
    """``y = sum_k p_k(S) x c_k`` on the JAX path by ``K - 1`` products.

    Works under ``jit``, ``grad`` and ``vmap``. Shapes as
    :func:`stablefilt._filters.run_filter`.
    """
    return run_filter(lambda z: shift_product(op, z), taps, jnp.asarray(x), basis, xp=jnp)
