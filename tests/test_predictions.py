"""Certified predictions (docs/theory.md section 10): the margin test, the
certified accuracy, the certified radius, and ``certify --against GRAPH``.

Sources of the check values:
- model outputs are recomputed by the independent numpy reference of
  tests/helpers.py (``V h(Lambda) V^T`` from ``numpy.linalg.eigh``, the GNN of
  docs/theory.md s.1), on ``S + E S + S E`` built densely here;
- ``||E||_2`` by ``numpy.linalg.norm(., 2)``; margins by ``numpy.sort``;
- the margin lemma's worst case ``d = (r / sqrt(2)) (e_j - e_k)`` is the
  Cauchy-Schwarz equality case (docs/theory.md s.10.2; common practice);
- the radius of a bound linear in eps, ``c(eps) = a eps``, is ``m / (sqrt(2) a)``
  in closed form.
"""

from __future__ import annotations

import json
import os

import helpers as H
import numpy as np
import pytest

from stablefilt import _attack as atk
from stablefilt import cli, open_run
from stablefilt._predictions import certified_mask, certified_radii, plain_bounds, run_outputs

# ---------------------------------------------------------------------------
# The margin test on its own.


def _worst_rows(rng, b, r, c):
    """Random logits ``(b, r, c)`` and per-signal bounds; the worst change of
    each row of norm exactly its signal's bound: ``(bound / sqrt(2)) (e_j - e_k)``
    with ``k`` the top class and ``j`` the runner-up (Cauchy-Schwarz equality)."""
    z = rng.standard_normal((b, r, c)) * rng.uniform(0.1, 3.0, size=(b, 1, 1))
    bounds = rng.uniform(0.0, 1.5, size=b)
    order = np.argsort(z, axis=-1)
    k, j = order[..., -1], order[..., -2]
    d = np.zeros_like(z)
    step = (bounds / np.sqrt(2.0))[:, None]
    np.put_along_axis(d, k[..., None], -step[..., None], axis=-1)
    np.put_along_axis(d, j[..., None], step[..., None], axis=-1)
    return z, bounds, d


def _flipped_or_tied(z, z_hat):
    """The class changed, or the new top two are tied (the class is no longer sure)."""
    top = np.argmax(z, axis=-1)
    s = np.sort(z_hat, axis=-1)
    return (np.argmax(z_hat, axis=-1) != top) | (s[..., -1] - s[..., -2] <= 1e-12)


def _wrong_mask(rows, bounds):
    """The margin test without its sqrt(2): unsound (docs/theory.md s.10.2)."""
    s = np.sort(rows, axis=-1)
    return (s[..., -1] - s[..., -2]) > np.asarray(bounds)[:, None]


@pytest.mark.parametrize("seed", range(5))
def test_margin_test_survives_its_worst_change_and_the_wrong_one_does_not(seed):
    rng = np.random.default_rng(seed)
    z, bounds, d = _worst_rows(rng, 40, 25, 4)
    assert np.allclose(np.linalg.norm(d, axis=-1), bounds[:, None])  # each row's change has the signal's bound
    broken = _flipped_or_tied(z, z + d)
    ok = certified_mask(z, bounds)
    assert not np.any(ok & broken)
    # Tightness (s.10.2): everything the test leaves out, a change of that size breaks.
    s = np.sort(z, axis=-1)
    clear = (s[..., -1] - s[..., -2]) < np.sqrt(2.0) * bounds[:, None] * (1 - 1e-9)
    assert np.all(broken[clear])
    # The variant without sqrt(2) certifies predictions that the worst change flips.
    assert np.any(_wrong_mask(z, bounds) & broken)


def test_ties_are_never_certified():
    z = np.array([[[2.0, 2.0, -1.0], [3.0, 1.0, 0.0]]])
    assert certified_mask(z, np.zeros(1)).tolist() == [[False, True]]
    # A margin just at the threshold is not certified (strict inequality).
    z = np.array([[[np.sqrt(2.0) * 0.5, 0.0]]])
    assert not certified_mask(z, np.array([0.5]))[0, 0]


@pytest.mark.parametrize("seed", range(3))
def test_radius_of_a_linear_bound_is_the_closed_form_within_the_search_resolution(seed):
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((6, 30, 3))
    a = rng.uniform(10, 1000, size=6)
    s = np.sort(z, axis=-1)
    true = (s[..., -1] - s[..., -2]) / (np.sqrt(2.0) * a[:, None])  # closed form: m / (sqrt(2) a)
    upper = 0.05
    r = certified_radii(z, lambda e: a * e, upper, steps=20)
    assert len(r.evaluated) - 1 <= 20
    # Every reported radius is a lower bound (up to the margin test's round-off allowance) ...
    assert np.all(r.radius <= np.minimum(true, upper) * (1 + 1e-6) + 1e-12)
    # ... within the ladder's factor 2 where the truth lies inside its range ...
    inside = (true < upper) & (true > upper * 2.0 ** -11)
    assert np.all(r.radius[inside] >= true[inside] / 2 * (1 - 1e-6))
    assert np.all(r.radius[true >= upper] == upper)
    # ... and the median is resolved by the bisection (docs/theory.md s.10.4).
    assert r.median <= np.median(true) * (1 + 1e-6) and r.median >= np.median(true) * 0.97


def test_radius_is_sound_for_a_bound_that_is_not_monotone():
    rng = np.random.default_rng(7)
    z = rng.standard_normal((4, 20, 3))
    wobble = lambda e: np.full(4, 50 * e * (1 + 0.5 * np.sin(1e4 * e)))  # noqa: E731
    r = certified_radii(z, wobble, 0.1)
    s = np.sort(z, axis=-1)
    m = s[..., -1] - s[..., -2]
    # Each radius is a size at which the test passed (inclusion makes that a
    # lower bound on the true radius, theory s.10.4).
    for b in range(4):
        for i in range(20):
            e = r.radius[b, i]
            assert e == 0.0 or m[b, i] > np.sqrt(2) * wobble(e)[b]


# ---------------------------------------------------------------------------
# On a trained run.


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    return H.plain_run(tmp_path_factory)[1]


@pytest.fixture(scope="module")
def rc(run_dir):
    import jax

    from stablefilt._runcert import certify_run

    # Float64 as the certify command runs it; restored afterwards, so that
    # later modules train in the default float32 (a run resumed there must
    # equal one trained straight through: tests/test_train.py).
    previous = bool(jax.config.jax_enable_x64)
    jax.config.update("jax_enable_x64", True)
    try:
        run = open_run(run_dir)
        yield run, certify_run(run, [1e-3, 1e-2])
    finally:
        jax.config.update("jax_enable_x64", previous)


def _ref_rows(run, s):
    """The run's test outputs on the dense operator ``s`` by the numpy reference, as ``(B, N, C)``."""
    return H.ref_forward(run.params, run.spec, s, run.test_x)


def test_certified_predictions_survive_attacks_and_random_perturbations(rc):
    run, cert = rc
    s = run.op.dense()
    z = _ref_rows(run, s)
    assert np.allclose(z, run_outputs(run), atol=1e-10)
    rng = np.random.default_rng(0)
    checked = 0
    for eps in (1e-3, 1e-2):
        ok = certified_mask(z, cert.signal_bounds[eps])
        assert ok.any() and not ok.all()  # the check bites: some certified, some not
        cls = np.argmax(z, axis=-1)
        for _ in range(3):  # random E with ||E||_2 = eps exactly
            z_hat = _ref_rows(run, H.relative(s, H.random_error(rng, run.op.nodes, eps)))
            assert np.all(np.argmax(z_hat, axis=-1)[ok] == cls[ok])
            checked += int(ok.sum())
        # The attack on the signals with the most certified predictions at the smallest margins.
        margin = np.sort(z, axis=-1)
        margin = margin[..., -1] - margin[..., -2]
        worst = np.argsort(np.where(ok, margin, np.inf).min(axis=1))[:2]
        for b in worst:
            res = atk.attack(run.params, run.spec, run.op, run.test_x[b], eps, restarts=2, iters=20, seed=1)
            assert np.linalg.norm(res.e, 2) <= eps * (1 + 1e-5)
            e = np.diag(res.e) if res.e.ndim == 1 else res.e
            zb = H.ref_forward(run.params, run.spec, H.relative(s, e), run.test_x[b])
            assert np.linalg.norm(zb - z[b]) <= cert.signal_bounds[eps][b]  # measured within its bound
            assert np.all(np.argmax(zb, axis=-1)[ok[b]] == cls[b][ok[b]])
            checked += int(ok[b].sum())
    assert checked > 0


def _certify_json(capsys, argv):
    capsys.readouterr()
    assert cli.main(argv) == 0
    return H.strict_json(capsys.readouterr().out)


@pytest.fixture(scope="module")
def perturbed(run_dir, tmp_path_factory):
    """A relabelled relative perturbation of size 2e-3 of the run's graph
    (``P^T (S + E S + S E) P``), and an additive change no ``E`` expresses
    (a self-loop on a normalized Laplacian: the zero eigenvalue pairs with itself)."""
    base = tmp_path_factory.mktemp("against")
    s = open_run(run_dir).op.dense()
    rng = np.random.default_rng(3)
    n = s.shape[0]
    e = H.random_error(rng, n, 2e-3)
    p = rng.permutation(n)
    rel = os.path.join(base, "relabelled.npy")
    np.save(rel, H.relative(s, e)[p][:, p])
    add = s.copy()
    add[0, 0] += 0.2
    add[0, 1] += 0.3
    add[1, 0] += 0.3
    bad = os.path.join(base, "additive.npy")
    np.save(bad, add)
    return rel, bad, 2e-3


def test_against_recovers_a_relabelled_relative_perturbation(run_dir, rc, perturbed, capsys):
    rel, _, size = perturbed
    d = _certify_json(capsys, ["certify", run_dir, "--against", rel, "--shift", "as-is", "--align", "--json"])
    a = d["against"]
    assert size / 2 <= a["relative"] <= 2 * size  # ||E||_2 by numpy.linalg.norm above
    assert a["expressible"] and a["covered"] and a["reason"] is None
    assert a["measured_max"] <= a["certified"]
    assert 0 < a["measured_mean"] <= a["measured_max"]
    assert a["exceeded"] == 0 and a["certified_flipped"] == 0
    assert 0.0 <= a["flipped"] <= 1.0
    # certified_accuracy recomputed independently: numpy reference logits,
    # the run's per-signal bounds, margin > sqrt(2) c.
    run, cert = rc
    z = _ref_rows(run, run.op.dense())
    s = np.sort(z, axis=-1)
    margin = s[..., -1] - s[..., -2]
    correct = np.argmax(z, axis=-1) == run.test_y
    plain = plain_bounds(run, cert)  # the same per-signal bounds certify uses (the smaller of two, both sound)
    for eps, key in ((1e-3, "0.001"), (1e-2, "0.01")):
        c = np.minimum(cert.signal_bounds[eps], plain(eps))
        certified = margin > np.sqrt(2.0) * c[:, None]
        assert d["certified_accuracy"][key] == pytest.approx((correct & certified).mean(), abs=1e-12)
    assert d["predictions"]["radius"]["median"] > 0


def test_against_a_change_the_model_cannot_express_is_not_covered(run_dir, perturbed, capsys):
    _, bad, _ = perturbed
    argv = ["certify", run_dir, "--against", bad, "--shift", "as-is", "--eps", "0.001"]
    a = _certify_json(capsys, argv + ["--json"])["against"]
    assert not a["expressible"] and not a["covered"]
    assert "does not apply" in a["reason"]
    assert a["measured_max"] > 0 and a["flipped"] is not None  # measured figures still reported
    capsys.readouterr()
    assert cli.main(argv) == 0
    assert "not covered: the new graph differs" in capsys.readouterr().out


def test_against_bad_input_is_one_sentence(run_dir, tmp_path, capsys):
    H.one_line_exit_2(capsys, ["certify", run_dir, "--align"])
    H.one_line_exit_2(capsys, ["certify", run_dir, "--against", str(tmp_path / "missing.npy")])
    small = tmp_path / "small.npy"
    np.save(small, np.eye(3))
    H.one_line_exit_2(capsys, ["certify", run_dir, "--against", str(small), "--shift", "as-is"])


def test_training_log_and_summary_carry_certified_accuracy(run_dir):
    log = H.read_jsonl(os.path.join(run_dir, "log.jsonl"))
    assert all(set(r["val_certified_acc"]) == {"0.001", "0.01"} for r in log)
    assert all(0 <= v <= r["val_acc"] + 1e-6 for r in log for v in r["val_certified_acc"].values())
    with open(os.path.join(run_dir, "summary.json")) as fh:
        p = json.load(fh)["predictions"]
    assert p["task"] == "classify" and p["per"] == "node"
    assert p["certified_accuracy"]["0.001"] >= p["certified_accuracy"]["0.01"]
    assert p["certified_accuracy"]["0.001"] <= p["accuracy"]


def test_regression_per_node_bounds_hold_and_the_rms_one_is_not_a_per_node_bound():
    from stablefilt._model import ModelSpec
    from stablefilt._predictions import certify_predictions

    rng = np.random.default_rng(11)
    b, n = 5, 40
    spec = ModelSpec((1, 4), readout="node", outputs=1)
    y = rng.standard_normal((b, n, 1))
    c = rng.uniform(0.1, 2.0, size=b)
    pc = certify_predictions(y, y[..., 0], spec, "regress", [1e-3], {1e-3: c}, "test")
    assert pc.node_bound_max[0] == pytest.approx(c.max()) and pc.rms_bound_max[0] == pytest.approx(c.max() / np.sqrt(n))
    for _ in range(20):  # random changes with ||Delta_b||_F = c_b (the certificate's statement)
        d = rng.standard_normal((b, n, 1))
        d *= (c / np.linalg.norm(d.reshape(b, -1), axis=1))[:, None, None]
        rows = np.linalg.norm(d, axis=-1)
        assert np.all(rows <= c[:, None] * (1 + 1e-12))  # 10.5: one node's change
        assert np.all(np.sqrt(np.mean(rows**2, axis=1)) <= c / np.sqrt(n) * (1 + 1e-12))  # 10.5: root mean square
    # All of the change on one node reaches the per-node bound, so the RMS
    # figure c / sqrt(N) is no bound on a single node's change.
    d = np.zeros((b, n, 1))
    d[:, 0, 0] = c
    assert np.all(np.abs(d[:, 0, 0]) > c / np.sqrt(n))
    assert np.all(np.abs(d[:, 0, 0]) <= c)


def test_coverage_conditions_of_a_known_graph():
    # docs/theory.md s.10.6: expressible; a flat readout keeps the node order;
    # under --same-kind the new graph keeps the training graph's kind.
    from stablefilt._against import _why_not

    ok = dict(expressible=True, residual=0.0, tolerance=1e-13, flat=False, kept_order=True, same_kind=False,
              train_kind="normalized-laplacian", new_kind="normalized-laplacian")
    assert _why_not(**ok) is None
    assert "no relative perturbation" in _why_not(**{**ok, "expressible": False, "residual": 1e-3})
    assert "flat readout" in _why_not(**{**ok, "flat": True, "kept_order": False})
    assert _why_not(**{**ok, "flat": False, "kept_order": False}) is None  # relabelling is in the model
    assert "keeps the kind" in _why_not(**{**ok, "same_kind": True, "new_kind": "as-is"})
    assert _why_not(**{**ok, "same_kind": False, "new_kind": "as-is"}) is None  # Weyl widening: any S_hat


@pytest.mark.parametrize("readout", ["mean", "flat"])
def test_graph_level_predictions_are_one_per_signal(readout):
    from stablefilt._model import ModelSpec
    from stablefilt._predictions import certify_predictions

    rng = np.random.default_rng(5)
    out = rng.standard_normal((50, 4))
    y = rng.integers(0, 4, size=50)
    c = rng.uniform(0, 1, size=50)
    spec = ModelSpec((1, 4), readout=readout, outputs=4, nodes=10 if readout == "flat" else 0)
    pc = certify_predictions(out, y, spec, "classify", [1e-3], {1e-3: c}, "test")
    s = np.sort(out, axis=1)  # numpy reference: margin > sqrt(2) c per signal
    want = ((np.argmax(out, axis=1) == y) & (s[:, -1] - s[:, -2] > np.sqrt(2.0) * c)).mean()
    assert pc.per == "signal" and pc.predictions == 50
    assert pc.certified_accuracy[0] == pytest.approx(want, abs=1e-12)
    assert pc.accuracy == pytest.approx((np.argmax(out, axis=1) == y).mean())
