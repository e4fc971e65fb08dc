"""The main job on an open dataset: scikit-learn's handwritten digits
(``sklearn.datasets.load_digits``, bundled with the package; Alpaydin and
Kaynak, UCI, 1998), each 8 x 8 image a signal on the 4-neighbour grid graph
(``networkx.grid_2d_graph``), normalised Laplacian (spectrum in [0, 2], Chung
1997). A two-layer GNN with mean pooling is trained to tell 0, 1 and 7 apart,
with and without the integral-Lipschitz penalty, through the command line.

Checked: accuracy far above chance (1/3) on held-out images; the penalty
shrinks the certified bound; and no measured change of the trained model
under random relative perturbations of the grid and scalings exceeds its
certificate (float64 numpy eigh reference model, tests/helpers.py).
"""

from __future__ import annotations

import json
import os

import helpers as H
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

from stablefilt import cli, open_run

sklearn_datasets = pytest.importorskip("sklearn.datasets")

CONFIG = """\
name = "digits-{name}"
[data]
source = "files"
graph = "grid.npz"
signals = "digits.npz"
task = "classify"
shift = "normalized-laplacian"
seed = 0
[model]
features = [8, 8]
taps = 4
basis = "chebyshev"
nonlinearity = "relu"
readout = "mean"
[penalty]
mode = "integral_lipschitz"
weight = {weight}
[train]
epochs = 30
batch_size = 32
learning_rate = 0.03
seed = 0
[certify]
eps = [0.001, 0.01]
"""


@pytest.fixture(scope="module")
def digit_runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("digits")
    grid = nx.to_scipy_sparse_array(nx.grid_2d_graph(8, 8), nodelist=[(r, c) for r in range(8) for c in range(8)])
    sp.save_npz(d / "grid.npz", sp.csr_matrix(grid))
    data = sklearn_datasets.load_digits()
    keep = np.isin(data.target, [0, 1, 7])
    x = (data.data[keep] / 16.0).astype(np.float32)  # pixel intensities 0..16, row-major like the node list
    y = np.searchsorted([0, 1, 7], data.target[keep]).astype(np.int64)
    np.savez(d / "digits.npz", x=x, y=y)
    runs = {}
    for name, weight in (("plain", 0.0), ("penalised", 0.5)):
        cfg = H.write(d / f"{name}.toml", CONFIG.format(name=name, weight=weight))
        out = str(d / name)
        assert cli.main(["train", cfg, "--out", out]) == 0
        runs[name] = out
    return runs


def test_digits_accuracy_and_penalty_trade_off(digit_runs, capsys):
    capsys.readouterr()
    s = {k: json.load(open(os.path.join(v, "summary.json"))) for k, v in digit_runs.items()}
    # Measured when this test was written: 87.0 % plain, 80.6 % penalised,
    # certified 7.84 against 0.627 at eps = 1e-3. Mean pooling discards where
    # a stroke is, so neither is near the state of the art for digits.
    for k in s:
        assert s[k]["metrics"]["test_acc"] >= 0.7, (k, s[k]["metrics"])  # chance is 1/3
    for e in ("0.001", "0.01"):
        assert 3 * s["penalised"]["certificate"]["certified"][e] < s["plain"]["certificate"]["certified"][e]


@pytest.mark.parametrize("which", ["plain", "penalised"])
def test_digits_certificate_holds_against_measured_changes(digit_runs, which):
    run_dir = digit_runs[which]
    run = open_run(run_dir)
    cert = json.load(open(os.path.join(run_dir, "summary.json")))["certificate"]["certified"]
    s = run.op.dense()
    n = s.shape[0]
    x = run.test_x.astype(np.float64)
    params = H.to_numpy(run.params)

    def model(m):
        return H.ref_model(params, m, x, kind=run.spec.basis.kind, interval=run.spec.basis.interval,
                           nonlinearity=run.spec.nonlinearity, readout=run.spec.readout)

    y = model(s)
    rng = np.random.default_rng(5)
    for key, bound in cert.items():
        eps = float(key)
        hats = [H.relative(s, H.random_error(rng, n, eps)) for _ in range(4)] + [(1 + 2 * eps) * s, (1 - 2 * eps) * s]
        change = max(float(H.change_norms(y, model(h)).max()) for h in hats)
        assert 0 < change <= bound, (key, change, bound)
