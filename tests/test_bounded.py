"""Every spectral step has a bounded cost: Lanczos runs within its budget of
restarts, basis size and wall time; the inertia factorisation within its
wall time; an end that cannot be proved in budget falls back to Gershgorin
and the interval still holds every eigenvalue (reference:
numpy.linalg.eigvalsh); a Laplacian given as a matrix needs no Lanczos for
its lower end; a step that does not fit in memory is refused before it
starts."""

from __future__ import annotations

import time

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

import stablefilt as sf
from stablefilt import _interval
from stablefilt._budget import call_within, can_fork
from stablefilt._interval import LanczosBudget, count_above, spectral_interval
from stablefilt._memory import MemoryRefused, available_bytes, require

GRAPHS = {
    "karate": nx.karate_club_graph,  # bundled with networkx
    "geometric": lambda: nx.random_geometric_graph(150, 0.15, seed=3),
    "path": lambda: nx.path_graph(60),
    "disconnected": lambda: nx.disjoint_union(nx.path_graph(10), nx.cycle_graph(9)),
}


def _contains(iv, lam):
    return iv.lower <= lam[0] and lam[-1] <= iv.upper


@pytest.fixture
def eigsh_calls(monkeypatch):
    """Record the arguments of every ``eigsh`` call the interval makes."""
    calls = []
    real = spla.eigsh

    def spy(a, *args, **kw):
        calls.append(kw)
        return real(a, *args, **kw)

    monkeypatch.setattr(_interval.spla, "eigsh", spy)
    return calls


@pytest.mark.parametrize("name", sorted(GRAPHS))
@pytest.mark.parametrize("kind", sf.KINDS)
def test_every_lanczos_call_has_a_budget(eigsh_calls, name, kind):
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()), kind)
    budget = LanczosBudget(maxiter=50, ncv=12, seconds=20.0)
    iv = spectral_interval(op, exact_limit=5, budget=budget)
    lam = np.linalg.eigvalsh(op.dense())  # reference: numpy.linalg.eigvalsh
    assert _contains(iv, lam), (iv, lam[0], lam[-1])
    for kw in eigsh_calls:
        assert kw["maxiter"] <= budget.maxiter and kw["ncv"] <= budget.ncv
    # Each end records its method and a time.
    ends = iv.ends()
    assert {ends["lower"]["method"], ends["upper"]["method"]} <= {"construction", "gershgorin", "lanczos+inertia"}
    assert ends["lower"]["seconds"] >= 0 and ends["upper"]["seconds"] >= 0


@pytest.mark.parametrize("name", ["karate", "geometric"])
def test_no_product_budget_falls_back_to_gershgorin_and_still_holds_the_spectrum(name):
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS[name]()))  # adjacency: both ends need Lanczos
    lam = np.linalg.eigvalsh(op.dense())
    # One restart of three vectors cannot reach tol 1e-6 on these graphs.
    iv = spectral_interval(op, exact_limit=5, budget=LanczosBudget(maxiter=1, ncv=3))
    assert (iv.lower_method, iv.upper_method) == ("gershgorin", "gershgorin")
    assert set(iv.notes) == {"lower", "upper"}
    g_lo, g_hi = _interval.gershgorin(op.matrix)  # Gershgorin row sums (always valid)
    assert (iv.lower, iv.upper) == (g_lo, g_hi)
    assert _contains(iv, lam)


def test_no_time_budget_falls_back_and_counts_no_further_products():
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS["geometric"]()))
    lam = np.linalg.eigvalsh(op.dense())
    t0 = time.perf_counter()
    iv = spectral_interval(op, exact_limit=5, budget=LanczosBudget(seconds=0.0))
    assert time.perf_counter() - t0 < 30  # a loose sanity bound, not a timing assertion
    assert iv.method == "gershgorin"
    assert "budget" in iv.notes["upper"]
    assert _contains(iv, lam)


def test_laplacian_given_as_a_matrix_needs_no_lanczos_for_its_lower_end(eigsh_calls):
    # A combinatorial Laplacian read as-is: the all-ones vector has Rayleigh
    # quotient 0, the row-sum lower end (L 1 = 0; common practice).
    a = nx.to_numpy_array(nx.random_geometric_graph(200, 0.12, seed=5))
    lap = np.diag(a.sum(axis=1)) - a
    op = sf.shift_operator(lap)
    iv = spectral_interval(op, exact_limit=5)
    assert iv.lower_method == "gershgorin" and "Rayleigh" in iv.notes["lower"]
    assert all(kw.get("which") != "SA" for kw in eigsh_calls)
    lam = np.linalg.eigvalsh(lap)
    assert _contains(iv, lam)
    assert iv.lower <= 0 <= iv.lower + 1e-6  # tight to within the pad


def test_inertia_count_under_a_budget_agrees_with_eigvalsh():
    op = sf.shift_operator(nx.to_numpy_array(GRAPHS["geometric"]()), "laplacian")
    lam = np.linalg.eigvalsh(op.dense())  # reference: numpy.linalg.eigvalsh
    for sigma in (lam[-1] + 1e-3, 0.5 * (lam[40] + lam[41]), lam[0] - 1e-3):
        assert count_above(op.matrix, float(sigma), seconds=30.0) == int(np.sum(lam > sigma))


@pytest.mark.skipif(not can_fork(), reason="no fork on this platform: the factorisation runs without a time limit")
def test_a_step_past_its_wall_time_is_ended():
    t0 = time.perf_counter()
    out = call_within(time.sleep, (30,), 0.5)
    assert out.status == "timeout"
    assert time.perf_counter() - t0 < 10
    assert call_within(sum, ([1, 2, 3],), 30).value == 6
    assert call_within(int, ("x",), 30).status == "failed"  # ValueError in the child


def test_a_step_that_does_not_fit_is_refused_in_one_sentence(monkeypatch):
    with pytest.raises(MemoryRefused) as got:
        require(10**12, "a dense eigendecomposition of 353553 nodes", available=10**9)
    msg = str(got.value)
    assert msg.count(". ") == 0 and "1 TB" in msg and "1 GB" in msg
    require(10**6, "a small step", available=10**9)  # fits: nothing raised
    have = available_bytes()
    assert have is None or have > 0
    # The dense path of the interval checks before it starts.
    monkeypatch.setattr("stablefilt._memory.available_bytes", lambda: 1000)
    op = sf.shift_operator(nx.to_numpy_array(nx.karate_club_graph()))
    with pytest.raises(MemoryRefused, match="dense eigendecomposition of 34 nodes"):
        spectral_interval(op)


def test_bound_command_json_records_each_end(tmp_path, capsys):
    import json

    from stablefilt._io import save_filter
    from stablefilt.cli import main

    a = nx.to_numpy_array(nx.random_geometric_graph(300, 0.1, seed=2))
    sp.save_npz(tmp_path / "g.npz", sp.csr_matrix(np.diag(a.sum(axis=1)) - a))
    save_filter(str(tmp_path / "f.npz"), np.array([1.0, -0.1, 0.01]), sf.make_basis())
    assert main(["bound", str(tmp_path / "g.npz"), str(tmp_path / "f.npz"), "--eps", "0.01", "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert set(d["interval_ends"]) == {"lower", "upper"}
    assert d["interval_ends"]["lower"]["method"] == "exact"
    assert isinstance(d["interval_ends"]["upper"]["seconds"], float)


def test_lower_figure_stops_at_its_time_and_stays_a_realised_change():
    # The realised change of E = eps I on S is ||H((1 + 2 eps) S) - H(S)||_2
    # (docs/theory.md s.2: scaling), computed here from numpy.linalg.eigvalsh.
    from stablefilt._search import lower_change

    op = sf.shift_operator(nx.to_numpy_array(GRAPHS["geometric"]()), "laplacian")
    taps, basis = np.array([1.0, -0.3, 0.05]), sf.make_basis()
    lam = np.linalg.eigvalsh(op.dense())
    eps = 0.01
    exact = max(np.max(np.abs(np.polyval(taps[::-1], (1 + 2 * sign * eps) * lam) - np.polyval(taps[::-1], lam)))
                for sign in (1.0, -1.0))
    full = lower_change(op, taps, basis, eps)
    quick = lower_change(op, taps, basis, eps, seconds=0.0)  # one iteration per start
    assert 0 < quick.value <= full.value <= exact * (1 + 1e-9)
    assert full.value >= exact * (1 - 1e-6)


def test_minres_solve_agrees_with_bartels_stewart_and_stops_at_its_budget():
    import scipy.linalg as sla

    from stablefilt._sylvester import minres_sylvester

    a = nx.to_numpy_array(nx.karate_club_graph(), weight=None)  # Zachary 1977, bundled with networkx
    s = np.diag(a.sum(axis=1)) - a + 0.5 * np.eye(34)  # L + I/2: every lam_i + lam_j >= 1
    rng = np.random.default_rng(4)
    e = rng.standard_normal((34, 34))
    e = 0.01 * (e + e.T)
    d = s @ e + e @ s
    sol = minres_sylvester(sp.csr_array(s), d, tol=1e-12)
    ref = sla.solve_sylvester(s, s, d)  # reference: scipy (Bartels-Stewart)
    assert sol.converged and sol.method == "minres"
    np.testing.assert_allclose(sol.e, ref, atol=1e-10 * np.abs(ref).max())
    assert sol.residual == pytest.approx(np.linalg.norm(s @ sol.e + sol.e @ s - d), rel=1e-6, abs=1e-14)
    stopped = minres_sylvester(sp.csr_array(s), d, seconds=0.0)  # out of time at the first product
    assert not stopped.converged and stopped.iterations == 0
    assert stopped.residual == pytest.approx(np.linalg.norm(d), rel=1e-12)  # E = 0 leaves all of D
