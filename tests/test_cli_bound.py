"""``stablefilt bound GRAPH FILTER --eps E ... [--shift KIND] [--json]``:
the three graph formats give the same certificate, ``--json`` prints exactly
one JSON object of the documented shape, the figures cover changes measured
here, and bad input exits with status 2 and one line on stderr."""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import helpers as H
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
from reference import change, relative

import stablefilt as sf
from stablefilt._io import save_filter
from stablefilt.cli import main

BOUND_KEYS = {"eps", "certified", "first_order", "remainder", "published", "aligned", "lower"}
TOP_KEYS = {"nodes", "interval", "interval_method", "constants", "bounds"}


@pytest.fixture
def files(tmp_path):
    g = nx.les_miserables_graph()  # bundled with networkx; weighted
    a = nx.to_numpy_array(g)
    np.save(tmp_path / "g.npy", a)
    sp.save_npz(tmp_path / "g.npz", sp.csr_matrix(a))
    i, j = np.nonzero(np.triu(a, 1))
    with open(tmp_path / "g.csv", "w") as fh:
        fh.write("src,dst,weight\n")
        for u, v in zip(i, j):
            fh.write(f"{u},{v},{float(a[u, v])!r}\n")
    save_filter(str(tmp_path / "mono.npz"), np.array([0.5, -0.2, 0.03, -0.001]), sf.make_basis())
    save_filter(str(tmp_path / "cheb.npz"), np.random.default_rng(1).standard_normal((4, 2, 2)),
                sf.make_basis("chebyshev", (0.0, 2.0)))
    return tmp_path, a


def _run(argv, capsys):
    code = main([str(x) for x in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_three_graph_formats_give_the_same_certificate(files, capsys):
    d, _ = files
    results = []
    for g in ("g.npy", "g.npz", "g.csv"):
        code, out, err = _run(["bound", d / g, d / "mono.npz", "--eps", "0.01", "--eps", "0.1", "--json"], capsys)
        assert code == 0 and err == ""
        obj = H.strict_json(out)
        for end in obj["interval_ends"].values():  # wall times differ from run to run
            assert end.pop("seconds") >= 0
        results.append(obj)
    assert results[0] == results[1] == results[2]


@pytest.mark.parametrize("filt,shift", [("mono.npz", "as-is"), ("cheb.npz", "normalized-laplacian")])
def test_json_shape_and_soundness(files, capsys, filt, shift):
    d, a = files
    code, out, err = _run(["bound", d / "g.npy", d / filt, "--eps", "0.001", "--eps", "0.05", "--shift", shift,
                           "--json"], capsys)
    assert code == 0 and err == ""
    obj = H.strict_json(out)
    assert TOP_KEYS <= set(obj)
    assert obj["nodes"] == 77
    lo, hi = obj["interval"]
    s = sf.shift_operator(a, shift).dense()
    lam = np.linalg.eigvalsh(s)  # reference: numpy.linalg.eigvalsh
    assert lo <= lam[0] and lam[-1] <= hi
    if shift == "normalized-laplacian":
        assert -1e-8 <= lo and hi <= 2 + 1e-8  # Chung, Spectral Graph Theory 1997
    assert isinstance(obj["interval_method"], str) and obj["interval_method"]
    assert isinstance(obj["constants"], dict)
    assert [b["eps"] for b in obj["bounds"]] == [0.001, 0.05]
    z = np.load(d / filt)
    taps, kind = z["taps"], str(z["basis"])
    interval = tuple(z["interval"]) if kind == "chebyshev" else None
    for b in obj["bounds"]:
        assert BOUND_KEYS <= set(b)
        for key in BOUND_KEYS:
            assert isinstance(b[key], (int, float)) and math.isfinite(b[key]), key
        assert b["lower"] <= b["certified"] <= b["published"]
        # the certificate covers the scaling change measured here (reference: numpy.linalg.eigh)
        for sign in (1, -1):
            e = sign * b["eps"] * np.eye(77)
            assert change(s, relative(s, e), taps, kind, interval) <= b["certified"]


def test_table_goes_to_the_current_stdout(files, capsys):
    d, _ = files
    code, out, err = _run(["bound", d / "g.npz", d / "mono.npz", "--eps", "0.01"], capsys)
    assert code == 0 and "certified" in out


def _write_bad(d):
    (d / "trunc.npy").write_bytes((d / "g.npy").read_bytes()[:90])
    (d / "trunc.npz").write_bytes((d / "g.npz").read_bytes()[:60])
    (d / "g.txt").write_text("0 1\n")
    (d / "header.csv").write_text("a,b,c\n0,1,1\n")
    np.save(d / "nonsym.npy", np.array([[0.0, 1.0], [0.0, 0.0]]))
    np.savez(d / "nobasis.npz", taps=np.ones(3))
    np.savez(d / "badbasis.npz", taps=np.ones(3), basis=np.asarray("legendre"))
    np.savez(d / "nointerval.npz", taps=np.ones(3), basis=np.asarray("chebyshev"))
    np.savez(d / "rank2.npz", taps=np.ones((3, 2)), basis=np.asarray("monomial"))
    (d / "truncf.npz").write_bytes((d / "mono.npz").read_bytes()[:40])


BAD = [
    (["missing.npy", "mono.npz", "--eps", "0.1"], "does not exist"),
    (["g.npy", "missing.npz", "--eps", "0.1"], "does not exist"),
    (["g.txt", "mono.npz", "--eps", "0.1"], ".npy, .npz or .csv"),
    (["trunc.npy", "mono.npz", "--eps", "0.1"], "could not be read"),
    (["trunc.npz", "mono.npz", "--eps", "0.1"], "could not be read"),
    (["header.csv", "mono.npz", "--eps", "0.1"], "header"),
    (["nonsym.npy", "mono.npz", "--eps", "0.1"], "symmetric"),
    (["g.npy", "nobasis.npz", "--eps", "0.1"], "basis"),
    (["g.npy", "badbasis.npz", "--eps", "0.1"], "unknown basis"),
    (["g.npy", "nointerval.npz", "--eps", "0.1"], "interval"),
    (["g.npy", "rank2.npz", "--eps", "0.1"], "shape"),
    (["g.npy", "truncf.npz", "--eps", "0.1"], "could not be read"),
    (["g.npy", "mono.npz", "--eps", "-1"], "--eps"),
    (["g.npy", "mono.npz", "--eps=-0.5"], "--eps"),
    (["g.npy", "mono.npz", "--eps", "abc"], "not a number"),
    (["g.npy", "mono.npz"], "--eps"),
    (["g.npy", "mono.npz", "--eps", "0.1", "--shift", "laplacian-ish"], "shift"),
]


@pytest.mark.parametrize("argv,needle", BAD, ids=[" ".join(b[0]) for b in BAD])
def test_bad_input_exits_2_with_one_line(files, capsys, argv, needle):
    d, _ = files
    _write_bad(d)
    args = ["bound"] + [str(d / x) if (x.endswith((".npy", ".npz", ".csv", ".txt"))) else x for x in argv]
    try:
        code = main(args)
    except SystemExit as exc:  # argparse's own usage errors
        code = exc.code
    out = capsys.readouterr()
    assert code == 2
    assert out.out == ""
    lines = out.err.strip().splitlines()
    assert len(lines) == 1, out.err
    assert "Traceback" not in out.err
    assert needle in lines[0], lines[0]
    assert lines[0].startswith("stablefilt") and lines[0].endswith(".")


def _entry_point():
    exe = Path(sys.executable).with_name("stablefilt")
    if not exe.exists():
        pytest.skip("the stablefilt console script is not installed next to this interpreter")
    return exe


def test_console_script_subprocess(files):
    d, _ = files
    exe = _entry_point()
    ok = subprocess.run([exe, "bound", d / "g.csv", d / "mono.npz", "--eps", "0.01", "--json"],
                        capture_output=True, text=True, timeout=120)
    assert ok.returncode == 0, ok.stderr
    obj = H.strict_json(ok.stdout)
    assert TOP_KEYS <= set(obj) and len(obj["bounds"]) == 1
    table = subprocess.run([exe, "bound", d / "g.npz", d / "cheb.npz", "--eps", "0.01", "--shift", "laplacian"],
                           capture_output=True, text=True, timeout=120)
    assert table.returncode == 0 and table.stderr == ""
    assert "certified" in table.stdout and "published" in table.stdout and "77 nodes" in table.stdout
    bad = subprocess.run([exe, "bound", d / "missing.npy", d / "mono.npz", "--eps", "0.01"],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and bad.stdout == ""
    assert len(bad.stderr.strip().splitlines()) == 1 and "Traceback" not in bad.stderr
