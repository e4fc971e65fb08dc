"""Cost of the ``certified`` penalty inside a training step.

A training step of the demo's model shape (2 layers of 16 features, K = 5,
Chebyshev basis of ``[0, 2]``, relu, per-node readout to 3 classes, biases),
on the normalised Laplacian of a random geometric graph (average degree
about 10, RCM order), a batch of 32 signals, cross-entropy, optax Adam, one
``jax.jit``. The same step with ``loss + w * certified_penalty(params)``
(docs/theory.md s.11; grid 64, the trainer's) is timed against it,
interleaved round by round. The penalty depends on the taps, biases and
readout only, not on N.

Target (issue 11): the step with the penalty <= 1.10x the step without it at
N >= 10^4.

    python benchmarks/bench_certified_penalty.py [--sizes 1e3,1e4] [--rounds 9]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy: threaded BLAS spins on a busy machine

import argparse  # noqa: E402
import sys  # noqa: E402

import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
import optax  # noqa: E402
from _common import geometric_adjacency, interleaved, machine_note, ms, parse_sizes, print_summary, ratio, spread  # noqa: E402

import stablefilt as sf  # noqa: E402
from stablefilt._certpenalty import certified_penalty, certified_setup  # noqa: E402

TARGET = 1.10
TARGET_FROM = 10_000
WEIGHT = 1e-4
BATCH = 32
INTERVAL = (0.0, 2.0)


def make_step(opt, spec, setup):
    def loss(params, op, x, y):
        out = sf.forward(params, op, x, spec)
        task = jnp.mean(optax.softmax_cross_entropy_with_integer_labels(out, y))
        return task if setup is None else task + WEIGHT * certified_penalty(params, setup)

    @jax.jit
    def step(params, state, op, x, y):
        val, grad = jax.value_and_grad(loss)(params, op, x, y)
        updates, state = opt.update(grad, state, params)
        return optax.apply_updates(params, updates), state, val

    return step


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--sizes", default="1e3,1e4", help="comma-separated node counts (default 1e3,1e4)")
    p.add_argument("--rounds", type=int, default=9, help="interleaved rounds per size (default 9)")
    p.add_argument("--seed", type=int, default=0)
    args = p.parse_args(argv)
    print(f"bench_certified_penalty: jax {jax.__version__}; {machine_note()}")
    spec = sf.ModelSpec((1, 16, 16), taps=5, basis=sf.Basis("chebyshev", INTERVAL), readout="node", outputs=3)
    params = sf.init_params(spec, args.seed)
    opt = optax.adam(1e-3)
    rng = np.random.default_rng(args.seed)
    # The penalty alone (value and gradient): independent of N.
    setup0 = certified_setup(spec, INTERVAL, rho=2.0, nodes=1000)
    vg = jax.jit(jax.value_and_grad(lambda q: certified_penalty(q, setup0)))
    alone = interleaved({"penalty": lambda: jax.block_until_ready(vg(params))}, max(args.rounds, 9))
    print(f"certified penalty alone, value and gradient: {ms(alone['penalty']):.2f} ms (median of rounds)")
    summary = []
    for n in parse_sizes(args.sizes):
        adj = geometric_adjacency(n, 10.0, np.random.default_rng(args.seed + n))
        op, _ = sf.reorder(sf.shift_operator(adj, "normalized-laplacian"))
        jop = sf.jax_operator(op)
        setup = certified_setup(spec, INTERVAL, rho=2.0, nodes=n, matrix=op.matrix)
        x = jnp.asarray(rng.standard_normal((BATCH, n, 1)), dtype=jnp.float32)
        y = jnp.asarray(rng.integers(0, 3, (BATCH, n)), dtype=jnp.int32)
        state = opt.init(params)
        steps = {"plain": make_step(opt, spec, None), "certified": make_step(opt, spec, setup)}

        def run(st, state=state, jop=jop, x=x, y=y):
            return jax.block_until_ready(st(params, state, jop, x, y)[0])

        times = interleaved({k: (lambda st=st, run=run: run(st)) for k, st in steps.items()}, args.rounds)
        r, q = ratio(times, "certified", "plain"), spread(times, "certified", "plain")
        mark = (f"{'PASS' if r <= TARGET else 'MISS'} (target <= {TARGET:.2f}x)" if n >= TARGET_FROM
                else f"(no target below N = {TARGET_FROM})")
        line = (f"N = {n:>6d}: step {ms(times['plain']):8.2f} ms, with certified penalty "
                f"{ms(times['certified']):8.2f} ms = {r:.3f}x [{q[0]:.3f}-{q[1]:.3f}] {mark}")
        print(line, flush=True)
        summary.append(line)
    print_summary("summary", summary)
    return 0


if __name__ == "__main__":
    sys.exit(main())
