"""The ``stablefilt`` command line.

Bad input is one sentence on stderr and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import sys

from ._errors import StablefiltError


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


def _print_certificate(cert, out=sys.stdout) -> None:
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
    d = sub.add_parser("demo", help="run the demonstration")
    d.set_defaults(func=cmd_demo)
    return p


def cmd_demo(args) -> int:
    from .demo import run_demo

    return run_demo()


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except StablefiltError as exc:
        msg = str(exc).rstrip(".")
        print(f"stablefilt {args.command}: {msg}.", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("stablefilt: interrupted.", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
