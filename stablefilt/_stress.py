"""Stress tests of a trained run: hold its certificates against real and
adversarial changes of the graph.

For each eps and kind of perturbation, samples are drawn, the model is run in
float64 on the perturbed graph, and every measured output change is compared
with the certificates: the operator-level one (inputs with ``||x||_F <= rho``)
and the input-specific one for that signal. Edge changes are not relative
perturbations by construction: their relative distance is measured (Sylvester
equation) and the certificate at that distance applies, when the change is
expressible at all.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from ._attack import DENSE_ATTACK_LIMIT, POLISH_LIMIT, adam_evaluations, attack, polish_steps
from ._distance import sylvester_relative, sym_norm2
from ._errors import StablefiltError
from ._memo import InputMemo
from ._model import forward_np
from ._modelcert import certify_inputs, model_bounds
from ._perturb import DENSE_LIMIT, diagonal, jitter, relabel, relative, scaling
from ._progress import bar, say_through
from ._runcert import run_constants, run_spectrum
from ._runs import Run

KINDS = ("relative", "diagonal", "scaling", "edges", "relabel")

#: Restarts of each attack (:func:`stablefilt._attack.attack`'s default).
ATTACK_RESTARTS = 5

#: The free-input attack (block ascent, stablefilt._freeattack): restarts,
#: evaluations per restart at most (a restart stops early at a local
#: maximum), and test signals it may start from (the largest input-specific
#: certificates first). On the 120-node demo one evaluation costs about 2 ms.
#: Measured there (3 seeds each): the largest change grows with the number
#: of random starts more than with their length (8 x 60: 1.259, 16 x 100:
#: 1.268-1.285, 32 x 200: 1.311 at eps 1e-3), so 24 x 150 (about 5 s per eps).
FREE_RESTARTS = 24
FREE_ITERS = 150
FREE_INPUTS = 4

#: The free-input attack on graphs of at most ``POLISH_LIMIT`` nodes with
#: dense or diagonal ``E``: the multi-start Adam search over the smoothed
#: model (stablefilt._adamattack), starts and steps. Measured on the 40-epoch
#: demo runs (docs/theory.md 9; float64 re-measured changes at eps 1e-3 and
#: 1e-2): 3 layers, block ascent with its polish 2.785 and 29.17, Adam 8 x 400
#: 3.060 and 31.33, 16 x 400 3.139 and 31.37 (17 and 13 s), 16 x 600 3.191
#: and 31.70, 32 x 600 3.187 and 31.94 (46 and 50 s); 2 layers 1.3355 and
#: 13.314 against 8 x 400's 1.3377 and 13.335.
FREE_STARTS = 16
FREE_STEPS = 300


def inapplicable(run: Run, kind: str, have_vectors: bool) -> str | None:
    """Why ``kind`` cannot be measured against a certificate on this run's
    operator, decided before any work (None when it can):

    - ``edges`` on a normalised Laplacian: ``S x0 = 0`` for ``x0 = D^1/2 1``,
      so every relative change has ``x0^T (E S + S E) x0 = 0``, while edge
      jitter (off-diagonal entries scaled, diagonal kept at 1) moves
      ``x0^T S x0`` by ``-sum_ij N_ij u_ij x0_i x0_j``, almost surely not 0:
      no sample could ever be covered (docs/theory.md section 2).
    - ``edges`` without the eigenvectors of ``S`` (graphs above the dense
      limit of the spectral interval): the relative distance of each change
      needs them, and it is not computed at that size.
    """
    if kind == "edges" and run.op.kind == "normalized-laplacian":
        return ("edge jitter on a normalised Laplacian moves x0^T S x0 for its null vector x0 = D^1/2 1, "
                "which no relative perturbation S + E S + S E can, so no sample could be covered")
    if kind == "edges" and not have_vectors:
        return (f"the relative distance of an edge change needs the eigenvectors of S, computed only for "
                f"graphs of at most the dense limit of nodes; this one has {run.op.nodes}")
    return None


@dataclasses.dataclass(frozen=True)
class StressRow:
    """One eps and kind of perturbation: the certificates, what was measured,
    and how many measured changes exceeded their certificate (``violations``,
    0 for a sound certificate). Attack rows add the ``attack_*`` fields: the
    strongest fixed-input change and its input-specific certificate, and the
    strongest change with a free input of norm ``rho``, the attack's kind
    (``dense``, ``diagonal`` or ``lowrank``) and its wall time in seconds."""

    eps: float
    kind: str
    certified: float
    published: float
    input_certified_max: float
    samples: int
    covered: int
    mean_change: float
    max_change: float
    ratio: float | None
    metric_perturbed: float | None
    metric_clean: float
    violations: int
    distance_max: float | None = None
    attack_change: float | None = None
    attack_certified: float | None = None
    attack_ratio: float | None = None
    attack_free_change: float | None = None
    attack_free_ratio: float | None = None
    attack_mode: str | None = None
    attack_seconds: float | None = None

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


def _ratio(cert, change):
    """``cert / change``, or None when nothing changed (a model whose output
    does not depend on the graph)."""
    return float(cert / change) if change > 0 else None


def _g(v) -> str:
    return "-" if v is None else f"{v:.3g}"


def _metric(out, y, task):
    if task == "classify":
        return float(np.mean(np.argmax(out, axis=-1) == y))
    return float(np.sqrt(np.mean((out[..., 0] - y) ** 2)))


def _draw(run: Run, kind: str, eps: float, seed: int, sample: int = 0, eig=None):
    """``(S_hat ShiftOperator, relative distance or None, perm or None)``;
    scaling alternates ``(1 + 2 eps) S`` and ``(1 - 2 eps) S`` with ``sample``.
    ``eig = (lam, V)`` of ``S``, needed by the ``edges`` kind."""
    op = run.op
    if kind == "relative":
        p = relative(op, eps, seed) if op.nodes <= DENSE_LIMIT else diagonal(op, eps, seed)
        return p.op, eps, None
    if kind == "diagonal":
        return diagonal(op, eps, seed).op, eps, None
    if kind == "scaling":
        return scaling(op, eps, sample).op, eps, None
    if kind == "relabel":
        p = relabel(op, seed)
        return p.op, 0.0, p.perm
    if kind == "edges":
        p = jitter(op, 2 * eps, seed)
        if eig is None:
            return p.op, None, None
        sol = sylvester_relative(op.dense(), p.op.dense(), eig=eig)
        add = sym_norm2(p.op.dense() - op.dense())
        if sol.residual > 1e-8 * max(add, 1e-300):
            return p.op, None, None
        return p.op, sym_norm2(sol.e), None
    raise ValueError(kind)


def stress_run(run: Run, eps_list, *, kinds=KINDS[:4], samples: int = 5, attack_signals: int = 0, seed: int = 0,
               attack_iters: int = 30, attack_kind: str = "auto", progress=None) -> list[StressRow]:
    """Stress a run; see the module docstring. ``attack_signals > 0`` also
    attacks that many test signals (and one free input) per eps, with
    ``attack_kind`` one of ``stablefilt._attack.MODES`` (``auto``: dense up
    to ``DENSE_ATTACK_LIMIT`` nodes, low-rank beyond). The model's constants
    are computed once for every eps and sample. Kinds that cannot apply to
    the run's operator (:func:`inapplicable`) are left out before any work;
    :func:`skipped_kinds` says which and why. A progress bar (standard error,
    terminals only) counts samples and attack iterations; ``progress``
    receives one line per row."""
    if run.spec.readout == "flat" and "relabel" in kinds:
        raise StablefiltError(f"run {run.path!r} has a flat readout, whose certificate keeps the node order "
                              "(docs/theory.md s.8.1); leave relabel out of the kinds.")
    spectrum = run_spectrum(run)
    skip = dict(skipped_kinds(run, kinds, spectrum.eigenvectors is not None))
    kinds = [k for k in kinds if k not in skip]
    eig = None if spectrum.eigenvectors is None else (spectrum.eigenvalues, spectrum.eigenvectors)
    f_restarts, f_iters, f_search = free_budget(_attack_mode(run, attack_kind), attack_iters, run.op.nodes)
    # Each fixed-input attack: its restarts, then the polish of its winner.
    # The Adam polish of every winner adds polish_steps(N, iters) each; the
    # Adam search has none.
    f_count = (f_restarts * f_iters + polish_steps(run.op.nodes, f_iters) if f_search == "ascent"
               else adam_evaluations(f_restarts, f_iters))
    per_attack = (attack_signals * ((ATTACK_RESTARTS + 1) * attack_iters + polish_steps(run.op.nodes, attack_iters))
                  + f_count)
    total = len(eps_list) * (len(kinds) * samples + per_attack * bool(attack_signals))
    with bar(total, "stress", unit="step") as pb:
        return _stress_rows(run, eps_list, kinds, samples, attack_signals, seed, attack_iters,
                            say_through(pb, progress), spectrum, eig, pb, attack_kind)


def _attack_mode(run: Run, attack_kind: str) -> str:
    if attack_kind != "auto":
        return attack_kind
    return "dense" if run.op.nodes <= DENSE_ATTACK_LIMIT else "lowrank"


def free_budget(mode: str, attack_iters: int, nodes: int) -> tuple[int, int, str]:
    """``(restarts, iterations per restart, search)`` of the free-input
    attack: the Adam search's ``FREE_STARTS``, ``FREE_STEPS`` for dense and
    diagonal ``E`` on graphs of at most ``POLISH_LIMIT`` nodes; else the block
    ascent's ``FREE_RESTARTS``, ``FREE_ITERS``; the fixed-input attacks'
    budget in low-rank mode (graphs beyond the dense limit, where each
    iteration is costlier and the diagonal and low-rank searches both run)."""
    if mode == "lowrank":
        return ATTACK_RESTARTS, attack_iters, "ascent"
    if nodes <= POLISH_LIMIT:
        return FREE_STARTS, FREE_STEPS, "adam"
    return FREE_RESTARTS, FREE_ITERS, "ascent"


#: Largest graph for the direct operator search of a linear model's free-input attack.
LINEAR_SEARCH_LIMIT = 400


def linear_free_attack(run: Run, eps: float, rho: float, seed: int = 0) -> float | None:
    """For a model that is one linear bank (one layer, no nonlinearity after
    it, readout none or per node, biases cancelling in the change), the
    strongest change with a free input of norm ``rho`` is ``rho ||H_W(S_hat)
    - H_W(S)||_2`` for the bank with taps ``c_k W``: searched directly on the
    operator (:func:`stablefilt._search.worst_perturbation`, dense) and
    realised by its top right singular vector scaled to ``rho``. None for
    other models, or above ``LINEAR_SEARCH_LIMIT`` nodes."""
    from ._search import worst_perturbation

    spec = run.spec
    linear = spec.depth == 1 and (spec.nonlinearity == "none" or not spec.final_nonlinearity)
    if not linear or spec.readout not in ("none", "node") or run.op.nodes > LINEAR_SEARCH_LIMIT:
        return None
    taps = np.asarray(run.params["layers"][0]["taps"], dtype=np.float64)
    if spec.readout == "node":
        taps = np.einsum("kfg,gc->kfc", taps, np.asarray(run.params["readout"]["weight"], dtype=np.float64))
    found = worst_perturbation(run.op.dense(), taps, spec.basis, eps, restarts=8, iters=40, seed=seed)
    return float(found.change * rho)


def skipped_kinds(run: Run, kinds, have_vectors: bool | None = None) -> list[tuple[str, str]]:
    """``[(kind, reason)]`` for the ``kinds`` that cannot apply to the run
    (:func:`inapplicable`); ``have_vectors``: whether the eigenvectors of
    ``S`` are computed (default: the graph is within the dense limit of the
    spectral interval)."""
    if have_vectors is None:
        from ._interval import EXACT_LIMIT

        have_vectors = run.op.nodes <= EXACT_LIMIT
    out = []
    for k in kinds:
        why = inapplicable(run, k, have_vectors)
        if why is not None:
            out.append((k, why))
    return out


def _stress_rows(run, eps_list, kinds, samples, attack_signals, seed, attack_iters, progress, spectrum, eig, pb,
                 attack_kind="auto"):
    constants = run_constants(run, spectrum)
    iv, lam, vecs, rho = spectrum.interval, spectrum.eigenvalues, spectrum.eigenvectors, spectrum.rho
    x = np.asarray(run.test_x, dtype=np.float64)
    y = run.test_y
    task = run.manifest.get("task", "classify")
    s = run.op.matrix
    y0 = forward_np(run.params, s, x, run.spec)
    clean = _metric(y0, y, task)
    rows = []
    cache = {}
    memo = InputMemo()  # the bounds' eps-free parts, shared by every size

    def input_bound(e_used, refine=0):
        """Input-specific bounds of the test signals at ``e_used`` (cached);
        the ``refine`` largest refined for their own inputs."""
        key = (round(float(e_used), 15), refine)
        if key not in cache:
            cache[key] = certify_inputs(run.params, run.spec, s, iv, x, e_used, lam, vecs, constants, refine=refine,
                                        memo=memo)
        return cache[key]

    for eps in eps_list:
        bound = model_bounds(constants, eps, rho=rho)
        c_op = bound.certified
        c_in = input_bound(eps)
        for kind in kinds:
            changes, metrics, viol, covered, dists = [], [], 0, 0, []
            for k in range(samples):
                op_hat, dist, perm = _draw(run, kind, eps, seed + 1000 * k + 17, k, eig)
                pb.update(1)
                xin = x if perm is None else x[:, perm, :]
                out = forward_np(run.params, op_hat.matrix, xin, run.spec)
                if perm is not None and run.spec.readout in ("node", "none"):
                    inv = np.argsort(perm)
                    out = out[:, inv]
                diff = np.sqrt(np.sum((out - y0).reshape(len(x), -1) ** 2, axis=1))
                metrics.append(_metric(out, y, task))
                changes.append(diff)
                if dist is None:
                    continue
                covered += 1
                dists.append(dist)
                per = input_bound(dist)
                opb = model_bounds(constants, dist, rho=rho).certified if dist != eps else c_op
                viol += int(np.sum(diff > per)) + int(np.sum(diff > opb))
            ch = np.concatenate(changes)
            row = StressRow(eps=eps, kind=kind, certified=c_op, published=bound.published,
                            input_certified_max=float(c_in.max()), samples=samples, covered=covered,
                            mean_change=float(ch.mean()), max_change=float(ch.max()),
                            ratio=(c_op / float(ch.max())) if ch.max() > 0 else None,
                            metric_perturbed=float(np.mean(metrics)), metric_clean=clean, violations=viol,
                            distance_max=max(dists) if dists else None)
            rows.append(row)
            if progress:
                progress(f"eps {eps:g} {kind}: max change {row.max_change:.4g}, certified {c_op:.4g}, "
                         f"violations {viol}")
        if attack_signals:
            mode = _attack_mode(run, attack_kind)
            t_att = time.perf_counter()
            best, best_c = None, None
            order = np.argsort(-c_in)[:attack_signals]
            # The attacked signals' bounds, refined for their own inputs (theory s.9.5).
            c_att = certify_inputs(run.params, run.spec, s, iv, x[order], eps, lam, vecs, constants,
                                   refine=len(order))
            for i, c_i in zip(order, c_att):
                r = attack(run.params, run.spec, run.op, x[i], eps, mode=mode, iters=attack_iters, seed=seed,
                           restarts=ATTACK_RESTARTS, polish=True, progress=pb.update)
                # The largest change / certificate, multiplied out: a certificate can be 0.
                if best is None or r.change * best_c > best.change * float(c_i):
                    best, best_c = r, float(c_i)
            pool = np.argsort(-c_in)[:FREE_INPUTS]
            f_restarts, f_iters, f_search = free_budget(mode, attack_iters, run.op.nodes)
            free = attack(run.params, run.spec, run.op, x[pool[0]], eps, mode=mode, free_input=True, rho=rho,
                          iters=f_iters, seed=seed, restarts=f_restarts, inputs=x[pool[1:]], polish=True,
                          search=f_search, progress=pb.update).change
            linear = linear_free_attack(run, eps, rho, seed)
            free = free if linear is None else max(free, linear)
            t_att = time.perf_counter() - t_att
            viol = int(best.change > best_c) + int(free > c_op)
            worst = max(best.change, free)
            row = StressRow(eps=eps, kind="attack", certified=c_op, published=bound.published,
                            input_certified_max=float(c_in.max()), samples=1, covered=1,
                            mean_change=best.change, max_change=worst, ratio=_ratio(c_op, worst),
                            metric_perturbed=None, metric_clean=clean, violations=viol, distance_max=eps,
                            attack_change=best.change, attack_certified=best_c,
                            attack_ratio=_ratio(best_c, best.change), attack_free_change=free,
                            attack_free_ratio=_ratio(c_op, free), attack_mode=mode,
                            attack_seconds=t_att)
            rows.append(row)
            if progress:
                progress(f"eps {eps:g} attack ({mode}): {best.change:.4g} <= true worst case <= {best_c:.4g} "
                         f"(input-specific, ratio {_g(row.attack_ratio)}); free input {free:.4g} <= "
                         f"{c_op:.4g} (ratio {_g(row.attack_free_ratio)}); {t_att:.1f} s")
    return rows
