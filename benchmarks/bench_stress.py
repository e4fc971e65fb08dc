"""Where the time of ``stablefilt stress RUN --attack`` goes, stage by stage,
for one eps.

The stages are those of ``stablefilt._stress.stress_run`` with
``--samples 1 --kinds scaling --attack`` (two attacked test signals):

- ``spectrum``: the certified spectral interval and eigenpairs of ``S``;
- ``constants``: the model's eps-free constants (``run_constants``:
  rebalanced factorisations and composition constants);
- ``input bounds``: the operator-level bound and the input-specific bounds
  of every test signal (``model_bounds``, ``certify_inputs``);
- ``refined bounds``: the attacked signals' bounds refined for their own
  inputs (``certify_inputs(..., refine=2)``);
- ``scaling sample``: one scaling perturbation, every test signal, float64;
- ``fixed attacks``: the attacks on the two signals (projected gradient,
  then the polish of the winner);
- ``free attack``: the free-input block ascent (stablefilt._freeattack);
- ``linear free``: the operator search for one-bank linear models (0 s for
  others).

Reference, measured in the same run: one float64 forward pass of every test
signal on the unperturbed graph (``forward_np``). Repeat 1 runs in a fresh
process state (JAX compiles its functions then, as a ``stress`` command
does); the figures quoted for the later repeats are medians, with their
ratio to the reference. The memoised first-bank search of the attacks is
cleared before every repeat, so each repeat does one eps's full work.

    python benchmarks/bench_stress.py RUN [--eps 1e-3] [--repeats 3] [--blas-threads 1]

``RUN`` is a run directory (``stablefilt train configs/demo.toml`` makes
one). Nothing here asserts a time; every attack figure printed is a change
re-measured in float64, printed beside its certificate.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from _common import blas_threads, machine_note  # noqa: E402


def _stages(run, eps: float):
    from stablefilt import _attack
    from stablefilt._model import forward_np
    from stablefilt._modelcert import certify_inputs, model_bounds
    from stablefilt._perturb import scaling
    from stablefilt._runcert import run_constants, run_spectrum
    from stablefilt._stress import ATTACK_RESTARTS, FREE_INPUTS, free_budget, linear_free_attack

    _attack._FIRST_BANK_CACHE.clear()
    times, out = {}, {}
    x = np.asarray(run.test_x, dtype=np.float64)
    s = run.op.matrix

    def clock(name, fn):
        t = time.perf_counter()
        r = fn()
        times[name] = time.perf_counter() - t
        return r

    clock("reference", lambda: forward_np(run.params, s, x, run.spec))
    spec_ = clock("spectrum", lambda: run_spectrum(run))
    consts = clock("constants", lambda: run_constants(run, spec_))
    lam, vecs, iv, rho = spec_.eigenvalues, spec_.eigenvectors, spec_.interval, spec_.rho

    def bounds():
        b = model_bounds(consts, eps, rho=rho)
        return b, certify_inputs(run.params, run.spec, s, iv, x, eps, lam, vecs, consts)

    bound, c_in = clock("input bounds", bounds)
    order = np.argsort(-c_in)[:2]
    clock("refined bounds", lambda: certify_inputs(run.params, run.spec, s, iv, x[order], eps, lam, vecs, consts,
                                                     refine=len(order)))
    clock("scaling sample", lambda: forward_np(run.params, scaling(run.op, eps, 0).op.matrix, x, run.spec))
    mode = "dense" if run.op.nodes <= _attack.DENSE_ATTACK_LIMIT else "lowrank"
    fixed = clock("fixed attacks", lambda: [_attack.attack(run.params, run.spec, run.op, x[i], eps, mode=mode,
                                                           iters=30, seed=0, restarts=ATTACK_RESTARTS)
                                            for i in order])
    pool = np.argsort(-c_in)[:FREE_INPUTS]
    restarts, iters, search = free_budget(mode, 30, run.op.nodes)
    free = clock("free attack", lambda: _attack.attack(run.params, run.spec, run.op, x[pool[0]], eps, mode=mode,
                                                       free_input=True, rho=rho, iters=iters, seed=0,
                                                       restarts=restarts, inputs=x[pool[1:]], polish=True,
                                                       search=search))
    linear = clock("linear free", lambda: linear_free_attack(run, eps, rho, 0))
    out["certified"] = bound.certified
    out["fixed"] = max(r.change for r in fixed)
    out["free"] = max(free.change, linear or 0.0)
    return times, out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("run")
    ap.add_argument("--eps", type=float, default=1e-3)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--blas-threads", type=int, default=None)
    args = ap.parse_args(argv)
    if args.blas_threads is not None:
        setter = blas_threads()
        if setter is None:
            print("--blas-threads needs threadpoolctl; running with the default threads")
        else:
            setter(args.blas_threads)
    from stablefilt._runs import open_run

    run = open_run(args.run)
    print(f"stress stages, {args.run}: {run.op.nodes} nodes, depth {run.spec.depth}, eps {args.eps:g}")
    print(machine_note())
    rows = []
    for k in range(max(args.repeats, 1)):
        times, out = _stages(run, args.eps)
        rows.append(times)
        print(f"repeat {k + 1}: total {sum(v for n, v in times.items() if n != 'reference'):.1f} s; "
              f"free-input change {out['free']:.4g}, fixed-input {out['fixed']:.4g}, "
              f"operator-level certificate {out['certified']:.4g}")
        if out["free"] > out["certified"]:
            print("FAIL: an attack exceeded the operator-level certificate")
            return 1
    names = [n for n in rows[0] if n != "reference"]
    warm = rows[1:] or rows
    ref = float(np.median([r["reference"] for r in warm]))
    print(f"{'stage':<16}{'repeat 1 (s)':>14}{'median later (s)':>18}{'x reference':>13}")
    for n in names:
        med = float(np.median([r[n] for r in warm]))
        print(f"{n:<16}{rows[0][n]:>14.2f}{med:>18.2f}{med / ref:>13.0f}")
    total = [sum(r[n] for n in names) for r in warm]
    print(f"{'total':<16}{sum(rows[0][n] for n in names):>14.2f}{float(np.median(total)):>18.2f}")
    print(f"reference (float64 forward of {len(run.test_x)} test signals): {ref * 1e3:.1f} ms")
    print(machine_note())
    return 0


if __name__ == "__main__":
    sys.exit(main())
