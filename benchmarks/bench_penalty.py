"""Cost of the integral-Lipschitz penalty inside a training step.

A training step: a one-layer bank (taps ``(5, 32, 32)``, Chebyshev basis of
``[0, 2]``) on the normalised Laplacian of a random geometric graph (average
degree about 10, RCM order), squared-error loss against random targets,
``jax.value_and_grad``, optax Adam, one ``jax.jit``. The same step with
``loss + w * mean(stablefilt.integral_lipschitz(taps, [0, 2], grid=256))`` is
timed against it, interleaved round by round.

Target (issue 2): the step with the penalty <= 1.05x the step without it at
N >= 10^4. Also printed: the penalty alone and ``stablefilt.kernel_bound``
alone (value and gradient, 32 x 32 bank), and the step with ``kernel_bound``
as the penalty, for reference.

    python benchmarks/bench_penalty.py [--sizes 1e3,1e4,1e5] [--rounds 15]
"""

from __future__ import annotations

import argparse
import sys

import jax
import jax.numpy as jnp
import numpy as np
import optax
from _common import (
    HUGEPAGES_HELP,
    faults_per_call,
    geometric_adjacency,
    interleaved,
    machine_note,
    ms,
    parse_sizes,
    print_summary,
    ratio,
    rerun_with_hugepages,
    spread,
)

import stablefilt as sf

F = 32
K = 5
GRID = 256
WEIGHT = 0.1
TARGET = 1.05
TARGET_FROM = 10_000
INTERVAL = (0.0, 2.0)
BASIS = sf.Basis("chebyshev", INTERVAL)


def il_penalty(taps):
    return jnp.mean(sf.integral_lipschitz(taps, INTERVAL, BASIS, grid=GRID))


def kernel_penalty(taps):
    return jnp.mean(sf.kernel_bound(taps, INTERVAL, BASIS, grid=GRID))


def make_step(opt, penalty):
    """A jitted Adam step; the graph and the data are arguments."""

    def loss(taps, op, x, y):
        err = jnp.mean((sf.apply_filter(op, taps, x, BASIS) - y) ** 2)
        return err if penalty is None else err + WEIGHT * penalty(taps)

    @jax.jit
    def step(taps, state, op, x, y):
        val, grad = jax.value_and_grad(loss)(taps, op, x, y)
        updates, state = opt.update(grad, state, taps)
        return optax.apply_updates(taps, updates), state, val

    return step


def alone(fn, taps, rounds):
    """Median ms of ``value_and_grad(fn)`` for the bank ``taps``."""
    vg = jax.jit(jax.value_and_grad(fn))
    times = interleaved({"x": lambda: vg(taps)[1].block_until_ready()}, rounds)
    return ms(times["x"])


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--sizes", default="1e3,1e4,1e5", help="comma-separated node counts (default 1e3,1e4,1e5)")
    p.add_argument("--rounds", type=int, default=15, help="interleaved rounds per size (default 15)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--malloc-hugepages", action="store_true", help=HUGEPAGES_HELP)
    args = p.parse_args(argv)
    if args.malloc_hugepages:
        rerun_with_hugepages(__file__)
    print(f"bench_penalty: jax {jax.__version__}; {machine_note()}")
    print(f"bank K = {K}, F_in = F_out = {F}, {BASIS.kind} basis of {list(INTERVAL)}, penalty weight {WEIGHT}, "
          f"grid {GRID}; ratios are medians of per-round ratios [quartiles]")

    rng = np.random.default_rng(args.seed)
    taps0 = jnp.asarray(rng.standard_normal((K, F, F)) / np.sqrt(F) * 0.5 ** np.arange(K)[:, None, None],
                        dtype=jnp.float32)
    rounds_alone = max(args.rounds, 21)
    t_il = alone(il_penalty, taps0, rounds_alone)
    t_kb = alone(kernel_penalty, taps0, rounds_alone)
    print(f"\npenalty alone, value and gradient, 32 x 32 bank: integral_lipschitz (grid {GRID}) {t_il:.3f} ms; "
          f"kernel_bound (grid {GRID}) {t_kb:.3f} ms")

    opt = optax.adam(1e-3)
    steps = {"plain": make_step(opt, None), "integral-Lipschitz": make_step(opt, il_penalty),
             "kernel bound": make_step(opt, kernel_penalty)}
    summary = []
    for n in parse_sizes(args.sizes):
        adj = geometric_adjacency(n, 10.0, np.random.default_rng(args.seed + n))
        op, _ = sf.reorder(sf.shift_operator(adj, "normalized-laplacian"))
        jop = sf.jax_operator(op)
        x = jnp.asarray(rng.standard_normal((n, F)), dtype=jnp.float32)
        y = jnp.asarray(rng.standard_normal((n, F)), dtype=jnp.float32)
        state = opt.init(taps0)

        def run(st, state=state, jop=jop, x=x, y=y):
            return st(taps0, state, jop, x, y)[0].block_until_ready()

        methods = {name: (lambda st=st, run=run: run(st)) for name, st in steps.items()}
        times = interleaved(methods, args.rounds)
        r_il, q_il = ratio(times, "integral-Lipschitz", "plain"), spread(times, "integral-Lipschitz", "plain")
        r_kb, q_kb = ratio(times, "kernel bound", "plain"), spread(times, "kernel bound", "plain")
        flt = faults_per_call(methods["plain"])
        if n >= TARGET_FROM:
            mark = f"{'PASS' if r_il <= TARGET else 'MISS'} (target <= {TARGET:.2f}x)"
        else:
            mark = f"(no target below N = {TARGET_FROM})"
        print(f"\nN = {n}: step without penalty {ms(times['plain']):.2f} ms ({flt:.0f} page faults per step), "
              f"{args.rounds} rounds")
        print(f"  with integral-Lipschitz penalty {ms(times['integral-Lipschitz']):.2f} ms = {r_il:.3f}x "
              f"[{q_il[0]:.3f}-{q_il[1]:.3f}]  {mark}")
        print(f"  with kernel-bound penalty       {ms(times['kernel bound']):.2f} ms = {r_kb:.3f}x "
              f"[{q_kb[0]:.3f}-{q_kb[1]:.3f}]  (for reference, no target)")
        summary.append(f"N = {n:>6d}: step {ms(times['plain']):8.2f} ms, with integral-Lipschitz penalty "
                       f"{r_il:.3f}x {mark}; with kernel bound {r_kb:.3f}x")
    print_summary(f"summary (penalty alone: integral_lipschitz {t_il:.3f} ms, kernel_bound {t_kb:.3f} ms)", summary)
    return 0


if __name__ == "__main__":
    sys.exit(main())
