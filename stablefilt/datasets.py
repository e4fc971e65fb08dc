"""Open datasets that registry packages ship as data files: selectable as a
config's ``[data] source`` (``karate``, ``digits``, ``minnesota``), or
written out as the files a ``source = "files"`` config reads (docs/data.md,
"Open datasets").
An optional extra (``pip install stablefilt[datasets]``): the core never
imports this module, and nothing is downloaded.

- :func:`write_karate`: networkx's karate club (Zachary, "An Information Flow
  Model for Conflict and Fission in Small Groups", 1977): 34 members, 78
  ties, two factions after the split.
- :func:`write_digits`: scikit-learn's bundled handwritten digits (the UCI
  optical digits test set, Alpaydin and Kaynak 1998): 1797 images of 8 x 8
  pixels, ten classes, each image a signal on the pixel grid graph.
- :func:`write_minnesota`: the Minnesota road network (2642 intersections,
  3303 roads) in the data file ``pointclouds/minnesota.mat`` that the
  ``pygsp`` package ships (read with :func:`scipy.io.loadmat`; the package
  itself is never imported): a smooth field to recover from sparse noisy
  readings, a node task.
"""

from __future__ import annotations

import os

import numpy as np

_KARATE_CONFIG = """\
name = "karate"

[data]
source = "files"
graph = "karate.csv"
signals = "karate-x.npy"
targets = "karate-y.npy"
task = "classify"
shift = "normalized-laplacian"

[model]
features = [8]
taps = 4

[train]
epochs = 40

[certify]
eps = [0.001, 0.01]
"""

_DIGITS_CONFIG = """\
name = "digits"

[data]
source = "files"
graph = "digits-grid.csv"
signals = "digits-x.npy"
targets = "digits-y.npy"
task = "classify"
shift = "normalized-laplacian"

[model]
features = [16]
taps = 4
readout = "flat"

[train]
epochs = 30
learning_rate = 0.01
batch_size = 64

[certify]
eps = [0.001, 0.01]
"""


def _save(folder: str, name: str, arr) -> None:
    np.save(os.path.join(folder, name), np.asarray(arr))


def _text(folder: str, name: str, text: str) -> str:
    path = os.path.join(folder, name)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text)
    return path


def karate_arrays(samples: int = 200, observed: float = 0.3, noise: float = 0.5, seed: int = 0):
    """``(adjacency (34, 34), x (samples, 34), y (samples, 34), ids)``: the
    karate club task of :func:`write_karate`, in memory (``ids`` the
    members ``M-1..M-34``)."""
    import networkx as nx

    g = nx.karate_club_graph()
    n = g.number_of_nodes()
    a = np.zeros((n, n))
    for u, v in g.edges():
        a[u, v] = a[v, u] = 1.0
    faction = np.array([g.nodes[i]["club"] == "Officer" for i in range(n)], dtype=np.int64)
    rng = np.random.default_rng(seed)
    seen = rng.random((samples, n)) < observed
    x = np.where(seen, (2.0 * faction - 1.0) + noise * rng.standard_normal(seen.shape), 0.0)
    return a, x, np.tile(faction, (samples, 1)), tuple(f"M-{i + 1}" for i in range(n))


def write_karate(folder: str, samples: int = 200, observed: float = 0.3, noise: float = 0.5, seed: int = 0) -> str:
    """Write the karate club as a node task; returns the config's path.

    Files: ``karate.csv`` (edge list, IDs ``M-1..M-34`` as members are
    numbered in the 1977 paper), ``karate-x.npy`` ``(samples, 34)``: each
    signal reveals the faction (+1 / -1) of a random ``observed`` share of
    the members, with Gaussian noise of scale ``noise``, and 0 elsewhere;
    ``karate-y.npy`` ``(samples, 34)``: every member's faction (0 Mr. Hi,
    1 Officer), and ``karate.toml``.
    """
    import networkx as nx

    _, x, y, _ = karate_arrays(samples, observed, noise, seed)
    os.makedirs(folder, exist_ok=True)
    lines = ["source,target"] + [f"M-{u + 1},M-{v + 1}" for u, v in nx.karate_club_graph().edges()]
    _text(folder, "karate.csv", "\n".join(lines) + "\n")
    _save(folder, "karate-x.npy", x)
    _save(folder, "karate-y.npy", y)
    return _text(folder, "karate.toml", _KARATE_CONFIG)


def grid_edges(rows: int, cols: int) -> list[tuple[int, int]]:
    """The 4-neighbour grid graph on ``rows x cols`` pixels, pixel
    ``(r, c)`` numbered ``r * cols + c`` (as ``image.reshape(-1)``)."""
    edges = []
    for r in range(rows):
        for c in range(cols):
            i = r * cols + c
            if c + 1 < cols:
                edges.append((i, i + 1))
            if r + 1 < rows:
                edges.append((i, i + cols))
    return edges


def digits_arrays():
    """``(adjacency (64, 64), x (1797, 64) in [0, 1], y (1797,))``: scikit-learn's
    digits on the 8 x 8 pixel grid, in memory."""
    from sklearn.datasets import load_digits

    d = load_digits()
    a = np.zeros((64, 64))
    for i, j in grid_edges(8, 8):
        a[i, j] = a[j, i] = 1.0
    return a, d.data / 16.0, d.target.astype(np.int64)


def write_digits(folder: str) -> str:
    """Write scikit-learn's digits on the 8 x 8 pixel grid; returns the
    config's path. Files: ``digits-grid.csv`` (112 edges, pixel IDs 0..63),
    ``digits-x.npy`` ``(1797, 64)`` scaled to ``[0, 1]``, ``digits-y.npy``
    ``(1797,)`` labels 0..9, and ``digits.toml`` (flat readout: the pixels
    keep their place, docs/theory.md s.8.1)."""
    _, x, y = digits_arrays()
    os.makedirs(folder, exist_ok=True)
    _text(folder, "digits-grid.csv", "src,dst\n" + "".join(f"{a},{b}\n" for a, b in grid_edges(8, 8)))
    _save(folder, "digits-x.npy", x)
    _save(folder, "digits-y.npy", y)
    return _text(folder, "digits.toml", _DIGITS_CONFIG)


def correlation_graph(x: np.ndarray, k: int = 6) -> np.ndarray:
    """Symmetric k-nearest-neighbour graph of the nodes (pixels) of signals
    ``x`` ``(S, N)``, weighted by ``|correlation|`` across the signals; a
    node whose signal never varies keeps no edges. An estimated graph: two
    disjoint sets of signals give two versions of it."""
    x = np.asarray(x, dtype=np.float64)
    sd = x.std(axis=0)
    live = sd > 0
    c = np.zeros((x.shape[1], x.shape[1]))
    z = (x[:, live] - x[:, live].mean(axis=0)) / sd[live]
    c[np.ix_(live, live)] = np.abs(z.T @ z) / x.shape[0]
    np.fill_diagonal(c, 0.0)
    a = np.zeros_like(c)
    for i in np.flatnonzero(live):
        nb = np.argsort(-c[i])[:k]
        a[i, nb] = c[i, nb]
    return np.maximum(a, a.T)


_MINNESOTA_CONFIG = """\
name = "minnesota"

[data]
source = "files"
graph = "minnesota.npz"
signals = "minnesota-x.npy"
targets = "minnesota-y.npy"
task = "regress"
shift = "normalized-laplacian"

[model]
features = [8]
taps = 5
readout = "node"

[train]
epochs = 20
learning_rate = 0.01
batch_size = 32

[certify]
eps = [0.001, 0.01]
"""


def minnesota_file() -> str:
    """Path of ``pointclouds/minnesota.mat`` inside the installed ``pygsp``
    package, found from its import spec without running the package."""
    import importlib.util

    spec = importlib.util.find_spec("pygsp")
    folders = list(spec.submodule_search_locations or []) if spec is not None else []
    for folder in folders:
        path = os.path.join(folder, "data", "pointclouds", "minnesota.mat")
        if os.path.isfile(path):
            return path
    from ._errors import StablefiltError

    raise StablefiltError("the Minnesota road network is read from the data file of the pygsp package, which is not "
                          "installed; pip install \"stablefilt[datasets]\"")


def read_minnesota():
    """``(adjacency, xy)``: the road network's symmetric sparse adjacency
    ``(2642, 2642)`` (weights 1 and 2 as stored) and the intersections'
    longitude/latitude ``(2642, 2)``."""
    import scipy.io
    import scipy.sparse as sp

    m = scipy.io.loadmat(minnesota_file())
    return sp.csr_array(m["A"], dtype=np.float64), np.asarray(m["xy"], dtype=np.float64)


def minnesota_arrays(samples: int = 300, sources: int = 4, spread: float = 20.0, observed: float = 0.3,
                     noise: float = 0.1, seed: int = 0):
    """``(adjacency (2642, 2642) sparse, x, y (samples, 2642))``: the road
    network task of :func:`write_minnesota`, in memory."""
    import scipy.sparse as sp
    from scipy.sparse.linalg import expm_multiply

    a, _ = read_minnesota()
    n = a.shape[0]
    lap = sp.csr_array(sp.diags_array(np.asarray(a.sum(axis=1)).ravel()) - a)
    rng = np.random.default_rng(seed)
    spikes = np.zeros((n, samples))
    for s in range(samples):
        spikes[rng.choice(n, sources, replace=False), s] = rng.uniform(-1.0, 1.0, sources)
    field = expm_multiply(-spread * lap, spikes).T
    field /= np.maximum(np.max(np.abs(field), axis=1, keepdims=True), np.finfo(float).tiny)
    seen = rng.random(field.shape) < observed
    x = np.where(seen, field + noise * rng.standard_normal(field.shape), 0.0)
    return a, x.astype(np.float32), field.astype(np.float32)


def write_minnesota(folder: str, samples: int = 300, sources: int = 4, spread: float = 20.0, observed: float = 0.3,
                    noise: float = 0.1, seed: int = 0) -> str:
    """Write the Minnesota road network as a node regression task; returns
    the config's path.

    Each sample is a smooth field: ``sources`` random intersections with
    amplitudes in ``[-1, 1]``, diffused over the roads by the heat kernel
    ``exp(-spread L)`` (``L`` the combinatorial Laplacian; scipy's
    ``expm_multiply``) and scaled to a peak of 1. The signal reveals the field
    at a random ``observed`` share of the intersections with Gaussian noise
    of scale ``noise`` (0 elsewhere); the target is the field everywhere.
    Files: ``minnesota.npz`` (``scipy.sparse.save_npz``),
    ``minnesota-x.npy`` and ``minnesota-y.npy`` ``(samples, 2642)``, and
    ``minnesota.toml``.
    """
    import scipy.sparse as sp

    a, x, y = minnesota_arrays(samples, sources, spread, observed, noise, seed)
    os.makedirs(folder, exist_ok=True)
    sp.save_npz(os.path.join(folder, "minnesota.npz"), sp.csr_matrix(a))
    _save(folder, "minnesota-x.npy", x)
    _save(folder, "minnesota-y.npy", y)
    return _text(folder, "minnesota.toml", _MINNESOTA_CONFIG)


#: Config sources served by this module: name -> (task, targets per node).
SOURCES = {"karate": ("classify", True), "digits": ("classify", False), "minnesota": ("regress", True)}


def source_arrays(name: str, given: dict, seed: int):
    """``(adjacency, x, y, ids)`` for the config source ``name`` (a key of
    :data:`SOURCES`); ``given`` holds the ``[data]`` keys the config sets
    itself (``samples``, ``noise``), which override the dataset's defaults."""
    kw = {k: given[k] for k in ("samples", "noise") if k in given}
    if name == "karate":
        return karate_arrays(seed=seed, **kw)
    if name == "minnesota":
        a, x, y = minnesota_arrays(seed=seed, **kw)
        return a, x, y, None
    a, x, y = digits_arrays()
    return a, x, y, None
