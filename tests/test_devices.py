"""Several devices: data-parallel training equals one device, the sharded
shift product equals scipy's CSR product, a sharded GNN's output and
gradient equal the single-device ones, the halo plans count the halo that
networkx counts, and a run over two processes equals a one-process run.

Several CPU devices are simulated with
``XLA_FLAGS=--xla_force_host_platform_device_count=4``, which must be set
before JAX starts, so those checks run in a subprocess (small graphs, a few
seconds each).
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import textwrap

import helpers as H
import jax
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

from stablefilt import parse_config
from stablefilt._errors import ConfigError
from stablefilt._partition import halo_plan, node_parts, partition_plan
from stablefilt._train import Trainer

TESTS = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(TESTS)


def _env(devices: int | None = 4, **extra) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (ROOT, TESTS, env.get("PYTHONPATH", "")) if p)
    flags = [f for f in env.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
    if devices:
        flags.append(f"--xla_force_host_platform_device_count={devices}")
    env["XLA_FLAGS"] = " ".join(flags)
    env.update(extra)
    return env


def _run(code: str, devices: int = 4, timeout: float = 120) -> dict:
    """Run ``code`` in a fresh interpreter with ``devices`` CPU devices; it
    prints one JSON object as its last line."""
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], env=_env(devices), capture_output=True,
                          text=True, timeout=timeout, cwd=ROOT)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


def _config_text(devices: int, batch_size: int = 10) -> str:
    return H.tiny_text(features="[6]", taps=3, weight=0.1, epochs=2, batch_size=batch_size).replace(
        "seed = 0\n\n[certify]", f"seed = 0\ndevices = {devices}\n\n[certify]")


def geometric(n: int, radius: float, seed: int) -> sp.csr_array:
    """Adjacency of a random geometric graph (networkx's generator)."""
    g = nx.random_geometric_graph(n, radius, seed=seed)
    return sp.csr_array(nx.to_scipy_sparse_array(g, nodelist=range(n), format="csr"))


# ---------------------------------------------------------------------------
# The config key.


def test_devices_key_is_checked(tmp_path, capsys):
    """``train.devices`` must be a positive integer no larger than the
    number of devices JAX sees; otherwise one sentence, exit status 2."""
    with pytest.raises(ConfigError, match="positive integer"):
        parse_config(_config_text(0), ".")
    with pytest.raises(ConfigError, match="train.split = 'edges' is invalid"):
        parse_config(_config_text(1).replace("devices = 1", 'devices = 1\nsplit = "edges"'), ".")
    too_many = jax.device_count() + 1
    with pytest.raises(ConfigError, match=f"train.devices = {too_many} asks for more devices"):
        Trainer.from_config(parse_config(_config_text(too_many), "."))
    cfg = H.write(tmp_path / "c.toml", _config_text(too_many))
    line = H.one_line_exit_2(capsys, ["train", cfg, "--out", str(tmp_path / "run")])
    assert "devices" in line
    assert not (tmp_path / "run" / "params.npz").exists()


# ---------------------------------------------------------------------------
# Data parallel.


def test_training_on_four_devices_equals_one_device():
    """Two epochs of the trainer's step on 4 devices, with the batch split
    (``split = "signals"``) and with the nodes split (``split = "nodes"``,
    METIS if installed, else RCM), give the parameters of two epochs on one
    device and the same evaluation, within float32 round-off (1e-5
    relative; common practice for float32). 36 training signals in batches
    of 10: with the batch split every batch is padded to 12 with masked
    signals, so the padding is exercised."""
    partition = _methods()[-1]
    result = _run(f"""
        import json, numpy as np, jax
        from stablefilt import parse_config, init_params
        from stablefilt._train import Trainer, build_step
        assert jax.device_count() == 4
        params, evals = {{}}, {{}}
        for name, extra in (("one", "devices = 1"), ("signals", "devices = 4"),
                            ("nodes", 'devices = 4\\nsplit = "nodes"\\npartition = "{partition}"')):
            text = {_config_text(1)!r}.replace("devices = 1", extra)
            tr = Trainer.from_config(parse_config(text, "."))
            batches = tr.batches(1)
            tx, step, evaluate = build_step(tr, len(batches))
            p = init_params(tr.spec, tr.seed)
            st = tx.init(p)
            for epoch in (1, 2):
                for b in tr.batches(epoch):
                    p, st, *_ = step(p, st, tr.op, tr.x[b], tr.y[b])
            params[name] = [np.asarray(a) for a in jax.tree_util.tree_leaves(p)]
            evals[name] = [float(v) for v in evaluate(p, tr.op, tr.x[tr.data.val], tr.y[tr.data.val])]
        rel = {{k: max(float(np.max(np.abs(a - b)) / np.max(np.abs(a))) for a, b in zip(params["one"], params[k]))
               for k in ("signals", "nodes")}}
        print(json.dumps({{"rel": rel, "leaves": len(params["one"]), "sizes": [len(b) for b in batches],
                          "evals": evals}}))
    """)
    assert result["leaves"] >= 4 and all(n % 4 for n in result["sizes"])  # padding was needed
    for split in ("signals", "nodes"):
        assert result["rel"][split] < 1e-5, result
        np.testing.assert_allclose(result["evals"][split], result["evals"]["one"], rtol=1e-5)


# ---------------------------------------------------------------------------
# Partitions and halo plans (no devices needed).


@pytest.mark.parametrize("exchange", ["permute", "gather"])
@pytest.mark.parametrize("method", ["rcm", "metis"])
def test_halo_plan_counts_the_halo_and_rebuilds_the_matrix(method, exchange):
    """Each device's halo is the node boundary of its part
    (``networkx.node_boundary``), the plan's local entries, mapped back to
    global indices through the exchange, are exactly the matrix's entries,
    and a permute exchange moves no more rows than a gather."""
    if method == "metis":
        pytest.importorskip("pymetis", reason="the METIS partition needs the optional package pymetis")
    a = geometric(200, 0.12, seed=3)
    a = sp.csr_array(a + sp.diags_array(np.linspace(0.5, 1.5, 200)))  # self loops stay local
    plan = partition_plan(a, 4, method, exchange)
    g = nx.from_scipy_sparse_array(a)
    assert plan.devices == 4 and sorted(np.unique(plan.parts)) == [0, 1, 2, 3]
    slot_node = np.full(4 * plan.block, -1)
    slot_node[plan.position] = np.arange(200)
    sent = slot_node[np.arange(4)[:, None] * plan.block + plan.send]  # (D, width): global node of each sent row
    rebuilt = np.zeros((200, 200))
    for d in range(4):
        part = set(np.flatnonzero(plan.parts == d))
        assert plan.halo[d] == len(nx.node_boundary(g, part))
        if exchange == "gather":
            received = sent.ravel()
        else:  # shift s brings device (d - s) mod D's segment s
            offs = np.cumsum([0] + [w for _, w in plan.shifts])
            received = np.concatenate([sent[(d - s) % 4, offs[i]:offs[i + 1]] for i, (s, _) in enumerate(plan.shifts)])
        ext = np.concatenate([slot_node[d * plan.block:(d + 1) * plan.block], received])
        assert ext.shape[0] == plan.extended
        k = plan.nnz[d]
        rows = slot_node[d * plan.block + plan.rows[d, :k]]
        np.add.at(rebuilt, (rows, ext[plan.cols[d, :k]]), plan.vals[d, :k])
        assert np.all(plan.vals[d, k:] == 0)
    np.testing.assert_array_equal(rebuilt, a.toarray())
    s = plan.summary(3)
    assert s["halo_bytes"] == 4 * 3 * int(plan.halo.sum()) and s["local_bytes"] == 4 * 3 * 200
    assert s["halo_bytes"] <= s["moved_bytes"]
    if exchange == "permute":
        assert s["moved_bytes"] <= halo_plan(a, plan.parts, devices=4, exchange="gather").moved_bytes(3)


def test_rcm_parts_are_balanced_and_corner_cases():
    """RCM blocks differ in size by at most one; a graph without edges has
    no halo; more parts than a tiny graph's nodes leaves parts empty."""
    a = geometric(103, 0.15, seed=5)
    sizes = np.bincount(node_parts(a, 4, "rcm"), minlength=4)
    assert sizes.max() - sizes.min() <= 1 and sizes.sum() == 103
    empty = halo_plan(sp.csr_array((10, 10)), np.arange(10) % 3)
    assert empty.halo.sum() == 0 and empty.nnz.sum() == 0
    tiny = halo_plan(sp.csr_array(np.ones((2, 2))), np.array([0, 0]), devices=3)
    assert tiny.devices == 3 and list(tiny.halo) == [0, 0, 0]
    with pytest.raises(ConfigError, match="unknown partition"):
        node_parts(a, 2, "spectral")


# ---------------------------------------------------------------------------
# The sharded product and model.

_SHARDED_SETUP = """
    import json, numpy as np, scipy.sparse as sp, networkx as nx, jax, jax.numpy as jnp
    from stablefilt._partition import partition_plan
    from stablefilt._sharded import node_mesh, sharded_operator, sharded_product, sharded_filter, sharded_forward
    assert jax.device_count() == 4
    mesh = node_mesh(4)
    methods = {methods!r}
"""


def _methods():
    try:
        import pymetis  # noqa: F401
    except ImportError:
        return ["rcm"]
    return ["rcm", "metis"]


def test_sharded_product_equals_scipy_csr():
    """``S x`` with the nodes split over 4 devices equals scipy's float64
    CSR product (the reference) within float32 round-off, for a random
    geometric graph and for a disconnected graph with isolated nodes, with
    either exchange."""
    result = _run(_SHARDED_SETUP.format(methods=_methods()) + """
    rng = np.random.default_rng(0)
    g = nx.random_geometric_graph(300, 0.1, seed=1)
    a = nx.to_scipy_sparse_array(g, nodelist=range(300), format="csr")
    b = sp.block_diag([a[:150, :150], sp.csr_array((20, 20)), a[150:, 150:] * 0.5], format="csr")
    errs = []
    for m in (a, b):
        m = sp.csr_array(m, dtype=np.float64)
        for method, exchange in [(a, b) for a in methods for b in ("permute", "gather")]:
            op = sharded_operator(partition_plan(m, 4, method, exchange), mesh)
            for x in (rng.standard_normal((m.shape[0], 3)), rng.standard_normal(m.shape[0])):
                y = np.asarray(jax.jit(lambda o, v: sharded_product(o, v, mesh))(op, x.astype(np.float32)))
                ref = m @ x  # scipy CSR, float64
                errs.append(float(np.max(np.abs(y - ref)) / np.max(np.abs(ref))))
    print(json.dumps({"errs": errs}))
    """)
    assert len(result["errs"]) == 8 * len(_methods())
    assert max(result["errs"]) < 1e-5, result


def test_sharded_filter_bank_and_gnn_equal_one_device():
    """Forward and gradient with respect to the taps with nodes split over
    4 devices: the filter bank against the float64 spectral reference
    (numpy.linalg.eigh, tests/helpers.ref_bank) and its gradient
    ``dL/dc_k = (p_k(S) X)^T G`` with ``p_k(S) X`` by the Chebyshev
    recursion on scipy's CSR product; a two-layer GNN (mean readout after
    the RCM partition, node readout after METIS) against the single-device model, output and every gradient
    within 1e-5 relative (float32; common practice)."""
    result = _run(_SHARDED_SETUP.format(methods=_methods()) + """
    import helpers as H
    from stablefilt._filters import Basis
    from stablefilt._graph import shift_operator
    from stablefilt._model import ModelSpec, forward, init_params
    from stablefilt._sparse import jax_operator
    rng = np.random.default_rng(2)
    g = nx.random_geometric_graph(240, 0.12, seed=4)
    op = shift_operator(nx.to_scipy_sparse_array(g, nodelist=range(240), format="csr"), "normalized-laplacian")
    s = sp.csr_array(op.matrix, dtype=np.float64)
    iv = (0.0, 2.0)
    basis = Basis("chebyshev", iv)
    taps = rng.standard_normal((4, 3, 2)) / 4
    x = rng.standard_normal((240, 3))
    gw = rng.standard_normal((240, 2))
    ref_y = H.ref_bank(s.toarray(), taps, x[None], "chebyshev", iv)[0]
    al, be = 2 / (iv[1] - iv[0]), -(iv[0] + iv[1]) / (iv[1] - iv[0])
    polys = [x, al * (s @ x) + be * x]
    while len(polys) < 4:
        polys.append(2 * (al * (s @ polys[-1]) + be * polys[-1]) - polys[-2])
    ref_g = np.stack([p.T @ gw for p in polys])
    out = {"bank": [], "bank_grad": [], "model": [], "model_grad": []}
    jop = jax_operator(op)
    xb = rng.standard_normal((5, 240, 3)).astype(np.float32)
    for method in methods:
        # The gather exchange after RCM, the permute exchange after METIS (or after RCM without pymetis).
        exchange = "gather" if method == "rcm" and len(methods) > 1 else "permute"
        sh = sharded_operator(partition_plan(s, 4, method, exchange), mesh)
        f = jax.jit(lambda c: sharded_filter(sh, c, x.astype(np.float32), basis, mesh))
        y = np.asarray(f(taps.astype(np.float32)))
        out["bank"].append(float(np.max(np.abs(y - ref_y)) / np.max(np.abs(ref_y))))
        gr = np.asarray(jax.jit(jax.grad(lambda c: jnp.sum(f(c) * gw)))(taps.astype(np.float32)))
        out["bank_grad"].append(float(np.max(np.abs(gr - ref_g)) / np.max(np.abs(ref_g))))
        # One readout per partition keeps the test short: pooled after RCM, per node after METIS.
        for readout, outputs in ((("mean", 2),) if method == "rcm" else (("node", 3),)):
            spec = ModelSpec((3, 6, 4), taps=3, basis=basis, readout=readout, outputs=outputs)
            params = init_params(spec, 7)
            def both(fwd):
                return jax.jit(lambda p: (fwd(p), jax.grad(lambda q: jnp.sum(jnp.sin(fwd(q))))(p)))
            ya, ga = both(lambda p: forward(p, jop, xb, spec))(params)
            yb, gb = both(lambda p: sharded_forward(p, sh, xb, spec, mesh))(params)
            out["model"].append(float(jnp.max(jnp.abs(ya - yb)) / jnp.max(jnp.abs(ya))))
            for a_, b_ in zip(jax.tree_util.tree_leaves(ga), jax.tree_util.tree_leaves(gb)):
                out["model_grad"].append(float(jnp.max(jnp.abs(a_ - b_)) / jnp.maximum(jnp.max(jnp.abs(a_)), 1e-30)))
    print(json.dumps(out))
    """)
    k = len(_methods())
    assert len(result["bank"]) == k and len(result["model"]) == k and len(result["model_grad"]) >= k * 4
    for name, errs in result.items():
        assert max(errs) < 1e-5, (name, errs)


# ---------------------------------------------------------------------------
# Several processes.


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@pytest.mark.parametrize("split", ["signals", "nodes"])
def test_two_processes_train_like_one(tmp_path, split):
    """``stablefilt train`` in two local processes joined by
    ``STABLEFILT_COORDINATOR`` (one CPU device each, ``train.devices = 2``,
    gloo collectives), with the batch or the nodes split over the two,
    ends with the parameters of a one-process run, within float32 round-off
    (common practice)."""
    extra = f'split = "{split}"\npartition = "{_methods()[-1]}"'
    H.write(tmp_path / "two.toml", _config_text(2).replace("devices = 2", f"devices = 2\n{extra}"))
    H.write(tmp_path / "one.toml", _config_text(1))
    addr = f"127.0.0.1:{_free_port()}"
    cmd = [sys.executable, "-m", "stablefilt.cli", "train", "--quiet"]
    jobs = [(str(tmp_path / "two.toml"), f"r{i}", _env(None, STABLEFILT_COORDINATOR=addr, STABLEFILT_PROCESSES="2",
                                                       STABLEFILT_PROCESS_ID=str(i))) for i in range(2)]
    jobs.append((str(tmp_path / "one.toml"), "s", _env(None)))  # the one-process reference, run alongside
    procs = [subprocess.Popen(cmd + [cfg, "--out", str(tmp_path / out)], env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True, cwd=ROOT) for cfg, out, env in jobs]
    try:
        outs = [p.communicate(timeout=150) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    for p, (_, err) in zip(procs, outs):
        assert p.returncode == 0, err[-3000:]
    ref = np.load(tmp_path / "s" / "checkpoint.npz")
    keys = [k for k in ref.files if k.startswith("params/")]
    assert len(keys) >= 4
    for i in range(2):
        got = np.load(tmp_path / f"r{i}" / "checkpoint.npz")
        for k in keys:
            assert np.max(np.abs(got[k] - ref[k])) <= 1e-5 * np.max(np.abs(ref[k])), (i, k)


@pytest.mark.parametrize("env, word", [
    ({"STABLEFILT_COORDINATOR": "hostonly"}, "STABLEFILT_COORDINATOR"),
    ({"STABLEFILT_COORDINATOR": "127.0.0.1:1", "STABLEFILT_PROCESSES": "two"}, "STABLEFILT_PROCESSES"),
    ({"STABLEFILT_COORDINATOR": "127.0.0.1:1", "STABLEFILT_PROCESSES": "2", "STABLEFILT_PROCESS_ID": "2"},
     "STABLEFILT_PROCESS_ID"),
])
def test_bad_process_variables_are_one_sentence(tmp_path, capsys, monkeypatch, env, word):
    """Malformed process variables are refused before JAX's runtime starts:
    one sentence naming the variable, exit status 2 (the project's
    bad-input rule)."""
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    cfg = H.write(tmp_path / "c.toml", _config_text(1))
    line = H.one_line_exit_2(capsys, ["train", cfg, "--out", str(tmp_path / "run")])
    assert word in line
    assert not (tmp_path / "run").exists()
