"""The invented scenario the drop-in examples share: a random sensor graph,
smooth signals on it, and one random relative perturbation of it. Only the
data lives here; each example shows the penalty and the certificate itself.
"""

import numpy as np

import stablefilt as sf


def sensor_graph(nodes: int, rng: np.random.Generator):
    """Sensors at random points of the unit square, Gaussian weights within
    distance 0.3; the normalised Laplacian as a stablefilt shift operator."""
    pts = rng.uniform(size=(nodes, 2))
    d = np.linalg.norm(pts[:, None] - pts[None], axis=-1)
    adj = np.exp(-(d / 0.15) ** 2) * (d < 0.3)
    np.fill_diagonal(adj, 0.0)
    return sf.shift_operator(adj, "normalized-laplacian")


def smooth_signals(graph, count: int, rng: np.random.Generator) -> np.ndarray:
    """``count`` smooth signals ``(N, count)``: white noise through ``exp(-3 lam)``."""
    w, v = np.linalg.eigh(graph.dense())
    return v @ (np.exp(-3 * w)[:, None] * rng.standard_normal((graph.nodes, count)))


def perturbed_operator(graph, eps: float, rng: np.random.Generator):
    """``S_hat = S + E S + S E`` for a random symmetric ``E`` with ``||E||_2 = eps``,
    as a JAX operator."""
    n = graph.nodes
    e = rng.standard_normal((n, n))
    e = (e + e.T) / 2
    e *= eps / np.linalg.norm(e, 2)
    s = graph.dense()
    return sf.jax_operator(sf.shift_operator(s + e @ s + s @ e, "as-is"))
