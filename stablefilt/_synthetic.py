"""Synthetic graphs for scale, built sparse, and a source-localisation task
on them.

- :func:`geometric_graph`: a random geometric graph: ``n`` uniform points in
  the unit square, joined when at most ``r`` apart (Euclidean), with ``n pi
  r^2 = degree`` (the expected degree away from the border). Pairs come from
  ``scipy.spatial.cKDTree.query_pairs``: ``O(n degree)`` time and memory.
- :func:`block_graph`: a stochastic block model: ``communities`` equal
  blocks, each pair of nodes joined independently with probability ``p_in``
  inside a block and ``p_out`` between blocks, chosen so the expected degree
  is ``degree`` with a share ``inside`` of it inside the block. Each block
  pair is sampled by geometric skips over its list of node pairs (Batagelj
  and Brandes, "Efficient generation of large random networks", Phys. Rev. E
  71, 2005): ``O(n + edges)``, never a dense matrix.
- :func:`localisation_task`: signals made of a few point sources in one
  class (a block, or a vertical strip of the square) diffused over the graph
  by lazy random-walk steps, plus noise. Targets per node: whether the node
  lies in the sources' class (classify), or the clean diffused field
  (regress).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from ._errors import ConfigError


@dataclasses.dataclass(frozen=True)
class SyntheticGraph:
    """A generated graph.

    Attributes:
      adjacency: symmetric CSR, weights 1, no self-loops.
      classes: ``(n,)`` int class of each node (block, or strip of the square).
      positions: ``(n, 2)`` points of a geometric graph, else None.
      radius: the geometric graph's radius, else None.
      probabilities: ``(p_in, p_out)`` of a block model, else None.
      kind: ``geometric`` or ``blocks``.
    """

    adjacency: sp.csr_array
    classes: np.ndarray
    positions: np.ndarray | None
    radius: float | None
    probabilities: tuple[float, float] | None
    kind: str


def _symmetric(i, j, n) -> sp.csr_array:
    w = np.ones(2 * len(i), dtype=np.float64)
    a = sp.coo_array((w, (np.concatenate([i, j]), np.concatenate([j, i]))), shape=(n, n))
    return sp.csr_array(a)


def geometric_edges(positions: np.ndarray, radius: float) -> np.ndarray:
    """``(m, 2)`` pairs ``i < j`` with ``||p_i - p_j||_2 <= radius``."""
    from scipy.spatial import cKDTree

    pairs = cKDTree(positions).query_pairs(radius, output_type="ndarray")
    return np.sort(pairs, axis=1) if len(pairs) else np.zeros((0, 2), dtype=np.int64)


def geometric_graph(n: int, degree: float, seed: int, communities: int = 4) -> SyntheticGraph:
    """Random geometric graph in the unit square (module docstring); node
    classes are ``communities`` vertical strips of equal width."""
    _check(n, degree, communities)
    rng = np.random.default_rng(seed)
    pos = rng.random((n, 2))
    r = float(np.sqrt(degree / (np.pi * n)))
    e = geometric_edges(pos, r)
    classes = np.minimum((pos[:, 0] * communities).astype(np.int64), communities - 1)
    return SyntheticGraph(_symmetric(e[:, 0], e[:, 1], n), classes, pos, r, None, "geometric")


def _bernoulli_indices(total: int, p: float, rng) -> np.ndarray:
    """Sorted indices in ``[0, total)``, each present independently with
    probability ``p``: cumulative sums of geometric gaps."""
    if p <= 0 or total <= 0:
        return np.zeros(0, dtype=np.int64)
    if p >= 1:
        return np.arange(total, dtype=np.int64)
    out, start = [], -1
    while True:
        expect = (total - start) * p
        k = int(expect + 6 * np.sqrt(expect) + 16)
        pos = start + np.cumsum(rng.geometric(p, size=k))
        out.append(pos[pos < total])
        if pos[-1] >= total:
            break
        start = int(pos[-1])
    return np.concatenate(out).astype(np.int64)


def block_sizes(n: int, communities: int) -> np.ndarray:
    """Equal blocks, the first ``n mod communities`` one node larger."""
    return np.full(communities, n // communities) + (np.arange(communities) < n % communities)


def block_probabilities(n: int, degree: float, communities: int, inside: float) -> tuple[float, float]:
    """``(p_in, p_out)`` for expected degree ``degree`` with a share
    ``inside`` inside the block (equal blocks of ``n / communities``)."""
    size = n / communities
    p_in = degree * inside / max(size - 1, 1)
    p_out = degree * (1 - inside) / max(n - size, 1) if communities > 1 else 0.0
    if p_in > 1 or p_out > 1:
        raise ConfigError(f"a block model with {n} nodes in {communities} blocks cannot reach degree {degree:g}; "
                          "use fewer blocks or a lower degree.")
    return float(p_in), float(p_out)


def block_graph(n: int, degree: float, seed: int, communities: int = 4, inside: float = 0.9,
                probabilities: tuple[float, float] | None = None) -> SyntheticGraph:
    """Stochastic block model (module docstring); ``probabilities``
    overrides ``(p_in, p_out)``."""
    _check(n, degree, communities)
    if not 0 <= inside <= 1:
        raise ConfigError(f"the share of edges inside a block must lie in [0, 1]; got {inside}.")
    p_in, p_out = probabilities or block_probabilities(n, degree, communities, inside)
    rng = np.random.default_rng(seed)
    sizes = block_sizes(n, communities)
    first = np.concatenate([[0], np.cumsum(sizes)])
    rows, cols = [], []
    for a in range(communities):
        na = int(sizes[a])
        # Inside: ordered pairs (i, j) of the block, kept when i < j: each
        # unordered pair is drawn once with probability p_in.
        t = _bernoulli_indices(na * na, p_in, rng)
        i, j = t // na, t % na
        keep = i < j
        rows.append(first[a] + i[keep])
        cols.append(first[a] + j[keep])
        for b in range(a + 1, communities):
            nb = int(sizes[b])
            t = _bernoulli_indices(na * nb, p_out, rng)
            rows.append(first[a] + t // nb)
            cols.append(first[b] + t % nb)
    i, j = np.concatenate(rows), np.concatenate(cols)
    classes = np.repeat(np.arange(communities), sizes)
    return SyntheticGraph(_symmetric(i, j, n), classes, None, None, (p_in, p_out), "blocks")


def _check(n, degree, communities):
    if n < 2:
        raise ConfigError(f"a synthetic graph needs at least 2 nodes; got {n}.")
    if not degree > 0 or not np.isfinite(degree):
        raise ConfigError(f"the average degree must be a positive number; got {degree}.")
    if not 1 <= communities <= n:
        raise ConfigError(f"the number of communities must lie in [1, {n}]; got {communities}.")


def localisation_task(g: SyntheticGraph, samples: int, sources: int, steps: int, noise: float, seed: int,
                      task: str = "classify") -> tuple[np.ndarray, np.ndarray]:
    """``(x, y)``: ``x`` ``(samples, n, 1)`` float32, ``y`` ``(samples, n)``.

    Each sample draws a class ``c`` and ``sources`` nodes of class ``c``
    with unit spikes, diffuses them by ``steps`` lazy random-walk steps
    ``z <- (z + A D^{-1} z) / 2`` (mass preserving), scales the field to a
    peak of 1 and adds Gaussian noise of scale ``noise``. Targets:
    ``1{class_i == c}`` (classify) or the clean field (regress)."""
    a = g.adjacency
    n = a.shape[0]
    deg = np.asarray(a.sum(axis=1)).ravel()
    inv = np.where(deg > 0, 1.0 / np.maximum(deg, 1e-300), 0.0)
    rng = np.random.default_rng(seed)
    ncls = int(g.classes.max()) + 1
    members = [np.flatnonzero(g.classes == c) for c in range(ncls)]
    chosen = rng.integers(ncls, size=samples)
    z = np.zeros((n, samples), dtype=np.float64)
    for s, c in enumerate(chosen):
        pool = members[c] if len(members[c]) else np.arange(n)
        z[rng.choice(pool, min(sources, len(pool)), replace=False), s] = 1.0
    for _ in range(steps):
        z = 0.5 * (z + a @ (inv[:, None] * z))
    z /= np.maximum(z.max(axis=0, keepdims=True), np.finfo(float).tiny)
    x = (z.T + noise * rng.standard_normal((samples, n))).astype(np.float32)[:, :, None]
    if task == "classify":
        y = (g.classes[None, :] == chosen[:, None]).astype(np.int32)
    else:
        y = z.T.astype(np.float32)
    return x, y
