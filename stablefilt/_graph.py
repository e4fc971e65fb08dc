"""Graph shift operators: construction from arrays, sparse matrices and edge
lists, validation, the standard kinds, fingerprints and node reordering.

The stored operator is always a float64 ``scipy.sparse.csr_array`` with sorted
indices. Everything that certifies works on it; the JAX training path gets a
float32 copy from :func:`stablefilt.jax_operator`.
"""

from __future__ import annotations

import dataclasses
import hashlib

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from ._errors import GraphError
from ._interval import spectral_interval

#: Kinds of shift operator built from a weighted adjacency matrix.
KINDS = ("as-is", "scaled-adjacency", "laplacian", "normalized-laplacian")

#: Symmetry tolerance, relative to the largest absolute entry.
SYMMETRY_TOL = 1e-10

#: Node ids in an edge list must lie below this: the sparse products index
#: nodes with int32 (scipy's CSR and the JAX path).
MAX_NODES = 2**31 - 1


@dataclasses.dataclass(frozen=True)
class ShiftOperator:
    """A real symmetric graph shift operator ``S`` (N x N), stored in float64.

    Attributes:
      matrix: ``scipy.sparse.csr_array`` of shape ``(N, N)``, float64,
        exactly symmetric (the mean of the input and its transpose).
      kind: one of :data:`KINDS`; how ``matrix`` was built from the input.
      scale: for ``scaled-adjacency``, the certified upper bound on
        ``||A||_2`` the adjacency was divided by; 1.0 otherwise.
    """

    matrix: sp.csr_array
    kind: str = "as-is"
    scale: float = 1.0

    @property
    def nodes(self) -> int:
        return self.matrix.shape[0]

    @property
    def edges(self) -> int:
        """Number of stored off-diagonal entries above the diagonal."""
        m = sp.triu(self.matrix, k=1)
        return int(m.count_nonzero())

    def dense(self) -> np.ndarray:
        return self.matrix.toarray()

    def fingerprint(self) -> str:
        """SHA-256 of the CSR arrays (shape, indptr, indices, data), hex."""
        m = self.matrix
        h = hashlib.sha256()
        h.update(np.asarray(m.shape, dtype=np.int64).tobytes())
        h.update(np.asarray(m.indptr, dtype=np.int64).tobytes())
        h.update(np.asarray(m.indices, dtype=np.int64).tobytes())
        h.update(np.asarray(m.data, dtype=np.float64).tobytes())
        return h.hexdigest()

    def permuted(self, perm: np.ndarray) -> "ShiftOperator":
        """The operator ``P S P^T`` with node ``perm[i]`` renamed ``i``."""
        perm = np.asarray(perm)
        m = self.matrix[perm][:, perm]
        return ShiftOperator(_canonical(m), self.kind, self.scale)


def _canonical(m) -> sp.csr_array:
    m = sp.csr_array(m, dtype=np.float64)
    m.sum_duplicates()
    m.eliminate_zeros()
    m.sort_indices()
    return m


def symmetric(m) -> sp.csr_array:
    """Exactly symmetric canonical CSR: products like ``D A D`` round each
    entry on its own, so a built operator is averaged with its transpose."""
    m = sp.csr_array(m, dtype=np.float64)
    return _canonical((m + m.T) * 0.5)


def _check_matrix(m: sp.csr_array, name: str, tol: float) -> sp.csr_array:
    if m.ndim != 2 or m.shape[0] != m.shape[1]:
        raise GraphError(f"{name} must be a square matrix; got shape {m.shape}.")
    if m.shape[0] < 1:
        raise GraphError(f"{name} must have at least one node; it has none.")
    if not np.all(np.isfinite(m.data)):
        raise GraphError(f"{name} has NaN or infinite entries; every weight must be finite.")
    scale = float(np.max(np.abs(m.data))) if m.nnz else 0.0
    asym = abs(m - m.T)
    worst = float(asym.max()) if asym.nnz else 0.0
    if worst > tol * max(scale, np.finfo(float).tiny):
        raise GraphError(
            f"{name} is not symmetric: the largest |S_ij - S_ji| is {worst:.3g}, "
            f"above the tolerance {tol:g} relative to the largest entry {scale:.3g}."
        )
    return _canonical((m + m.T) * 0.5)


def as_matrix(source, name: str = "the graph") -> sp.csr_array:
    """Turn a dense array or scipy sparse matrix into float64 CSR, unchecked."""
    if sp.issparse(source):
        if np.iscomplexobj(source.data):
            raise GraphError(f"{name} has complex entries; a shift operator needs real weights.")
        return _canonical(source)
    if np.iscomplexobj(source):  # a cast to float64 would drop the imaginary parts
        raise GraphError(f"{name} has complex entries; a shift operator needs real weights.")
    try:
        arr = np.asarray(source, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise GraphError(f"{name} must be a numeric matrix; it could not be read as numbers.") from exc
    if arr.ndim != 2:
        raise GraphError(f"{name} must be a 2-D matrix; got an array with {arr.ndim} dimensions.")
    if arr.shape[0] != arr.shape[1]:
        raise GraphError(f"{name} must be a square matrix; got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)):
        raise GraphError(f"{name} has NaN or infinite entries; every weight must be finite.")
    return _canonical(sp.csr_array(arr))


def from_edges(src, dst, weight=None, nodes: int | None = None, name: str = "the edge list") -> sp.csr_array:
    """Symmetric weighted adjacency from an undirected edge list.

    Each row ``(src[e], dst[e], weight[e])`` is one undirected edge. Node ids
    are integers in ``[0, nodes)``; ``nodes`` defaults to the largest id plus
    one. An edge listed twice (either orientation) must carry the same weight.
    """
    src = np.asarray(src)
    dst = np.asarray(dst)
    w = np.ones(len(src)) if weight is None else np.asarray(weight, dtype=np.float64)
    if not (src.shape == dst.shape == w.shape) or src.ndim != 1:
        raise GraphError(f"{name} must have columns src, dst and weight of equal length.")
    for col, arr in (("src", src), ("dst", dst)):
        if arr.size and (not np.issubdtype(arr.dtype, np.number) or np.any(arr != np.round(arr))):
            raise GraphError(f"{name}: node ids in column {col} must be integers.")
        if arr.size and np.any(arr < 0):
            raise GraphError(f"{name}: node ids in column {col} must be non-negative.")
    src = src.astype(np.int64)
    dst = dst.astype(np.int64)
    if not np.all(np.isfinite(w)):
        raise GraphError(f"{name} has NaN or infinite weights; every weight must be finite.")
    top = int(max(src.max(initial=-1), dst.max(initial=-1))) + 1
    if nodes is None:
        nodes = top
    if nodes < 1:
        raise GraphError(f"{name} has no nodes; a graph needs at least one.")
    if top > nodes:
        raise GraphError(f"{name} names node {top - 1}, out of range for a graph of {nodes} nodes.")
    if nodes > MAX_NODES:
        raise GraphError(f"{name} names node {top - 1}; node ids must be below {MAX_NODES} (int32 sparse indices).")
    lo = np.minimum(src, dst)
    hi = np.maximum(src, dst)
    key = lo * nodes + hi
    order = np.argsort(key, kind="stable")
    ks, ws = key[order], w[order]
    same = ks[1:] == ks[:-1]
    if np.any(same & (ws[1:] != ws[:-1])):
        i = int(np.argmax(same & (ws[1:] != ws[:-1])))
        a, b = divmod(int(ks[i]), nodes)
        raise GraphError(f"{name} lists edge ({a}, {b}) twice with different weights {ws[i]:g} and {ws[i + 1]:g}.")
    keep = np.concatenate([[True], ~same]) if len(ks) else np.zeros(0, bool)
    ks, ws = ks[keep], ws[keep]
    a, b = np.divmod(ks, nodes)
    off = a != b
    rows = np.concatenate([a, b[off]])
    cols = np.concatenate([b, a[off]])
    vals = np.concatenate([ws, ws[off]])
    try:
        return _canonical(sp.coo_array((vals, (rows, cols)), shape=(nodes, nodes)))
    except MemoryError:
        raise GraphError(f"{name} names node {top - 1}: a graph of {nodes} nodes does not fit in memory.") from None


def shift_operator(source, kind: str = "as-is", *, tol: float = SYMMETRY_TOL, name: str = "the graph") -> ShiftOperator:
    """Build and validate a graph shift operator.

    Args:
      source: a dense ``(N, N)`` array, a scipy sparse matrix, or a
        :class:`ShiftOperator` (its matrix is used as the input).
      kind: ``"as-is"`` uses the symmetric matrix as given; the others read it
        as a weighted adjacency ``A`` (non-negative weights, no self-loops):
        ``"scaled-adjacency"`` is ``A / s`` with ``s`` a certified upper bound
        on ``||A||_2`` (so the spectrum lies in ``[-1, 1]``);
        ``"laplacian"`` is ``D - A``; ``"normalized-laplacian"`` is
        ``I - D^-1/2 A D^-1/2`` with isolated nodes given ``D^-1/2 = 0``
        (common practice; networkx does the same).
      tol: symmetry tolerance, relative to the largest absolute entry.
      name: how error messages refer to the input.

    Returns:
      A :class:`ShiftOperator`.

    Raises:
      GraphError: the input is not square, not symmetric within ``tol``, has
        non-finite entries or no nodes, or violates what ``kind`` needs.
    """
    if kind not in KINDS:
        raise GraphError(f"unknown shift kind {kind!r}; expected one of {', '.join(KINDS)}.")
    if isinstance(source, ShiftOperator):
        source = source.matrix
    m = _check_matrix(as_matrix(source, name), name, tol)
    if kind == "as-is":
        return ShiftOperator(m, kind)
    if m.nnz and m.data.min() < 0:
        raise GraphError(f"{name} has negative weights; kind {kind!r} needs a non-negative adjacency.")
    if m.diagonal().any():
        raise GraphError(f"{name} has self-loops (non-zero diagonal); kind {kind!r} needs an adjacency without them.")
    n = m.shape[0]
    deg = np.asarray(m.sum(axis=1)).ravel()
    if kind == "laplacian":
        return ShiftOperator(symmetric(sp.diags_array(deg) - m), kind)
    if kind == "normalized-laplacian":
        inv = np.zeros(n)
        pos = deg > 0
        inv[pos] = 1.0 / np.sqrt(deg[pos])
        d = sp.diags_array(inv)
        eye = sp.diags_array(pos.astype(np.float64))
        return ShiftOperator(symmetric(eye - d @ m @ d), kind)
    # scaled-adjacency: divide by a certified bound on the spectral radius.
    iv = spectral_interval(ShiftOperator(m, "as-is"))
    s = max(abs(iv.lower), abs(iv.upper))
    if s == 0.0:
        return ShiftOperator(m, kind, 1.0)
    return ShiftOperator(symmetric(m / s), kind, float(s))


def reorder(op: ShiftOperator) -> tuple[ShiftOperator, np.ndarray]:
    """Reverse Cuthill-McKee node order (``scipy.sparse.csgraph``).

    Returns ``(P S P^T, perm)``; signals follow with ``x[perm]`` and are put
    back with ``y[inverse]`` where ``inverse = np.argsort(perm)``. Sparse
    products are several times faster in this order on geometric graphs.
    """
    perm = reverse_cuthill_mckee(sp.csr_matrix(op.matrix), symmetric_mode=True)
    perm = np.asarray(perm, dtype=np.int64)
    return op.permuted(perm), perm
