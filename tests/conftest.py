"""Shared fixtures: small graph families (N <= 40) built from networkx
generators with explicit seeds, and a float64 switch for JAX."""

from __future__ import annotations

import jax
import networkx as nx
import numpy as np
import pytest

import stablefilt as sf


def _weighted(g, seed, low=0.2, high=2.0):
    """Adjacency of ``g`` with weights uniform in ``[low, high)``."""
    rng = np.random.default_rng(seed)
    a = nx.to_numpy_array(g, weight=None)
    w = np.triu(rng.uniform(low, high, a.shape), 1)
    return a * (w + w.T)


def _random_weighted():
    return _weighted(nx.gnp_random_graph(14, 0.35, seed=11), seed=12)


def _bipartite():
    g = nx.bipartite.random_graph(5, 7, 0.5, seed=13)
    return _weighted(g, seed=14)


def _disconnected():
    g = nx.disjoint_union(nx.cycle_graph(5), nx.path_graph(4))
    g.add_node(9)  # an isolated node as well
    return nx.to_numpy_array(g)


#: name -> (adjacency builder, shift kind). Kinds cover all four; every
#: family named in the issue is here: random weighted, bipartite, complete
#: (repeated eigenvalues), star, path, disconnected.
FAMILIES = {
    "random-adjacency": (_random_weighted, "as-is"),
    "random-laplacian": (_random_weighted, "laplacian"),
    "random-normalized": (_random_weighted, "normalized-laplacian"),
    "random-scaled": (_random_weighted, "scaled-adjacency"),
    "bipartite-adjacency": (_bipartite, "as-is"),
    "complete-laplacian": (lambda: nx.to_numpy_array(nx.complete_graph(7)), "laplacian"),
    "star-adjacency": (lambda: nx.to_numpy_array(nx.star_graph(8)), "as-is"),
    "path-normalized": (lambda: nx.to_numpy_array(nx.path_graph(10)), "normalized-laplacian"),
    "disconnected-laplacian": (_disconnected, "laplacian"),
}


@pytest.fixture(scope="session")
def family_ops():
    return {name: sf.shift_operator(build(), kind) for name, (build, kind) in FAMILIES.items()}


@pytest.fixture(params=sorted(FAMILIES))
def family(request, family_ops):
    """``(name, ShiftOperator)`` for each graph family."""
    return request.param, family_ops[request.param]


@pytest.fixture
def x64():
    """Run the test body with JAX in float64; restored afterwards."""
    with jax.enable_x64(True):
        yield

