"""The trainer: compiled once, jit equals no-jit, resume equals an
uninterrupted run, run directories are never overwritten unasked, the log is
complete, early stopping, regression from files, the penalty shrinks the
certificate, and the logged certificate holds against measured changes.

Every run is tiny (30 sensors, 60 snapshots, one layer, 6 epochs) and
written under pytest's tmp_path.
"""

from __future__ import annotations

import json
import math
import os
import shutil

import helpers as H
import jax
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

from stablefilt import cli, init_params, load_config, open_run, parse_config, train
from stablefilt._store import load_checkpoint, read_log
from stablefilt._train import Trainer, build_step

CompileCounter = H.CompileCounter

#: A small model (K = 2, 2 features, a 16-point penalty grid) for the step
#: tests: the op-by-op run without jit stays short, and both tests share one
#: compiled step.
SMALL = H.tiny_text(features="[2]", taps=2, weight=0.5).replace("weight = 0.5", "weight = 0.5\ngrid = 16")


@pytest.fixture(scope="module")
def trainer():
    return Trainer.from_config(parse_config(SMALL, "."))


# ---------------------------------------------------------------------------
# Compilation.


def test_training_step_compiles_once(trainer):
    """A second call with the same shapes compiles nothing, counted by a
    jax.monitoring listener and by the jitted function's cache."""
    batches = trainer.batches(1)
    assert len(batches) >= 2 and len({len(b) for b in batches}) == 1  # equal sizes by design
    tx, step, _ = build_step(trainer, len(batches))
    params = init_params(trainer.spec, 0)
    state = tx.init(params)
    x, y, op = trainer.x, trainer.y, trainer.op
    b0, b1 = (np.asarray(b) for b in batches[:2])
    xb0, yb0, xb1, yb1 = x[b0], y[b0], x[b1], y[b1]
    params, state, *_ = step(params, state, op, xb0, yb0)
    size = step._cache_size()
    with CompileCounter() as counter:
        jax.block_until_ready(step(params, state, op, xb1, yb1))
    assert counter.count == 0
    assert step._cache_size() == size
    # The counter sees a compilation when there is one (a fresh shape).
    with CompileCounter() as counter:
        jax.block_until_ready(jax.jit(lambda v: v * 3 + 1)(np.ones(size + 17, np.float32)))
    assert counter.count >= 1


def test_training_loop_compiles_nothing_after_the_first_epoch(tmp_path_factory):
    """Over the whole straight run: nothing compiles after epoch 1."""
    H.plain_run(tmp_path_factory)
    marks = H.PLAIN_MARKS
    assert len(marks) == 6, marks
    assert marks[1:] == [marks[0]] * 5, marks


def test_step_jit_equals_no_jit(trainer):
    """One training step with and without ``jax.disable_jit()`` (as optax
    tests its transformations): equal to float32 round-off."""
    tr = trainer
    batches = tr.batches(1)
    tx, step, _ = build_step(tr, len(batches))
    params = init_params(tr.spec, 3)
    state = tx.init(params)
    b = np.asarray(batches[0])
    args = (params, state, tr.op, tr.x[b], tr.y[b])
    fast = step(*args)
    with jax.disable_jit():
        slow = step(*args)
    fl, sl = jax.tree_util.tree_leaves(fast), jax.tree_util.tree_leaves(slow)
    assert len(fl) == len(sl)
    for a, c in zip(fl, sl):
        a, c = np.asarray(a), np.asarray(c)
        assert a.shape == c.shape and a.dtype == c.dtype
        np.testing.assert_allclose(a, c, rtol=1e-5, atol=1e-6)
    # The step did something: params moved and the penalty was active.
    moved = [np.max(np.abs(np.asarray(p1) - np.asarray(p0)))
             for p1, p0 in zip(jax.tree_util.tree_leaves(fast[0]), jax.tree_util.tree_leaves(params))]
    assert max(moved) > 0 and float(fast[4]) > 0


# ---------------------------------------------------------------------------
# Resume.


def _npz(path):
    with np.load(path, allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def _assert_same_arrays(a, b):
    assert sorted(a) == sorted(b)
    for k in a:
        assert a[k].dtype == b[k].dtype and a[k].shape == b[k].shape, k
        assert np.array_equal(a[k], b[k]), k


def _same_log(la, lb):
    assert [r["epoch"] for r in la] == [r["epoch"] for r in lb]
    for ra, rb in zip(la, lb):
        assert {k: v for k, v in ra.items() if k != "seconds"} == {k: v for k, v in rb.items() if k != "seconds"}


def test_resume_equals_uninterrupted(tmp_path_factory, tmp_path):
    cfg, run_a = H.plain_run(tmp_path_factory)  # 6 epochs straight through
    log_a = H.read_jsonl(os.path.join(run_a, "log.jsonl"))
    # Meaningful only if the kept (best-validation) params come from after
    # the interruption at epoch 3.
    vals = [r["val_acc"] for r in log_a]
    assert int(np.argmax(vals)) + 1 > 3, vals
    run_b = str(tmp_path / "b")
    assert cli.main(["train", cfg, "--out", run_b, "--epochs", "3"]) == 0
    assert len(H.read_jsonl(os.path.join(run_b, "log.jsonl"))) == 3
    assert cli.main(["train", cfg, "--out", run_b, "--resume", "--epochs", "6"]) == 0
    _assert_same_arrays(_npz(os.path.join(run_a, "params.npz")), _npz(os.path.join(run_b, "params.npz")))
    ca, cb = _npz(os.path.join(run_a, "checkpoint.npz")), _npz(os.path.join(run_b, "checkpoint.npz"))
    ca.pop("meta")
    cb.pop("meta")
    _assert_same_arrays(ca, cb)  # last params, optimiser state and best params
    _same_log(log_a, H.read_jsonl(os.path.join(run_b, "log.jsonl")))


def test_crash_leaves_log_and_checkpoint_and_resume_finishes(tmp_path_factory, tmp_path):
    """A run interrupted after epoch 3 keeps a readable log and checkpoint,
    has no params.npz, and ``--resume`` ends where the straight run ends."""
    cfg_path, run_a = H.plain_run(tmp_path_factory)
    cfg = load_config(cfg_path)
    out = str(tmp_path / "crashed")

    def crash(msg):
        if msg.startswith("epoch   3/"):
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        train(cfg, out, progress=crash)
    assert [r["epoch"] for r in read_log(os.path.join(out, "log.jsonl"))] == [1, 2, 3]
    assert not os.path.exists(os.path.join(out, "params.npz"))
    assert not [f for f in os.listdir(out) if f.startswith(".tmp-")]  # no temporary left behind
    tr = Trainer.from_config(cfg)
    template = init_params(tr.spec, 0)
    state, meta = load_checkpoint(os.path.join(out, "checkpoint.npz"), {"params": template})
    assert meta["epoch"] == 3
    assert jax.tree_util.tree_structure(state["params"]) == jax.tree_util.tree_structure(template)
    assert cli.main(["train", cfg_path, "--out", out, "--resume"]) == 0
    _assert_same_arrays(_npz(os.path.join(run_a, "params.npz")), _npz(os.path.join(out, "params.npz")))


def test_resume_needs_a_checkpoint(tmp_path, capsys):
    cfg = H.write(tmp_path / "c.toml", H.tiny_text())
    assert cli.main(["train", cfg, "--out", str(tmp_path / "none"), "--resume"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "checkpoint" in err[0]


# ---------------------------------------------------------------------------
# Never overwrite unasked.


def test_existing_run_is_not_overwritten_without_force(tmp_path_factory, capsys):
    cfg, run_a = H.plain_run(tmp_path_factory)
    before = H.snapshot(run_a)
    capsys.readouterr()
    assert cli.main(["train", cfg, "--out", run_a]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--force" in err[0] and "Traceback" not in err[0]
    assert H.snapshot(run_a) == before  # same files, bytes and mtimes


def test_force_writes_into_an_existing_run(tmp_path_factory, tmp_path):
    cfg, run_a = H.plain_run(tmp_path_factory)
    out = str(tmp_path / "copy")
    shutil.copytree(run_a, out)
    old_log = open(os.path.join(out, "log.jsonl"), "rb").read()
    assert cli.main(["train", cfg, "--out", out, "--force", "--seed", "1", "--epochs", "2"]) == 0
    log = H.read_jsonl(os.path.join(out, "log.jsonl"))
    assert [r["epoch"] for r in log] == [1, 2]  # this run's records only
    assert json.load(open(os.path.join(out, "manifest.json")))["seed"] == 1
    assert json.load(open(os.path.join(out, "summary.json")))["epochs"] == 2
    a, b = _npz(os.path.join(run_a, "params.npz")), _npz(os.path.join(out, "params.npz"))
    assert any(not np.array_equal(a[k], b[k]) for k in a)
    # The old log is kept aside, not lost.
    assert open(os.path.join(out, "log.jsonl.previous"), "rb").read() == old_log


# ---------------------------------------------------------------------------
# The log.

REQUIRED = ("epoch", "loss", "task_loss", "penalty", "train_acc", "val_acc", "certified", "published", "layers",
            "seconds")


@pytest.mark.parametrize("which", ["plain", "penalised"])
def test_log_records_are_complete(tmp_path_factory, which):
    cfg_path, run = (H.plain_run if which == "plain" else H.penalised_run)(tmp_path_factory)
    cfg = load_config(cfg_path)
    lines = open(os.path.join(run, "log.jsonl")).read().splitlines()
    assert len(lines) == 6
    eps = [f"{e:g}" for e in cfg["certify"]["eps"]]
    for i, line in enumerate(lines, start=1):
        rec = json.loads(line)  # every line is one JSON object
        for key in REQUIRED:
            assert key in rec, key
        assert rec["epoch"] == i
        for key in ("loss", "task_loss", "penalty", "train_acc", "val_acc", "seconds"):
            assert isinstance(rec[key], float) and math.isfinite(rec[key]), key
        assert 0 <= rec["train_acc"] <= 1 and 0 <= rec["val_acc"] <= 1 and rec["seconds"] >= 0
        assert rec["loss"] == pytest.approx(rec["task_loss"] + rec["penalty"], rel=1e-6, abs=1e-6)
        assert (rec["penalty"] > 0) == (which == "penalised")
        for key in ("certified", "published"):
            assert sorted(rec[key], key=float) == sorted(eps, key=float)
            assert all(isinstance(v, float) and v > 0 and math.isfinite(v) for v in rec[key].values())
        # A larger ball of perturbations cannot need a smaller bound.
        vals = [rec["certified"][e] for e in sorted(eps, key=float)]
        assert vals == sorted(vals)
        assert len(rec["layers"]) == len(cfg["model"]["features"])
        for layer in rec["layers"]:
            assert set(layer) >= {"integral_lipschitz", "kernel", "sup"}
            assert all(isinstance(layer[k], float) and layer[k] >= 0 for k in ("integral_lipschitz", "kernel", "sup"))


def test_penalty_shrinks_the_certificate(tmp_path_factory):
    """Same data, model and seed; only the penalty weight differs."""
    _, plain = H.plain_run(tmp_path_factory)
    _, pen = H.penalised_run(tmp_path_factory)
    sp_, sq = (json.load(open(os.path.join(r, "summary.json"))) for r in (plain, pen))
    assert sp_["penalty"]["weight"] == 0 and sq["penalty"]["weight"] > 0
    for e, v in sp_["certificate"]["certified"].items():
        assert sq["certificate"]["certified"][e] < v, (e, sq["certificate"]["certified"][e], v)
    assert sq["certificate"]["layers"][0]["integral_lipschitz"] < sp_["certificate"]["layers"][0]["integral_lipschitz"]


# ---------------------------------------------------------------------------
# Early stopping.


def _expected_stop(vals, patience, higher_better=True):
    """The epoch the rule 'stop after `patience` epochs without a strict
    improvement of the best validation metric' stops at (common practice)."""
    best, bad = None, 0
    for epoch, v in enumerate(vals, start=1):
        if best is None or (v > best if higher_better else v < best):
            best, bad = v, 0
        else:
            bad += 1
        if bad >= patience:
            return epoch
    return len(vals)


def test_early_stopping_with_patience(tmp_path, capsys):
    """Noisy snapshots and a small learning rate: the validation accuracy
    stalls, so a 30-epoch budget stops early."""
    cfg = H.write(tmp_path / "c.toml", H.tiny_text(noise=0.35, lr=0.01, epochs=30, patience=2))
    out = str(tmp_path / "run")
    assert cli.main(["train", cfg, "--out", out]) == 0
    assert "early stop" in capsys.readouterr().out
    log = H.read_jsonl(os.path.join(out, "log.jsonl"))
    vals = [r["val_acc"] for r in log]
    assert len(log) < 30
    assert len(log) == _expected_stop(vals, 2)
    summary = json.load(open(os.path.join(out, "summary.json")))
    assert summary["epochs"] == len(log)
    # The kept params are the best-validation ones.
    assert summary["metrics"]["val_acc"] == pytest.approx(max(vals), abs=1e-6)


# ---------------------------------------------------------------------------
# Regression from the user's files.


@pytest.fixture(scope="module")
def les_mis(tmp_path_factory):
    """Les Miserables co-occurrence graph (bundled with networkx, 77 nodes)
    saved with scipy.sparse.save_npz, and smooth targets: a low-pass of the
    inputs, ``y = V exp(-2 Lambda) V^T x`` on the normalised Laplacian
    (numpy.linalg.eigh)."""
    folder = tmp_path_factory.mktemp("files")
    g = nx.les_miserables_graph()
    adj = nx.to_scipy_sparse_array(g, weight="weight", format="csr").astype(np.float64)
    sp.save_npz(folder / "graph.npz", sp.csr_matrix(adj))
    a = adj.toarray()
    deg = a.sum(axis=1)
    lap = np.eye(len(a)) - a / np.sqrt(np.outer(deg, deg))
    w, v = np.linalg.eigh(lap)
    rng = np.random.default_rng(21)
    x = rng.standard_normal((60, len(a)))
    y_node = (v @ (np.exp(-2 * w)[:, None] * (v.T @ x.T))).T
    y_graph = 3.0 * x.mean(axis=1)
    np.savez(folder / "signals.npz", x=x, y=y_node)
    np.savez(folder / "graph_signals.npz", x=x, y=y_graph)
    return folder


FILES_CFG = """\
name = "les-mis-{name}"
[data]
source = "files"
graph = "graph.npz"
signals = "{signals}"
task = "regress"
shift = "normalized-laplacian"
[model]
features = [4]
taps = 3
readout = "{readout}"
[train]
epochs = 6
batch_size = 12
learning_rate = 0.02
[certify]
eps = [0.01]
"""


@pytest.mark.parametrize("readout,signals", [("node", "signals.npz"), ("mean", "graph_signals.npz")])
def test_regression_from_files(les_mis, tmp_path, readout, signals):
    cfg = H.write(les_mis / f"{readout}.toml", FILES_CFG.format(name=readout, signals=signals, readout=readout))
    out = str(tmp_path / "run")
    assert cli.main(["train", cfg, "--out", out]) == 0
    log = H.read_jsonl(os.path.join(out, "log.jsonl"))
    assert all("train_rmse" in r and "val_rmse" in r and "train_acc" not in r for r in log)
    assert log[-1]["task_loss"] < log[0]["task_loss"]  # Adam reduces the squared error
    summary = json.load(open(os.path.join(out, "summary.json")))
    assert summary["metric"] == "rmse"
    # The reported test RMSE recomputed from the run's files with the
    # numpy eigh reference model (float32 training path vs float64: 1e-5).
    run = open_run(out)
    test = _npz(os.path.join(out, "test.npz"))
    graph = sp.load_npz(os.path.join(out, "graph.npz")).toarray()
    pred = H.ref_model(H.to_numpy(run.params), graph, test["x"], kind=run.spec.basis.kind,
                       interval=run.spec.basis.interval, nonlinearity=run.spec.nonlinearity, readout=readout)
    rmse = float(np.sqrt(np.mean((pred[..., 0] - test["y"]) ** 2)))
    assert summary["metrics"]["test_rmse"] == pytest.approx(rmse, rel=1e-5)
    assert test["y"].shape == ((len(test["x"]), 77) if readout == "node" else (len(test["x"]),))


# ---------------------------------------------------------------------------
# The logged certificates against measured changes of the trained models.


def _measured(run_dir, params, eps_keys, rng, trials=4):
    """Largest measured ``||Phi(S_hat) x - Phi(S) x||_F`` per eps over random
    dense relative perturbations of the run's graph (and scalings), for its
    test signals and random signals of norm rho; numpy eigh reference."""
    run = open_run(run_dir)
    s = run.op.dense()
    n = s.shape[0]
    rho = json.load(open(os.path.join(run_dir, "manifest.json")))["rho"]
    x = np.concatenate([run.test_x.astype(np.float64), H.signals(rng, 4, n, run.test_x.shape[2], rho)])
    assert np.all(np.linalg.norm(x.reshape(len(x), -1), axis=1) <= rho * (1 + 1e-6))

    def model(m):
        return H.ref_model(params, m, x, kind=run.spec.basis.kind, interval=run.spec.basis.interval,
                           nonlinearity=run.spec.nonlinearity, readout=run.spec.readout)

    y = model(s)
    out = {}
    for key in eps_keys:
        eps = float(key)
        hats = [H.relative(s, H.random_error(rng, n, eps)) for _ in range(trials)]
        hats += [(1 + 2 * eps) * s, (1 - 2 * eps) * s]
        out[key] = max(float(H.change_norms(y, model(h)).max()) for h in hats)
    return out


@pytest.mark.parametrize("which", ["plain", "penalised"])
def test_logged_certificates_hold_for_the_trained_model(tmp_path_factory, which):
    cfg_path, run_dir = (H.plain_run if which == "plain" else H.penalised_run)(tmp_path_factory)
    rng = np.random.default_rng(33)
    summary = json.load(open(os.path.join(run_dir, "summary.json")))
    final = H.to_numpy(open_run(run_dir).params)
    got = _measured(run_dir, final, summary["certificate"]["certified"], rng)
    for key, change in got.items():
        assert 0 < change <= summary["certificate"]["certified"][key], (key, change)
    # The last epoch's log record certifies the last epoch's params (from
    # the checkpoint), over the interval only.
    cfg = load_config(cfg_path)
    tr = Trainer.from_config(cfg)
    state, meta = load_checkpoint(os.path.join(run_dir, "checkpoint.npz"), {"params": init_params(tr.spec, 0)})
    last = H.read_jsonl(os.path.join(run_dir, "log.jsonl"))[-1]
    assert last["epoch"] == meta["epoch"]
    got = _measured(run_dir, H.to_numpy(state["params"]), last["certified"], rng)
    for key, change in got.items():
        assert 0 < change <= last["certified"][key], (key, change)


def test_classification_loss_has_no_gather_and_matches_optax():
    """The trainer's cross-entropy equals optax's integer-label form
    (``softmax_cross_entropy_with_integer_labels``, the reference) and its
    gradient has no gather or scatter: their index arrays were constant-folded
    by XLA for seconds, with a warning, at 10^5 nodes."""
    import jax
    import jax.numpy as jnp
    import optax

    from stablefilt._train import task_loss

    rng = np.random.default_rng(0)
    out = jnp.asarray(rng.standard_normal((4, 50, 3)), jnp.float32)
    y = jnp.asarray(rng.integers(0, 3, (4, 50)))
    want = float(jnp.mean(optax.softmax_cross_entropy_with_integer_labels(out, y)))
    assert float(task_loss(out, y, "classify")) == pytest.approx(want, rel=1e-6)
    text = str(jax.make_jaxpr(jax.grad(lambda o: task_loss(o, y, "classify")))(out))
    assert "gather" not in text and "scatter" not in text
