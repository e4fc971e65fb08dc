"""Distances between two versions of a graph: the Sylvester relative error
matrix, the residual of a change that is not relative, node alignment, the
eigenvector misalignment, and the ``distance`` command.

Sources of the check values:
- ``scipy.linalg.solve_sylvester(S, S, S_hat - S)`` (Bartels-Stewart) for
  ``S E + E S = S_hat - S`` (docs/theory.md s. 2 names it the reference);
- networkx's karate club graph (Zachary 1977, bundled with networkx) for
  alignment by ``scipy.optimize.quadratic_assignment``;
- scaling ``(1 + t) S`` has ``E = (t/2) I``, so distance ``t/2`` and
  misalignment 0 (theory.md s. 2, derived);
- ``nx.complete_bipartite_graph``: adjacency eigenvalues in +/- pairs and 0
  (common practice; checked by ``numpy.linalg.eigvalsh`` below);
- misalignment ``delta = (||U - V||_2 + 1)^2 - 1`` lies in ``[0, 8]`` (Gama,
  Bruna, Ribeiro, IEEE TSP 2020); for a plane rotation by ``theta``,
  ``||R - I||_2 = 2 sin(theta / 2)`` (closed form, derived).
"""

from __future__ import annotations

import csv
import os
import subprocess
import sys

import helpers as H
import networkx as nx
import numpy as np
import pytest
import scipy.linalg as sla

import stablefilt as sf
from stablefilt import _distance as dist
from stablefilt import stress as st
from stablefilt._distance import sylvester_relative
from stablefilt.cli import main

KARATE = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977


def _pd_shifts():
    """Shifts with every ``lam_i + lam_j > 0``: ``I + D^-1/2 A D^-1/2`` of the
    karate club (eigenvalues in [0, 2], the smallest above 0 since the graph
    is not bipartite), and ``L + I`` of a random weighted graph."""
    deg = KARATE.sum(axis=1)
    norm_adj = KARATE / np.sqrt(np.outer(deg, deg))
    rng = np.random.default_rng(21)
    g = nx.gnp_random_graph(18, 0.3, seed=22)
    a = nx.to_numpy_array(g, weight=None)
    w = np.triu(rng.uniform(0.2, 2.0, a.shape), 1)
    a = a * (w + w.T)
    lap = np.diag(a.sum(axis=1)) - a
    return {"karate-I+normadj": np.eye(34) + norm_adj, "random-L+I": lap + np.eye(18)}


PD = _pd_shifts()


# ---------------------------------------------------------------------------
# Sylvester solution.


@pytest.mark.parametrize("name", sorted(PD))
@pytest.mark.parametrize("change", ["relative", "additive", "diagonal"])
def test_sylvester_matches_scipy(name, change):
    s = sf.shift_operator(PD[name]).dense()
    lam = np.linalg.eigvalsh(s)
    assert np.min(lam[:, None] + lam[None, :]) > 0.05  # every lam_i + lam_j away from 0
    op = sf.shift_operator(s)
    p = getattr(st, change)(op, 0.03, 5)
    s_hat = p.op.dense()
    d = s_hat - s
    ref = sla.solve_sylvester(s, s, d)
    e, resid, nsing, _ = sylvester_relative(s, s_hat)
    scale = np.linalg.norm(ref, 2)
    assert nsing == 0
    assert np.max(np.abs(e - ref)) <= 1e-10 * scale
    assert np.max(np.abs(s @ e + e @ s - d)) <= 1e-12 * max(1.0, np.max(np.abs(d)))
    assert resid <= 1e-12
    out = st.distance(op, p.op)
    assert out.expressible and not out.aligned and out.perm is None
    assert out.relative == pytest.approx(np.linalg.norm(ref, 2), rel=1e-10)
    assert out.additive == pytest.approx(np.linalg.norm(d, 2), rel=1e-12)
    if change in ("relative", "diagonal"):
        # The solution is unique here, so it is the generator's E itself.
        e_gen = p.e if p.e.ndim == 2 else np.diag(p.e)
        assert np.max(np.abs(out.e - e_gen)) <= 1e-10 * 0.03
        assert out.relative == pytest.approx(0.03, rel=1e-9)


# ---------------------------------------------------------------------------
# Scaling.


@pytest.mark.parametrize("kind", ["as-is", "normalized-laplacian", "laplacian"])
@pytest.mark.parametrize("t", [1e-3, 1e-2, 0.1])
def test_scaling_has_distance_half_t_and_no_misalignment(kind, t):
    """``(1 + t) S``: relative distance ``t / 2``, ``delta = 0`` (theory.md s. 2)."""
    op = sf.shift_operator(KARATE, kind)
    hat = sf.shift_operator((1 + t) * op.dense())
    d = st.distance(op, hat)
    assert d.expressible
    assert d.residual <= 1e-12 * d.additive
    assert d.relative == pytest.approx(t / 2, rel=1e-9)
    assert 0.0 <= d.delta <= 1e-8
    assert d.additive == pytest.approx(t * np.linalg.norm(op.dense(), 2), rel=1e-12)


# ---------------------------------------------------------------------------
# Non-expressible changes.


@pytest.mark.parametrize("sizes", [(4, 6), (3, 3), (5, 9)])
def test_bipartite_additive_change_is_not_expressible(sizes):
    """Bipartite adjacency: eigenvalues in +/- pairs, so ``lam_i + lam_j = 0``
    occurs. A generic additive change cannot be written ``E S + S E``: the
    distance says so, reports the residual, and stays finite and modest
    (never a division by a near-zero ``lam_i + lam_j``)."""
    a = nx.to_numpy_array(nx.complete_bipartite_graph(*sizes))
    lam, v = np.linalg.eigh(a)
    assert np.allclose(lam, -lam[::-1], atol=1e-12)  # +/- pairs (numpy.linalg.eigvalsh)
    op = sf.shift_operator(a)
    p = st.additive(op, 0.05, 3)
    d = st.distance(op, p.op)
    assert not d.expressible
    assert d.singular_pairs > 0
    assert d.as_dict()["upper_bound"] is True
    assert np.isfinite(d.relative)
    # ||E||_2 <= ||E~||_F <= ||D~||_F / min over the kept pairs of |lam_i + lam_j| (derived).
    denom = np.abs(lam[:, None] + lam[None, :])
    kept = denom > 1e-8 * np.max(np.abs(lam))
    dt = v.T @ (p.op.dense() - a) @ v
    assert d.relative <= np.linalg.norm(dt, "fro") / np.min(denom[kept]) * (1 + 1e-9)
    assert d.relative < 1.0
    # The residual is exactly the part of the change on the dropped pairs (derived).
    lost = v @ np.where(kept, 0.0, dt) @ v.T
    assert d.residual == pytest.approx(np.linalg.norm(lost, 2), rel=1e-8)
    assert d.residual > 1e-3
    assert d.additive == pytest.approx(0.05, rel=1e-12)


def test_relative_change_of_bipartite_graph_is_expressible():
    """A relative change of the same bipartite adjacency is expressible: the
    part on the pairs with ``lam_i + lam_j = 0`` vanishes (derived)."""
    op = sf.shift_operator(nx.to_numpy_array(nx.complete_bipartite_graph(4, 6)))
    p = st.relative(op, 0.02, 9)
    d = st.distance(op, p.op)
    assert d.singular_pairs > 0
    assert d.expressible
    assert d.residual <= 1e-12
    # E is not unique there; the one found is feasible, so no larger than needed
    # up to that freedom, and it reproduces S_hat.
    s = op.dense()
    assert np.max(np.abs(s + d.e @ s + s @ d.e - p.op.dense())) <= 1e-13
    assert d.relative <= 0.02 * (1 + 1e-9)


# ---------------------------------------------------------------------------
# Alignment.


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_alignment_recovers_karate_relabelling(seed):
    """A random relabelling of Zachary's karate club (networkx) is undone by
    ``quadratic_assignment``: distance ~0 and the permutation found maps the
    graph onto itself exactly (the truth, up to an automorphism)."""
    a = sf.shift_operator(KARATE)
    truth = np.random.default_rng(100 + seed).permutation(34)
    b_mat = KARATE[truth][:, truth]
    b = sf.shift_operator(b_mat)
    d = st.distance(a, b, align_nodes=True)
    perm = d.perm
    assert sorted(perm.tolist()) == list(range(34))
    assert np.array_equal(b_mat[perm][:, perm], KARATE)
    sigma = truth[perm]  # composed with the truth: an automorphism of the karate graph
    assert np.array_equal(KARATE[sigma][:, sigma], KARATE)
    assert d.aligned and d.as_dict()["upper_bound"] is True
    assert d.additive == 0.0
    assert d.relative <= 1e-12
    assert d.expressible


def test_without_alignment_a_relabelling_is_far():
    a = sf.shift_operator(KARATE)
    truth = np.random.default_rng(7).permutation(34)
    d = st.distance(a, sf.shift_operator(KARATE[truth][:, truth]))
    assert d.additive > 1.0


# ---------------------------------------------------------------------------
# Misalignment.


def test_misalignment_in_range():
    """``0 <= delta <= 8`` (Gama, Bruna, Ribeiro 2020): ``||U - V||_2 <= 2``
    for orthogonal ``U, V``. Random shifts, random ``E``, repeated eigenvalues."""
    rng = np.random.default_rng(0)
    values = []
    for k in range(300):
        n = int(rng.integers(1, 25))
        if k % 3 == 0:
            s = nx.to_numpy_array(nx.complete_graph(n))  # repeated eigenvalues
        else:
            s = rng.standard_normal((n, n))
            s = s + s.T
        e = rng.standard_normal((n, n))
        e = e + e.T
        delta = st.misalignment(s, e)
        values.append(delta)
        assert 0.0 <= delta <= 8.0, (k, delta)
    assert max(values) > 3.0  # the range is actually exercised


@pytest.mark.parametrize("theta", [0.05, 0.3, 0.7])
def test_misalignment_plane_rotation(theta):
    """``S = diag(1, 2)``, ``E`` with eigenvectors rotated by ``theta < pi/4``:
    ``||R - I||_2 = 2 sin(theta/2)`` (closed form), so
    ``delta = (2 sin(theta/2) + 1)^2 - 1``."""
    r = np.array([[np.cos(theta), -np.sin(theta)], [np.sin(theta), np.cos(theta)]])
    e = r @ np.diag([0.1, -0.05]) @ r.T
    want = (2 * np.sin(theta / 2) + 1) ** 2 - 1
    assert st.misalignment(np.diag([1.0, 2.0]), e) == pytest.approx(want, rel=1e-12)


def test_misalignment_zero_when_e_commutes_with_s():
    """``E = V diag(m) V^T`` with ``V`` the eigenvectors of ``S``: ``delta = 0``
    (columns and signs matched); also ``E = c I``."""
    rng = np.random.default_rng(3)
    s = sf.shift_operator(KARATE, "normalized-laplacian").dense()
    lam, v = np.linalg.eigh(s)
    e = (v * rng.uniform(-0.1, 0.1, 34)) @ v.T
    assert st.misalignment(s, e) <= 1e-8
    assert st.misalignment(s, 0.03 * np.eye(34)) <= 1e-8
    flipped = v * rng.choice([-1.0, 1.0], 34)
    assert st.misalignment(s, e, flipped) <= 1e-8


# ---------------------------------------------------------------------------
# Corner cases and errors.


def test_identical_graphs_and_one_node():
    a = sf.shift_operator(KARATE)
    d = st.distance(a, a)
    assert d.relative == 0.0 and d.additive == 0.0 and d.residual == 0.0 and d.expressible
    assert d.delta <= 1e-8
    one = st.distance(sf.shift_operator(np.array([[2.0]])), sf.shift_operator(np.array([[2.2]])))
    assert one.relative == pytest.approx(0.05, rel=1e-12)  # 2 E 2 = 0.2
    assert one.delta == 0.0 and one.expressible


def test_different_sizes_is_an_error():
    with pytest.raises(sf.GraphError, match="34 and 10 nodes"):
        st.distance(sf.shift_operator(KARATE), sf.shift_operator(KARATE[:10, :10]))


def test_above_the_dense_limit_the_iterative_paths_agree_with_the_eigenbasis(monkeypatch):
    """Above DISTANCE_LIMIT no dense eigendecomposition is made: a diagonal
    change is fitted exactly (E = diag(e), ||E||_2 = max |e_i|), a general
    one by MINRES; both agree with the eigenbasis solve and with
    scipy.linalg.solve_sylvester (Bartels-Stewart)."""
    s = PD["random-L+I"]
    n = len(s)
    rng = np.random.default_rng(8)
    e_diag = rng.uniform(-0.02, 0.02, n)
    s_diag = s * (1 + e_diag[:, None] + e_diag[None, :])  # S + E S + S E with E = diag(e)
    e_full = H.random_error(rng, n, 0.02)
    s_full = H.relative(s, e_full)
    dense = {k: st.distance(sf.shift_operator(s), sf.shift_operator(m)) for k, m in (("d", s_diag), ("f", s_full))}
    monkeypatch.setattr(dist, "DISTANCE_LIMIT", 5)
    monkeypatch.setattr(np.linalg, "eigh", None)  # no dense eigendecomposition on these paths
    d = st.distance(sf.shift_operator(s), sf.shift_operator(s_diag))
    assert d.method == "diagonal" and d.expressible and d.residual_norm == "F"
    assert d.relative == pytest.approx(np.abs(e_diag).max(), rel=1e-9)
    assert d.relative == pytest.approx(dense["d"].relative, rel=1e-9)
    f = st.distance(sf.shift_operator(s), sf.shift_operator(s_full))
    assert f.method == "minres" and f.expressible and f.solve["converged"]
    ref = sla.solve_sylvester(s, s, s_full - s)  # reference: Bartels-Stewart
    np.testing.assert_allclose(f.e, ref, atol=1e-9 * np.abs(ref).max())
    assert f.relative == pytest.approx(dense["f"].relative, rel=1e-6)
    assert f.relative <= f.relative_upper * (1 + 1e-12)


def test_above_the_iterative_limit_a_general_change_is_refused(monkeypatch):
    monkeypatch.setattr(dist, "DISTANCE_LIMIT", 5)
    monkeypatch.setattr(dist, "ITERATIVE_LIMIT", 10)
    s = PD["random-L+I"]
    e = H.random_error(np.random.default_rng(3), len(s), 0.02)
    with pytest.raises(sf.GraphError, match="at most 10 nodes"):
        st.distance(sf.shift_operator(s), sf.shift_operator(H.relative(s, e)))
    # An entry-wise rescaling is still measured there.
    ok = st.distance(sf.shift_operator(s), sf.shift_operator(1.04 * s))
    assert ok.method == "diagonal" and ok.relative == pytest.approx(0.02, rel=1e-9)  # (1 + t) S: E = t/2 I


def test_alignment_above_its_limit_is_refused(monkeypatch):
    monkeypatch.setattr(dist, "ALIGN_LIMIT", 20)
    with pytest.raises(sf.GraphError, match="at most 20 nodes"):
        st.distance(sf.shift_operator(KARATE), sf.shift_operator(KARATE), align_nodes=True)


# ---------------------------------------------------------------------------
# The command.


@pytest.fixture
def graph_files(tmp_path):
    t = np.random.default_rng(5).permutation(34)
    files = {
        "A": KARATE,
        "B": 1.02 * KARATE,
        "P": KARATE[t][:, t],
        "small": KARATE[:10, :10],
        "bip": nx.to_numpy_array(nx.complete_bipartite_graph(4, 6)),
        "bip2": st.additive(sf.shift_operator(nx.to_numpy_array(nx.complete_bipartite_graph(4, 6))), 0.05, 1).op.dense(),
    }
    out = {}
    for k, m in files.items():
        out[k] = str(tmp_path / f"{k}.npy")
        np.save(out[k], m)
    return out


def _one_sentence(err):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith("stablefilt") and lines[0].endswith(".")


def test_cli_distance_json(graph_files, capsys):
    rc = main(["distance", graph_files["A"], graph_files["B"], "--json"])
    out, err = capsys.readouterr()
    assert rc == 0 and err == ""
    assert len(out.strip().splitlines()) == 1
    d = H.strict_json(out)
    assert d["relative"] == pytest.approx(0.01, rel=1e-9)  # (1.02) A: t = 0.02
    assert d["expressible"] is True and d["aligned"] is False
    assert d["delta"] <= 1e-8
    assert d["nodes"] == 34
    assert d["additive"] == pytest.approx(0.02 * np.linalg.norm(KARATE, 2), rel=1e-12)


def test_cli_distance_align_json(graph_files, capsys):
    rc = main(["distance", graph_files["A"], graph_files["P"], "--align", "--json"])
    out, _ = capsys.readouterr()
    assert rc == 0
    d = H.strict_json(out)
    assert d["aligned"] is True and d["upper_bound"] is True
    assert d["relative"] <= 1e-12 and d["additive"] == 0.0
    assert "upper bound" in d["model"]


def test_cli_distance_not_expressible_json(graph_files, capsys):
    rc = main(["distance", graph_files["bip"], graph_files["bip2"], "--json"])
    out, _ = capsys.readouterr()
    assert rc == 0
    d = H.strict_json(out)
    assert d["expressible"] is False and d["residual"] > 0 and d["singular_pairs"] > 0


def test_cli_distance_table(graph_files, capsys):
    rc = main(["distance", graph_files["bip"], graph_files["bip2"]])
    out, _ = capsys.readouterr()
    assert rc == 0
    assert "relative distance" in out and "NOT expressible" in out and "additive distance" in out


@pytest.mark.parametrize("which", ["sizes", "missing"])
def test_cli_distance_bad_input(graph_files, tmp_path, capsys, which):
    b = graph_files["small"] if which == "sizes" else str(tmp_path / "nope.npy")
    rc = main(["distance", graph_files["A"], b])
    out, err = capsys.readouterr()
    assert rc == 2 and out == ""
    _one_sentence(err)
    assert ("34 and 10 nodes" in err) if which == "sizes" else ("does not exist" in err)


def test_cli_distance_exit_status_from_the_shell(graph_files, tmp_path):
    """The installed entry point: exit 2 and one sentence on a missing file."""
    exe = os.path.join(os.path.dirname(sys.executable), "stablefilt")
    cmd = [exe] if os.path.exists(exe) else [sys.executable, "-m", "stablefilt.cli"]
    r = subprocess.run(cmd + ["distance", graph_files["A"], str(tmp_path / "nope.npy")], capture_output=True,
                       text=True, cwd=tmp_path, timeout=120)
    assert r.returncode == 2 and r.stdout == ""
    _one_sentence(r.stderr)


def test_cli_distance_save_perm(graph_files, tmp_path, capsys):
    """The saved permutation undoes the relabelling of the karate club
    (networkx): graph_b's rows and columns taken in the saved order equal
    graph_a exactly, and it equals --json's perm."""
    path = tmp_path / "perm.csv"
    rc = main(["distance", graph_files["A"], graph_files["P"], "--align", "--json", "--save-perm", str(path)])
    out, _ = capsys.readouterr()
    assert rc == 0
    rows = list(csv.DictReader(open(path, newline="")))
    assert [int(r["graph_a_index"]) for r in rows] == list(range(34))
    perm = np.array([int(r["graph_b_index"]) for r in rows])
    assert perm.tolist() == H.strict_json(out)["alignment"]["perm"]
    b = np.load(graph_files["P"])
    assert np.array_equal(b[perm][:, perm], KARATE)
    # An existing file is refused before any work: one sentence, unchanged.
    before = path.read_bytes()
    rc = main(["distance", graph_files["A"], graph_files["P"], "--align", "--save-perm", str(path)])
    out, err = capsys.readouterr()
    assert rc == 2 and out == "" and "already exists" in err
    _one_sentence(err)
    assert path.read_bytes() == before


def test_cli_distance_save_perm_needs_align(graph_files, tmp_path, capsys):
    rc = main(["distance", graph_files["A"], graph_files["P"], "--save-perm", str(tmp_path / "p.csv")])
    out, err = capsys.readouterr()
    assert rc == 2 and "--align" in err and not (tmp_path / "p.csv").exists()
    _one_sentence(err)


def test_cli_distance_save_perm_with_node_ids(tmp_path, capsys):
    """Edge lists naming their nodes: the saved rows carry the IDs, and each
    ID is matched to itself when graph_b lists the same edges in another
    order (so its nodes are read in another order)."""
    a = H.write(tmp_path / "a.csv", "src,dst\nST-1,ST-2\nST-2,ST-3\nST-3,ST-4\nST-4,ST-1\nST-1,ST-3\n")
    b = H.write(tmp_path / "b.csv", "src,dst\nST-3,ST-4\nST-4,ST-1\nST-1,ST-3\nST-2,ST-3\nST-1,ST-2\n")
    path = tmp_path / "perm.csv"
    assert main(["distance", a, b, "--align", "--save-perm", str(path)]) == 0
    rows = list(csv.DictReader(open(path, newline="")))
    assert len(rows) == 4 and all(r["graph_a_id"] == r["graph_b_id"] for r in rows)


def test_misalignment_left_out_above_its_limit_with_the_same_distance(monkeypatch):
    s = PD["random-L+I"]
    e = H.random_error(np.random.default_rng(6), len(s), 0.02)
    a, b = sf.shift_operator(s), sf.shift_operator(H.relative(s, e))
    full = st.distance(a, b)
    monkeypatch.setattr(dist, "MISALIGNMENT_LIMIT", 5)
    short = st.distance(a, b)
    assert short.delta is None and full.delta is not None
    # Above the limit ||E||_2 is a proved upper bound (Lanczos + Cholesky,
    # docs/theory.md s. 2), never below the eigh figure and within 1e-8 of it.
    assert short.solve["norm_of_e"] in ("lanczos+cholesky", "eigvalsh")
    assert full.relative * (1 - 1e-13) <= short.relative <= full.relative * (1 + 1e-8)
    assert short.relative == pytest.approx(0.02, rel=1e-8)  # ||E||_2 = 0.02 by construction (helpers.random_error)
    assert H.strict_json(__import__("json").dumps(short.as_dict()))["delta"] is None


@pytest.mark.parametrize("name", sorted(PD))
def test_large_graph_norms_against_scipy(name, monkeypatch):
    """Above ``EXACT_NORM_LIMIT`` (lowered here) the residual is a Frobenius
    norm and ``||E||_2`` a proved upper bound: checked against
    ``scipy.linalg.solve_sylvester`` (Bartels-Stewart) and numpy's 2-norms,
    for a relative change (expressible) and an additive one on ``L + I``
    (every ``lam_i + lam_j > 0``, so expressible too, with a larger E)."""
    s = PD[name]
    op = sf.shift_operator(s)
    monkeypatch.setattr(dist, "EXACT_NORM_LIMIT", 5)
    monkeypatch.setattr(dist, "MISALIGNMENT_LIMIT", 5)
    for change in ("relative", "additive"):
        p = getattr(st, change)(op, 0.03, 7)
        d_mat = p.op.dense() - s
        ref = sla.solve_sylvester(s, s, d_mat)
        out = st.distance(op, p.op)
        true = np.linalg.norm(ref, 2)
        assert out.residual_norm == "F" and out.solve["additive"] == "lanczos"
        assert true * (1 - 1e-12) <= out.relative <= true * (1 + 1e-8)
        assert np.max(np.abs(out.e - ref)) <= 1e-10 * true
        assert 0.0 <= out.residual <= 1e-12  # round-off only: the change is expressible here
        assert out.expressible
        assert out.additive == pytest.approx(np.linalg.norm(d_mat, 2), rel=1e-7)


def test_large_graph_residual_of_a_change_that_is_not_relative(monkeypatch):
    """The bipartite case above ``EXACT_NORM_LIMIT`` (lowered): the Frobenius
    residual is at least the 2-norm of the part on the dropped pairs (derived
    as in test_bipartite_additive_change_is_not_expressible; numpy norms)."""
    a = nx.to_numpy_array(nx.complete_bipartite_graph(5, 9))
    lam, v = np.linalg.eigh(a)
    op = sf.shift_operator(a)
    p = st.additive(op, 0.05, 3)
    monkeypatch.setattr(dist, "EXACT_NORM_LIMIT", 5)
    d = st.distance(op, p.op)
    kept = np.abs(lam[:, None] + lam[None, :]) > 1e-8 * np.max(np.abs(lam))
    lost = v @ np.where(kept, 0.0, v.T @ (p.op.dense() - a) @ v) @ v.T
    assert not d.expressible and d.residual_norm == "F"
    assert d.residual == pytest.approx(np.linalg.norm(lost, "fro"), rel=1e-8)
    assert d.residual >= np.linalg.norm(lost, 2) * (1 - 1e-9)
