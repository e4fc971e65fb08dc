"""Synthetic graphs for scale against networkx's generators, and their
config source.

Sources of the check values:
- random geometric graph: ``networkx.random_geometric_graph`` with the same
  positions and radius is the reference edge set (both join pairs at
  Euclidean distance <= radius);
- stochastic block model: edges of a block pair are independent Bernoulli
  draws, so their count is Binomial(m, p) (handbook fact); counts are held
  within 6 standard deviations, and networkx's
  ``stochastic_block_model`` with the same sizes and probabilities is held to
  the same band (a check that the band is the right one);
- the expected degree of the geometric graph away from the border,
  ``n pi r^2`` (area of the disc times the density; common practice).
"""

from __future__ import annotations

import helpers as H
import networkx as nx
import numpy as np
import pytest

from stablefilt import load_config
from stablefilt._data import build_dataset
from stablefilt._errors import ConfigError
from stablefilt._synthetic import (
    _bernoulli_indices,
    block_graph,
    block_sizes,
    geometric_edges,
    geometric_graph,
    localisation_task,
)


@pytest.mark.parametrize("n,degree,seed", [(50, 6.0, 0), (300, 10.0, 1), (800, 8.0, 2)])
def test_geometric_edges_equal_networkx(n, degree, seed):
    g = geometric_graph(n, degree, seed)
    ref = nx.random_geometric_graph(n, g.radius, pos={i: tuple(p) for i, p in enumerate(g.positions)})
    want = {tuple(sorted(e)) for e in ref.edges()}
    a = g.adjacency.tocoo()
    got = {(int(i), int(j)) for i, j in zip(a.row, a.col) if i < j}
    assert got == want
    assert got == {tuple(map(int, e)) for e in geometric_edges(g.positions, g.radius)}
    assert np.all(a.data == 1.0) and g.adjacency.diagonal().sum() == 0
    assert abs(g.adjacency - g.adjacency.T).sum() == 0


def test_geometric_degree_away_from_the_border():
    g = geometric_graph(20000, 10.0, 3)
    inner = np.all((g.positions > g.radius) & (g.positions < 1 - g.radius), axis=1)
    deg = np.asarray(g.adjacency.sum(axis=1)).ravel()[inner]
    # Mean of ~19000 Poisson(10)-like counts: standard error ~0.023.
    assert abs(deg.mean() - 10.0) < 0.15


def _block_counts(edges, classes, k):
    c = np.zeros((k, k))
    for i, j in edges:
        a, b = sorted((classes[i], classes[j]))
        c[a, b] += 1
    return c


def _within_band(count, m, p):
    sd = np.sqrt(m * p * (1 - p))
    return abs(count - m * p) <= 6 * sd + 1e-9


@pytest.mark.parametrize("n,k,p_in,p_out,seed", [(400, 4, 0.1, 0.01, 0), (601, 3, 0.05, 0.002, 1),
                                                 (200, 2, 0.5, 0.2, 2)])
def test_block_model_edge_counts_match_the_probabilities(n, k, p_in, p_out, seed):
    g = block_graph(n, 1.0, seed, communities=k, probabilities=(p_in, p_out))
    sizes = block_sizes(n, k)
    a = g.adjacency.tocoo()
    mine = [(i, j) for i, j in zip(a.row, a.col) if i < j]
    assert g.adjacency.diagonal().sum() == 0 and abs(g.adjacency - g.adjacency.T).sum() == 0
    assert np.all(a.data == 1.0)
    probs = np.full((k, k), p_out)
    np.fill_diagonal(probs, p_in)
    ref = nx.stochastic_block_model(sizes.tolist(), probs.tolist(), seed=seed)
    ref_classes = np.repeat(np.arange(k), sizes)
    ours, theirs = _block_counts(mine, g.classes, k), _block_counts(ref.edges(), ref_classes, k)
    for x in range(k):
        for y in range(x, k):
            m = sizes[x] * (sizes[x] - 1) / 2 if x == y else sizes[x] * sizes[y]
            p = p_in if x == y else p_out
            assert _within_band(ours[x, y], m, p), (x, y, ours[x, y], m * p)
            assert _within_band(theirs[x, y], m, p)


def test_bernoulli_indices_rate_and_range():
    rng = np.random.default_rng(0)
    for total, p in ((10**6, 1e-3), (5000, 0.3), (10, 0.0), (10, 1.0)):
        t = _bernoulli_indices(total, p, rng)
        assert np.all(np.diff(t) > 0) and (len(t) == 0 or (t[0] >= 0 and t[-1] < total))
        assert _within_band(len(t), total, p)


def test_block_model_degree_and_share_inside():
    g = block_graph(40000, 10.0, 5, communities=8, inside=0.8)
    a = g.adjacency.tocoo()
    deg = a.nnz / 40000
    same = np.mean(g.classes[a.row] == g.classes[a.col])
    assert abs(deg - 10.0) < 0.1 and abs(same - 0.8) < 0.01


def test_localisation_task_targets():
    g = block_graph(300, 8.0, 0, communities=3)
    x, y = localisation_task(g, 20, 2, 5, 0.0, 1)
    assert x.shape == (20, 300, 1) and y.shape == (20, 300) and x.dtype == np.float32
    for s in range(20):
        c = int(g.classes[np.argmax(x[s, :, 0])])
        # The peak of a noiseless field sits in the sources' block, which the
        # targets mark.
        assert np.array_equal(y[s], (g.classes == c).astype(np.int32))
        assert x[s].max() == pytest.approx(1.0)
    xr, yr = localisation_task(g, 4, 2, 5, 0.0, 1, task="regress")
    assert np.allclose(xr[..., 0], yr)


def test_bad_generator_arguments():
    with pytest.raises(ConfigError):
        block_graph(100, 200.0, 0, communities=4)
    with pytest.raises(ConfigError):
        geometric_graph(1, 5.0, 0)
    with pytest.raises(ConfigError):
        block_graph(10, 2.0, 0, communities=20)


@pytest.mark.parametrize("source", ["geometric", "blocks"])
def test_config_source(tmp_path, source):
    text = (f'name = "syn-{source}"\n[data]\nsource = "{source}"\nsize = 400\ndegree = 8\ncommunities = 3\n'
            'samples = 30\nsources = 2\ndiffusion = 6\nnoise = 0.1\nseed = 4\n[model]\nfeatures = [4]\ntaps = 3\n')
    d = build_dataset(load_config(H.write(str(tmp_path / "c.toml"), text)))
    assert d.op.nodes == 400 and d.x.shape == (30, 400, 1) and d.y.shape == (30, 400)
    assert d.node_task and d.classes == 2 and d.task == "classify"
    assert len(d.train) + len(d.val) + len(d.test) == 30
