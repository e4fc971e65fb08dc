"""Text for people: number formatting, plain tables, certificates and stress
results as printed by the command line and the demo, and the one caution
sentence that goes with every certificate."""

from __future__ import annotations

import numpy as np

#: Printed after every certificate.
CAUTION = "A certificate covers only the stated perturbation model and eps; it is no assurance of real-world safety."


def fmt(x) -> str:
    """A figure to 4 significant digits, or ``-`` for None."""
    if x is None:
        return "-"
    return f"{x:.4g}"


def progress_printer(every: int):
    """A trainer's ``progress`` that prints the first and last epoch lines
    and every ``every``-th, and every other message (early stop, lock notes)."""

    def show(msg: str) -> None:
        words = msg.split()
        if words[:1] == ["epoch"] and len(words) > 1 and "/" in words[1]:
            done, total = (int(v) for v in words[1].split("/"))
            if not (done == 1 or done == total or done % every == 0):
                return
        print(msg, flush=True)

    return show


def interval_ends_text(iv) -> str:
    """How each end of a spectral interval was proved and how long it took."""
    parts = []
    for side, e in iv.ends().items():
        note = f" ({e['note']})" if e.get("note") else ""
        parts.append(f"{side} end by {e['method']} in {e['seconds']:.3g} s{note}")
    return "spectral interval: " + "; ".join(parts)


def table(rows, header) -> str:
    """Right-aligned columns under a header and a rule."""
    cells = [header] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _g3(x) -> str:
    return "-" if x is None else f"{x:.3g}"


def _assumptions(assumptions: dict) -> list[str]:
    return ["assumptions:"] + [f"  {k}: {v}" for k, v in assumptions.items()]


def _big(x):
    return float(np.max(x)) if x is not None else None


def filter_certificate_text(cert) -> str:
    """A filter :class:`~stablefilt._certify.Certificate`: graph, basis,
    constants, the per-eps table, assumptions and the caution."""
    d = cert.as_dict()
    c = cert.constants
    b = cert.basis
    lines = [
        f"graph: {cert.nodes} nodes; spectral interval [{cert.interval.lower:.6g}, {cert.interval.upper:.6g}] "
        f"({cert.interval.method})",
        interval_ends_text(cert.interval),
        f"filter basis: {b.kind}" + (f" on [{b.interval[0]:g}, {b.interval[1]:g}]" if b.interval else ""),
        "constants (max over filters): "
        f"integral Lipschitz {fmt(_big(c.integral_lipschitz))}, Lipschitz {fmt(_big(c.lipschitz))}, "
        f"sup |h| {fmt(_big(c.sup))}, pairwise {fmt(_big(c.pairwise))}, kernel (interval) {fmt(_big(c.kernel))}, "
        f"kernel (eigenvalues) {fmt(_big(c.kernel_spectrum))}",
    ]
    rows = [[fmt(x["eps"]), fmt(x["certified"]), fmt(x["first_order"]), fmt(x["remainder"]),
             fmt(x["published"]), fmt(x["aligned"]), fmt(x["lower"]),
             fmt(x["certified"] / x["lower"]) if x["lower"] else "-"] for x in d["bounds"]]
    lines.append(table(rows, ["eps", "certified", "first-order", "remainder", "published", "aligned", "lower",
                              "cert/lower"]))
    return "\n".join(lines + _assumptions(d["assumptions"]) + [CAUTION])


def run_certificate_text(run, rc, eps_list) -> str:
    """A run's :class:`~stablefilt._runcert.RunCertificate` at ``eps_list``:
    per-layer constants and changes, the per-eps table, assumptions and the
    caution."""
    iv = rc.spectrum.interval
    cert = rc.model
    lines = [f"run {rc.run}: {rc.nodes} nodes, spectral interval [{iv.lower:.6g}, {iv.upper:.6g}] ({iv.method}), "
             f"model {list(run.spec.features)} with K = {run.spec.taps} ({run.spec.basis.kind})",
             interval_ends_text(iv)]
    at = [cert.at(e) for e in eps_list]
    rows = [[str(i + 1), fmt(lc.integral_lipschitz), fmt(lc.kernel), fmt(lc.sup)]
            + [fmt(b.layer_changes[i]) for b in at] for i, lc in enumerate(cert.layers)]
    lines.append(table(rows, ["layer", "integral Lipschitz", "kernel", "sup ||H||"] + [f"change@{e:g}" for e in eps_list]))
    rows = [[f"{e:g}", fmt(b.certified), fmt(b.per_unit), fmt(rc.input_at(e)), fmt(b.published)]
            for e, b in zip(eps_list, at)]
    lines.append(table(rows, ["eps", "certified", "per unit eps", "input-specific (test max)", "published"]))
    lines.append(f"input-specific bounds: {rc.input_method}")
    return "\n".join(lines + _assumptions(cert.assumptions) + [CAUTION])


def compare_table(rows) -> tuple[list[str], list[list[str]]]:
    """``(header, lines)`` of the comparison of runs (rows of
    :func:`~stablefilt._runs.compare_rows`)."""
    eps = sorted({k for r in rows for k in r["certified"]}, key=float)
    depth = max(len(r["layers"]) for r in rows)
    header = ["run", "penalty", "test metric"] + [f"IL layer {i + 1}" for i in range(depth)]
    header += [f"certified@{e}" for e in eps] + [f"published@{e}" for e in eps]
    lines = []
    for r in rows:
        m = r["metric"]
        il = [fmt(lr["integral_lipschitz"]) for lr in r["layers"]]
        w = r["penalty_weight"]
        pen = "none" if (max(w) if isinstance(w, list) else w) == 0 else f"{r['penalty_mode']} x {w}"
        line = [r["name"] or r["run"], pen, f"{m} {r[f'test_{m}']:.4f}"]
        line += il + ["-"] * (depth - len(il))
        line += [fmt(r["certified"].get(e)) for e in eps] + [fmt(r["published"].get(e)) for e in eps]
        lines.append(line)
    return header, lines


def compare_csv(rows) -> tuple[list[str], list[list]]:
    """``(header, lines)`` of the comparison as data for ``compare --csv``:
    the metric's name in its own column and every figure as the raw float
    (written in full precision by :mod:`csv`), empty where a run lacks it."""
    eps = sorted({k for r in rows for k in r["certified"]}, key=float)
    depth = max(len(r["layers"]) for r in rows)
    header = ["run", "name", "penalty_mode", "penalty_weight", "metric", "test_value", "kept_epoch"]
    header += [f"integral_lipschitz_layer_{i + 1}" for i in range(depth)]
    header += [f"certified@{e}" for e in eps] + [f"published@{e}" for e in eps]
    lines = []
    for r in rows:
        m = r["metric"]
        w = r["penalty_weight"]
        il = [lr["integral_lipschitz"] for lr in r["layers"]]
        line = [r["run"], r["name"] or "", r["penalty_mode"], " ".join(map(repr, w)) if isinstance(w, list) else w,
                m, r[f"test_{m}"], "" if r.get("kept_epoch") is None else r["kept_epoch"]]
        line += il + [""] * (depth - len(il))
        line += [r["certified"].get(e, "") for e in eps] + [r["published"].get(e, "") for e in eps]
        lines.append(line)
    return header, lines


def stress_text(rows, metric: str, rho) -> str:
    """The stress table of :func:`~stablefilt._stress.stress_run` rows, the
    clean metric, and one line per attack."""
    body = [[fmt(r.eps), r.kind, f"{r.covered}/{r.samples}", fmt(r.certified), fmt(r.published),
             fmt(r.mean_change), fmt(r.max_change), fmt(r.ratio),
             "-" if r.kind == "attack" else f"{r.metric_perturbed:.4f}", str(r.violations)] for r in rows]
    lines = [table(body, ["eps", "kind", "covered", "certified", "published", "mean change", "max change",
                          "cert/max", f"test {metric}", "violations"]),
             f"clean test {metric}: {rows[0].metric_clean:.4f}; certified bounds hold for inputs with "
             f"||x||_F <= {rho:.4g}"]
    for r in rows:
        if r.kind == "attack":
            lines.append(f"eps {r.eps:g}: attack {r.attack_change:.4g} <= true worst case <= {r.attack_certified:.4g} "
                         f"(input-specific; ratio {_g3(r.attack_ratio)}); free input {r.attack_free_change:.4g} <= "
                         f"{r.certified:.4g} (ratio {_g3(r.attack_free_ratio)})")
    return "\n".join(lines)


def perm_text(perm, ids_a=None, ids_b=None) -> str:
    """The CSV of ``distance --align --save-perm``: per node ``i`` of
    graph_a the node ``perm[i]`` of graph_b matched to it, by index and,
    when both graphs name their nodes (edge lists), by ID."""
    from ._edgelist import _csv_field

    named = ids_a is not None and ids_b is not None
    lines = ["graph_a_index,graph_b_index" + (",graph_a_id,graph_b_id" if named else "")]
    for i, j in enumerate(perm):
        lines.append(f"{i},{int(j)}" + (f",{_csv_field(str(ids_a[i]))},{_csv_field(str(ids_b[int(j)]))}" if named else ""))
    return "\n".join(lines) + "\n"


def distance_text(d, name_a: str, name_b: str, nodes: int, aligned: bool) -> str:
    """A :class:`~stablefilt._distance.Distance` between two graph files."""
    lines = [f"{name_a} (S) -> {name_b} (S_hat): {nodes} nodes"]
    al = d.alignment
    if al is not None:
        lines.append(f"  nodes aligned ({al.start} start): mismatch ||S - P S_hat P^T||_F / ||S||_F "
                     f"{fmt(al.mismatch_before)} in the given order, {fmt(al.mismatch_after)} aligned; the figures "
                     "below are upper bounds on the distance over all node orders (--json lists the permutation)")
    lines += [f"  relative distance ||E||_2 (S_hat = S + E S + S E): {fmt(d.relative)}"
              + (" (an upper bound)" if d.as_dict()["upper_bound"] else ""),
              f"  residual ||S E + E S - (S_hat - S)||_{d.residual_norm}: {fmt(d.residual)} "
              f"({'round-off' if d.method == 'eigenbasis' else 'iterative'} allowance {fmt(d.tolerance)}) -> "
              + ("expressible as a relative perturbation" if d.expressible else
                 "NOT expressible as a relative perturbation; the relative distance covers only part of the change")]
    if d.method == "diagonal":
        lines.append("  found with a diagonal E (S_ij (1 + e_i + e_j)) by sparse least squares, no dense "
                     "eigendecomposition; exact when the residual is within the allowance")
    elif d.method == "minres":
        sv = d.solve
        lines.append(f"  found by MINRES on S E + E S ({sv.get('iterations')} iterations, "
                     f"{'converged' if sv.get('converged') else 'stopped at its budget'}, {sv.get('seconds')} s); "
                     f"||E||_2 is a Lanczos estimate, at most ||E||_F = {fmt(d.relative_upper)}")
    if d.singular_pairs:
        lines.append(f"  {d.singular_pairs} eigenvalue pairs with lam_i + lam_j = 0: E is not determined there (set to 0)")
    if d.amplified:
        p = d.pairs
        lines.append(f"  S is indefinite (eigenvalues {p['eigenvalues'][0]:.4g} to {p['eigenvalues'][1]:.4g}): E = "
                     f"Dt_ij / (lam_i + lam_j) divides by pairs summing to as little as {p['smallest_pair_sum']:.3g} "
                     f"||S||_2, so a change of {p['additive_over_norm']:.3g} ||S||_2 needs a relative E of "
                     f"{fmt(d.relative)}; a shift operator with its spectrum on one side of 0 (laplacian, "
                     "normalized-laplacian) avoids this")
    lines += [f"  eigenvector misalignment delta (eigenvectors of E against those of S, {name_a}; 0 to 8, near 8 for "
              f"a generic E however small): {fmt(d.delta)}",
              f"  additive distance ||S_hat - S||_2: {fmt(d.additive)}"]
    return "\n".join(lines)


def front_text(points, eps: float, metric: str) -> str:
    """The accuracy-stability front as text: the non-dominated runs of
    :func:`~stablefilt._figures.front_points`, smallest bound first."""
    front = sorted((p for p in points if p["front"]), key=lambda p: p["bound"])
    lines = [[p["run"], fmt(p["bound"]), f"{p['metric']:.4f}"] for p in front]
    head = (f"accuracy-stability front at eps {eps:g}: {len(front)} of {len(points)} runs are not beaten on both "
            f"the certified bound and test {metric} by another run")
    return head + "\n" + table(lines, ["run", f"certified@{eps:g}", f"test {metric}"])


def sweep_text(rows, failed, points, eps, figure) -> str:
    """What ``sweep`` prints at the end: the comparison of the complete runs,
    their front (``points`` of :func:`~stablefilt._figures.front_points` at
    ``eps``), the failed runs with their reasons and the figure's path."""
    parts = []
    if rows:
        header, lines = compare_table(rows)
        parts += [table(lines, header), "", front_text(points, eps, rows[0]["metric"])]
    else:
        parts.append("no run of the sweep is complete.")
    if failed:
        parts += ["", f"{len(failed)} run(s) failed or did not finish:"]
        parts += [f"  {f['name']}: {f['failed']}" for f in failed]
    if figure:
        parts += ["", f"front figure written to {figure}"]
    elif rows:
        parts += ["", "(install the report extra, matplotlib, for the front figure)"]
    return "\n".join(parts)


def predictions_text(pc) -> str:
    """A :class:`~stablefilt._predictions.PredictionCertificate`: per eps,
    the certified share and certified accuracy (classify) or the per-node
    output bounds (regress), and the certified radius."""
    what = "node" if pc.per == "node" else "signal"
    lines = [f"predictions: {pc.predictions} test predictions, one per {what}; bound: {pc.bound}"]
    if pc.task == "classify":
        rows = [[f"{e:g}", f"{100 * c:.1f}%", f"{100 * a:.1f}%"]
                for e, c, a in zip(pc.eps, pc.certified, pc.certified_accuracy)]
        lines.append(table(rows, ["eps", "certified (class cannot change)", "certified accuracy"]))
        lines.append(f"accuracy {100 * pc.accuracy:.1f}%; a prediction is certified when its logit margin exceeds "
                     "sqrt(2) times the bound on its signal's output change (docs/theory.md s.10.2)")
        r = pc.radii
        if r is not None:
            q1, q3 = (float(np.quantile(r.radius, q)) for q in (0.25, 0.75))
            lines.append(f"certified radius: median {r.median:.4g} (quartiles {q1:.4g}, {q3:.4g}; "
                         f"{100 * float(np.mean(r.radius >= r.upper)):.1f}% certified up to the largest eps tried, "
                         f"{r.upper:g}); each the largest eps, of {len(r.evaluated) - 1} evaluated, at which the "
                         "prediction's class provably cannot change")
    else:
        rows = [[f"{e:g}", fmt(mx), fmt(md)] for e, mx, md in zip(pc.eps, pc.node_bound_max, pc.node_bound_median)]
        head = ["eps", f"bound on one {what}'s output change (largest)", "(median)"]
        if pc.rms_bound_max:
            rows = [r + [fmt(a), fmt(b)] for r, a, b in zip(rows, pc.rms_bound_max, pc.rms_bound_median)]
            head += ["root mean square over nodes (largest)", "(median)"]
        lines.append(table(rows, head))
    return "\n".join(lines)


def against_text(ag, graph: str) -> str:
    """An :class:`~stablefilt._against.Against`: distance, measured change,
    flips and the certificate, and whether it covers the new graph."""
    d = ag.as_dict()
    lines = [f"against {graph}: relative distance {ag.relative:.4g}"
             + (" after aligning nodes (an upper bound)" if ag.aligned else "")
             + f", residual {ag.residual:.3g} ({'expressible' if ag.expressible else 'not expressible'} "
               "in the relative model)",
             f"  measured output change on the test signals: largest {d['measured_max']:.4g}, mean "
             f"{d['measured_mean']:.4g}; certified at eps {ag.eps:.4g}: largest {fmt(d['certified'])}"]
    if ag.flipped is not None:
        lines.append(f"  predictions whose class changed: {100 * ag.flipped:.2f}%; certified at this eps: "
                     f"{100 * ag.certified_predictions:.1f}% (of which changed: {ag.certified_flipped})")
    lines.append("  covered: the certificate applies to this graph." if ag.covered else f"  not covered: {ag.reason}")
    if ag.exceeded and ag.covered:
        lines.append(f"  SOUNDNESS FAILURE: {ag.exceeded} measured changes exceed their certificate.")
    return "\n".join(lines)
