"""Demo data: soil-moisture sensors in an invented orchard.

The orchard is a grid of irrigation blocks; sensors are scattered over it and
joined to their nearest neighbours with Gaussian weights of distance. A leak
in one block wets the soil around it, and the wetting spreads over the sensor
graph. Every number here is generated: this is demo data, not a measurement.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp
from scipy.spatial import cKDTree

from ._graph import ShiftOperator


@dataclasses.dataclass(frozen=True)
class Orchard:
    positions: np.ndarray  # (N, 2), metres
    block: np.ndarray  # (N,) irrigation block of each sensor
    blocks: int
    adjacency: sp.csr_array


def make_orchard(sensors: int = 120, rows: int = 2, cols: int = 3, neighbours: int = 6, seed: int = 0) -> Orchard:
    """Sensors over a ``rows x cols`` grid of 40 m x 40 m blocks, joined to
    their ``neighbours`` nearest sensors with weights ``exp(-d^2 / s^2)``,
    ``s`` the median neighbour distance."""
    rng = np.random.default_rng(seed)
    pos = rng.uniform(0, 1, (sensors, 2)) * np.array([cols * 40.0, rows * 40.0])
    bx = np.minimum((pos[:, 0] // 40).astype(int), cols - 1)
    by = np.minimum((pos[:, 1] // 40).astype(int), rows - 1)
    block = by * cols + bx
    tree = cKDTree(pos)
    dist, idx = tree.query(pos, k=neighbours + 1)
    s = np.median(dist[:, 1:])
    r = np.repeat(np.arange(sensors), neighbours)
    c = idx[:, 1:].ravel()
    w = np.exp(-(dist[:, 1:].ravel() ** 2) / s**2)
    a = sp.coo_array((w, (r, c)), shape=(sensors, sensors)).tocsr()
    a = a.maximum(a.T)
    return Orchard(pos, block, rows * cols, sp.csr_array(a))


def leak_snapshots(orchard: Orchard, op: ShiftOperator, count: int, seed: int, spread: float = 0.6,
                   steps: int = 4, noise: float = 0.35, return_clean: bool = False):
    """``count`` moisture snapshots and the soil state of every sensor.

    A leak in a random block wets a few of its sensors; the wetting diffuses
    by ``steps`` applications of ``(1 - spread) I + spread * D^-1 A``. Each
    sensor's soil state is 0 (dry), 1 (damp) or 2 (waterlogged) from the
    clean moisture (thresholds at its 60th and 90th percentiles over all
    snapshots); the reading adds noise of ``noise`` times the clean spread.

    Returns:
      ``(readings (count, N), states (count, N) int, leaking block (count,))``,
      and the clean moisture ``(count, N)`` last when ``return_clean``.
    """
    rng = np.random.default_rng(seed)
    a = op.matrix
    deg = np.asarray(a.sum(axis=1)).ravel()
    deg[deg == 0] = 1
    walk = sp.diags_array(1 / deg) @ a
    n = a.shape[0]
    blocks = rng.integers(0, orchard.blocks, count)
    x = np.zeros((count, n))
    for t, lab in enumerate(blocks):
        members = np.flatnonzero(orchard.block == lab)
        if len(members) == 0:
            members = np.arange(n)
        wet = rng.choice(members, size=min(3, len(members)), replace=False)
        x[t, wet] = rng.uniform(1, 2, len(wet))
    for _ in range(steps):
        x = (1 - spread) * x + spread * np.asarray(walk @ x.T).T
    lo, hi = np.quantile(x, [0.6, 0.9])
    states = (x > lo).astype(np.int64) + (x > hi).astype(np.int64)
    readings = x + noise * x.std() * rng.standard_normal(x.shape)
    if return_clean:
        return readings, states, blocks, x
    return readings, states, blocks
