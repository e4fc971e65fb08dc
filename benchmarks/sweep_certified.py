"""Sweep the weight of the ``certified`` penalty on the demo and report the
certified bound and the test accuracy at each weight.

For each weight, the demo config (``configs/demo.toml``) is trained with
``[penalty] mode = "certified"`` for ``--epochs`` epochs (``stablefilt
train``), then certified (``stablefilt certify RUN --json``); the table
lists the certified bound at eps = 1e-3 and 1e-2 and the test accuracy.
Cost: one short training and one certificate per weight (about two minutes
each on a loaded 2-core machine at the default 15 epochs).

    python benchmarks/sweep_certified.py [--epochs 15] [--weights 0,1e-5,...]
        [--mode certified] [--out runs/sweep]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
WEIGHTS = "0,1e-5,3e-5,1e-4,3e-4,1e-3,3e-3"


def config_text(base: str, mode: str, weight: float, name: str) -> str:
    """The demo config with its ``[penalty]`` table and name replaced."""
    pen = f'[penalty]\nmode = "{mode}"\nweight = {weight!r}\nreduce = "max"\n\n'
    text = re.sub(r"\[penalty\]\n(?:[^\[]*\n)*?(?=\[)", pen, base)
    return re.sub(r'^name = ".*"$', f'name = "{name}"', text, flags=re.M)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--epochs", type=int, default=15, help="epochs per run (default 15)")
    p.add_argument("--weights", default=WEIGHTS, help=f"comma-separated weights (default {WEIGHTS})")
    p.add_argument("--mode", default="certified", help="penalty mode (default certified)")
    p.add_argument("--config", default=os.path.join(ROOT, "configs", "demo.toml"))
    p.add_argument("--out", default=os.path.join("runs", "sweep"), help="folder for the runs (default runs/sweep)")
    args = p.parse_args(argv)
    weights = [float(w) for w in args.weights.split(",") if w.strip()]
    with open(args.config, encoding="utf-8") as fh:
        base = fh.read()
    os.makedirs(args.out, exist_ok=True)
    env = dict(os.environ)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")  # threaded BLAS spins on a busy shared machine
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [ROOT, env.get("PYTHONPATH")]))
    cli = [sys.executable, "-m", "stablefilt.cli"]
    print(f"sweep: mode {args.mode}, {args.epochs} epochs, weights {weights}; "
          f"load average {', '.join(f'{x:.2f}' for x in os.getloadavg())}", flush=True)
    rows = []
    for w in weights:
        name = f"{args.mode}-{w:g}"
        cfg = os.path.join(args.out, name + ".toml")
        run = os.path.join(args.out, name)
        with open(cfg, "w", encoding="utf-8") as fh:
            fh.write(config_text(base, args.mode, w, name))
        t0 = time.perf_counter()
        subprocess.run(cli + ["train", cfg, "--out", run, "--epochs", str(args.epochs), "--force", "--quiet"],
                       check=True, env=env)
        out = subprocess.run(cli + ["certify", run, "--json"], check=True, env=env, capture_output=True, text=True)
        cert = json.loads(out.stdout)["certified"]
        with open(os.path.join(run, "summary.json"), encoding="utf-8") as fh:
            acc = json.load(fh)["metrics"]["test_acc"]
        rows.append((w, acc, cert["0.001"], cert["0.01"], time.perf_counter() - t0))
        print(f"weight {w:g}: test accuracy {100 * acc:.2f} %, certified {cert['0.001']:.4g} at 1e-3, "
              f"{cert['0.01']:.4g} at 1e-2 ({rows[-1][4]:.0f} s)", flush=True)
    print(f"\n| {args.mode} weight | test accuracy | certified at eps = 1e-3 | certified at eps = 1e-2 |")
    print("|---|---|---|---|")
    for w, acc, c3, c2, _ in rows:
        print(f"| {w:g} | {100 * acc:.2f} % | {c3:.4g} | {c2:.4g} |")
    nonzero = [r for r in rows if r[0] > 0]
    mono = all(a[2] > b[2] for a, b in zip(nonzero, nonzero[1:]))
    print(f"\ncertified bound at 1e-3 {'decreases' if mono else 'does NOT decrease'} monotonically over the "
          f"nonzero weights; load average {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return 0 if mono else 1


if __name__ == "__main__":
    sys.exit(main())
