"""Why the integral-Lipschitz penalty's weight barely matters under Adam.

On the demo (configs/demo.toml) at its initial parameters, for one batch,
this prints per bank: how many tap entries the penalty's gradient reaches
with ``reduce = "max"`` and ``"mean"``; and, for weights 0.05, 0.5, 2.0, the
fraction of tap entries where the weighted penalty gradient outweighs the
task gradient, and the fraction whose sign (Adam's first update is
``-lr sign(g)``, and later ones stay close to a normalised step) differs
from that at weight 0.05. No training; a few seconds.

    python benchmarks/probe_penalty_weight.py [--config configs/demo.toml]
"""

from __future__ import annotations

import argparse
import os
import sys

import jax
import numpy as np

from stablefilt._config import load_config
from stablefilt._model import forward, init_params
from stablefilt._penalty import penalty
from stablefilt._train import Trainer, task_loss

HERE = os.path.dirname(os.path.abspath(__file__))
WEIGHTS = (0.05, 0.5, 2.0)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--config", default=os.path.join(os.path.dirname(HERE), "configs", "demo.toml"))
    args = p.parse_args(argv)
    tr = Trainer.from_config(load_config(args.config))
    params = init_params(tr.spec, tr.seed)
    b = tr.batches(1)[0]
    iv = (tr.interval.lower, tr.interval.upper)

    def task(q):
        return task_loss(forward(q, tr.op, tr.x[b], tr.spec), tr.y[b], tr.data.task)

    g_task = jax.grad(task)(params)["layers"]
    print(f"probe: {args.config}, task loss {float(task(params)):.4f}; load average "
          f"{', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    for reduce in ("max", "mean"):
        def pen(q, reduce=reduce):
            return penalty(q["layers"], iv, basis=tr.spec.basis, reduce=reduce)

        g_pen = jax.grad(pen)(params)["layers"]
        print(f"\nreduce = {reduce!r}: penalty {float(pen(params)):.4f}")
        for i, (gt, gp) in enumerate(zip(g_task, g_pen)):
            t, q = np.asarray(gt["taps"]).ravel(), np.asarray(gp["taps"]).ravel()
            reached = np.mean(q != 0)
            ref = np.sign(t + WEIGHTS[0] * q)
            cells = []
            for w in WEIGHTS:
                dom = np.mean(np.abs(w * q) > np.abs(t))
                flip = np.mean(np.sign(t + w * q) != ref)
                cells.append(f"w {w:g}: penalty outweighs task on {100 * dom:.1f} %, sign differs from w 0.05 on "
                             f"{100 * flip:.1f} %")
            print(f"  bank {i + 1}: penalty gradient reaches {100 * reached:.1f} % of {t.size} tap entries; "
                  + "; ".join(cells))
    return 0


if __name__ == "__main__":
    with jax.default_device(jax.devices("cpu")[0]):
        sys.exit(main())
