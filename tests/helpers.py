"""Shared test helpers: independent float64 references built from numpy and
numpy.polynomial only (nothing from stablefilt), relative perturbations of
dense shift operators, the tiny run configs, and strict JSON parsing.

References
- Frequency responses: tests/reference.py (``numpy.polynomial`` polyval /
  polyder, chebval / chebder of the mapped variable).
- A filter bank on a graph: ``Y[:, g] = sum_f V h_fg(Lambda) V^T X[:, f]``
  from ``numpy.linalg.eigh`` (spectral calculus; common practice).
- A GNN: ``x_l = sigma(H_l(S) x_{l-1} + b_l)`` and a linear readout, written
  out from docs/theory.md section 1.
"""

from __future__ import annotations

import json
import os
import textwrap

import numpy as np
from reference import bank_derivative, bank_response, derivative, response  # noqa: F401 (re-exported as H.*)

# ---------------------------------------------------------------------------
# Reference GNN (numpy.linalg.eigh, spectral calculus).

LEAKY_SLOPE = 0.1  # the library's documented leaky-ReLU slope (stablefilt._model)


def activation(name, z):
    if name == "relu":
        return np.maximum(z, 0.0)
    if name == "leaky_relu":
        return np.where(z >= 0, z, LEAKY_SLOPE * z)
    if name == "tanh":
        return np.tanh(z)
    return z


def ref_bank(s, taps, x, kind="monomial", interval=None):
    """``Y[:, g] = sum_f V h_fg(Lambda) V^T X[:, f]`` for ``x`` of shape
    ``(B, N, F_in)``; reference numpy.linalg.eigh."""
    w, v = np.linalg.eigh(np.asarray(s, dtype=np.float64))
    hw = bank_response(taps, w, kind, interval)  # (N, F_in, F_out)
    xt = np.einsum("ia,bif->baf", v, np.asarray(x, dtype=np.float64))  # V^T x
    yt = np.einsum("afg,baf->bag", hw, xt)
    return np.einsum("ia,bag->big", v, yt)


def ref_model(params, s, x, *, kind, interval, nonlinearity, readout, final_nonlinearity=True):
    """The GNN of docs/theory.md section 1 from numpy only. ``params`` as the
    library lays them out (a dict of plain arrays)."""
    z = np.asarray(x, dtype=np.float64)
    layers = params["layers"]
    for i, layer in enumerate(layers):
        z = ref_bank(s, np.asarray(layer["taps"], np.float64), z, kind, interval)
        if "bias" in layer:
            z = z + np.asarray(layer["bias"], np.float64)
        if i < len(layers) - 1 or final_nonlinearity:
            z = activation(nonlinearity, z)
    if readout == "none":
        return z
    w = np.asarray(params["readout"]["weight"], np.float64)
    b = np.asarray(params["readout"]["bias"], np.float64)
    if readout == "mean":
        z = z.mean(axis=1)
    elif readout == "sum":
        z = z.sum(axis=1)
    elif readout == "flat":
        z = np.stack([np.concatenate(list(zi)) for zi in z])  # node 0's features, then node 1's, ...
    return z @ w + b


def ref_forward(params, spec, s, x):
    """:func:`ref_model` for a ``ModelSpec``: ``x`` is one signal ``(N, F_0)``
    or a batch ``(B, N, F_0)``, the output shaped to match."""
    b = spec.basis
    z = np.asarray(x, dtype=np.float64)
    y = ref_model(to_numpy(params), s, z[None] if z.ndim == 2 else z, kind=b.kind, interval=b.interval,
                  nonlinearity=spec.nonlinearity, readout=spec.readout, final_nonlinearity=spec.final_nonlinearity)
    return y[0] if z.ndim == 2 else y


def to_numpy(tree):
    """A params pytree of dicts/lists with float64 numpy leaves."""
    if isinstance(tree, dict):
        return {k: to_numpy(v) for k, v in tree.items()}
    if isinstance(tree, (list, tuple)):
        return [to_numpy(v) for v in tree]
    return np.asarray(tree, dtype=np.float64)


# ---------------------------------------------------------------------------
# Perturbations (docs/theory.md section 2; Gama, Bruna, Ribeiro 2020).


def relative(s, e):
    """``S + E S + S E``."""
    return s + e @ s + s @ e


def random_error(rng, n, eps):
    """Dense symmetric ``E`` with ``||E||_2 = eps`` exactly (numpy.linalg.norm)."""
    a = rng.standard_normal((n, n))
    e = a + a.T
    return e * (eps / np.linalg.norm(e, 2))


def pair_error(v, i, j, eps):
    """``eps (v_i v_j^T + v_j v_i^T)`` (norm eps for i != j; the pair
    perturbations that attain ``|Gamma_ij|`` at first order, theory s.5 item 3),
    or ``eps v_i v_i^T`` for ``i == j``."""
    if i == j:
        return eps * np.outer(v[:, i], v[:, i])
    return eps * (np.outer(v[:, i], v[:, j]) + np.outer(v[:, j], v[:, i]))


def signals(rng, count, n, f, rho):
    """``count`` random signals ``(count, N, F)``, each of Frobenius norm ``rho``."""
    x = rng.standard_normal((count, n, f))
    return x * (rho / np.linalg.norm(x.reshape(count, -1), axis=1))[:, None, None]


def change_norms(y, y_hat):
    """Per-signal Frobenius norm of the output change."""
    d = np.asarray(y_hat) - np.asarray(y)
    return np.linalg.norm(d.reshape(d.shape[0], -1), axis=1)


# ---------------------------------------------------------------------------
# Configs.

TINY = """\
name = "{name}"

[data]
source = "orchard"
sensors = {sensors}
samples = {samples}
noise = {noise}
seed = 0

[model]
features = {features}
taps = {taps}
basis = "{basis}"

[penalty]
mode = "{mode}"
weight = {weight}

[train]
epochs = {epochs}
batch_size = {batch_size}
learning_rate = {lr}
clip = {clip}
patience = {patience}
seed = {seed}

[certify]
eps = [0.001, 0.01]
"""


def tiny_text(**kw) -> str:
    """A tiny orchard config: 30 sensors, 60 snapshots, one layer of 8 features.
    The defaults make the validation accuracy still improve after epoch 3,
    so the saved (best) parameters come from late epochs."""
    opts = dict(name="tiny", sensors=30, samples=60, noise=0.1, features="[8]", taps=4, basis="chebyshev",
                mode="integral_lipschitz", weight=0.0, epochs=6, batch_size=8, lr=0.05, clip=1.0, patience=0, seed=0)
    opts.update(kw)
    return TINY.format(**opts)


def small_run_text(**kw) -> str:
    """The smallest run that still exercises every file: :func:`tiny_text`
    with one layer of 4 features, 3 taps, penalty weight 0.1, 2 epochs of
    two batches of 16."""
    return tiny_text(**{**dict(features="[4]", taps=3, weight=0.1, epochs=2, batch_size=16), **kw})


def strict_json(text: str):
    """Exactly one JSON value; NaN and Infinity are refused (not JSON,
    RFC 8259), as is anything after the value."""
    def bad(name):
        raise ValueError(f"non-standard JSON constant {name}")

    return json.loads(text, parse_constant=bad)


def write(path, text: str) -> str:
    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    with open(path, "w") as fh:
        fh.write(textwrap.dedent(text))
    return str(path)


def snapshot(folder) -> dict:
    """``{name: (bytes, mtime_ns)}`` of every file in ``folder``."""
    out = {}
    for name in sorted(os.listdir(folder)):
        p = os.path.join(folder, name)
        if os.path.isfile(p):
            with open(p, "rb") as fh:
                out[name] = (fh.read(), os.stat(p).st_mtime_ns)
    return out


# ---------------------------------------------------------------------------
# Runs shared by the test modules (trained once per session, under pytest's
# tmp_path_factory).

_RUNS: dict = {}


def shared_run(tmp_path_factory, name: str, text: str, extra=()):
    """``(config path, run dir)`` of a run trained once per session with
    ``stablefilt train CONFIG --out DIR`` (in-process)."""
    from stablefilt import cli

    if name not in _RUNS:
        base = tmp_path_factory.mktemp(name)
        cfg = write(os.path.join(base, "config.toml"), text)
        out = os.path.join(base, "run")
        rc = cli.main(["train", cfg, "--out", out] + list(extra))
        assert rc == 0, f"training {name} failed"
        _RUNS[name] = (cfg, out)
    return _RUNS[name]


COMPILE_EVENT = "/jax/core/compile/backend_compile_duration"


class CompileCounter:
    """Counts XLA backend compilations through a jax.monitoring listener."""

    def __init__(self):
        self.count = 0

    def __call__(self, event, duration, **kwargs):
        if event == COMPILE_EVENT:
            self.count += 1

    def __enter__(self):
        import jax.monitoring

        jax.monitoring.register_event_duration_secs_listener(self)
        return self

    def __exit__(self, *exc):
        import jax.monitoring

        jax.monitoring.unregister_event_duration_listener(self)


#: Compilations counted at the end of each epoch of the plain run.
PLAIN_MARKS: list = []


def plain_run(tmp_path_factory):
    """The tiny config trained straight through for 6 epochs (run A), by
    ``stablefilt._train.train`` in-process, counting compilations per epoch."""
    if "plain" not in _RUNS:
        from stablefilt import load_config, train

        base = tmp_path_factory.mktemp("plain")
        cfg = write(os.path.join(base, "config.toml"), tiny_text(name="tiny-plain"))
        out = os.path.join(base, "run")
        with CompileCounter() as counter:
            train(load_config(cfg), out,
                  progress=lambda m: PLAIN_MARKS.append(counter.count) if m.startswith("epoch") else None)
        _RUNS["plain"] = (cfg, out)
    return _RUNS["plain"]


def penalised_run(tmp_path_factory):
    return shared_run(tmp_path_factory, "penalised", tiny_text(name="tiny-penalised", weight=1.0))


def read_jsonl(path):
    import json

    with open(path) as fh:
        return [json.loads(line) for line in fh if line.strip()]


def one_line_exit_2(capsys, argv):
    """Run the command line; it must exit 2 with one sentence on stderr and no
    traceback (the project's bad-input rule). Returns that line."""
    from stablefilt import cli

    capsys.readouterr()
    rc = cli.main(argv)
    out, err = capsys.readouterr()
    assert rc == 2, (out, err)
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("stablefilt ") and lines[0].endswith(".")
    return lines[0]

def bank_apply(s, taps, basis, x):
    """``sum_k p_k(S) X c_k`` by dense eigendecomposition (numpy ``eigh``)."""
    from stablefilt._filters import frequency_response

    lam, v = np.linalg.eigh(s)
    h = frequency_response(taps, lam, basis)  # (N, F_in, F_out)
    return v @ np.einsum("if,ifg->ig", v.T @ x, h)


def bank_first_order(s, taps, basis, d, x):
    """The first-order change of a bank by the Daleckii-Krein formula (Bhatia,
    "Matrix Analysis", 1997, Thm V.3.3): ``V (D~ o h^[1]) V^T`` per filter,
    summed over inputs, with numpy ``eigh``."""
    from stablefilt._filters import frequency_response, response_derivative

    lam, v = np.linalg.eigh(s)
    h = frequency_response(taps, lam, basis)
    dh = response_derivative(taps, lam, basis)
    diff = lam[:, None] - lam[None, :]
    close = np.abs(diff) < 1e-9
    safe = np.where(close, 1.0, diff)
    l1 = np.where(close[:, :, None, None], 0.5 * (dh[:, None] + dh[None, :]),
                  (h[:, None] - h[None, :]) / safe[:, :, None, None])  # (N, N, F_in, F_out)
    return v @ np.einsum("ij,ijfg,jf->ig", v.T @ d @ v, l1, v.T @ x)


def bank_remainder_dense(s, taps, basis, e, x):
    """``H(S + D) X - H(S) X - L(D) X`` with ``D = E S + S E``: what the
    first-order change leaves of a bank's change (numpy ``eigh`` for both
    banks, Daleckii-Krein for ``L``)."""
    d = e @ s + s @ e
    return bank_apply(s + d, taps, basis, x) - bank_apply(s, taps, basis, x) - bank_first_order(s, taps, basis, d, x)
