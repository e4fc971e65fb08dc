"""Node partitions of a graph over devices and the halo plan of the sharded
shift product.

Device ``d`` owns the rows of ``S`` of its part ``V_d``. Computing
``(S x)_i`` for ``i`` in ``V_d`` reads ``x_j`` for every neighbour ``j``;
the neighbours outside ``V_d`` are the *halo* of ``d``. Two ways to hand
every device its halo rows before the product, which is local from then on:

* ``permute`` (default): for each shift ``s = 1 .. D-1`` with traffic,
  device ``p`` sends device ``(p + s) mod D`` exactly the rows that device
  reads from it (``jax.lax.ppermute``), padded to the widest pair of that
  shift, ``W_s``; RCM blocks talk to their two neighbours only;
* ``gather``: each device publishes its *boundary* rows (those any other
  device needs), padded to a common width ``W``; one ``all_gather`` hands
  every device all boundary rows.

Per product on ``F`` columns of ``b``-byte numbers:

* halo bytes (the least any exchange must move): ``b F sum_d |halo_d|``;
* moved bytes: ``b F D sum_s W_s`` (permute) or ``b F D (D - 1) W``
  (gather);
* local bytes (the devices' own rows): ``b F N``.

Two partitions:

* ``rcm``: the reverse Cuthill-McKee order (Cuthill & McKee, "Reducing the
  bandwidth of sparse symmetric matrices", 1969; George & Liu, "Computer
  Solution of Large Sparse Positive Definite Systems", 1981) cut into ``D``
  consecutive blocks of equal size: a small bandwidth keeps each block's
  neighbours in the adjacent blocks;
* ``metis``: multilevel k-way partitioning minimising the edge cut
  (Karypis & Kumar, "A fast and high quality multilevel scheme for
  partitioning irregular graphs", SIAM J. Sci. Comput. 20, 1998), through
  the optional ``pymetis`` package.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from ._errors import ConfigError

METHODS = ("rcm", "metis")
EXCHANGES = ("permute", "gather")


def _csr(matrix) -> sp.csr_array:
    m = sp.csr_array(matrix)
    m.sum_duplicates()
    m.sort_indices()
    return m


def rcm_parts(matrix, count: int) -> np.ndarray:
    """Part of each node (``(N,)`` ints in ``[0, count)``): the reverse
    Cuthill-McKee order split into ``count`` consecutive blocks whose sizes
    differ by at most one."""
    m = _csr(matrix)
    n = m.shape[0]
    order = reverse_cuthill_mckee(sp.csr_matrix(m), symmetric_mode=True)
    parts = np.empty(n, np.int64)
    parts[order] = np.arange(n) * count // max(n, 1)
    return parts


def metis_parts(matrix, count: int) -> np.ndarray:
    """Part of each node from METIS k-way partitioning (pymetis, imported
    here: the optional extra ``partition``)."""
    try:
        import pymetis
    except ImportError:
        raise ConfigError("the METIS partition needs the optional package pymetis "
                          "(pip install 'stablefilt[partition]'); use the RCM partition without it.") from None
    m = _csr(matrix)
    if count == 1 or m.shape[0] <= count:
        return np.arange(m.shape[0]) * count // max(m.shape[0], 1)
    m = sp.csr_array(m - sp.diags_array(m.diagonal()))  # METIS takes no self loops
    m.eliminate_zeros()
    starts, adjacent = m.indptr.astype(np.int64), m.indices.astype(np.int64)
    if hasattr(pymetis, "CSRAdjacency"):  # newer pymetis; older ones take xadj/adjncy
        _, parts = pymetis.part_graph(count, adjacency=pymetis.CSRAdjacency(starts, adjacent))
    else:
        _, parts = pymetis.part_graph(count, xadj=starts, adjncy=adjacent)
    return np.asarray(parts, np.int64)


def node_parts(matrix, count: int, method: str = "rcm") -> np.ndarray:
    """Part of each node by ``method`` (``rcm`` or ``metis``)."""
    if method not in METHODS:
        raise ConfigError(f"unknown partition {method!r}; expected one of {', '.join(METHODS)}.")
    if not isinstance(count, int) or count < 1:
        raise ConfigError(f"the number of parts must be a positive integer; got {count!r}.")
    return (rcm_parts if method == "rcm" else metis_parts)(matrix, count)


@dataclasses.dataclass(frozen=True, eq=False)
class HaloPlan:
    """Everything the sharded product needs, as per-device numpy arrays
    stacked on a leading device axis (``D`` devices, ``R`` rows each).

    Attributes:
      method: how the parts were chosen (``rcm``, ``metis`` or ``given``).
      parts: ``(N,)`` part of each node.
      position: ``(N,)`` slot of each node in the padded, part-major order
        (device ``d`` holds slots ``d R .. (d + 1) R - 1``; within a part the
        nodes follow the reverse Cuthill-McKee order).
      block: ``R``, rows per device (the largest part).
      send: ``(D, W)`` local rows each device publishes (its boundary rows,
        padded with row 0).
      rows, cols, vals: ``(D, Z)`` local COO entries of each device's rows of
        ``S``: ``rows`` in ``[0, R)``, ``cols`` index the device's extended
        vector ``[own R rows ; all D W published rows]``, padding entries
        have ``vals = 0``.
      halo: ``(D,)`` number of distinct rows each device needs from others.
      nnz: ``(D,)`` stored entries of each device's rows (before padding).
      exchange: ``permute`` or ``gather``.
      shifts: for ``permute``, the ``(s, W_s)`` pairs with traffic, in the
        order of ``send``'s segments; empty for ``gather``.
    """

    method: str
    parts: np.ndarray
    position: np.ndarray
    block: int
    send: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    vals: np.ndarray
    halo: np.ndarray
    nnz: np.ndarray
    exchange: str = "gather"
    shifts: tuple = ()

    @property
    def devices(self) -> int:
        return self.send.shape[0]

    @property
    def width(self) -> int:
        return self.send.shape[1]

    @property
    def nodes(self) -> int:
        return self.parts.shape[0]

    def halo_bytes(self, features: int = 1, itemsize: int = 4) -> int:
        """Bytes any exchange must move per product: ``b F sum_d |halo_d|``."""
        return int(itemsize * features * int(self.halo.sum()))

    @property
    def extended(self) -> int:
        """Rows of a device's extended vector: its own and those received."""
        if self.exchange == "gather":
            return self.block + self.devices * self.width
        return self.block + self.width

    def moved_bytes(self, features: int = 1, itemsize: int = 4) -> int:
        """Bytes the exchange moves per product: ``b F D (D - 1) W``
        (gather) or ``b F D sum_s W_s`` (permute)."""
        d = self.devices
        rows = d * (d - 1) * self.width if self.exchange == "gather" else d * sum(w for _, w in self.shifts)
        return int(itemsize * features * rows)

    def local_bytes(self, features: int = 1, itemsize: int = 4) -> int:
        """Bytes of the devices' own rows read per product: ``b F N``."""
        return int(itemsize * features * self.nodes)

    def summary(self, features: int = 1, itemsize: int = 4) -> dict:
        return {"method": self.method, "devices": self.devices, "nodes": self.nodes, "block": self.block,
                "width": self.width, "halo_rows": int(self.halo.sum()), "nnz": [int(z) for z in self.nnz],
                "halo_bytes": self.halo_bytes(features, itemsize),
                "exchange": self.exchange, "moved_bytes": self.moved_bytes(features, itemsize),
                "local_bytes": self.local_bytes(features, itemsize)}


def halo_plan(matrix, parts: np.ndarray, method: str = "given", devices: int | None = None,
              exchange: str = "permute") -> HaloPlan:
    """The :class:`HaloPlan` of ``matrix`` (``N x N``, symmetric) split by
    ``parts`` (``(N,)`` ints) over ``devices`` devices (default
    ``max(parts) + 1``; a part may be empty), exchanging halo rows by
    ``exchange`` (``permute`` or ``gather``, module docstring)."""
    if exchange not in EXCHANGES:
        raise ConfigError(f"unknown exchange {exchange!r}; expected one of {', '.join(EXCHANGES)}.")
    m = _csr(matrix)
    n = m.shape[0]
    parts = np.asarray(parts, np.int64)
    if parts.shape != (n,) or (n and (parts.min() < 0)):
        raise ConfigError(f"the partition must give one non-negative part per node ({n}); got shape {parts.shape}.")
    d = max(int(parts.max()) + 1 if n else 1, int(devices or 1))
    sizes = np.bincount(parts, minlength=d)
    block = max(int(sizes.max()), 1)
    # Slot of each node: part-major, and within a part in reverse
    # Cuthill-McKee order (neighbours close in memory, as on one device).
    rank = np.empty(n, np.int64)
    rank[reverse_cuthill_mckee(sp.csr_matrix(m), symmetric_mode=True)] = np.arange(n)
    order = np.lexsort((rank, parts))
    local = np.empty(n, np.int64)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    local[order] = np.arange(n) - np.repeat(starts, sizes)
    position = parts * block + local
    coo = m.tocoo()
    r, c, v = coo.row.astype(np.int64), coo.col.astype(np.int64), coo.data
    pr, pc = parts[r], parts[c]
    cross = pr != pc
    if exchange == "gather":
        send, ext_cross, shifts = _gather_layout(c, cross, pc, local, d, block, n)
    else:
        send, ext_cross, shifts = _permute_layout(c, cross, pr, pc, local, d, block)
    ext = local[c].copy()
    ext[cross] = ext_cross
    nnz = np.bincount(pr, minlength=d)
    z = max(1, int(nnz.max()) if n else 1)
    rows = np.zeros((d, z), np.int64)
    cols = np.zeros((d, z), np.int64)
    vals = np.zeros((d, z), np.float64)
    halo = np.zeros(d, np.int64)
    for p in range(d):
        sel = pr == p
        k = int(sel.sum())
        rows[p, :k], cols[p, :k], vals[p, :k] = local[r[sel]], ext[sel], v[sel]
        halo[p] = np.unique(c[sel & cross]).size
    return HaloPlan(method, parts, position, block, send, rows, cols, vals, halo, nnz, exchange, shifts)


def _gather_layout(c, cross, pc, local, d: int, block: int, n: int):
    """Every part publishes its boundary rows (nodes any other part reads),
    padded to the widest, ``W``; the extended vector is ``[own ; D W]``."""
    boundary = [np.unique(c[cross & (pc == p)]) for p in range(d)]
    width = max(1, max((len(b) for b in boundary), default=0))
    send = np.zeros((d, width), np.int64)
    slot_in_send = np.zeros(n, np.int64)
    for p, b in enumerate(boundary):
        send[p, :len(b)] = local[b]
        slot_in_send[b] = np.arange(len(b))
    return send, block + pc[cross] * width + slot_in_send[c[cross]], ()


def _permute_layout(c, cross, pr, pc, local, d: int, block: int):
    """For each shift ``s`` with traffic, part ``p`` sends part
    ``(p + s) mod D`` exactly the rows it reads from ``p``, padded to the
    widest pair of that shift, ``W_s``; the extended vector of a part is
    ``[own ; received at shift s_1 ; at s_2 ; ...]``."""
    cc, rr, cp = c[cross], pr[cross], pc[cross]
    shift_of = (rr - cp) % d
    lists = {}  # (s, sender) -> sorted nodes sent
    for s in range(1, d):
        for p in range(d):
            sel = (shift_of == s) & (cp == p)
            if sel.any():
                lists[s, p] = np.unique(cc[sel])
    shifts = tuple((s, max(len(lists[s, p]) for p in range(d) if (s, p) in lists))
                   for s in range(1, d) if any((s, p) in lists for p in range(d)))
    total = max(1, sum(w for _, w in shifts))
    send = np.zeros((d, total), np.int64)
    ext_cross = np.zeros(cc.shape[0], np.int64)
    off = 0
    for s, w in shifts:
        for p in range(d):
            nodes = lists.get((s, p))
            if nodes is None:
                continue
            send[p, off:off + len(nodes)] = local[nodes]
            sel = (shift_of == s) & (cp == p)
            ext_cross[sel] = block + off + np.searchsorted(nodes, cc[sel])
        off += w
    return send, ext_cross, shifts


def partition_plan(matrix, devices: int, method: str = "rcm", exchange: str = "permute") -> HaloPlan:
    """:func:`halo_plan` of the partition ``method`` into ``devices`` parts."""
    return halo_plan(matrix, node_parts(matrix, devices, method), method, devices, exchange)
