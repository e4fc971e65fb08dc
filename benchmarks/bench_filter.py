"""Filter-bank forward and forward+backward on the JAX path against scipy.

A bank with taps ``(K, F_in, F_out) = (5, 32, 32)`` maps ``X`` (``N x 32``,
float32) to ``Y = sum_k p_k(S) X c_k`` by ``K - 1`` sparse products, on the
normalised Laplacian of a random geometric graph (average degree about 10),
nodes in reverse Cuthill-McKee order (``stablefilt.reorder``).

Reference, measured in the same run: scipy CSR (float32) doing the same
forward work, ``K - 1`` sparse products and the taps, written out here
independently of the library. Timed, interleaved round by round:

- ``scipy fwd``: the reference forward, with numpy's BLAS (the taps) at its
  default thread count and, when threadpoolctl is installed, at one thread;
  the faster of the two in each round is the reference;
- ``JAX fwd``: ``jit(stablefilt.apply_filter)``;
- ``JAX fwd+bwd``: ``jit(value_and_grad)`` of ``<Y, G>`` for a fixed ``G``,
  gradient with respect to the taps and ``X``.

Targets: forward <= 1.0x scipy's forward, forward+backward <= 2.0x scipy's
forward; at N >= 10^5 also forward <= 0.6x and forward+backward <= 1.5x.
Also: one product with and without the reordering, and for the monomial bank
the loop form (stablefilt._looped, used above ``LOOP_MIN_ELEMENTS`` without
malloc huge pages) against the same bank written out tap by tap, timed in
the same rounds.

    python benchmarks/bench_filter.py [--sizes 1e4,1e5] [--rounds 15]
"""

from __future__ import annotations

import argparse
import sys
import time

import jax
import jax.numpy as jnp
import numpy as np
from _common import (
    HUGEPAGES_HELP,
    blas_threads,
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
    verdict,
)

import stablefilt as sf
from stablefilt import _filters
from stablefilt._looped import loop_threshold
from stablefilt._sparse import shift_product

F = 32
K = 5
DEGREE = 10.0
FWD_TARGET = 1.0
BWD_TARGET = 2.0
#: The scale issue's targets at N = 10^5 (forward and forward+backward against scipy's forward).
SCALE_FWD = 0.6
SCALE_BWD = 1.5


def scipy_forward(s, taps, x, basis: sf.Basis):
    """``sum_k p_k(S) x c_k`` with scipy's CSR product: ``K - 1`` products,
    Chebyshev by its three-term recurrence on the mapped operator."""
    if basis.kind == "chebyshev":
        a, b = basis.interval
        al, be = 2.0 / (b - a), -(a + b) / (b - a)
        al, be = np.float32(al), np.float32(be)

        def step(z):
            return al * (s @ z) + be * z
    else:
        def step(z):
            return s @ z
    y = x @ taps[0]
    prev, cur = x, step(x)
    y += cur @ taps[1]
    for k in range(2, taps.shape[0]):
        if basis.kind == "chebyshev":
            prev, cur = cur, 2 * step(cur) - prev
        else:
            prev, cur = cur, step(cur)
        y += cur @ taps[k]
    return y


def make_graph(n: int, seed: int):
    rng = np.random.default_rng(seed)
    adj = geometric_adjacency(n, DEGREE, rng)
    op = sf.shift_operator(adj, "normalized-laplacian")
    ordered, _ = sf.reorder(op)
    return op, ordered


def relerr(a, b) -> float:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-30))


def bench_size(n: int, rounds: int, seed: int) -> tuple[list[str], bool]:
    """Time one size; returns summary lines and whether the outputs agreed."""
    t0 = time.perf_counter()
    unordered, op = make_graph(n, seed)
    build = time.perf_counter() - t0
    rng = np.random.default_rng(seed + 1)
    x = rng.standard_normal((n, F)).astype(np.float32)
    cot = rng.standard_normal((n, F)).astype(np.float32)
    taps = (rng.standard_normal((K, F, F)) / np.sqrt(F) * 0.5 ** np.arange(K)[:, None, None]).astype(np.float32)
    s = op.matrix.astype(np.float32)
    s_unordered = unordered.matrix.astype(np.float32)
    jop = sf.jax_operator(op)
    jop_unordered = sf.jax_operator(unordered)
    xj, cotj, tapsj = jnp.asarray(x), jnp.asarray(cot), jnp.asarray(taps)
    degree = (s.nnz - np.count_nonzero(s.diagonal())) / n
    set_blas = blas_threads()
    print(f"\nN = {n}: average degree {degree:.2f}, normalised Laplacian, built and reordered in "
          f"{build:.2f} s; F_in = F_out = {F}, K = {K}, float32, {rounds} rounds")

    ok = True
    lines = []
    bases = {"monomial": sf.Basis(), "chebyshev": sf.Basis("chebyshev", (0.0, 2.0))}
    for bname, basis in bases.items():
        # The graph is an argument of the jitted functions, not a closure.
        fwd = jax.jit(lambda g, t, z, basis=basis: sf.apply_filter(g, t, z, basis))

        def loss(t, z, g, c, basis=basis):
            return jnp.vdot(sf.apply_filter(g, t, z, basis), c)

        vg = jax.jit(jax.value_and_grad(loss, argnums=(0, 1)))

        t0 = time.perf_counter()
        yj = fwd(jop, tapsj, xj).block_until_ready()
        c_fwd = time.perf_counter() - t0
        t0 = time.perf_counter()
        val, (gt, gx) = vg(tapsj, xj, jop, cotj)
        gx.block_until_ready()
        c_bwd = time.perf_counter() - t0

        # Check that both sides do the same work: outputs and gradients
        # against the scipy reference (grad X = sum_k p_k(S) G c_k^T;
        # grad c_k = (p_k(S) X)^T G).
        y = scipy_forward(s, taps, x, basis)
        gx_ref = scipy_forward(s, np.swapaxes(taps, 1, 2), cot, basis)
        eye = np.eye(K, dtype=np.float32)[:, :, None, None] * np.eye(F, dtype=np.float32)
        # p_k(S) X for each k, one column block at a time, from the reference.
        pk = [scipy_forward(s, eye[:, k], x, basis) for k in range(K)]
        gt_ref = np.stack([p.T @ cot for p in pk])
        errs = (relerr(yj, y), relerr(gx, gx_ref), relerr(gt, gt_ref))
        if max(errs) > 1e-4:
            ok = False
            print(f"  MISMATCH ({bname}): relative errors against scipy y {errs[0]:.2e}, grad X {errs[1]:.2e}, "
                  f"grad taps {errs[2]:.2e}; the comparison below is not like for like")
        del pk

        methods = {
            "scipy fwd": lambda basis=basis: scipy_forward(s, taps, x, basis),
            "JAX fwd": lambda fwd=fwd: fwd(jop, tapsj, xj).block_until_ready(),
            "JAX fwd+bwd": lambda vg=vg: vg(tapsj, xj, jop, cotj)[1][1].block_until_ready(),
        }
        if bname == "monomial":
            # The same bank written out tap by tap, as below LOOP_MIN_ELEMENTS
            # (stablefilt._looped): traced with the loop switched off.
            saved = _filters._loop_threshold
            _filters._loop_threshold = lambda: 1 << 62
            try:
                fwd_w = jax.jit(lambda g, t, z, basis=basis: sf.apply_filter(g, t, z, basis))
                vg_w = jax.jit(jax.value_and_grad(loss, argnums=(0, 1)))
                fwd_w(jop, tapsj, xj).block_until_ready()
                vg_w(tapsj, xj, jop, cotj)[1][1].block_until_ready()
            finally:
                _filters._loop_threshold = saved
            methods["JAX fwd, written out"] = lambda fwd_w=fwd_w: fwd_w(jop, tapsj, xj).block_until_ready()
            methods["JAX fwd+bwd, written out"] = lambda vg_w=vg_w: vg_w(tapsj, xj, jop, cotj)[1][1].block_until_ready()
        if set_blas is not None:
            def one_thread(basis=basis):
                set_blas(1)
                try:
                    scipy_forward(s, taps, x, basis)
                finally:
                    set_blas(None)

            methods["scipy fwd, 1 BLAS thread"] = one_thread
        times = interleaved(methods, rounds)
        # The reference in each round is the faster scipy configuration.
        times["scipy"] = np.minimum(times["scipy fwd"], times.get("scipy fwd, 1 BLAS thread", np.inf))
        rf, rb = ratio(times, "JAX fwd", "scipy"), ratio(times, "JAX fwd+bwd", "scipy")
        qf, qb = spread(times, "JAX fwd", "scipy"), spread(times, "JAX fwd+bwd", "scipy")
        blas = ""
        if "scipy fwd, 1 BLAS thread" in times:
            blas = (f" (default BLAS threads {ms(times['scipy fwd']):.2f} ms, "
                    f"1 BLAS thread {ms(times['scipy fwd, 1 BLAS thread']):.2f} ms)")
        print(f"  {bname:9s}  scipy fwd {ms(times['scipy']):8.2f} ms{blas}")
        for name, r, q, lim in (("JAX fwd", rf, qf, FWD_TARGET), ("JAX fwd+bwd", rb, qb, BWD_TARGET)):
            print(f"  {'':9s}  {name:11s} {ms(times[name]):8.2f} ms = {r:.2f}x scipy fwd [{q[0]:.2f}-{q[1]:.2f}]  "
                  f"{verdict(r, lim)} (target <= {lim:.1f}x)")
        if "JAX fwd, written out" in times:
            looped = n * F >= loop_threshold()

            def vs_written(m, times=times):
                q = spread(times, m, m + ", written out")
                return f"{ratio(times, m, m + ', written out'):.2f}x [{q[0]:.2f}-{q[1]:.2f}]"

            print(f"  {'':9s}  {'as a loop' if looped else 'no loop (below the threshold, or malloc huge pages)'} "
                  f"against written out: fwd {vs_written('JAX fwd')}, fwd+bwd {vs_written('JAX fwd+bwd')}; "
                  f"written out: fwd "
                  f"{ratio(times, 'JAX fwd, written out', 'scipy'):.2f}x, fwd+bwd "
                  f"{ratio(times, 'JAX fwd+bwd, written out', 'scipy'):.2f}x scipy fwd")
        if n >= 100_000:
            print(f"  {'':9s}  scale targets at N >= 10^5: fwd {rf:.2f}x {verdict(rf, SCALE_FWD)} (<= {SCALE_FWD}x), "
                  f"fwd+bwd {rb:.2f}x {verdict(rb, SCALE_BWD)} (<= {SCALE_BWD}x)")
        flt = {name: faults_per_call(methods[name]) for name in ("scipy fwd", "JAX fwd", "JAX fwd+bwd")}
        print(f"  {'':9s}  page faults per call: " + ", ".join(f"{k} {v:.0f}" for k, v in flt.items()))
        print(f"  {'':9s}  compile: fwd {c_fwd:.2f} s, fwd+bwd {c_bwd:.2f} s; max relative error vs scipy: "
              f"y {errs[0]:.1e}, grad X {errs[1]:.1e}, grad taps {errs[2]:.1e}")
        lines.append(f"N = {n:>6d} {bname:9s} scipy fwd {ms(times['scipy']):8.2f} ms  JAX fwd {rf:.2f}x "
                     f"{verdict(rf, FWD_TARGET)}  fwd+bwd {rb:.2f}x {verdict(rb, BWD_TARGET)}")

    # Node order: one product, random order (as generated) against RCM.
    prod = jax.jit(shift_product)
    methods = {
        "scipy RCM": lambda: s @ x,
        "scipy random": lambda: s_unordered @ x,
        "JAX RCM": lambda: prod(jop, xj).block_until_ready(),
        "JAX random": lambda: prod(jop_unordered, xj).block_until_ready(),
    }
    times = interleaved(methods, rounds)
    gain_sp, gain_jx = ratio(times, "scipy random", "scipy RCM"), ratio(times, "JAX random", "JAX RCM")
    print(f"  one product S @ X (N x {F}), random node order -> RCM order: "
          f"scipy {ms(times['scipy random']):.2f} -> {ms(times['scipy RCM']):.2f} ms ({gain_sp:.2f}x faster), "
          f"JAX {ms(times['JAX random']):.2f} -> {ms(times['JAX RCM']):.2f} ms ({gain_jx:.2f}x); "
          f"JAX / scipy in RCM order {ratio(times, 'JAX RCM', 'scipy RCM'):.2f}x")
    lines.append(f"N = {n:>6d} one product, RCM speed-up: scipy {gain_sp:.2f}x, JAX {gain_jx:.2f}x")
    return lines, ok


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--sizes", default="1e4,1e5", help="comma-separated node counts (default 1e4,1e5)")
    p.add_argument("--rounds", type=int, default=15, help="interleaved rounds per size (default 15)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--malloc-hugepages", action="store_true", help=HUGEPAGES_HELP)
    args = p.parse_args(argv)
    if args.malloc_hugepages:
        rerun_with_hugepages(__file__)
    print(f"bench_filter: jax {jax.__version__} on {jax.devices()[0].platform}; {machine_note()}")
    print("figures are medians over rounds; ratios are medians of per-round ratios [quartiles]")
    summary, ok = [], True
    for n in parse_sizes(args.sizes):
        lines, good = bench_size(n, args.rounds, args.seed)
        summary += lines
        ok = ok and good
    print_summary("summary (targets: JAX fwd <= 1.0x scipy fwd, JAX fwd+bwd <= 2.0x scipy fwd)", summary)
    if not ok:
        print("MISMATCH: the JAX and scipy results disagreed; see above")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
