"""The trainer: task loss plus stability penalty, optax, early stopping, a
float64 certificate every epoch, atomic checkpoints and resume. The run
directory it writes is described in :mod:`stablefilt._runs`."""

from __future__ import annotations

import dataclasses
import functools
import json
import os
import time

import jax
import jax.numpy as jnp
import numpy as np
import optax

from ._certpenalty import CERT_GRID, CertifiedSetup, certified_penalty, certified_setup
from ._config import Config
from ._data import Dataset, build_dataset
from ._edgelist import node_list_text
from ._errors import ConfigError, RunError, TrainingDiverged
from ._filters import Basis
from ._graph import reorder
from ._interval import SpectralInterval, spectral_interval
from ._lock import check_unlocked, run_lock
from ._model import ModelSpec, forward, init_params, spec_from
from ._modelcert import certify_model, model_constants
from ._optstep import loss_terms, optimiser_step
from ._penalty import model_penalty, penalty
from ._predictions import training_predictions
from ._progress import bar, say_through
from ._runs import (
    check_out_dir,
    make_out_dir,
    new_manifest,
    now,
    prepare_out_dir,
    read_manifest_or_empty,
    run_paths,
    set_aside,
)
from ._sparse import jax_operator
from ._store import (
    FORMAT,
    append_log,
    atomic_write,
    load_checkpoint,
    npz_bytes,
    read_log,
    rewrite_log,
    save_checkpoint,
    save_graph,
    save_params,
    write_json,
)


def model_spec(config: Config, interval: SpectralInterval, in_features: int, outputs: int,
               nodes: int = 0) -> ModelSpec:
    m = config["model"]
    if m["basis"] == "chebyshev":
        iv = tuple(m["basis_interval"]) if m["basis_interval"] else (interval.lower, interval.upper)
        if not iv[0] < iv[1]:
            iv = (iv[0] - 1.0, iv[1] + 1.0)
        basis = Basis("chebyshev", (float(iv[0]), float(iv[1])))
    else:
        basis = Basis()
    if m["readout"] == "none" and m["features"][-1] != outputs:
        raise ConfigError(f"model.readout = 'none' needs the last of model.features to be {outputs} "
                          f"(the outputs of the task); got {m['features'][-1]}.")
    return spec_from(m, basis, in_features, outputs, nodes)


def _residual(out, y):
    """Regression error; a single output's targets carry no output axis."""
    return (out[..., 0] if y.ndim < out.ndim else out) - y


def task_loss(out, y, task: str):
    return jnp.mean(loss_terms(out, y, task))


def metric(out, y, task: str):
    """Accuracy (classify) or RMSE over every output (regress)."""
    if task == "classify":
        return jnp.mean((jnp.argmax(out, axis=-1) == y).astype(jnp.float32))
    return jnp.sqrt(jnp.mean(_residual(out, y) ** 2))


def make_penalty_fn(config, spec: ModelSpec, interval, setup: CertifiedSetup | None = None):
    """``(penalty(params), active)`` from the config's ``[penalty]``;
    ``interval`` is ``(a, b)``; ``setup`` is needed by mode ``certified``
    (:func:`stablefilt._certpenalty.certified_setup`)."""
    p = config["penalty"]
    iv = (float(interval[0]), float(interval[1]))
    weight = p["weight"]
    if p["mode"] == "certified":
        if setup is None:
            raise ConfigError("penalty mode 'certified' needs the training graph's setup (rho, nodes).")
        w = float(weight)

        def fn(params):
            val = certified_penalty(params, setup)
            return w * (jax.nn.relu(val - p["target"]) ** 2 if p["reduce"] == "hinge" else val)
    elif p["mode"] == "model":
        w = float(weight if not isinstance(weight, list) else max(weight))

        def fn(params):
            return w * model_penalty(params, iv, basis=spec.basis, grid=p["grid"], readout=spec.readout,
                                     reduce=p["reduce"] if p["reduce"] == "hinge" else "max", target=p["target"])
    else:
        def fn(params):
            return penalty(params["layers"], iv, mode=p["mode"], reduce=p["reduce"], target=p["target"],
                           weights=weight, basis=spec.basis, grid=p["grid"])
    active = (max(weight) if isinstance(weight, list) else weight) > 0
    return fn, active


def make_optimizer(config, steps_per_epoch: int):
    t = config["train"]
    lr = t["learning_rate"]
    if t["schedule"] == "cosine":
        lr = optax.cosine_decay_schedule(lr, max(1, t["epochs"] * steps_per_epoch))
    parts = []
    if t["clip"] > 0:
        parts.append(optax.clip_by_global_norm(t["clip"]))
    parts.append(optax.adamw(lr, weight_decay=t["weight_decay"]) if t["weight_decay"] > 0 else optax.adam(lr))
    return optax.chain(*parts)


@dataclasses.dataclass
class Trainer:
    """Everything a run needs, built once from a config."""

    config: Config
    data: Dataset
    interval: SpectralInterval
    spec: ModelSpec
    perm: np.ndarray
    op: object  # JaxShift in RCM order
    x: jnp.ndarray  # signals in RCM order
    y: jnp.ndarray
    rho: float
    eps: list
    seed: int

    @classmethod
    def from_config(cls, config: Config, seed: int | None = None) -> "Trainer":
        if config["train"].get("devices", 1) > 1:
            from ._parallel import check_devices

            check_devices(config["train"]["devices"])
        data = build_dataset(config)
        interval = spectral_interval(data.op)
        spec = model_spec(config, interval, data.x.shape[2], data.classes, data.op.nodes)
        if data.node_task == (spec.readout in ("mean", "sum", "flat")):
            want = "'node' or 'none'" if data.node_task else "'mean', 'sum' or 'flat'"
            per = "one per node" if data.node_task else "one per signal"
            raise ConfigError(f"model.readout = {spec.readout!r} does not fit the data, whose targets are {per}; "
                              f"use readout = {want}.")
        # The flat readout's weight rows follow the node order, so its model
        # trains in the given order (the run's files are in it).
        ordered, perm = (data.op, np.arange(data.op.nodes)) if spec.readout == "flat" else reorder(data.op)
        x = data.x[:, perm, :]
        y = data.y[:, perm] if data.node_task else data.y
        rho = float(np.max(np.linalg.norm(data.x.reshape(data.x.shape[0], -1).astype(np.float64), axis=1)))
        return cls(config, data, interval, spec, perm, jax_operator(ordered), jnp.asarray(x), jnp.asarray(y), rho,
                   [float(e) for e in config["certify"]["eps"]],
                   config["train"]["seed"] if seed is None else int(seed))

    def batches(self, epoch: int) -> list[np.ndarray]:
        """Equal-size mini-batches of training signals for ``epoch``,
        shuffled by ``(seed, epoch)``; the remainder rotates between epochs.
        Equal sizes keep the step compiled once."""
        tr = self.data.train
        bs = self.config["train"]["batch_size"]
        if bs == 0 or bs >= len(tr):
            return [tr]
        rng = np.random.default_rng([self.seed, epoch])
        order = rng.permutation(tr)
        return [order[i * bs:(i + 1) * bs] for i in range(len(tr) // bs)]

    def certificate(self, params, eigen: bool = False):
        """The model certificate: every epoch over the interval (cheap); at the
        end over the eigenvalues with rebalanced factorisations (tighter)."""
        lam = self.interval.eigenvalues if eigen else None
        return certify_model(params, self.spec, self.interval, self.data.op.nodes, self.eps, rho=self.rho,
                             eigenvalues=lam, matrix=self.data.op.matrix, rebalance=eigen)


def build_step(trainer: Trainer, steps: int):
    """``(tx, step, evaluate)`` for a trainer. Cached on everything they
    depend on, so a process training many runs of the same shapes compiles
    each step once (see the soak test)."""
    c = trainer.config
    iv = (float(trainer.interval.lower), float(trainer.interval.upper))
    setup = None
    if c["penalty"]["mode"] == "certified":
        setup = certified_setup(trainer.spec, iv, rho=trainer.rho, nodes=trainer.data.op.nodes,
                                matrix=trainer.data.op.matrix, grid=min(c["penalty"]["grid"], CERT_GRID))
    key = (trainer.spec, trainer.data.task, json.dumps(c["penalty"], sort_keys=True),
           json.dumps(c["train"], sort_keys=True), int(steps), iv, setup)
    return _build_step_cached(key)


@functools.lru_cache(maxsize=16)
def _build_step_cached(key):
    spec, task, pen_json, train_json, steps, iv, setup = key
    cfg = {"penalty": json.loads(pen_json), "train": json.loads(train_json)}
    tx = make_optimizer(cfg, steps)
    pen_fn, active = make_penalty_fn(cfg, spec, iv, setup)

    def loss_fn(params, op, xb, yb):
        out = forward(params, op, xb, spec)
        tl = task_loss(out, yb, task)
        pen = pen_fn(params) if active else jnp.float32(0.0)
        return tl + pen, (tl, pen)

    devices = cfg["train"].get("devices", 1)
    if devices > 1:  # the batch or the nodes split over several devices (docs/devices.md)
        from ._parallel import node_split_functions, parallel_functions

        if cfg["train"].get("split", "signals") == "nodes":
            return (tx,) + node_split_functions(spec, task, tx, pen_fn, active, devices, cfg["train"]["partition"])
        return (tx,) + parallel_functions(spec, task, tx, pen_fn, active, devices)

    step = optimiser_step(loss_fn, tx)

    @jax.jit
    def evaluate(params, op, xb, yb):
        out = forward(params, op, xb, spec)
        return task_loss(out, yb, task), metric(out, yb, task)

    return tx, step, evaluate


def _run_bytes(trainer: Trainer, params) -> int:
    """Rough upper estimate of a run's files: three copies of the params and
    Adam's two moments in the checkpoint, the graph, the test data, logs."""
    p = sum(np.asarray(a).nbytes for a in jax.tree_util.tree_leaves(params))
    m = trainer.data.op.matrix
    g = m.data.nbytes + m.indices.nbytes + m.indptr.nbytes
    t = trainer.data.x[trainer.data.test].nbytes + trainer.data.y[trainer.data.test].nbytes
    return 2 * (6 * p + g + t) + (1 << 20)


#: Taps or weights beyond this size count as exploding.
EXPLODED = 1e6


def _diverged(loss: float, params) -> str | None:
    """Why training must stop, or None."""
    if not np.isfinite(loss):
        return f"the loss became {loss}"
    biggest = max(float(np.max(np.abs(np.asarray(a)))) for a in jax.tree_util.tree_leaves(params))
    if not np.isfinite(biggest):
        return "a parameter became NaN or infinite"
    if biggest > EXPLODED:
        return f"the parameters exploded (largest |value| {biggest:.3g} > {EXPLODED:g})"
    return None


def _fmt_metric(task: str) -> str:
    return "acc" if task == "classify" else "rmse"


def train(config: Config, out: str, *, epochs: int | None = None, seed: int | None = None, resume: bool = False,
          force: bool = False, progress=print) -> dict:
    """Train the model a config describes and write the run directory.

    Returns the summary dictionary (also written to ``summary.json``).
    """
    check_unlocked(out, resume)
    check_out_dir(out, resume, force)
    trainer = Trainer.from_config(config, seed)
    params = init_params(trainer.spec, trainer.seed)
    make_out_dir(out)
    with run_lock(out, resume=resume, note=progress):
        # Checked again under the lock: a run that finished meanwhile filled it.
        check_out_dir(out, resume, force)
        prepare_out_dir(out, _run_bytes(trainer, params))
        return _train_locked(trainer, params, out, epochs, resume, progress)


def _train_locked(trainer: Trainer, params, out: str, epochs, resume: bool, progress) -> dict:
    config = trainer.config
    t = config["train"]
    n_epochs = int(epochs if epochs is not None else t["epochs"])
    steps = len(trainer.batches(0))
    tx, step, evaluate = build_step(trainer, steps)
    opt_state = tx.init(params)
    best = params
    best_val, bad, start_epoch, best_epoch = None, 0, 1, None
    paths = run_paths(out)
    if resume:
        state, meta = load_checkpoint(paths["ckpt"], {"params": params, "opt_state": opt_state, "best": best})
        if meta.get("fingerprint") != trainer.data.op.fingerprint() or meta.get("seed") != trainer.seed:
            raise RunError(f"checkpoint in {out!r} was made from another graph or seed than this config gives.")
        params, opt_state, best = state["params"], state["opt_state"], state["best"]
        best_val, bad, start_epoch = meta["best_val"], meta["bad"], meta["epoch"] + 1
        best_epoch = meta.get("best_epoch")  # None in checkpoints written before it was kept
        n_epochs = max(n_epochs, meta.get("epochs", n_epochs))
        rewrite_log(paths["log"], [r for r in read_log(paths["log"]) if r.get("epoch", 0) <= meta["epoch"]])
        manifest = dict(read_manifest_or_empty(paths["manifest"]))
    else:
        atomic_write(os.path.join(out, "config.toml"), config.text.encode())
        save_graph(os.path.join(out, "graph.npz"), trainer.data.op.matrix)
        te = trainer.data.test
        atomic_write(os.path.join(out, "test.npz"), npz_bytes({"x": trainer.data.x[te], "y": trainer.data.y[te]}))
        if trainer.data.node_ids is not None:  # to read later graphs and join predictions in this order
            atomic_write(os.path.join(out, "nodes.csv"), node_list_text(trainer.data.node_ids).encode())
        for k in ("log", "ckpt", "params", "summary"):
            set_aside(paths[k])
        d = trainer.data
        manifest = new_manifest(config.name, trainer.seed, d.op, trainer.interval, trainer.spec.basis, d.task,
                                d.classes, {"train": len(d.train), "val": len(d.val), "test": len(d.test)},
                                trainer.rho)
        write_json(paths["manifest"], manifest)
    x, y, op = trainer.x, trainer.y, trainer.op
    tr, va = jnp.asarray(trainer.data.train), jnp.asarray(trainer.data.val)
    mname = _fmt_metric(trainer.data.task)
    higher_better = trainer.data.task == "classify"
    patience = t["patience"]
    epoch = start_epoch - 1
    # A bar over epochs with a time estimate (standard error, terminals only);
    # the epoch lines print through it.
    with bar(n_epochs - start_epoch + 1, "training", unit="epoch") as pb:
        progress = say_through(pb, progress)
        for epoch in range(start_epoch, n_epochs + 1):
            t0 = time.perf_counter()
            losses, tls, pens = [], [], []
            for b in trainer.batches(epoch):
                params, opt_state, loss, tl, pen = step(params, opt_state, op, x[b], y[b])
                losses.append(loss)
                tls.append(tl)
                pens.append(pen)
            loss, tl, pen = (float(np.mean(jax.device_get(v))) for v in (losses, tls, pens))
            why = _diverged(loss, params)
            if why:
                append_log(paths["log"], {"epoch": epoch, "stopped": why, "loss": loss if np.isfinite(loss) else None})
                kept = (f"the last good checkpoint (epoch {epoch - 1}) is kept in {out!r}" if epoch > 1
                        else f"no epoch completed, so {out!r} holds no checkpoint")
                raise TrainingDiverged(f"training stopped at epoch {epoch}: {why}; {kept}. "
                                       "Lower the learning rate or clip harder.")
            _, tr_m = evaluate(params, op, x[tr], y[tr])
            va_l, va_m = evaluate(params, op, x[va], y[va])
            tr_m, va_m, va_l = float(tr_m), float(va_m), float(va_l)
            cert = trainer.certificate(params)
            cert_json = cert.as_dict()
            val_cert = _val_certified(trainer, params, cert)
            seconds = time.perf_counter() - t0
            record = {
                "epoch": epoch, "loss": loss, "task_loss": tl, "penalty": pen,
                f"train_{mname}": tr_m, f"val_{mname}": va_m, "val_loss": va_l,
                "certified": cert_json["certified"], "published": cert_json["published"],
                "layers": [{"integral_lipschitz": lr.integral_lipschitz, "kernel": lr.kernel, "sup": lr.sup}
                           for lr in cert.layers],
                "seconds": seconds,
            }
            if val_cert is not None:
                record["val_certified_acc"] = val_cert
            improved = best_val is None or (va_m > best_val if higher_better else va_m < best_val)
            if improved:
                best_val, bad, best, best_epoch = va_m, 0, params, epoch
            else:
                bad += 1
            append_log(paths["log"], record)
            save_checkpoint(paths["ckpt"], {"params": params, "opt_state": opt_state, "best": best},
                            {"format": FORMAT, "epoch": epoch, "epochs": n_epochs, "best_val": best_val, "bad": bad,
                             "best_epoch": best_epoch,
                             "seed": trainer.seed, "fingerprint": trainer.data.op.fingerprint()})
            e0 = f"{trainer.eps[0]:g}"
            c0 = cert.at(trainer.eps[0]).certified
            progress(f"epoch {epoch:3d}/{n_epochs}  loss {loss:.4f} (task {tl:.4f}, penalty {pen:.4f})  "
                     f"train {mname} {tr_m:.4f}  val {mname} {va_m:.4f}  certified@{e0} {c0:.4g}  "
                     f"{seconds:.2f}s")
            pb.update(1)
            pb.set_postfix_str(f"loss {loss:.4g}, val {mname} {va_m:.4g}")
            if patience and bad >= patience:
                progress(f"early stop: validation {mname} did not improve for {patience} epochs")
                break
    return finish(trainer, best, evaluate, out, manifest, paths, epoch, best_epoch)


def _val_certified(trainer: Trainer, params, cert) -> dict | None:
    """Per eps, the certified accuracy of the validation predictions under
    the epoch's operator-level certificate (docs/theory.md s.10.3; cheap: one
    float64 forward pass), or None for regression."""
    if trainer.data.task != "classify":
        return None
    va = trainer.data.val
    pc = training_predictions(params, trainer.spec, trainer.data.op.matrix, trainer.data.x[va], trainer.data.y[va],
                              "classify", cert)
    return pc.as_dict()["certified_accuracy"]


def _test_predictions(trainer: Trainer, params, cert):
    """The certified test predictions of the kept parameters: the smaller of
    the final certificate and each signal's input-specific bound (without the
    per-signal refinement; ``stablefilt certify`` refines and adds radii)."""
    d = trainer.data
    lam = trainer.interval.eigenvalues
    vecs = None
    if lam is not None:
        lam, vecs = np.linalg.eigh(d.op.dense())
    constants = model_constants(params, trainer.spec, trainer.interval, d.op.nodes, lam, matrix=d.op.matrix)
    return training_predictions(params, trainer.spec, d.op.matrix, d.x[d.test], d.y[d.test], d.task, cert,
                                constants=constants, eigenvectors=vecs)


def finish(trainer: Trainer, params, evaluate, out: str, manifest: dict, paths: dict, last_epoch: int,
           kept_epoch: int | None = None) -> dict:
    """Evaluate and certify the kept parameters (those of ``kept_epoch``, the
    best validation epoch) and write ``params.npz`` and ``summary.json``."""
    save_params(paths["params"], params)
    mname = _fmt_metric(trainer.data.task)
    x, y, op = trainer.x, trainer.y, trainer.op
    metrics = {}
    for split, idx in (("train", trainer.data.train), ("val", trainer.data.val), ("test", trainer.data.test)):
        loss, m = evaluate(params, op, x[jnp.asarray(idx)], y[jnp.asarray(idx)])
        metrics[f"{split}_{mname}"] = float(m)
        metrics[f"{split}_loss"] = float(loss)
    use_eig = trainer.interval.eigenvalues is not None
    cert = trainer.certificate(params, eigen=use_eig)
    summary = {
        "name": trainer.config.name,
        "epochs": last_epoch,
        "kept_epoch": kept_epoch,
        "metric": mname,
        "metrics": metrics,
        "penalty": trainer.config["penalty"],
        "model": {"features": list(trainer.spec.features), "taps": trainer.spec.taps,
                  "basis": trainer.spec.basis.kind, "nonlinearity": trainer.spec.nonlinearity,
                  "readout": trainer.spec.readout},
        "certificate": cert.as_dict(),
        "predictions": _test_predictions(trainer, params, cert).as_dict(),
    }
    write_json(paths["summary"], summary)
    manifest["finished"] = now()
    write_json(paths["manifest"], manifest)
    return summary


