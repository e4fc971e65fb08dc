"""The ``stablefilt`` command line.

Bad input is one sentence on stderr and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys

import numpy as np

from ._errors import StablefiltError, TrainingDiverged


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one sentence, status 2
        self.exit(2, f"{self.prog}: {message}.\n")


class UsageError(StablefiltError):
    """A command-line option is malformed."""


def _eps_list(values) -> list[float]:
    out = []
    for v in values or []:
        try:
            e = float(v)
        except ValueError:
            raise UsageError(f"--eps {v!r} is not a number") from None
        if not math.isfinite(e) or e < 0:
            raise UsageError(f"--eps must be a finite number >= 0; got {v}")
        out.append(e)
    return out


def _fmt(x) -> str:
    if x is None:
        return "-"
    return f"{x:.4g}"


def _table(rows, header) -> str:
    cells = [header] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _print_certificate(cert, out=None) -> None:
    out = out or sys.stdout  # looked up at call time: callers may redirect sys.stdout
    d = cert.as_dict()
    c = cert.constants
    print(f"graph: {cert.nodes} nodes; spectral interval [{cert.interval.lower:.6g}, {cert.interval.upper:.6g}] "
          f"({cert.interval.method})", file=out)
    b = cert.basis
    print(f"filter basis: {b.kind}" + (f" on [{b.interval[0]:g}, {b.interval[1]:g}]" if b.interval else ""), file=out)

    def big(x):
        import numpy as np

        return float(np.max(x)) if x is not None else None

    print("constants (max over filters): "
          f"integral Lipschitz {_fmt(big(c.integral_lipschitz))}, Lipschitz {_fmt(big(c.lipschitz))}, "
          f"sup |h| {_fmt(big(c.sup))}, pairwise {_fmt(big(c.pairwise))}, kernel (interval) {_fmt(big(c.kernel))}, "
          f"kernel (eigenvalues) {_fmt(big(c.kernel_spectrum))}", file=out)
    rows = [[_fmt(x["eps"]), _fmt(x["certified"]), _fmt(x["first_order"]), _fmt(x["remainder"]),
             _fmt(x["published"]), _fmt(x["aligned"]), _fmt(x["lower"]),
             _fmt(x["certified"] / x["lower"]) if x["lower"] else "-"] for x in d["bounds"]]
    print(_table(rows, ["eps", "certified", "first-order", "remainder", "published", "aligned", "lower",
                        "cert/lower"]), file=out)
    print("assumptions:", file=out)
    for k, v in d["assumptions"].items():
        print(f"  {k}: {v}", file=out)
    print("A certificate covers only the stated perturbation model and eps; it is no assurance of real-world safety.",
          file=out)


def cmd_bound(args) -> int:
    from ._certify import certify_filter
    from ._io import load_filter, load_graph

    eps = _eps_list(args.eps)
    if not eps:
        raise UsageError("give at least one --eps")
    if args.delta is not None and not (0 <= args.delta <= 8):
        raise UsageError(f"--delta must lie in [0, 8]; got {args.delta}")
    op = load_graph(args.graph, args.shift)
    taps, basis = load_filter(args.filter)
    cert = certify_filter(op, taps, basis, eps, delta=8.0 if args.delta is None else args.delta)
    if args.json:
        json.dump(cert.as_dict(), sys.stdout)
        sys.stdout.write("\n")
    else:
        _print_certificate(cert)
    return 0


def cmd_train(args) -> int:
    from ._config import load_config
    from ._train import train

    config = load_config(args.config)
    if args.epochs is not None and args.epochs < 1:
        raise UsageError(f"--epochs must be at least 1; got {args.epochs}")
    if args.seed is not None and args.seed < 0:
        raise UsageError(f"--seed must be non-negative; got {args.seed}")
    out = args.out or os.path.join("runs", config.name)
    summary = train(config, out, epochs=args.epochs, seed=args.seed, resume=args.resume, force=args.force,
                    progress=lambda m: print(m, flush=True))
    m = summary["metric"]
    cert = summary["certificate"]["certified"]
    print(f"run written to {out}: test {m} {summary['metrics'][f'test_{m}']:.4f}; certified "
          + ", ".join(f"{v:.4g} at eps {k}" for k, v in cert.items())
          + f" (inputs with ||x|| <= {summary['certificate']['rho']:.4g})")
    return 0


def certify_run(run, eps_list):
    """Float64 certificate of a run: over the eigenvalues when the graph is
    small enough to decompose, else over its interval; plus the
    input-specific bound on the run's test signals."""
    from ._interval import spectral_interval
    from ._modelcert import certify_inputs, certify_model

    iv = spectral_interval(run.op)
    lam = iv.eigenvalues
    vecs = None
    if lam is not None:
        lam, vecs = np.linalg.eigh(run.op.dense())
    rho = float(run.manifest.get("rho") or np.max(np.linalg.norm(run.test_x.reshape(len(run.test_x), -1), axis=1)))
    cert = certify_model(run.params, run.spec, iv, run.op.nodes, eps_list, rho=rho, eigenvalues=lam)
    inputs = {}
    for e in eps_list:
        per = certify_inputs(run.params, run.spec, run.op.matrix, iv, run.test_x, e, lam, vecs)
        inputs[f"{e:g}"] = float(per.max())
    return cert, iv, inputs


def cmd_certify(args) -> int:
    from ._train import open_run

    run = open_run(args.run)
    eps = _eps_list(args.eps) or [float(e) for e in run.config["certify"]["eps"]]
    cert, iv, inputs = certify_run(run, eps)
    if args.json:
        d = cert.as_dict()
        d.update({"run": args.run, "nodes": run.op.nodes, "interval": [iv.lower, iv.upper],
                  "interval_method": iv.method, "input_specific_test_max": inputs})
        json.dump(d, sys.stdout)
        sys.stdout.write("\n")
        return 0
    print(f"run {args.run}: {run.op.nodes} nodes, spectral interval [{iv.lower:.6g}, {iv.upper:.6g}] ({iv.method}), "
          f"model {list(run.spec.features)} with K = {run.spec.taps} ({run.spec.basis.kind})")
    rows = [[str(i + 1), _fmt(lr.integral_lipschitz), _fmt(lr.kernel), _fmt(lr.sup)]
            + [_fmt(lr.change[f"{e:g}"]) for e in eps] for i, lr in enumerate(cert.layers)]
    print(_table(rows, ["layer", "integral Lipschitz", "kernel", "sup ||H||"] + [f"change@{e:g}" for e in eps]))
    rows = [[f"{e:g}", _fmt(cert.certified[f"{e:g}"]), _fmt(cert.per_unit[f"{e:g}"]), _fmt(inputs[f"{e:g}"]),
             _fmt(cert.published[f"{e:g}"])] for e in eps]
    print(_table(rows, ["eps", "certified", "per unit eps", "input-specific (test max)", "published"]))
    print("assumptions:")
    for k, v in cert.assumptions.items():
        print(f"  {k}: {v}")
    print("A certificate covers only the stated perturbation model and eps; it is no assurance of real-world safety.")
    return 0


def compare_rows(paths) -> list[dict]:
    from ._runs import read_json

    rows = []
    for p in paths:
        if not os.path.isdir(p):
            raise UsageError(f"run directory {p!r} does not exist")
        s = read_json(os.path.join(p, "summary.json"), "run summary")
        try:
            m = s["metric"]
            cert = s["certificate"]
            rows.append({
                "run": p,
                "name": s.get("name"),
                "penalty_mode": s["penalty"]["mode"],
                "penalty_weight": s["penalty"]["weight"],
                "model": s["model"],
                "metric": m,
                f"test_{m}": s["metrics"][f"test_{m}"],
                "layers": [{"integral_lipschitz": lr["integral_lipschitz"], "kernel": lr["kernel"], "sup": lr["sup"]}
                           for lr in cert["layers"]],
                "certified": cert["certified"],
                "published": cert["published"],
                "rho": cert["rho"],
            })
        except (KeyError, TypeError):
            from ._errors import RunError

            raise RunError(f"run summary in {p!r} lacks the fields compare needs; is it from this version?") from None
    first = lambda r: min(r["certified"].items(), key=lambda kv: float(kv[0]))[1]  # noqa: E731
    rows.sort(key=lambda r: (first(r), -r.get("test_acc", 0.0), r.get("test_rmse", 0.0)))
    return rows


def cmd_compare(args) -> int:
    rows = compare_rows(args.runs)
    csv_file = None
    if args.csv:
        # Opened (exclusively) before anything is printed, so a bad path is
        # one error with nothing on stdout, and no existing file is touched.
        try:
            csv_file = open(args.csv, "x", newline="")
        except FileExistsError:
            raise UsageError(f"--csv {args.csv!r} already exists; choose a new file name") from None
        except OSError as exc:
            raise UsageError(f"--csv {args.csv!r} cannot be created ({exc.strerror or type(exc).__name__}); "
                             "give a new file in an existing, writable folder") from None
    eps = sorted({k for r in rows for k in r["certified"]}, key=float)
    depth = max(len(r["layers"]) for r in rows)
    header = ["run", "penalty", "test metric"] + [f"IL layer {i + 1}" for i in range(depth)]
    header += [f"certified@{e}" for e in eps] + [f"published@{e}" for e in eps]
    table = []
    for r in rows:
        m = r["metric"]
        il = [_fmt(lr["integral_lipschitz"]) for lr in r["layers"]]
        w = r["penalty_weight"]
        pen = "none" if (max(w) if isinstance(w, list) else w) == 0 else f"{r['penalty_mode']} x {w}"
        line = [r["name"] or r["run"], pen, f"{m} {r[f'test_{m}']:.4f}"]
        line += il + ["-"] * (depth - len(il))
        line += [_fmt(r["certified"].get(e)) for e in eps] + [_fmt(r["published"].get(e)) for e in eps]
        table.append(line)
    if args.json:
        json.dump(rows, sys.stdout)
        sys.stdout.write("\n")
    else:
        print(_table(table, header))
    if csv_file is not None:
        import csv

        with csv_file as fh:
            w = csv.writer(fh)
            w.writerow(header)
            w.writerows(table)
    return 0


def cmd_distance(args) -> int:
    from ._distance import distance
    from ._io import load_graph

    a = load_graph(args.graph_a, args.shift)
    b = load_graph(args.graph_b, args.shift)
    d = distance(a, b, align_nodes=args.align)
    out = d.as_dict()
    out.update({"nodes": a.nodes, "graph_a": args.graph_a, "graph_b": args.graph_b})
    if args.json:
        json.dump(out, sys.stdout)
        sys.stdout.write("\n")
        return 0
    print(f"{args.graph_a} -> {args.graph_b}: {a.nodes} nodes" + (", nodes aligned by quadratic assignment" if args.align else ""))
    bound = " (an upper bound)" if out["upper_bound"] else ""
    print(f"  relative distance ||E||_2: {_fmt(d.relative)}{bound}")
    print(f"  residual ||S E + E S - (S_hat - S)||_2: {_fmt(d.residual)} -> "
          + ("expressible as a relative perturbation" if d.expressible else
             "NOT expressible as a relative perturbation; the relative distance covers only part of the change"))
    if d.singular_pairs:
        print(f"  {d.singular_pairs} eigenvalue pairs with lam_i + lam_j = 0: E is not determined there (set to 0)")
    print(f"  eigenvector misalignment delta: {_fmt(d.delta)}")
    print(f"  additive distance ||S_hat - S||_2: {_fmt(d.additive)}")
    return 0


def cmd_stress(args) -> int:
    from ._stress import KINDS, stress
    from ._train import open_run

    kinds = [k.strip() for k in args.kinds.split(",") if k.strip()]
    bad = [k for k in kinds if k not in KINDS]
    if bad or not kinds:
        raise UsageError(f"--kinds takes a comma-separated list of {', '.join(KINDS)}; got {args.kinds!r}")
    if args.samples < 1:
        raise UsageError(f"--samples must be at least 1; got {args.samples}")
    run = open_run(args.run)
    eps = _eps_list(args.eps) or [float(e) for e in run.config["certify"]["eps"]]
    if any(e <= 0 for e in eps):
        raise UsageError("--eps must be > 0 for a stress test")
    show = None if args.json else (lambda m: print(m, flush=True))
    rows = stress(run, eps, kinds=kinds, samples=args.samples, attack_signals=2 if args.attack else 0, progress=show)
    violations = sum(r.violations for r in rows)
    if args.json:
        import dataclasses

        json.dump({"run": args.run, "nodes": run.op.nodes, "rho": run.manifest.get("rho"),
                   "rows": [dataclasses.asdict(r) for r in rows], "violations": violations}, sys.stdout)
        sys.stdout.write("\n")
    else:
        m = "acc" if run.manifest.get("task", "classify") == "classify" else "rmse"
        table = [[_fmt(r.eps), r.kind, f"{r.covered}/{r.samples}", _fmt(r.certified), _fmt(r.published),
                  _fmt(r.mean_change), _fmt(r.max_change), _fmt(r.ratio),
                  "-" if r.kind == "attack" else f"{r.metric_perturbed:.4f}", str(r.violations)] for r in rows]
        print(_table(table, ["eps", "kind", "covered", "certified", "published", "mean change", "max change",
                             "cert/max", f"test {m}", "violations"]))
        print(f"clean test {m}: {rows[0].metric_clean:.4f}; certified bounds hold for inputs with "
              f"||x||_F <= {run.manifest.get('rho'):.4g}")
        for r in rows:
            if r.kind == "attack":
                print(f"eps {r.eps:g}: attack {r.attack_change:.4g} <= true worst case <= {r.attack_certified:.4g} "
                      f"(input-specific; ratio {r.attack_ratio:.3g}); free input {r.attack_free_change:.4g} <= "
                      f"{r.certified:.4g} (ratio {r.attack_free_ratio:.3g})")
    if violations:
        print(f"stablefilt stress: SOUNDNESS FAILURE: {violations} measured changes exceed their certificate.",
              file=sys.stderr)
        return 3
    return 0


def cmd_demo(args) -> int:
    from .demo import run_demo

    if args.epochs is not None and args.epochs < 1:
        raise UsageError(f"--epochs must be at least 1; got {args.epochs}")
    if args.out and os.path.exists(args.out) and not os.path.isdir(args.out):
        raise UsageError(f"--out {args.out!r} is a file; expected a folder for the demo's runs")
    return run_demo(args.out, args.epochs)


def build_parser() -> argparse.ArgumentParser:
    from ._graph import KINDS

    p = _Parser(prog="stablefilt", description="Stability certificates for graph filters and GNNs.")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    b = sub.add_parser("bound", help="certify a filter on a graph")
    b.add_argument("graph", help=".npy dense matrix, .npz from scipy.sparse.save_npz, or .csv edge list src,dst,weight")
    b.add_argument("filter", help=".npz with taps, basis and (Chebyshev) interval")
    b.add_argument("--eps", action="append", required=True, help="relative perturbation size; repeat for several")
    b.add_argument("--shift", choices=KINDS, default="as-is", help="build this kind of shift operator from the graph")
    b.add_argument("--delta", type=float, default=None, help="eigenvector misalignment for the published bound (default 8)")
    b.add_argument("--json", action="store_true", help="print one JSON object")
    b.set_defaults(func=cmd_bound)
    t = sub.add_parser("train", help="train a model from a TOML config")
    t.add_argument("config")
    t.add_argument("--out", help="run directory (default runs/<name>)")
    t.add_argument("--epochs", type=int)
    t.add_argument("--seed", type=int)
    t.add_argument("--resume", action="store_true", help="continue from the run's last checkpoint")
    t.add_argument("--force", action="store_true", help="write into an existing run directory")
    t.set_defaults(func=cmd_train)
    c = sub.add_parser("certify", help="recompute a trained model's certificate in float64")
    c.add_argument("run")
    c.add_argument("--eps", action="append")
    c.add_argument("--json", action="store_true")
    c.set_defaults(func=cmd_certify)
    m = sub.add_parser("compare", help="compare runs on accuracy and certified bound")
    m.add_argument("runs", nargs="+")
    m.add_argument("--json", action="store_true")
    m.add_argument("--csv", help="also write the table to this new CSV file")
    m.set_defaults(func=cmd_compare)
    g = sub.add_parser("distance", help="relative distance between two graphs")
    g.add_argument("graph_a")
    g.add_argument("graph_b")
    g.add_argument("--align", action="store_true", help="align node order first (the result is an upper bound)")
    g.add_argument("--shift", choices=KINDS, default="as-is")
    g.add_argument("--json", action="store_true")
    g.set_defaults(func=cmd_distance)
    st = sub.add_parser("stress", help="hold a run's certificates against perturbed graphs and attacks")
    st.add_argument("run")
    st.add_argument("--eps", action="append")
    st.add_argument("--samples", type=int, default=5)
    st.add_argument("--attack", action="store_true", help="also search for the worst perturbation")
    st.add_argument("--kinds", default="relative,diagonal,scaling,edges")
    st.add_argument("--json", action="store_true")
    st.set_defaults(func=cmd_stress)
    d = sub.add_parser("demo", help="train the orchard demo with and without the penalty and compare")
    d.add_argument("--out", help="folder for the two runs (default runs/demo-<time>)")
    d.add_argument("--epochs", type=int, help="train each run this many epochs instead of the configs' 40")
    d.set_defaults(func=cmd_demo)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except TrainingDiverged as exc:
        print(f"stablefilt {args.command}: {str(exc).rstrip('.')}.", file=sys.stderr)
        return 1
    except StablefiltError as exc:
        msg = str(exc).rstrip(".")
        print(f"stablefilt {args.command}: {msg}.", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("stablefilt: interrupted.", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
