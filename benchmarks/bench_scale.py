"""Scaling: training epoch, memory, certification and one product's
bandwidth from 10^3 to 10^6 nodes, beside scipy's CSR forward in the same run.

For each N: a random geometric graph of average degree about 10
(``stablefilt._synthetic.geometric_graph``), its normalised Laplacian in
reverse Cuthill-McKee order, and a 2-layer model with ``F = 32`` features
throughout, ``K = 5`` Chebyshev taps on ``[0, 2]``, node readout, float32.

- epoch: ``--signals`` training steps of one signal each (Adam, squared
  error; ``jit`` of value and gradient, compiled before timing), median of
  ``--rounds`` epochs;
- scipy: the reference forward of one bank (``K - 1`` CSR products and the
  taps, ``bench_filter.scipy_forward``) and the JAX bank forward, interleaved,
  as a ratio (epoch / scipy bank forward too); the reference in each round
  is the faster of scipy with numpy's BLAS at its default threads and at one;
- memory: the process's peak resident set (``resource.getrusage``,
  ``ru_maxrss``) after the size ran (sizes run in increasing order, so it is
  the peak of the largest size so far);
- certification: the spectral interval, the filter certificate of the first
  bank (``certify_filter``, eps 1e-3 and 1e-2, without the realised lower
  figure and without the rebalanced joint factorisation, whose optimisation
  took minutes for a 32 x 32 bank) and the model certificate (``certify_model``), wall times;
- one product ``S @ X`` (``X``: ``N x 32``): achieved bandwidth against the
  bytes it must move at least (the CSR arrays, ``X`` read once and ``Y``
  written once), beside a memory copy of the same size measured here.

Sizes above the memory guard (an estimate of the bytes a size needs against
``MemAvailable``) are skipped with a note. Prints a table and writes JSON.

    python benchmarks/bench_scale.py [--sizes 1e3,1e4,1e5] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time

import jax
import jax.numpy as jnp
import numpy as np
import optax
from _common import (
    HUGEPAGES_HELP,
    blas_threads,
    interleaved,
    machine_note,
    ms,
    parse_sizes,
    ratio,
    rerun_with_hugepages,
)
from bench_filter import scipy_forward

import stablefilt as sf
from stablefilt._sparse import shift_product
from stablefilt._synthetic import geometric_graph

F = 32
K = 5
DEGREE = 10.0
BASIS = sf.Basis("chebyshev", (0.0, 2.0))


def available_bytes() -> int | None:
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def needed_bytes(n: int) -> int:
    """A generous estimate: about 40 float32 ``N x F`` arrays (signals,
    activations and gradients of two layers, scipy's and JAX's temporaries)
    plus the graph in a few copies (CSR float64 and float32, COO while
    building, the k-d tree)."""
    return int(40 * n * F * 4 + 12 * n * DEGREE * 16 + 200 * n)


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def _median_time(fn, rounds: int) -> float:
    out = []
    for _ in range(rounds):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return float(np.median(out))


def copy_bandwidth(nbytes: int, rounds: int = 5) -> float:
    """Bytes per second of ``numpy.copyto`` (read + write) on ``nbytes``."""
    a = np.ones(max(nbytes // 8, 1))
    b = np.empty_like(a)
    t = min(_median_time(lambda: np.copyto(b, a), 1) for _ in range(rounds))
    return 2 * a.nbytes / t


def bench_size(n: int, rounds: int, signals: int, seed: int, product_rounds: int) -> dict:
    t0 = time.perf_counter()
    g = geometric_graph(n, DEGREE, seed)
    op, _ = sf.reorder(sf.shift_operator(g.adjacency, "normalized-laplacian"))
    build = time.perf_counter() - t0
    s = op.matrix.astype(np.float32)
    jop = sf.jax_operator(op)
    rng = np.random.default_rng(seed + 1)
    spec = sf.ModelSpec((F, F, F), taps=K, basis=BASIS, nonlinearity="relu", readout="node", outputs=1)
    params = sf.init_params(spec, seed)
    xs = rng.standard_normal((signals, n, F)).astype(np.float32)
    ys = rng.standard_normal((signals, n, 1)).astype(np.float32)
    opt = optax.adam(1e-3)
    state = opt.init(params)

    def loss(p, g_, x, y):
        return jnp.mean((sf.forward(p, g_, x, spec) - y) ** 2)

    @jax.jit
    def step(p, st, g_, x, y):
        val, gr = jax.value_and_grad(loss)(p, g_, x, y)
        upd, st = opt.update(gr, st, p)
        return optax.apply_updates(p, upd), st, val

    xj, yj = jnp.asarray(xs), jnp.asarray(ys)
    t0 = time.perf_counter()
    params, state, _ = step(params, state, jop, xj[:1], yj[:1])
    jax.block_until_ready(params)
    compile_s = time.perf_counter() - t0
    box = {"p": params, "s": state}

    def epoch():
        p, st = box["p"], box["s"]
        for i in range(signals):
            p, st, _ = step(p, st, jop, xj[i:i + 1], yj[i:i + 1])
        jax.block_until_ready(p)
        box["p"], box["s"] = p, st

    epoch_s = _median_time(epoch, rounds)

    # The scipy reference and the JAX bank, interleaved.
    taps = np.asarray(params["layers"][1]["taps"])
    x0 = xs[0]
    tj, x0j = jnp.asarray(taps), jnp.asarray(x0)
    fwd = jax.jit(lambda g_, t, z: sf.apply_filter(g_, t, z, BASIS))
    methods = {"scipy fwd": lambda: scipy_forward(s, taps, x0, BASIS),
               "JAX fwd": lambda: fwd(jop, tj, x0j).block_until_ready()}
    set_blas = blas_threads()
    if set_blas is not None:
        def one_thread():
            set_blas(1)
            try:
                scipy_forward(s, taps, x0, BASIS)
            finally:
                set_blas(None)

        methods["scipy fwd, 1 BLAS thread"] = one_thread
    times = interleaved(methods, product_rounds, samples=2)
    # The reference in each round is the faster scipy configuration (bench_filter).
    times["scipy fwd"] = np.minimum(times["scipy fwd"], times.get("scipy fwd, 1 BLAS thread", np.inf))
    scipy_s = float(np.median(times["scipy fwd"]))

    # One product's bandwidth.
    prod = jax.jit(shift_product)
    prod(jop, x0j).block_until_ready()
    pt = min(_median_time(lambda: prod(jop, x0j).block_until_ready(), 3) for _ in range(3))
    moved = s.nnz * 8 + (n + 1) * 4 + 2 * n * F * 4
    copy = copy_bandwidth(moved)

    # Certification (float64 path).
    t0 = time.perf_counter()
    iv = sf.spectral_interval(op)
    iv_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    sf.certify_filter(op, np.asarray(params["layers"][0]["taps"]), BASIS, [1e-3, 1e-2], interval=iv,
                      use_eigenvalues=False, lower=False, rebalance=False)
    cf_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    sf.certify_model(params, spec, iv, n, [1e-3, 1e-2], rho=1.0)
    cm_s = time.perf_counter() - t0
    return {"nodes": n, "edges": int((s.nnz - np.count_nonzero(s.diagonal())) // 2), "build_s": build,
            "compile_s": compile_s, "epoch_s": epoch_s, "signals_per_epoch": signals,
            "scipy_bank_fwd_ms": 1e3 * scipy_s, "jax_bank_fwd_ms": ms(times["JAX fwd"]),
            "jax_fwd_ratio": ratio(times, "JAX fwd", "scipy fwd"), "epoch_over_scipy_fwd": epoch_s / scipy_s,
            "peak_rss_mb": peak_rss_mb(), "interval_s": iv_s, "certify_filter_s": cf_s, "certify_model_s": cm_s,
            "product_ms": 1e3 * pt, "product_bytes": moved, "product_gb_s": moved / pt / 1e9,
            "copy_gb_s": copy / 1e9, "load": list(os.getloadavg())}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--sizes", default="1e3,1e4,1e5", help="comma-separated node counts (default 1e3,1e4,1e5)")
    p.add_argument("--rounds", type=int, default=3, help="epochs timed per size (default 3)")
    p.add_argument("--signals", type=int, default=4, help="training signals (steps) per epoch (default 4)")
    p.add_argument("--product-rounds", type=int, default=5, help="interleaved rounds against scipy (default 5)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--json", help="write the rows to this JSON file")
    p.add_argument("--malloc-hugepages", action="store_true", help=HUGEPAGES_HELP)
    args = p.parse_args(argv)
    if args.malloc_hugepages:
        rerun_with_hugepages(__file__)
    print(f"bench_scale: jax {jax.__version__} on {jax.devices()[0].platform}; {machine_note()}")
    print(f"random geometric graphs, degree ~{DEGREE:g}, normalised Laplacian in RCM order; 2 layers, F = {F}, "
          f"K = {K}; epoch = {args.signals} training steps of one signal")
    rows = []
    for n in sorted(parse_sizes(args.sizes)):
        avail = available_bytes()
        if avail is not None and needed_bytes(n) > 0.7 * avail:
            print(f"N = {n}: skipped, needs about {needed_bytes(n) / 2**30:.1f} GiB of "
                  f"{avail / 2**30:.1f} GiB available")
            continue
        row = bench_size(n, args.rounds, args.signals, args.seed, args.product_rounds)
        rows.append(row)
        print(f"N = {n}: {row['edges']} edges, built in {row['build_s']:.1f} s, compiled in {row['compile_s']:.1f} s; "
              f"load {row['load'][0]:.2f}; epoch {row['epoch_s']:.3f} s, peak RSS {row['peak_rss_mb']:.0f} MB",
              flush=True)
    head = ["N", "epoch s", "epoch/scipy", "scipy fwd ms", "JAX fwd/scipy", "peak RSS MB", "interval s",
            "cert filter s", "cert model s", "product ms", "GB/s (copy GB/s)"]
    print("\n| " + " | ".join(head) + " |")
    print("|" + "---|" * len(head))
    for r in rows:
        print(f"| {r['nodes']} | {r['epoch_s']:.3f} | {r['epoch_over_scipy_fwd']:.1f}x | {r['scipy_bank_fwd_ms']:.2f} | "
              f"{r['jax_fwd_ratio']:.2f}x | {r['peak_rss_mb']:.0f} | {r['interval_s']:.2f} | "
              f"{r['certify_filter_s']:.2f} | {r['certify_model_s']:.2f} | {r['product_ms']:.2f} | "
              f"{r['product_gb_s']:.1f} ({r['copy_gb_s']:.1f}) |")
    print(f"end: {machine_note()}")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump({"rows": rows, "machine": machine_note()}, fh, indent=1, allow_nan=False)
    return 0


if __name__ == "__main__":
    sys.exit(main())
