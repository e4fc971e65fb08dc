"""The open datasets as config sources (``[data] source = "karate" |
"digits" | "minnesota"``), checked against the counts their sources report:
Zachary's karate club has 34 members and 78 ties and splits into two
factions (Zachary 1977; networkx's copy); scikit-learn's digits are 1797
images of 8 x 8 pixels in ten classes (scikit-learn's documentation); the
Minnesota road network in pygsp's data file has 2642 intersections and 3303
roads (its own adjacency, read with scipy)."""

from __future__ import annotations

import importlib.util
import os

import helpers as H
import numpy as np
import pytest

from stablefilt import cli
from stablefilt._config import parse_config
from stablefilt._data import build_dataset

pytest.importorskip("networkx")
CONFIGS = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "configs")


def _config(name):
    with open(os.path.join(CONFIGS, f"{name}.toml"), encoding="utf-8") as fh:
        return parse_config(fh.read(), CONFIGS)


def test_karate_source_counts():
    ds = build_dataset(_config("karate"))
    assert ds.op.nodes == 34  # Zachary 1977: 34 members
    assert ds.task == "classify" and ds.classes == 2 and ds.node_task  # two factions, a node task
    assert ds.x.shape == (200, 34, 1) and ds.y.shape == (200, 34)
    assert ds.node_ids[0] == "M-1" and len(ds.node_ids) == 34
    # 78 ties: the normalized Laplacian has 2 * 78 off-diagonal nonzeros.
    dense = ds.op.dense()
    assert int(np.count_nonzero(dense - np.diag(np.diag(dense)))) == 2 * 78


def test_digits_source_counts():
    pytest.importorskip("sklearn")
    ds = build_dataset(_config("digits"))
    assert ds.op.nodes == 64 and ds.x.shape == (1797, 64, 1)  # 1797 images of 8 x 8 pixels
    assert ds.classes == 10 and not ds.node_task  # ten classes, one label per image
    dense = ds.op.dense()
    assert int(np.count_nonzero(dense - np.diag(np.diag(dense)))) == 2 * 112  # 4-neighbour grid: 2 * 8 * 7 edges


def test_minnesota_source_counts():
    if importlib.util.find_spec("pygsp") is None:  # only its data file is read; the package is never imported
        pytest.skip("the pygsp package (which carries the road network's data file) is not installed")
    ds = build_dataset(parse_config('[data]\nsource = "minnesota"\nsamples = 40\n', CONFIGS))
    assert ds.op.nodes == 2642 and ds.task == "regress" and ds.x.shape == (40, 2642, 1)
    dense_nnz = ds.op.matrix.nnz - int(np.count_nonzero(ds.op.matrix.diagonal()))
    assert dense_nnz == 2 * 3303  # 3303 roads


def test_source_overrides_and_task_mismatch(capsys, tmp_path):
    ds = build_dataset(parse_config('[data]\nsource = "karate"\nsamples = 30\nseed = 4\n', CONFIGS))
    assert ds.x.shape[0] == 30
    path = H.write(tmp_path / "bad.toml", '[data]\nsource = "minnesota"\ntask = "classify"\n')
    assert cli.main(["train", path, "--out", str(tmp_path / "run")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "regress" in err
    assert not (tmp_path / "run").exists()


def test_train_from_karate_source(tmp_path, capsys):
    text = open(os.path.join(CONFIGS, "karate.toml"), encoding="utf-8").read().replace("epochs = 40", "epochs = 2")
    path = H.write(tmp_path / "karate.toml", text)
    assert cli.main(["train", path, "--out", str(tmp_path / "run"), "--quiet"]) == 0
    assert (tmp_path / "run" / "summary.json").exists()
