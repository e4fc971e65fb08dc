"""Bringing one's own data (docs/data.md): CSV edge lists with named,
1-based or gapped node IDs, header variants, separate signal and target
files, multi-output regression, the node order written into the run, the
Chebyshev-range warning, the run-directory lock, and the distance's
round-off tolerance, alignment and explanations."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import helpers as H
import networkx as nx
import numpy as np
import pytest

import stablefilt as sf
from stablefilt._distance import distance
from stablefilt._edgelist import read_edge_list, read_node_list
from stablefilt._errors import GraphError, RunError
from stablefilt._io import load_graph, save_filter
from stablefilt._lock import LOCK, run_lock
from stablefilt.cli import main


def _write(path, text):
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text)
    return str(path)


# ---- edge lists ---------------------------------------------------------

def test_string_ids_map_in_natural_order(tmp_path):
    p = _write(tmp_path / "g.csv", "source,target,weight\nST-010,ST-002,0.5\nST-002,ST-001,2\n")
    el = read_edge_list(p)
    assert el.ids == ("ST-001", "ST-002", "ST-010")
    m = load_graph(p).dense()
    # by hand: ST-001 - ST-002 weight 2, ST-002 - ST-010 weight 0.5
    np.testing.assert_array_equal(m, [[0, 2, 0], [2, 0, 0.5], [0, 0.5, 0]])


def test_ids_from_one_give_three_nodes_not_four(tmp_path):
    p = _write(tmp_path / "g.csv", "src,dst,weight\n1,2,1\n2,3,1\n")
    op = load_graph(p)
    assert op.nodes == 3
    # path graph P3, same as networkx's (Zachary-free reference: nx.path_graph)
    np.testing.assert_array_equal(op.dense(), nx.to_numpy_array(nx.path_graph(3)))


def test_gaps_are_an_error_naming_them_unless_a_node_list_is_given(tmp_path):
    p = _write(tmp_path / "g.csv", "src,dst\n0,1\n1,4\n")
    with pytest.raises(GraphError, match="never names 2, 3"):
        load_graph(p)
    nodes = _write(tmp_path / "nodes.txt", "id\n0\n1\n2\n3\n4\n")
    op = load_graph(p, nodes=read_node_list(nodes))
    assert op.nodes == 5 and op.edges == 2
    assert not op.dense()[2].any() and not op.dense()[3].any()  # isolated, as the node list says


@pytest.mark.parametrize("text", [
    "src,dst\n0,1\n1,2\n",
    "source,target\n0,1\n1,2\n",
    "from,to\n0,1\n1,2\n",
    "0,1\n1,2\n",
])
def test_missing_weight_column_means_weight_one(tmp_path, text):
    op = load_graph(_write(tmp_path / "g.csv", text))
    np.testing.assert_array_equal(op.dense(), nx.to_numpy_array(nx.path_graph(3)))  # networkx P3


def test_headerless_names_need_the_option_and_columns_by_name(tmp_path):
    p = _write(tmp_path / "g.csv", "A,B\nB,C\n")
    with pytest.raises(GraphError, match="headerless"):
        read_edge_list(p)
    assert read_edge_list(p, header=False).ids == ("A", "B", "C")
    q = _write(tmp_path / "h.csv", "km,a_station,b_station\n2.5,X,Y\n")
    el = read_edge_list(q, columns=["a_station", "b_station", "km"])
    assert el.ids == ("X", "Y") and el.weight.tolist() == [2.5]


def test_unknown_node_in_node_list_is_named(tmp_path):
    p = _write(tmp_path / "g.csv", "src,dst\nA,B\nB,Z\n")
    with pytest.raises(GraphError, match="'Z'"):
        read_edge_list(p, nodes=("A", "B", "C"))


# ---- training from files --------------------------------------------------

FILES = """\
name = "own"

[data]
source = "files"
graph = "g.csv"
signals = "{signals}"
{extra}
task = "{task}"
shift = "normalized-laplacian"

[model]
features = [4]
taps = 3
readout = "{readout}"

[train]
epochs = 2
batch_size = 0
"""


def _karate_files(tmp_path, rng):
    """networkx's karate club (Zachary 1977: 34 members, 78 ties, two
    factions) as a CSV edge list with string IDs M-1..M-34."""
    g = nx.karate_club_graph()
    assert g.number_of_nodes() == 34 and g.number_of_edges() == 78  # Zachary 1977
    lines = ["source,target"] + [f"M-{u + 1},M-{v + 1}" for u, v in g.edges()]
    _write(tmp_path / "g.csv", "\n".join(lines) + "\n")
    faction = np.array([g.nodes[i]["club"] == "Officer" for i in range(34)], dtype=np.int64)
    return g, faction


def test_trains_on_karate_club_with_string_ids_and_separate_files(tmp_path):
    rng = np.random.default_rng(0)
    g, faction = _karate_files(tmp_path, rng)
    x = rng.normal(size=(40, 34)) + faction[None, :]
    y = np.tile(faction, (40, 1))
    # signals as CSV with the node IDs as header, columns shuffled: read back in node order
    ids = [f"M-{i + 1}" for i in range(34)]
    order = rng.permutation(34)
    rows = [",".join(ids[j] for j in order)] + [",".join(f"{v:.17g}" for v in r[order]) for r in x]
    _write(tmp_path / "x.csv", "\n".join(rows) + "\n")
    np.save(tmp_path / "y.npy", y)
    cfg = tmp_path / "c.toml"
    _write(cfg, FILES.format(signals="x.csv", extra='targets = "y.npy"', task="classify", readout="node"))
    out = tmp_path / "run"
    assert main(["train", str(cfg), "--out", str(out)]) == 0
    written = read_node_list(str(out / "nodes.csv"))
    from stablefilt._edgelist import _natural

    assert written == tuple(sorted(ids, key=_natural))
    run = sf.open_run(str(out))
    # the run's graph is networkx's normalized Laplacian in that node order
    perm = [int(v[2:]) - 1 for v in written]
    ref = nx.normalized_laplacian_matrix(g, nodelist=perm, weight=None).toarray()
    np.testing.assert_allclose(run.op.dense(), ref, atol=1e-12)
    assert not os.path.exists(out / LOCK)


def test_multi_output_regression_per_node(tmp_path):
    rng = np.random.default_rng(1)
    _write(tmp_path / "g.csv", "src,dst\n1,2\n2,3\n3,4\n4,1\n")
    x = rng.normal(size=(30, 4, 2))
    y = np.stack([x[..., 0], x[..., 0] - x[..., 1], 2 * x[..., 1]], axis=-1)  # (S, N, 3)
    np.save(tmp_path / "x.npy", x)
    np.savez(tmp_path / "y.npz", y=y)
    cfg = _write(tmp_path / "c.toml", FILES.format(signals="x.npy", extra='targets = "y.npz"', task="regress",
                                                   readout="node"))
    summary = sf.train(sf.load_config(cfg), str(tmp_path / "run"), progress=lambda m: None)
    assert summary["model"]["readout"] == "node"
    run = sf.open_run(str(tmp_path / "run"))
    assert run.spec.outputs == 3 and run.test_y.shape[1:] == (4, 3)
    assert np.isfinite(summary["metrics"]["test_rmse"])
    # stress reads one output: refused in one sentence, not a traceback
    assert main(["stress", str(tmp_path / "run"), "--samples", "1"]) == 2


def test_multi_output_regression_per_signal(tmp_path):
    rng = np.random.default_rng(2)
    _write(tmp_path / "g.csv", "src,dst\n0,1\n1,2\n")
    x = rng.normal(size=(30, 3))
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", np.stack([x.sum(1), x.max(1)], axis=1))  # (S, 2)
    cfg = _write(tmp_path / "c.toml", FILES.format(signals="x.npy", extra='targets = "y.npy"', task="regress",
                                                   readout="mean"))
    sf.train(sf.load_config(cfg), str(tmp_path / "run"), progress=lambda m: None)
    assert sf.open_run(str(tmp_path / "run")).spec.outputs == 2


def test_old_npz_with_x_and_y_still_loads(tmp_path):
    rng = np.random.default_rng(3)
    np.save(tmp_path / "g.npy", nx.to_numpy_array(nx.cycle_graph(5)))
    np.savez(tmp_path / "s.npz", x=rng.normal(size=(20, 5)), y=rng.integers(0, 2, size=(20, 5)))
    text = FILES.format(signals="s.npz", extra="", task="classify", readout="node").replace("g.csv", "g.npy")
    from stablefilt._data import build_dataset

    ds = build_dataset(sf.load_config(_write(tmp_path / "c.toml", text)))
    assert ds.x.shape == (20, 5, 1) and ds.classes == 2 and ds.node_ids is None


# ---- bound: spectrum outside the Chebyshev interval ----------------------

def test_bound_warns_when_the_spectrum_leaves_the_basis_interval(tmp_path, capsys):
    a = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977, bundled with networkx
    np.save(tmp_path / "g.npy", a)
    save_filter(str(tmp_path / "f.npz"), np.array([1.0, -0.5, 0.1]), sf.Basis("chebyshev", (0.0, 2.0)))
    argv = ["bound", str(tmp_path / "g.npy"), str(tmp_path / "f.npz"), "--eps", "0.01"]
    assert main(argv + ["--json"]) == 0
    d = H.strict_json(capsys.readouterr().out)
    lam = np.linalg.eigvalsh(a)  # numpy reference: the adjacency's spectrum leaves [0, 2]
    assert lam[0] < 0 and lam[-1] > 2
    assert len(d["warnings"]) == 1 and "[0, 2]" in d["warnings"][0]
    assert main(argv) == 0
    assert sum(line.startswith("warning: ") for line in capsys.readouterr().out.splitlines()) == 1
    assert main(argv + ["--shift", "normalized-laplacian", "--json"]) == 0
    assert H.strict_json(capsys.readouterr().out)["warnings"] == []


# ---- the run lock ----------------------------------------------------------

def test_second_writer_is_refused_and_the_first_run_untouched(tmp_path, capsys):
    """The lock is held by another process (a child python), as when two
    ``train`` commands start at once."""
    out = tmp_path / "run"
    os.makedirs(out)
    (out / "config.toml").write_text("first run's file\n")
    cfg = _write(tmp_path / "c.toml", H.small_run_text())
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, time\nfrom stablefilt._lock import run_lock\n"
         "with run_lock(sys.argv[1]):\n    print('held', flush=True)\n    time.sleep(60)\n", str(out)],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        before = sorted(os.listdir(out))
        for extra in ([], ["--force"], ["--resume"]):
            assert main(["train", cfg, "--out", str(out)] + extra) == 2
            err = capsys.readouterr().err
            assert f"process {holder.pid}" in err and "being written" in err and err.count("\n") == 1
        assert sorted(os.listdir(out)) == before
        assert (out / "config.toml").read_text() == "first run's file\n"
    finally:
        holder.kill()
        holder.wait()


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_stale_lock_is_reported_and_resume_takes_it_over(tmp_path, capsys):
    out = tmp_path / "run"
    cfg = _write(tmp_path / "c.toml", H.small_run_text())
    assert main(["train", cfg, "--out", str(out)]) == 0
    os.unlink(out / "params.npz")  # as if killed after the last checkpoint
    pid = _dead_pid()
    (out / LOCK).write_text(f"{pid}\n")
    capsys.readouterr()
    assert main(["train", cfg, "--out", str(out), "--force"]) == 2
    err = capsys.readouterr().err
    assert f"process {pid}" in err and "no longer running" in err and "--resume" in err and LOCK in err
    assert main(["train", cfg, "--out", str(out), "--resume"]) == 0
    assert "took over the lock" in capsys.readouterr().out
    assert not os.path.exists(out / LOCK)


def test_lock_refuses_while_held_in_process(tmp_path):
    with run_lock(str(tmp_path)):
        with pytest.raises(RunError, match="being written"):
            with run_lock(str(tmp_path)):
                pass


# ---- distance ---------------------------------------------------------------

def _weighted_geometric(n, seed):
    g = nx.random_geometric_graph(n, 0.12 if n >= 200 else 0.35, seed=seed)
    a = nx.to_numpy_array(g, weight=None)
    w = np.triu(np.random.default_rng(seed).uniform(0.5, 2.0, a.shape), 1)
    return a * (w + w.T)


def _relative(s, eps, seed):
    e = np.random.default_rng(seed).standard_normal(s.shape)
    e = (e + e.T) / 2
    e *= eps / np.linalg.norm(e, 2)
    return s + e @ s + s @ e


def test_tiny_relative_change_is_expressible_within_round_off():
    # L + I: positive definite, so no pair lam_i + lam_j vanishes
    s = sf.shift_operator(_weighted_geometric(40, 5), "laplacian").dense() + np.eye(40)
    s_hat = _relative(s, 1e-9, 6)
    d = distance(sf.shift_operator(s), sf.shift_operator(s_hat))
    assert 0 < d.residual <= d.tolerance and d.expressible
    np.testing.assert_allclose(d.relative, 1e-9, rtol=1e-4)
    # a change that is not relative: S = diag(1, -1) has lam_1 + lam_2 = 0, and
    # an off-diagonal change falls entirely on that pair (by hand: residual 0.5)
    s2 = np.diag([1.0, -1.0])
    d2 = distance(sf.shift_operator(s2), sf.shift_operator(s2 + 0.5 * np.eye(2)[::-1]))
    assert d2.singular_pairs == 2 and not d2.expressible
    np.testing.assert_allclose(d2.residual, 0.5, rtol=1e-12)


def test_align_recovers_a_relabelled_relative_perturbation_on_300_nodes():
    s = sf.shift_operator(_weighted_geometric(300, 1), "normalized-laplacian").dense()
    s_hat = _relative(s, 0.01, 2)
    perm = np.random.default_rng(3).permutation(300)
    d = distance(sf.shift_operator(s), sf.shift_operator(s_hat[perm][:, perm]), align_nodes=True)
    al = d.alignment
    assert np.array_equal(perm[al.perm], np.arange(300))  # every node back in place
    # the perturbation's size, by construction; E is undetermined on the pair of the
    # Laplacian's zero eigenvalue, hence a relative, not exact, match
    assert abs(d.relative - 0.01) < 1e-4 * 0.01
    assert al.mismatch_after < al.mismatch_before


def test_align_never_worse_than_the_given_order_and_json_lists_the_permutation(tmp_path, capsys):
    a = _weighted_geometric(30, 7)
    np.save(tmp_path / "a.npy", a)
    np.save(tmp_path / "b.npy", _relative(a, 0.02, 8))
    assert main(["distance", str(tmp_path / "a.npy"), str(tmp_path / "b.npy"), "--align", "--json"]) == 0
    d = H.strict_json(capsys.readouterr().out)
    al = d["alignment"]
    assert al["mismatch_after"] <= al["mismatch_before"] and sorted(al["perm"]) == list(range(30))
    assert "graph_a" in d["delta_of"]


def test_indefinite_adjacency_explains_pairs_near_zero(tmp_path, capsys):
    a = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977; indefinite adjacency
    rng = np.random.default_rng(9)
    w = np.triu(1 + rng.uniform(-0.02, 0.02, a.shape), 1)
    b = a * (w + w.T)
    np.save(tmp_path / "a.npy", a)
    np.save(tmp_path / "b.npy", b)
    assert main(["distance", str(tmp_path / "a.npy"), str(tmp_path / "b.npy"), "--json"]) == 0
    d = H.strict_json(capsys.readouterr().out)
    lam = np.linalg.eigvalsh(a)  # numpy reference
    np.testing.assert_allclose(d["spectrum_a"], [lam[0], lam[-1]], rtol=1e-10)
    assert d["driven_by_pairs_near_zero"] and d["relative"] > 3 * d["additive"] / lam[-1]
    assert main(["distance", str(tmp_path / "a.npy"), str(tmp_path / "b.npy")]) == 0
    assert "indefinite" in capsys.readouterr().out


def test_distance_reads_later_versions_in_a_runs_node_order(tmp_path, capsys):
    _write(tmp_path / "v1.csv", "src,dst,weight\nB,A,1\nA,C,2\n")
    _write(tmp_path / "v2.csv", "src,dst,weight\nC,A,2.02\nA,B,1\n")
    _write(tmp_path / "nodes.csv", "index,id\n0,C\n1,A\n2,B\n")
    args = [str(tmp_path / "v1.csv"), str(tmp_path / "v2.csv"), "--nodes", str(tmp_path / "nodes.csv"), "--json"]
    assert main(["distance"] + args) == 0
    d = json.loads(capsys.readouterr().out)
    np.testing.assert_allclose(d["additive"], 0.02, rtol=1e-12)  # one edge changed by 0.02: ||.||_2 = 0.02


def test_swap_cost_matches_the_frobenius_change():
    from stablefilt._distance import _swap_cost

    rng = np.random.default_rng(4)
    s = rng.normal(size=(7, 7))
    s = s + s.T
    b = rng.normal(size=(7, 7))
    b = b + b.T
    p = np.arange(7)
    p[[1, 5]] = [5, 1]
    direct = np.sum((s - b[p][:, p]) ** 2) - np.sum((s - b) ** 2)  # numpy, by definition
    np.testing.assert_allclose(_swap_cost(s, b, 1, 5), direct, rtol=1e-10)


def test_an_unknown_column_is_never_dropped_in_silence(tmp_path):
    p = _write(tmp_path / "g.csv", "from,to,km\nA,B,2\n")
    with pytest.raises(GraphError, match="'km'"):
        read_edge_list(p)
    assert read_edge_list(p, columns=["from", "to", "km"]).weight.tolist() == [2.0]
    assert read_edge_list(p, columns=["from", "to"]).weight.tolist() == [1.0]


def _knn_graph(pos, k=8, width=0.05):
    """Gaussian-kernel k-nearest-neighbour graph of points (common practice)."""
    d = np.sqrt(((pos[:, None] - pos[None]) ** 2).sum(-1))
    w = np.exp(-(d / width) ** 2)
    np.fill_diagonal(d, np.inf)
    idx = np.argsort(d, axis=1)[:, :k]
    a = np.zeros_like(d)
    r = np.repeat(np.arange(len(pos)), k)
    a[r, idx.ravel()] = w[r, idx.ravel()]
    return np.maximum(a, a.T)


def test_align_on_a_re_estimated_and_relabelled_graph_comes_near_the_known_order():
    rng = np.random.default_rng(5)
    pos = rng.uniform(size=(300, 2))
    a = _knn_graph(pos)
    b = _knn_graph(pos + rng.normal(scale=0.002, size=pos.shape))  # the graph estimated again
    perm = rng.permutation(300)
    sa = sf.shift_operator(a, "laplacian")
    known = distance(sa, sf.shift_operator(b, "laplacian"))
    found = distance(sa, sf.shift_operator(b[perm][:, perm], "laplacian"), align_nodes=True)
    # measured: 0.1508 both ways (before the signature start, 87.5 aligned)
    assert found.relative <= 1.2 * known.relative
    assert np.mean(perm[found.perm] == np.arange(300)) > 0.95


# ---- open datasets shipped inside registry packages -----------------------

def test_karate_files_match_the_source_counts_and_train(tmp_path, capsys):
    from stablefilt.datasets import write_karate

    cfg = write_karate(str(tmp_path), samples=60)
    el = read_edge_list(str(tmp_path / "karate.csv"))
    assert len(el.ids) == 34 and len(el.src) == 78  # Zachary 1977: 34 members, 78 ties
    y = np.load(tmp_path / "karate-y.npy")
    assert y.shape == (60, 34) and np.bincount(y[0]).tolist() == [17, 17]  # networkx's 'club': 17 and 17
    assert main(["train", cfg, "--out", str(tmp_path / "run"), "--epochs", "8"]) == 0
    line = capsys.readouterr().out.strip().splitlines()[-1]
    assert "test acc" in line
    assert os.path.isfile(tmp_path / "run" / "nodes.csv")


def test_digits_files_match_the_source_counts(tmp_path):
    from stablefilt.datasets import correlation_graph, grid_edges, write_digits

    write_digits(str(tmp_path))
    x, y = np.load(tmp_path / "digits-x.npy"), np.load(tmp_path / "digits-y.npy")
    # scikit-learn's documentation of load_digits: 1797 samples, 64 features, 10 classes
    assert x.shape == (1797, 64) and sorted(set(y.tolist())) == list(range(10))
    grid = nx.grid_2d_graph(8, 8)  # networkx reference: 2 * 8 * 7 = 112 edges
    ours = nx.Graph(grid_edges(8, 8))
    assert ours.number_of_edges() == grid.number_of_edges() == 112
    assert nx.is_isomorphic(ours, grid)
    # the graph differs from run to run: two estimates from disjoint halves
    a, b = correlation_graph(x[0::2]), correlation_graph(x[1::2])
    assert a.shape == (64, 64) and np.allclose(a, a.T) and not np.allclose(a, b)
    d = distance(sf.shift_operator(a, "normalized-laplacian"), sf.shift_operator(b, "normalized-laplacian"))
    assert d.additive > 0 and np.isfinite(d.relative)


def test_minnesota_files_match_the_source_counts(tmp_path):
    """The road network from pygsp's data file (read with scipy.io.loadmat):
    2642 intersections, as pygsp's documentation of its Minnesota graph
    states (from memory); the edge count and the two connected components are
    checked against networkx on the same matrix."""
    import importlib.util

    if importlib.util.find_spec("pygsp") is None:  # found, never imported
        pytest.skip("pygsp (the test extra) is not installed")
    from stablefilt.datasets import read_minnesota, write_minnesota

    a, xy = read_minnesota()
    assert a.shape == (2642, 2642) and xy.shape == (2642, 2)
    g = nx.from_scipy_sparse_array(a)
    assert g.number_of_nodes() == 2642 and g.number_of_edges() == a.nnz // 2 == 3303
    assert sorted(len(c) for c in nx.connected_components(g)) == [2, 2640]
    assert "pygsp" not in sys.modules  # the package is only a carrier of the data file
    cfg = write_minnesota(str(tmp_path), samples=12)
    x, y = np.load(tmp_path / "minnesota-x.npy"), np.load(tmp_path / "minnesota-y.npy")
    assert x.shape == y.shape == (12, 2642) and np.allclose(np.max(np.abs(y), axis=1), 1.0)
    seen = x != 0
    assert 0.2 < seen.mean() < 0.4  # the observed share, 0.3
    config = sf.load_config(cfg)
    assert config["data"]["task"] == "regress"
