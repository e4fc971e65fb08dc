"""The ``stablefilt`` command line.

Bad input is one sentence on stderr and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import warnings

from ._checks import basis_range_warning, check_eps, check_finite
from ._errors import OverflowFigure, StablefiltError, TrainingDiverged
from ._text import (
    against_text,
    compare_csv,
    compare_table,
    distance_text,
    filter_certificate_text,
    perm_text,
    predictions_text,
    progress_printer,
    run_certificate_text,
    stress_text,
    table,
)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one sentence, status 2
        self.exit(2, f"{self.prog}: {message}.\n")


class UsageError(StablefiltError):
    """A command-line option is malformed."""


def _eps_list(values, positive: bool = False) -> list[float]:
    return [check_eps(v, "--eps", positive=positive, error=UsageError) for v in values or []]


def _deployed(kind: str, same_kind: bool):
    """The deployed graph's interval under ``--same-kind``, or None."""
    from ._certify import deployed_interval

    if not same_kind:
        return None
    got = deployed_interval(kind)
    if got is None:
        raise UsageError(f"--same-kind needs an operator whose spectrum is known by construction (laplacian, "
                         f"normalized-laplacian or scaled-adjacency); this one is {kind}")
    return got


@contextlib.contextmanager
def _float64(what: str):
    """Run a float64 computation on user numbers: overflow and round-off
    warnings are silenced (the result is checked for finite figures
    instead), and a computation that breaks down on numbers too large for
    float64 is one sentence, not a traceback."""
    import numpy as np

    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            yield
    except (OverflowError, FloatingPointError, np.linalg.LinAlgError) as exc:
        raise OverflowFigure(f"the {what} cannot be computed in float64 (the computation overflowed: "
                             f"{type(exc).__name__}); the taps, parameters or eps are too large, so rescale them or "
                             "give a smaller eps") from None


def _print_json(obj, what: str) -> None:
    """``obj`` as one line of strict JSON (no NaN, no Infinity: RFC 8259);
    a non-finite figure is an error naming it, checked before printing."""
    check_finite(obj, what)
    sys.stdout.write(json.dumps(obj, allow_nan=False) + "\n")


def _csv_options(args) -> dict:
    """How to read a CSV edge list: the node list, header and columns."""
    from ._edgelist import read_node_list

    cols = [c.strip() for c in args.columns.split(",")] if args.columns else None
    if cols is not None and (len(cols) not in (2, 3) or not all(cols)):
        raise UsageError(f"--columns takes SOURCE,TARGET[,WEIGHT] column names; got {args.columns!r}")
    return {"header": False if args.no_header else "auto", "columns": cols,
            "nodes": read_node_list(args.nodes) if args.nodes else None}


def _add_csv_options(p) -> None:
    p.add_argument("--nodes", help="node list (one ID per line, or a run's nodes.csv): node order for CSV edge lists")
    p.add_argument("--no-header", action="store_true", help="the CSV edge list has no header row")
    p.add_argument("--columns", help="SOURCE,TARGET[,WEIGHT]: column names in the CSV edge list's header")


def cmd_bound(args) -> int:
    from ._certify import certify_filter
    from ._interval import spectral_interval
    from ._io import load_filter, load_graph
    from ._progress import steps

    eps = _eps_list(args.eps)
    if not eps:
        raise UsageError("give at least one --eps")
    if args.delta is not None and not (0 <= args.delta <= 8):
        raise UsageError(f"--delta must lie in [0, 8]; got {args.delta}")
    op = load_graph(args.graph, args.shift, **_csv_options(args))
    taps, basis = load_filter(args.filter)
    with _float64("certificate"), steps("certificate") as (shown, _):
        cert = certify_filter(op, taps, basis, eps, delta=8.0 if args.delta is None else args.delta,
                              deployed=_deployed(op.kind, args.same_kind),
                              interval=spectral_interval(op, progress=shown))
        d = cert.as_dict()
    check_finite(d, "certificate")
    warn = basis_range_warning(cert.interval.lower, cert.interval.upper, basis)
    if args.json:
        _print_json({**d, "warnings": [warn] if warn else []}, "certificate")
    else:
        print(filter_certificate_text(cert))
        if warn:
            print(f"warning: {warn}")
    return 0


def cmd_train(args) -> int:
    from ._config import load_config
    from ._multihost import join_from_env
    from ._train import train

    join_from_env()  # a run over several processes (docs/devices.md); nothing without STABLEFILT_COORDINATOR
    config = load_config(args.config)
    if args.epochs is not None and args.epochs < 1:
        raise UsageError(f"--epochs must be at least 1; got {args.epochs}")
    if args.seed is not None and args.seed < 0:
        raise UsageError(f"--seed must be non-negative; got {args.seed}")
    out = args.out or os.path.join("runs", config.name)
    summary = train(config, out, epochs=args.epochs, seed=args.seed, resume=args.resume, force=args.force,
                    progress=_progress(args))
    m = summary["metric"]
    cert = summary["certificate"]["certified"]
    kept = summary.get("kept_epoch")
    which = f" with the parameters of epoch {kept} of {summary['epochs']} (best validation {m})" if kept else ""
    print(f"run written to {out}: test {m} {summary['metrics'][f'test_{m}']:.4f}{which}; certified "
          + ", ".join(f"{v:.4g} at eps {k}" for k, v in cert.items())
          + f" (inputs with ||x|| <= {summary['certificate']['rho']:.4g})")
    return 0


def _progress(args):
    """The progress printer of ``--log-every N`` and ``--quiet``: the first
    and last epoch and every ``N``-th, and every other message (early stop,
    lock notes); nothing under ``--quiet``."""
    if args.log_every is not None and args.log_every < 1:
        raise UsageError(f"--log-every must be at least 1; got {args.log_every}")
    if args.quiet:
        return lambda m: None
    return progress_printer(args.log_every or args.log_default)


def cmd_certify(args) -> int:
    from ._predictions import run_predictions, signal_bounds_at
    from ._progress import steps
    from ._runcert import certify_run
    from ._runs import open_run

    run = open_run(args.run)
    eps = _eps_list(args.eps) or [float(e) for e in run.config["certify"]["eps"]]
    upper = _eps_list([args.radius_max], positive=True)[0] if args.radius_max is not None else max(0.1, 10 * max(eps))
    _deployed(run.op.kind, args.same_kind)
    new = None
    if args.against is not None:
        from ._against import against, read_new_graph

        new = read_new_graph(run, args.against, args.shift, **_csv_options(args))
    elif args.align or args.shift:
        raise UsageError("--align and --shift go with --against GRAPH")
    with _float64("certificate"), steps("certificate") as (shown, _):
        rc = certify_run(run, eps, same_kind=args.same_kind, progress=shown)
        d = rc.as_dict()
        pc = run_predictions(run, rc, eps, radius_upper=upper)
        d["predictions"] = pc.as_dict()
        if pc.task == "classify":
            d["certified_accuracy"] = d["predictions"]["certified_accuracy"]
        ag = None
        if new is not None:
            ag = against(run, new, signal_bounds_at(run, rc), align=args.align, same_kind=args.same_kind)
            d["against"] = ag.as_dict()
    check_finite(d, "certificate")
    iv = rc.spectrum.interval
    warn = basis_range_warning(iv.lower, iv.upper, run.spec.basis)
    if args.json:
        _print_json({**d, "warnings": [warn] if warn else []}, "certificate")
    else:
        print(run_certificate_text(run, rc, eps))
        print(predictions_text(pc))
        if ag is not None:
            print(against_text(ag, args.against))
        if warn:
            print(f"warning: {warn}")
    if ag is not None and ag.covered and (ag.exceeded or ag.certified_flipped):
        print(f"stablefilt certify: SOUNDNESS FAILURE: on {args.against!r} {ag.exceeded} measured changes exceed "
              f"their certificate and {ag.certified_flipped or 0} certified predictions changed class.", file=sys.stderr)
        return 3
    return 0


def cmd_compare(args) -> int:
    from ._runs import compare_rows

    rows = compare_rows(args.runs, sort=args.sort)
    plot = _front_plot(args, rows) if args.plot else None
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
    check_finite(rows, "comparison")
    header, lines = compare_table(rows)
    if args.json:
        _print_json(rows, "comparison")
    else:
        print(table(lines, header))
    if csv_file is not None:
        import csv

        with csv_file as fh:
            w = csv.writer(fh)
            head, body = compare_csv(rows)
            w.writerow(head)
            w.writerows(body)
    if plot is not None:
        try:
            with open(args.plot, "xb") as fh:
                fh.write(plot)
        except OSError as exc:
            raise UsageError(f"--plot {args.plot!r} cannot be created ({exc.strerror or type(exc).__name__})") from None
    return 0


def _check_new_file(path: str, option: str) -> None:
    """Refuse, before any work, a file that exists or a folder that does not."""
    if os.path.exists(path):
        raise UsageError(f"{option} {path!r} already exists; choose a new file name")
    if not os.path.isdir(os.path.dirname(os.path.abspath(path))):
        raise UsageError(f"{option} {path!r} is in a folder that does not exist; give a new file in an existing folder")


def _write_new(path: str, option: str, text: str) -> None:
    """Write ``text`` to the new file ``path``; never over an existing one."""
    try:
        with open(path, "x", newline="") as fh:
            fh.write(text)
    except FileExistsError:
        raise UsageError(f"{option} {path!r} already exists; choose a new file name") from None
    except OSError as exc:
        raise UsageError(f"{option} {path!r} cannot be created ({exc.strerror or type(exc).__name__})") from None


def _front_plot(args, rows) -> bytes:
    """The front of ``compare --plot``, drawn before anything is printed or
    written; an existing file is refused, as for ``--csv``."""
    from ._report import front_rows

    ext = os.path.splitext(args.plot)[1].lower().lstrip(".")
    if ext not in ("png", "svg", "pdf"):
        raise UsageError(f"--plot {args.plot!r} must end in .png, .svg or .pdf")
    if os.path.exists(args.plot):
        raise UsageError(f"--plot {args.plot!r} already exists; choose a new file name")
    folder = os.path.dirname(os.path.abspath(args.plot))
    if not os.path.isdir(folder):
        raise UsageError(f"--plot {args.plot!r} is in a folder that does not exist; give a new file in an existing folder")
    eps = _eps_list(args.eps, positive=True)
    from . import _figures

    rows, e = front_rows(args.runs, eps[0] if eps else None)
    return _figures.image_bytes(_figures.front_figure(rows, e), ext)


def cmd_distance(args) -> int:
    from ._distance import distance
    from ._graph import shift_operator
    from ._io import read_graph
    from ._progress import steps

    if args.save_perm is not None:
        if not args.align:
            raise UsageError("--save-perm needs --align (without it the node order is the given one)")
        _check_new_file(args.save_perm, "--save-perm")
    opts = _csv_options(args)
    (ma, ids_a), (mb, ids_b) = read_graph(args.graph_a, **opts), read_graph(args.graph_b, **opts)
    a = shift_operator(ma, args.shift, name=f"graph file {args.graph_a!r}")
    b = shift_operator(mb, args.shift, name=f"graph file {args.graph_b!r}")
    with _float64("distance"), steps("distance") as (shown, _):
        d = distance(a, b, align_nodes=args.align, progress=shown)
        out = d.as_dict()
    check_finite(out, "distance")
    out.update({"nodes": a.nodes, "graph_a": args.graph_a, "graph_b": args.graph_b})
    if args.save_perm is not None:
        _write_new(args.save_perm, "--save-perm", perm_text(d.alignment.perm, ids_a, ids_b))
    if args.json:
        _print_json(out, "distance")
        return 0
    print(distance_text(d, args.graph_a, args.graph_b, a.nodes, args.align))
    return 0


def cmd_stress(args) -> int:
    from ._attack import DENSE_ATTACK_LIMIT
    from ._runs import open_run
    from ._stress import KINDS, skipped_kinds, stress_run

    kinds = [k.strip() for k in args.kinds.split(",") if k.strip()]
    bad = [k for k in kinds if k not in KINDS]
    if bad or not kinds:
        raise UsageError(f"--kinds takes a comma-separated list of {', '.join(KINDS)}; got {args.kinds!r}")
    if args.samples < 1:
        raise UsageError(f"--samples must be at least 1; got {args.samples}")
    run = open_run(args.run)
    if run.manifest.get("task") == "regress" and run.spec.outputs > 1:
        # The stress test's metric reads one output; until it reads several,
        # refuse rather than fail half-way.
        raise UsageError(f"run {args.run!r} regresses {run.spec.outputs} outputs; stress measures runs with one "
                         "regression output or classification only (certify works on it)")
    if run.spec.readout == "flat" and "relabel" in kinds:
        raise UsageError(f"run {args.run!r} has a flat readout, whose certificate keeps the node order "
                         "(docs/theory.md s.8.1); leave relabel out of --kinds")
    eps = _eps_list(args.eps, positive=True) or [float(e) for e in run.config["certify"]["eps"]]
    show = None if args.json else (lambda m: print(m, flush=True))
    if args.attack_kind == "dense" and run.op.nodes > DENSE_ATTACK_LIMIT:
        raise UsageError(f"--attack-kind dense needs at most {DENSE_ATTACK_LIMIT} nodes; this run's graph has "
                         f"{run.op.nodes} (use lowrank)")
    skipped = skipped_kinds(run, kinds)
    if len(skipped) == len(kinds) and not args.attack:
        raise UsageError("no kind in --kinds applies to this run: " + "; ".join(f"{k}: {r}" for k, r in skipped))
    for k, why in skipped if show else ():
        show(f"skipped {k}: {why}")
    rows = stress_run(run, eps, kinds=kinds, samples=args.samples, attack_signals=2 if args.attack else 0,
                      attack_kind=args.attack_kind, progress=show)
    violations = sum(r.violations for r in rows)
    result = {"run": args.run, "nodes": run.op.nodes, "rho": run.manifest.get("rho"),
              "rows": [r.as_dict() for r in rows], "violations": violations,
              "skipped": [{"kind": k, "reason": r} for k, r in skipped]}
    if args.save:
        from ._runs import now, set_aside
        from ._store import write_json

        path = os.path.join(args.run, "stress.json")
        set_aside(path)  # an earlier result is kept as stress.json.previous
        write_json(path, {**result, "saved": now(), "samples": args.samples, "kinds": kinds})
    if args.json:
        _print_json(result, "stress result")
    else:
        metric = "acc" if run.manifest.get("task", "classify") == "classify" else "rmse"
        print(stress_text(rows, metric, run.manifest.get("rho")))
    if violations:
        print(f"stablefilt stress: SOUNDNESS FAILURE: {violations} measured changes exceed their certificate.",
              file=sys.stderr)
        return 3
    return 0


def cmd_report(args) -> int:
    from ._report import write_report

    eps = _eps_list(args.eps, positive=True)
    if len(eps) > 1:
        raise UsageError("give at most one --eps (the eps of the front)")
    page, files = write_report(args.runs, args.out, eps[0] if eps else None,
                               progress=lambda m: print(m, flush=True))
    print(f"report written to {page} ({len(files) - 1} figures)")
    return 0


def cmd_sweep(args) -> int:
    from ._config import load_config
    from ._figures import front_points
    from ._grid import grid, parse_vary
    from ._sweep import run_sweep, sweep_rows, write_front
    from ._text import sweep_text

    if args.jobs < 1:
        raise UsageError(f"--jobs must be at least 1; got {args.jobs}")
    if args.epochs is not None and args.epochs < 1:
        raise UsageError(f"--epochs must be at least 1; got {args.epochs}")
    config = load_config(args.config)
    varies = [parse_vary(v) for v in args.vary]
    settings = grid(config, varies)
    out = args.out or os.path.join("runs", f"sweep-{config.name}")
    record = run_sweep(settings, out, epochs=args.epochs, jobs=args.jobs, scheduler=args.scheduler,
                       limit_threads=not args.no_thread_limits,
                       show_progress=not (args.quiet or args.json) and sys.stderr.isatty(),
                       sources={"config": args.config, "vary": {k: v for k, v in varies}})
    rows, failed, eps = sweep_rows(record)
    figure = write_front(out, rows, eps) if rows else None
    if args.json:
        _print_json(rows + failed, "sweep")
    else:
        points = front_points(rows, eps) if rows else []
        print(sweep_text(rows, failed, points, eps, figure))
    return 1 if failed else 0


def cmd_demo(args) -> int:
    from .demo import run_demo

    if args.epochs is not None and args.epochs < 1:
        raise UsageError(f"--epochs must be at least 1; got {args.epochs}")
    if args.out and os.path.exists(args.out) and not os.path.isdir(args.out):
        raise UsageError(f"--out {args.out!r} is a file; expected a folder for the demo's runs")
    return run_demo(args.out, args.epochs, progress=_progress(args))


def _add_log_options(p, every: int) -> None:
    p.add_argument("--log-every", type=int, default=None, metavar="N",
                   help=f"print every N-th epoch's line, besides the first and last (default {every})")
    p.add_argument("--quiet", action="store_true", help="print no epoch lines, only the final result")
    p.set_defaults(log_default=every)


def build_parser() -> argparse.ArgumentParser:
    from ._graph import KINDS
    from ._version import __version__

    p = _Parser(prog="stablefilt", description="Stability certificates for graph filters and GNNs.")
    p.add_argument("--version", action="version", version=f"stablefilt {__version__}",
                   help="print the version and exit")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    b = sub.add_parser("bound", help="certify a filter on a graph")
    b.add_argument("graph", help=".npy dense matrix, .npz from scipy.sparse.save_npz, or .csv edge list (docs/data.md)")
    b.add_argument("filter", help=".npz with taps, basis and (Chebyshev) interval")
    b.add_argument("--eps", action="append", required=True, help="relative perturbation size; repeat for several")
    b.add_argument("--shift", choices=KINDS, default="as-is", help="build this kind of shift operator from the graph")
    b.add_argument("--delta", type=float, default=None, help="eigenvector misalignment for the published bound (default 8)")
    b.add_argument("--json", action="store_true", help="print one JSON object")
    b.add_argument("--same-kind", action="store_true", help="assume the deployed graph is rebuilt as the same kind of operator, so its spectrum lies in that kind's interval; recorded with the certificate")
    _add_csv_options(b)
    b.set_defaults(func=cmd_bound)
    t = sub.add_parser("train", help="train a model from a TOML config")
    t.add_argument("config", help="TOML config (configs/*.toml, docs/data.md)")
    t.add_argument("--out", help="run directory (default runs/<name>)")
    t.add_argument("--epochs", type=int, help="train this many epochs instead of the config's [train] epochs")
    t.add_argument("--seed", type=int, help="seed for initialisation and batches instead of the config's")
    t.add_argument("--resume", action="store_true", help="continue from the run's last checkpoint")
    t.add_argument("--force", action="store_true", help="write into an existing run directory")
    _add_log_options(t, 1)
    t.set_defaults(func=cmd_train)
    c = sub.add_parser("certify", help="recompute a trained model's certificate in float64")
    c.add_argument("run", help="run directory written by train")
    c.add_argument("--eps", action="append", help="relative perturbation size; repeat for several (default: the config's)")
    c.add_argument("--json", action="store_true", help="print one JSON object")
    c.add_argument("--same-kind", action="store_true", help="assume the deployed graph is rebuilt as the same kind of operator, so its spectrum lies in that kind's interval; recorded with the certificate")
    c.add_argument("--radius-max", type=float, help="largest eps tried for the certified radius of each prediction (default: 0.1, or 10 times the largest --eps if more)")
    c.add_argument("--against", metavar="GRAPH", help="a new version of the graph (.npz, .npy or .csv): measure and certify the model on it")
    c.add_argument("--align", action="store_true", help="with --against: match the new graph's nodes to the training graph's first")
    c.add_argument("--shift", choices=KINDS, help="with --against: build the new graph as this kind of operator (default: the run's)")
    _add_csv_options(c)
    c.add_argument("--quiet", action="store_true", help="show no progress display")
    c.set_defaults(func=cmd_certify)
    m = sub.add_parser("compare", help="compare runs on accuracy and certified bound")
    m.add_argument("runs", nargs="+", help="run directories written by train")
    m.add_argument("--json", action="store_true", help="print one JSON list, one object per run")
    m.add_argument("--csv", help="also write the comparison to this new CSV file (raw full-precision numbers, "
                   "the metric's name in its own column)")
    m.add_argument("--sort", action="store_true", help="order the runs by the certified bound at the smallest eps, "
                   "then by the test metric (default: the order given)")
    m.add_argument("--plot", help="also draw the accuracy-stability front into this new .png, .svg or .pdf file")
    m.add_argument("--eps", action="append", help="eps of the front (default: the smallest eps all runs hold)")
    m.set_defaults(func=cmd_compare)
    g = sub.add_parser("distance", help="relative distance between two graphs")
    g.add_argument("graph_a", help="the first graph S (.npy, .npz or .csv edge list)")
    g.add_argument("graph_b", help="the second graph S_hat, written as S + E S + S E")
    g.add_argument("--align", action="store_true", help="align node order first (the result is an upper bound)")
    g.add_argument("--shift", choices=KINDS, default="as-is", help="build this kind of shift operator from both graphs")
    g.add_argument("--json", action="store_true", help="print one JSON object (with the permutation when aligned)")
    g.add_argument("--save-perm", metavar="FILE", help="with --align: write the permutation to this new CSV file "
                   "(graph_a_index,graph_b_index[,graph_a_id,graph_b_id] per node of graph_a)")
    g.add_argument("--quiet", action="store_true", help="show no progress bar")
    _add_csv_options(g)
    g.set_defaults(func=cmd_distance)
    st = sub.add_parser("stress", help="hold a run's certificates against perturbed graphs and attacks")
    st.add_argument("run", help="run directory written by train")
    st.add_argument("--eps", action="append", help="relative perturbation size; repeat for several (default: the config's)")
    st.add_argument("--samples", type=int, default=5, help="random perturbations per eps and kind (default 5)")
    st.add_argument("--attack", action="store_true", help="also search for the worst perturbation")
    st.add_argument("--attack-kind", choices=("auto", "dense", "diagonal", "lowrank"), default="auto",
                    help="perturbations the attack searches: dense E, diagonal E, or diagonal plus rank 8 "
                    "(default auto: dense up to 2000 nodes, lowrank beyond)")
    st.add_argument("--kinds", default="relative,diagonal,scaling,edges",
                    help="comma-separated kinds of random perturbation (default relative,diagonal,scaling,edges)")
    st.add_argument("--json", action="store_true", help="print one JSON object")
    st.add_argument("--save", action="store_true", help="also write the results to stress.json in the run folder")
    st.add_argument("--quiet", action="store_true", help="show no progress bar")
    st.set_defaults(func=cmd_stress)
    r = sub.add_parser("report", help="draw runs' figures and write one self-contained HTML page")
    r.add_argument("runs", nargs="+", help="run directories written by train")
    r.add_argument("--out", help="folder for report.html and the PNGs (default <first run>/report)")
    r.add_argument("--eps", action="append", help="eps of the front (default: the smallest eps all runs hold)")
    r.set_defaults(func=cmd_report)
    w = sub.add_parser("sweep", help="train a grid of settings of a config, each as its own run, and compare them")
    w.add_argument("config", help="TOML config the settings start from")
    w.add_argument("--vary", action="append", required=True, metavar="KEY=V1,V2,...",
                   help="a dotted config key and its values (TOML values), such as penalty.weight=0,0.5; "
                   "repeat for a grid")
    w.add_argument("--epochs", type=int, help="train each run this many epochs instead of the config's")
    w.add_argument("--jobs", type=int, default=1, help="runs at once on this machine, each its own process (default 1)")
    w.add_argument("--out", help="folder for the runs (default runs/sweep-<name>); a complete run there is skipped, "
                   "an interrupted one resumed")
    w.add_argument("--json", action="store_true", help="print one JSON list, one object per run")
    w.add_argument("--quiet", action="store_true", help="no progress display")
    w.add_argument("--scheduler", metavar="ADDRESS", help="submit the runs to this Dask scheduler (distributed extra); "
                   "--out must be a folder every worker shares")
    w.add_argument("--no-thread-limits", action="store_true",
                   help="let each run use all cores (by default each run process is limited to one thread)")
    w.set_defaults(func=cmd_sweep)
    d = sub.add_parser("demo", help="train the orchard demo with and without the penalty and compare")
    d.add_argument("--out", help="folder for the two runs (default runs/demo-<time>)")
    d.add_argument("--epochs", type=int, help="train each run this many epochs instead of the configs' 40")
    _add_log_options(d, 10)
    d.set_defaults(func=cmd_demo)
    return p


def main(argv=None) -> int:
    """The command line (``argv`` None: ``sys.argv``). The ``stablefilt``
    command and ``python -m stablefilt`` start through
    :func:`stablefilt._launch.main`, which sets malloc's huge pages first."""
    parser = build_parser()
    args = parser.parse_args(argv)
    from ._progress import set_quiet

    set_quiet(getattr(args, "quiet", False))  # --quiet: no progress bars either (set on every call)
    try:
        status = int(args.func(args) or 0)
        sys.stdout.flush()  # a closed pipe shows here, not at exit
        return status
    except BrokenPipeError:
        return _closed_pipe()
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


#: Exit status when the reader of stdout went away (``| head``): 128 + SIGPIPE,
#: what the shell reports for a program the signal ended.
CLOSED_PIPE = 141


def _closed_pipe() -> int:
    """End quietly after the reader closed stdout: point stdout at the null
    device so the interpreter's final flush raises nothing."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # stdout without a file descriptor (captured)
        pass
    return CLOSED_PIPE


if __name__ == "__main__":
    sys.exit(main())
