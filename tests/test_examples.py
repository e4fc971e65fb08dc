"""The drop-in examples (examples/*.py) and the certificate they use for a
user's own model, ``certify_layers``.

Each example trains with the penalty, prints a certificate per epoch, and
ends by measuring its own model's output change on an explicitly perturbed
graph ``S + E S + S E`` (numpy), which must stay within the certificate.
Here the printed figures are read back and checked. ``certify_layers`` is
held against changes measured with the numpy-only reference GNN of
tests/helpers.py (numpy.linalg.eigh spectral calculus) on random relative
perturbations (docs/theory.md section 2)."""

from __future__ import annotations

import importlib.util
import os
import re
import subprocess
import sys

import numpy as np
import pytest
from helpers import random_error, ref_model, relative, signals

import stablefilt as sf

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
EPOCHS = 2

EXAMPLES = [
    ("plain_jax_penalty.py", None),
    ("equinox_penalty.py", "equinox"),
    ("flax_penalty.py", "flax"),
]

_MEASURED = re.compile(r"measured change at eps ([0-9.e+-]+): ([0-9.e+-]+) <= certified ([0-9.e+-]+)")
_EPOCH = re.compile(r"epoch (\d+):.*certified@0\.001 ([0-9.e+-]+).*certified@0\.01 ([0-9.e+-]+)")


@pytest.mark.parametrize("script, needs", EXAMPLES, ids=[e[0] for e in EXAMPLES])
def test_example_runs_and_holds_its_certificate(script, needs):
    if needs is not None and importlib.util.find_spec(needs) is None:
        pytest.skip(f"{needs} is not installed (pip install 'stablefilt[examples]'); the example needs it")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (ROOT, os.environ.get("PYTHONPATH", "")) if p)}
    r = subprocess.run([sys.executable, os.path.join(ROOT, "examples", script), "--nodes", "40", "--epochs",
                        str(EPOCHS)], env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stdout + r.stderr
    epochs = [m.groups() for m in map(_EPOCH.search, r.stdout.splitlines()) if m]
    assert [int(e[0]) for e in epochs] == list(range(1, EPOCHS + 1)), r.stdout
    for _, c1, c2 in epochs:
        # A bound at 10x the eps is larger (first order in eps, plus a non-negative remainder).
        assert 0 < float(c1) < float(c2) < float("inf")
    [m] = [m for m in map(_MEASURED.search, r.stdout.splitlines()) if m]
    eps, measured, bound = (float(v) for v in m.groups())
    assert eps == 0.01 and 0 < measured <= bound


# ---------------------------------------------------------------------------
# certify_layers on a user's model.


def _graph(rng, n=12):
    a = np.triu(rng.uniform(0.2, 1.0, (n, n)) * (rng.uniform(size=(n, n)) < 0.4), 1)
    return sf.shift_operator(a + a.T, "normalized-laplacian")


@pytest.mark.parametrize("readout, nonlinearity", [("none", "relu"), ("node", "tanh"), ("mean", "leaky_relu")])
def test_certify_layers_bounds_measured_changes(readout, nonlinearity):
    rng = np.random.default_rng(5)
    g = _graph(rng)
    s = g.dense()
    iv = sf.spectral_interval(g)
    basis = sf.Basis("chebyshev", (0.0, 2.0))
    taps = [rng.standard_normal((3, 2, 4)) * 0.5, rng.standard_normal((3, 4, 3)) * 0.5]
    biases = [rng.standard_normal(4) * 0.3, rng.standard_normal(3) * 0.3]
    w = rng.standard_normal((3, 2))
    rho = 1.5
    eps = 0.02
    cert = sf.certify_layers(taps, basis, iv, [eps], rho=rho, nodes=g.nodes, nonlinearity=nonlinearity,
                             biases=biases, readout=readout, readout_weight=None if readout == "none" else w)
    params = {"layers": [{"taps": t, "bias": b} for t, b in zip(taps, biases)],
              "readout": {"weight": w, "bias": np.zeros(2)}}
    final = readout != "none"
    x = signals(rng, 6, g.nodes, 2, rho)
    y = ref_model(params, s, x, kind="chebyshev", interval=(0.0, 2.0), nonlinearity=nonlinearity, readout=readout,
                  final_nonlinearity=final)
    worst = 0.0
    for _ in range(8):
        s_hat = relative(s, random_error(rng, g.nodes, eps))
        y_hat = ref_model(params, s_hat, x, kind="chebyshev", interval=(0.0, 2.0), nonlinearity=nonlinearity,
                          readout=readout, final_nonlinearity=final)
        worst = max(worst, float(np.max(np.linalg.norm((y_hat - y).reshape(len(x), -1), axis=1))))
    assert 0 < worst <= cert.at(eps).certified
    # The same architecture through stablefilt's own model gives the same certificate.
    spec = sf.ModelSpec((2, 4, 3), taps=3, basis=basis, nonlinearity=nonlinearity, readout=readout,
                        outputs=2 if final else 1, final_nonlinearity=final)
    own = sf.certify_model(params if final else {"layers": params["layers"]}, spec, iv, g.nodes, [eps], rho=rho)
    assert cert.at(eps).certified == pytest.approx(own.at(eps).certified, rel=1e-12)


def test_certify_layers_single_channel_taps_and_no_bias():
    rng = np.random.default_rng(6)
    g = _graph(rng)
    iv = sf.spectral_interval(g)
    basis = sf.Basis()
    taps = [np.array([0.5, -0.3, 0.1])]
    cert = sf.certify_layers(taps, basis, iv, [1e-3], rho=1.0, nodes=g.nodes, nonlinearity="none")
    # One linear filter without bias: certify_filter finds a perturbation E whose change it computes
    # (its ``lower``, a change that occurs at this eps); no certificate may lie below it.
    one = sf.certify_filter(g, taps[0], basis, [1e-3])
    assert 0 < one.bounds[0].lower <= cert.at(1e-3).certified
    x = rng.standard_normal(g.nodes)
    x /= np.linalg.norm(x)
    s = g.dense()
    s_hat = relative(s, random_error(rng, g.nodes, 1e-3))
    h = lambda m: sum(c * np.linalg.matrix_power(m, k) for k, c in enumerate(taps[0]))  # noqa: E731 (monomial)
    assert np.linalg.norm(h(s_hat) @ x - h(s) @ x) <= cert.at(1e-3).certified


@pytest.mark.parametrize("kw, words", [
    (dict(taps=[np.ones((3, 2, 4)), np.ones((3, 5, 1))]), "layer 2 takes 5 features but layer 1 gives 4"),
    (dict(taps=[np.ones((3, 1, 2)), np.ones((4, 2, 1))]), "same number of taps"),
    (dict(nonlinearity="gelu"), "not one of"),
    (dict(readout="node"), "needs readout_weight"),
    (dict(readout="flat"), "is not one of"),
    (dict(biases=[np.ones(3)]), "must have 2 values"),
    (dict(taps=[np.full((3, 1, 2), np.nan)]), "must be finite"),
])
def test_certify_layers_refuses_bad_parts(kw, words):
    g = _graph(np.random.default_rng(7))
    args = dict(taps=[np.ones((3, 1, 2))], nonlinearity="relu", readout="none")
    args.update(kw)
    taps = args.pop("taps")
    with pytest.raises(sf.ConfigError, match=re.escape(words)):
        sf.certify_layers(taps, sf.Basis(), sf.spectral_interval(g), [1e-3], rho=1.0, nodes=g.nodes, **args)
