"""``stablefilt certify`` and ``stablefilt compare`` on finished, missing and
half-written run directories (in-process ``stablefilt.cli.main``)."""

from __future__ import annotations

import csv
import json
import os
import shutil

import helpers as H
import numpy as np
import pytest

from stablefilt import cli, open_run


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return H.plain_run(tmp_path_factory)[1], H.penalised_run(tmp_path_factory)[1]


def _json_out(capsys, argv):
    capsys.readouterr()
    assert cli.main(argv) == 0
    out = capsys.readouterr().out
    lines = [line for line in out.splitlines() if line.strip()]
    assert len(lines) == 1, out  # one JSON document on one line
    return json.loads(lines[0])


# ---------------------------------------------------------------------------
# certify


@pytest.mark.parametrize("which", [0, 1])
def test_certify_json_matches_summary(runs, capsys, which):
    """The same float64 computation as the summary: equal within 1e-9."""
    run = runs[which]
    d = _json_out(capsys, ["certify", run, "--json"])
    assert isinstance(d, dict)
    summary = json.load(open(os.path.join(run, "summary.json")))["certificate"]
    assert sorted(d["certified"]) == sorted(summary["certified"])
    for key, v in summary["certified"].items():
        assert d["certified"][key] == pytest.approx(v, rel=1e-9)
        assert d["published"][key] == pytest.approx(summary["published"][key], rel=1e-9)
    assert d["rho"] == pytest.approx(summary["rho"], rel=1e-12)
    assert len(d["layers"]) == len(summary["layers"])
    # The input-specific bound for the test signals is never above the
    # operator-level one (test signals have norm <= rho).
    for key, v in d["input_specific_test_max"].items():
        assert v <= d["certified"][key] * (1 + 1e-9)
    # A small graph: its eigenvectors are used, and the record says so.
    assert d["input_specific_method"].startswith("eigenvectors of S")


def test_certify_at_a_new_eps_holds(runs, capsys):
    """``--eps`` not in the config: the bound still covers measured changes
    of the run's model on random relative perturbations of its graph
    (numpy eigh reference model)."""
    run_dir = runs[0]
    d = _json_out(capsys, ["certify", run_dir, "--json", "--eps", "0.05"])
    assert list(d["certified"]) == ["0.05"]
    run = open_run(run_dir)
    s = run.op.dense()
    x = run.test_x.astype(np.float64)
    rng = np.random.default_rng(4)

    def model(m):
        return H.ref_model(H.to_numpy(run.params), m, x, kind=run.spec.basis.kind, interval=run.spec.basis.interval,
                           nonlinearity=run.spec.nonlinearity, readout=run.spec.readout)

    y = model(s)
    for _ in range(4):
        change = H.change_norms(y, model(H.relative(s, H.random_error(rng, len(s), 0.05))))
        assert 0 < change.max() <= d["input_specific_test_max"]["0.05"] <= d["certified"]["0.05"]


def test_certify_text_report(runs, capsys):
    capsys.readouterr()
    assert cli.main(["certify", runs[0]]) == 0
    out = capsys.readouterr().out
    for word in ("certified", "published", "assumptions", "relative", "input-specific bounds: eigenvectors of S"):
        assert word in out


def test_certify_missing_run(tmp_path, capsys):
    line = H.one_line_exit_2(capsys, ["certify", str(tmp_path / "nowhere")])
    assert "does not exist" in line


def test_certify_half_written_run(runs, tmp_path, capsys):
    """A run without params.npz (it did not finish)."""
    half = str(tmp_path / "half")
    shutil.copytree(runs[0], half)
    os.remove(os.path.join(half, "params.npz"))
    line = H.one_line_exit_2(capsys, ["certify", half])
    assert "params.npz" in line


def test_certify_folder_that_is_no_run(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    line = H.one_line_exit_2(capsys, ["certify", str(tmp_path / "empty")])
    assert "manifest" in line


# ---------------------------------------------------------------------------
# compare


def _first_bound(row):
    return min(row["certified"].items(), key=lambda kv: float(kv[0]))[1]


def test_compare_json_sorted_by_certified_bound(runs, capsys):
    plain, pen = runs
    orders = []
    for argv in ([plain, pen], [pen, plain]):
        rows = _json_out(capsys, ["compare", *argv, "--json", "--sort"])
        assert isinstance(rows, list) and len(rows) == 2 and all(isinstance(r, dict) for r in rows)
        bounds = [_first_bound(r) for r in rows]
        assert bounds == sorted(bounds)
        orders.append([r["run"] for r in rows])
        for r in rows:
            summary = json.load(open(os.path.join(r["run"], "summary.json")))
            assert r["certified"] == summary["certificate"]["certified"]
            assert r["test_acc"] == summary["metrics"]["test_acc"]
            assert r["penalty_weight"] == summary["penalty"]["weight"]
    assert orders[0] == orders[1] == [pen, plain]  # the penalised run has the smaller bound


def test_compare_json_keeps_the_given_order(runs, capsys):
    plain, pen = runs
    for argv in ([plain, pen], [pen, plain]):
        rows = _json_out(capsys, ["compare", *argv, "--json"])
        assert [r["run"] for r in rows] == argv


def test_compare_table_and_csv(runs, tmp_path, capsys):
    """The CSV holds raw full-precision numbers (equal to summary.json's, the
    reference), the metric's name in its own column, rows in the given order;
    the text table follows the same order unless --sort."""
    plain, pen = runs
    path = tmp_path / "cmp.csv"
    capsys.readouterr()
    assert cli.main(["compare", plain, pen, "--csv", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.index("tiny-plain") < out.index("tiny-penalised")
    with open(path, newline="") as fh:
        table = list(csv.reader(fh))
    header, body = table[0], table[1:]
    assert len(body) == 2 and [r[header.index("name")] for r in body] == ["tiny-plain", "tiny-penalised"]
    assert "certified@0.001" in header and "certified@0.01" in header
    for row, run in zip(body, (plain, pen)):
        summary = json.load(open(os.path.join(run, "summary.json")))
        assert row[header.index("run")] == run
        assert row[header.index("metric")] == "acc"
        assert float(row[header.index("test_value")]) == summary["metrics"]["test_acc"]  # exact, not rounded
        assert float(row[header.index("certified@0.001")]) == summary["certificate"]["certified"]["0.001"]
        assert int(row[header.index("kept_epoch")]) == summary["kept_epoch"]
    sorted_path = tmp_path / "sorted.csv"
    capsys.readouterr()
    assert cli.main(["compare", plain, pen, "--csv", str(sorted_path), "--sort"]) == 0
    out = capsys.readouterr().out
    assert out.index("tiny-penalised") < out.index("tiny-plain")  # the penalised run has the smaller bound
    with open(sorted_path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["name"] for r in rows] == ["tiny-penalised", "tiny-plain"]
    # Refuses to overwrite: status 2, one line, file unchanged.
    before = (path.read_bytes(), os.stat(path).st_mtime_ns)
    line = H.one_line_exit_2(capsys, ["compare", plain, pen, "--csv", str(path)])
    assert "exists" in line
    assert (path.read_bytes(), os.stat(path).st_mtime_ns) == before


def test_compare_missing_run(runs, tmp_path, capsys):
    line = H.one_line_exit_2(capsys, ["compare", runs[0], str(tmp_path / "gone")])
    assert "gone" in line


def test_input_method_recorded_without_eigenvectors(runs):
    """On a graph too large for eigh the record names the sparse-product form."""
    import dataclasses

    import stablefilt as sf

    rc = sf.certify_run(sf.open_run(runs[0]), [0.05])
    plain = dataclasses.replace(rc, spectrum=dataclasses.replace(rc.spectrum, eigenvalues=None, eigenvectors=None))
    assert "sparse products" in plain.input_method and "sparse products" in plain.as_dict()["input_specific_method"]
    assert rc.input_method.startswith("eigenvectors of S")
