"""Where the operator-level certificate of a deep model stands, between the
strongest change found on the model and the strongest change of its
gated relaxation.

For each eps, on a run directory:

- ``certified``: the operator-level certificate for every input with
  ``||x||_F <= rho`` (``stablefilt certify``'s, rebalanced constants);
- ``attack``: the strongest change found on the model itself, the
  free-input attack of ``stablefilt stress --attack`` (dense ``E``; the
  Adam search over the relu-smoothed model), a lower bound on the true
  worst case;
- ``gated``: the strongest change found on the *gated relaxation*: every
  nonlinearity replaced by a gate ``D`` in ``[0, 1]`` per node and feature,
  chosen freely (the same gate on the clean and the perturbed path, so no
  unit switches), jointly with ``E`` and ``x``. A relu is the gate ``1[v > 0]``
  its own input sets; letting the gates be any pattern is what a bound that
  composes worst-case activation patterns layer by layer allows. Searched
  by block ascent (an input move to ``rho g / ||g||``, a perturbation move
  to the extreme point ``eps Q sign(Lambda) Q^T`` of the gradient, a gate
  move to ``1[g > 0]``; each kept only when the squared change grows; the
  objective is convex in ``x`` and in each gate for the others fixed),
  JAX in float64.

Read: ``gated / attack`` is how much the free patterns add over what the
model's own patterns allowed in the search; ``certified / gated`` how far
the certificate stands above even the relaxation. Only runs with relu,
leaky relu or tanh hidden layers, a per-node or no readout, and at most
``MAX_NODES`` nodes (dense ``E``). Nothing here asserts a figure; every
``attack`` figure is re-measured in float64 on an actual perturbation.

    python benchmarks/bench_gates.py RUN [--eps 1e-3 --eps 1e-2] [--starts 8] [--moves 300] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time

import numpy as np
from _common import machine_note

#: Largest graph the dense search runs on.
MAX_NODES = 600


def gated_search(run, eps: float, rho: float, starts: int, moves: int, seed: int = 0) -> float:
    """The largest ``||Y_hat - Y||_F`` found on the gated relaxation (see the module docstring)."""
    import jax
    import jax.numpy as jnp

    from stablefilt._filters import run_filter
    from stablefilt._freeattack import extreme_point

    with jax.enable_x64(True):
        s = jnp.asarray(run.op.dense(), jnp.float64)
        n = s.shape[0]
        p = jax.tree_util.tree_map(lambda a: jnp.asarray(a, jnp.float64), run.params)
        spec = run.spec
        last = spec.depth - 1

        def out(sm, x, gates):
            z = x
            for i, layer in enumerate(p["layers"]):
                z = run_filter(lambda v: sm @ v, layer["taps"], z, spec.basis, xp=jnp)
                if "bias" in layer:
                    z = z + layer["bias"]
                if i < last or spec.final_nonlinearity:
                    z = gates[i] * z
            return z @ p["readout"]["weight"] if spec.readout == "node" else z

        def change(e, x, gates):
            return jnp.sum((out(s + e @ s + s @ e, x, gates) - out(s, x, gates)) ** 2)

        vg = jax.jit(jax.value_and_grad(change, argnums=(0, 1, 2)))
        rng = np.random.default_rng(seed)
        best = 0.0
        widths = spec.features[1:]
        for k in range(starts):
            x = rng.standard_normal((n, spec.features[0]))
            x *= rho / np.linalg.norm(x)
            gates = [np.ones((n, f)) if k % 2 == 0 else (rng.random((n, f)) < 0.5).astype(float) for f in widths]
            e = eps * np.eye(n) if k % 4 < 2 else extreme_point(rng.standard_normal((n, n)), eps)
            val, (ge, gx, gg) = vg(e, x, gates)
            for it in range(moves):
                for t in (1.0, 0.5, 0.25):
                    block = it % 3
                    if block == 0:
                        xn = x + t * (rho * np.asarray(gx) / max(np.linalg.norm(gx), 1e-300) - x)
                        xn *= rho / np.linalg.norm(xn)
                        cand = (e, xn, gates)
                    elif block == 1:
                        cand = (e + t * (extreme_point(np.asarray(ge), eps) - e), x, gates)
                    else:
                        cand = (e, x, [g + t * ((np.asarray(d) > 0).astype(float) - g) for g, d in zip(gates, gg)])
                    v2, grads = vg(*cand)
                    if float(v2) > float(val) * (1 + 1e-9):
                        (e, x, gates), val, (ge, gx, gg) = cand, v2, grads
                        break
            best = max(best, float(np.sqrt(val)))
        return best


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("run")
    ap.add_argument("--eps", type=float, action="append")
    ap.add_argument("--starts", type=int, default=8)
    ap.add_argument("--moves", type=int, default=300)
    ap.add_argument("--json")
    args = ap.parse_args(argv)
    eps_list = args.eps or [1e-3, 1e-2]

    from stablefilt._attack import attack
    from stablefilt._modelcert import model_bounds
    from stablefilt._runcert import run_constants, run_spectrum
    from stablefilt._runs import open_run
    from stablefilt._stress import FREE_INPUTS, free_budget

    run = open_run(args.run)
    spec = run.spec
    if run.op.nodes > MAX_NODES or spec.readout not in ("node", "none") or spec.nonlinearity == "none":
        print(f"bench_gates: needs at most {MAX_NODES} nodes, a per-node or no readout and a nonlinearity.")
        return 2
    sp = run_spectrum(run)
    t0 = time.perf_counter()
    mc = run_constants(run, sp)
    print(f"{args.run}: {spec.depth} layers, N = {run.op.nodes}, rho = {sp.rho:.4g}; constants {time.perf_counter() - t0:.1f} s")
    x = np.asarray(run.test_x, dtype=np.float64)
    pool = np.argsort(-np.linalg.norm(x.reshape(len(x), -1), axis=1))[:FREE_INPUTS]
    rows = []
    for eps in eps_list:
        cert = model_bounds(mc, eps, rho=sp.rho).certified
        t = time.perf_counter()
        restarts, iters, search = free_budget("dense", 30, run.op.nodes)
        found = attack(run.params, spec, run.op, x[pool[0]], eps, mode="dense", free_input=True, rho=sp.rho,
                       iters=iters, restarts=restarts, inputs=x[pool[1:]], polish=True, search=search).change
        t_att = time.perf_counter() - t
        t = time.perf_counter()
        gated = gated_search(run, eps, sp.rho, args.starts, args.moves)
        t_gate = time.perf_counter() - t
        rows.append(dict(eps=eps, certified=cert, attack=found, gated=gated, attack_seconds=t_att,
                         gated_seconds=t_gate))
        print(f"eps {eps:g}: certified {cert:.4g}; attack {found:.4g} ({t_att:.0f} s); gated {gated:.4g} "
              f"({t_gate:.0f} s); gated / attack {gated / found:.2f}, certified / gated {cert / gated:.2f}, "
              f"certified / attack {cert / found:.2f}")
    print(machine_note())
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump({"run": args.run, "rho": sp.rho, "rows": rows}, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
