"""Figures that overflow float64 are one sentence (exit 2), never
``Infinity`` or ``NaN`` in JSON and never a traceback."""

from __future__ import annotations

import shutil

import helpers as H
import networkx as nx
import numpy as np
import pytest

from stablefilt import cli


@pytest.fixture(scope="module")
def plain(tmp_path_factory):
    return H.plain_run(tmp_path_factory)[1]


def _refused(capsys, argv):
    """Exit 2, one sentence on stderr naming float64, nothing on stdout."""
    capsys.readouterr()
    rc = cli.main(argv)
    out, err = capsys.readouterr()
    assert rc == 2, (out, err)
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err and "float64" in lines[0], err
    return lines[0]


@pytest.mark.parametrize("taps, eps", [
    ([1.0, 1e200, 1e200], "0.01"),   # finite taps whose constants overflow
    ([1.0, 1e308, 1e308], "0.01"),   # an eigen-solver that breaks down on them
    ([1.0, 0.5, 0.2], "1e300"),      # (1 + eps)^k overflows
])
@pytest.mark.parametrize("as_json", [True, False])
def test_bound_overflow_is_one_sentence(tmp_path, capsys, taps, eps, as_json):
    # The 6-cycle (networkx), spectrum [-2, 2].
    np.save(tmp_path / "g.npy", nx.to_numpy_array(nx.cycle_graph(6)))
    np.savez(tmp_path / "f.npz", taps=np.array(taps), basis="monomial")
    _refused(capsys, ["bound", str(tmp_path / "g.npy"), str(tmp_path / "f.npz"), "--eps", eps]
             + (["--json"] if as_json else []))


def test_bound_json_is_strict_json(tmp_path, capsys):
    """A finite case still prints one strict JSON object (RFC 8259: no NaN,
    no Infinity; checked by helpers.strict_json)."""
    np.save(tmp_path / "g.npy", nx.to_numpy_array(nx.cycle_graph(6)))
    np.savez(tmp_path / "f.npz", taps=np.array([1.0, 0.5, 0.2]), basis="monomial")
    capsys.readouterr()
    assert cli.main(["bound", str(tmp_path / "g.npy"), str(tmp_path / "f.npz"), "--eps", "0.01", "--json"]) == 0
    d = H.strict_json(capsys.readouterr().out)
    assert d["bounds"][0]["certified"] > 0


def test_certify_overflow_is_one_sentence(plain, tmp_path, capsys):
    _refused(capsys, ["certify", plain, "--json", "--eps", "1e300"])


def test_certify_params_beyond_float32(plain, tmp_path, capsys):
    """Parameters written as float64 1e200: finite in the file, infinite
    once read as the float32 the model holds (numpy.finfo, the reference)."""
    with np.errstate(over="ignore"):
        assert np.float32(1e200) == np.inf
    run = tmp_path / "big"
    shutil.copytree(plain, run)
    with np.load(run / "params.npz") as z:
        arrays = {k: np.full(z[k].shape, 1e200) for k in z.files}
    np.savez(run / "params.npz", **arrays)
    capsys.readouterr()
    assert cli.main(["certify", str(run), "--json"]) == 2
    out, err = capsys.readouterr()
    assert out == "" and len(err.strip().splitlines()) == 1 and "float32" in err


def test_compare_json_refuses_a_summary_with_infinity(plain, tmp_path, capsys):
    """A summary holding Infinity (Python's json writes it) is not passed
    on as non-JSON."""
    run = tmp_path / "inf"
    shutil.copytree(plain, run)
    text = (run / "summary.json").read_text()
    d = __import__("json").loads(text)
    d["certificate"]["certified"]["0.001"] = float("inf")
    (run / "summary.json").write_text(__import__("json").dumps(d))
    _refused(capsys, ["compare", str(run), "--json"])
