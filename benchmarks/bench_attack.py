"""Cost of one iteration of the adversarial search (``stablefilt._attack``).

Model: a 2-layer GNN, features (1, 16, 16), K = 5 Chebyshev taps on [0, 2],
relu, per-node readout to 3 classes (the demo's shape). Graph: the normalised
Laplacian of a random geometric graph in the unit square (pairs closer than
``r`` joined by ``scipy.spatial.cKDTree``, ``n pi r^2 = 10`` neighbours),
nodes in reverse Cuthill-McKee order as the trainer uses.

One iteration is what ``attack`` does per step: ``_objective_grad`` (forward
on ``S + E S + S E`` and the gradient in ``E`` and ``x``), the normalised
step, and the projection onto the ball: eigenvalue clipping of the dense
``E`` (``N x N``), or entry clipping of the diagonal ``e``. It is called once
to warm up (compilation), then timed.

Reference, measured in the same run and interleaved round by round: one
forward pass of the same model on the unperturbed graph in float64 with
scipy CSR products and numpy (written out here, independently of the
library), and one scipy product ``S @ X`` with ``X`` of shape ``(N, 16)``.

    python benchmarks/bench_attack.py [--quick] [--rounds 15] [--dense-n 1000] [--diagonal-n 100000]
                                      [--blas-threads 1]

``--quick``: N = 300 (dense) and 10,000 (diagonal), fewer rounds. Figures are
medians over rounds; ratios are medians of per-round ratios [quartiles].
Nothing here is a timed assertion; the objective is checked against a float64
re-measurement so the timing is of the right computation.

``--blas-threads 1`` limits OpenBLAS (numpy's, scipy's, and so JAX's CPU
eigh) to one thread with threadpoolctl. On this shared 2-core machine, with the
other core busy, the default two threads spin: a 300 x 300 ``eigh`` took
0.2-4 s instead of 15 ms. Both sides of every ratio run under the same setting.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import jax
import jax.numpy as jnp
import numpy as np
import scipy.sparse as sp
from scipy.spatial import cKDTree

import stablefilt as sf
from stablefilt import _attack
from stablefilt._perturb import project_ball, relative_product

F = 16
K = 5
CLASSES = 3
DEGREE = 10.0
EPS = 0.01


def geometric_graph(n: int, rng) -> sp.csr_array:
    pts = rng.random((n, 2))
    r = np.sqrt(DEGREE / (np.pi * n))
    pairs = cKDTree(pts).query_pairs(r, output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    w = np.ones(len(i))
    return sp.csr_array(sp.coo_array((np.concatenate([w, w]), (np.concatenate([i, j]), np.concatenate([j, i]))),
                                     shape=(n, n)))


def reference_forward(p, s, x, interval=(0.0, 2.0)):
    """The model in float64: ``z = relu(sum_k T_k(S') z c_k + b)`` per layer
    (Chebyshev recurrence on ``S' = (2 S - (a + b) I) / (b - a)``), then the
    per-node readout. ``s`` is a scipy CSR matrix or any ``@``-able operator."""
    a, b = interval
    al, be = 2.0 / (b - a), -(a + b) / (b - a)
    z = x
    for layer in p["layers"]:
        taps = layer["taps"]
        prev, cur = z, al * (s @ z) + be * z
        y = prev @ taps[0] + cur @ taps[1]
        for k in range(2, taps.shape[0]):
            prev, cur = cur, 2 * (al * (s @ cur) + be * cur) - prev
            y += cur @ taps[k]
        z = np.maximum(y + layer["bias"], 0.0)
    return z @ p["readout"]["weight"] + p["readout"]["bias"]


class _Relative:
    """``S + E S + S E`` as an ``@``-able operator, for the float64 check."""

    def __init__(self, s, e):
        self.s, self.e = s, e

    def __matmul__(self, v):
        return relative_product(self.s, self.e, v)


def build(n: int, seed: int):
    rng = np.random.default_rng(seed)
    t0 = time.perf_counter()
    op = sf.shift_operator(geometric_graph(n, rng), "normalized-laplacian")
    op, _ = sf.reorder(op)
    built = time.perf_counter() - t0
    spec = sf.ModelSpec((1, F, F), taps=K, basis=sf.Basis("chebyshev", (0.0, 2.0)), nonlinearity="relu",
                        readout="node", outputs=CLASSES)
    params = sf.init_params(spec, seed)
    params["layers"] = [dict(layer, bias=jnp.asarray(rng.uniform(-0.1, 0.1, F), jnp.float32))
                        for layer in params["layers"]]
    x = rng.standard_normal((n, 1)).astype(np.float32)
    return op, spec, params, x, built


def bench(n: int, dense: bool, rounds: int, seed: int) -> dict:
    op, spec, params, x, built = build(n, seed)
    degree = (op.matrix.nnz - n) / n
    mode = "dense E" if dense else "diagonal E"
    print(f"\nN = {n} ({mode}): average degree {degree:.2f}, normalised Laplacian in RCM order, built in "
          f"{built:.2f} s; features (1, {F}, {F}), K = {K}, {rounds} rounds", flush=True)
    sop = sf.jax_operator(op)
    xj = jnp.asarray(x)
    y0 = _attack._forward(params, sop, xj[None], spec)
    rng = np.random.default_rng(seed + 1)
    if dense:
        e0 = rng.standard_normal((n, n))
        e0 = 0.5 * (e0 + e0.T)
        e0 *= EPS / np.max(np.abs(np.linalg.eigvalsh(e0)))
    else:
        e0 = rng.uniform(-EPS, EPS, n)
    state = {"e": jnp.asarray(e0, jnp.float32)}
    lr = 0.5 * EPS

    def iteration():
        """One step of ``attack``'s loop: objective and gradient, normalised
        step, projection. Returns (seconds in _objective_grad, seconds in the
        projection, objective)."""
        t0 = time.perf_counter()
        val, (ge, _) = _attack._objective_grad(params, sop, state["e"], xj, y0, spec)
        v = float(val)  # attack() reads the value (and the gradient norm) on the host
        gn = jnp.linalg.norm(ge)
        gn_host = float(gn)
        t1 = time.perf_counter()
        step = state["e"] + lr * ge / gn_host * np.sqrt(n)
        e = project_ball(step, EPS, xp=jnp)
        e.block_until_ready()
        t2 = time.perf_counter()
        state["e"] = e
        return t1 - t0, t2 - t1, v

    t0 = time.perf_counter()
    iteration()  # warm-up: compiles _objective_grad (and the projection)
    compile_s = time.perf_counter() - t0

    p64 = jax.tree_util.tree_map(lambda a: np.asarray(a, dtype=np.float64), params)
    s64 = op.matrix
    x64 = x.astype(np.float64)
    xf = np.random.default_rng(seed + 2).standard_normal((n, F))

    # Like for like: the objective at the current E equals a float64 re-measurement.
    e_now = np.asarray(state["e"], dtype=np.float64)
    _, _, v = iteration()
    e_meas = e_now if not dense else 0.5 * (e_now + e_now.T)
    ref_val = float(np.sum((reference_forward(p64, _Relative(s64, e_meas), x64)
                            - reference_forward(p64, s64, x64)) ** 2))
    err = abs(v - ref_val) / max(ref_val, 1e-300)

    it_t, grad_t, proj_t, fwd_t, prod_t = (np.empty(rounds) for _ in range(5))
    for r in range(rounds):
        # Alternate the order so neither side always follows the other.
        order = ("it", "fwd", "prod") if r % 2 == 0 else ("prod", "fwd", "it")
        for what in order:
            if what == "it":
                g, pj, _ = iteration()
                grad_t[r], proj_t[r] = g, pj
                it_t[r] = g + pj
            elif what == "fwd":
                t0 = time.perf_counter()
                reference_forward(p64, s64, x64)
                fwd_t[r] = time.perf_counter() - t0
            else:
                t0 = time.perf_counter()
                s64 @ xf
                prod_t[r] = time.perf_counter() - t0

    def q(a):
        lo, hi = np.quantile(a, [0.25, 0.75])
        return f"[{lo:.2f}-{hi:.2f}]"

    ms = lambda a: 1e3 * float(np.median(a))  # noqa: E731
    r_fwd, r_prod = it_t / fwd_t, it_t / prod_t
    print(f"  warm-up (compile) {compile_s:.2f} s; objective vs float64 re-measurement: relative error {err:.1e}")
    print(f"  attack iteration     {ms(it_t):9.2f} ms  (_objective_grad {ms(grad_t):.2f} ms, "
          f"projection {ms(proj_t):.2f} ms)")
    print(f"  scipy float64 forward {ms(fwd_t):8.2f} ms  -> iteration = {np.median(r_fwd):.2f}x forward {q(r_fwd)}")
    print(f"  scipy S @ X (N x {F})  {ms(prod_t):8.2f} ms  -> iteration = {np.median(r_prod):.1f}x product "
          f"{q(r_prod)}")
    return {"n": n, "mode": mode, "iter_ms": ms(it_t), "grad_ms": ms(grad_t), "proj_ms": ms(proj_t),
            "fwd_ms": ms(fwd_t), "ratio_fwd": float(np.median(r_fwd)), "prod_ms": ms(prod_t),
            "ratio_prod": float(np.median(r_prod)), "err": err}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="N = 300 (dense) and 10,000 (diagonal), fewer rounds")
    p.add_argument("--dense-n", type=int, default=None, help="nodes for the dense-E case (default 1000)")
    p.add_argument("--diagonal-n", type=int, default=None, help="nodes for the diagonal-E case (default 100000)")
    p.add_argument("--rounds", type=int, default=None, help="timed iterations per case (default 15, quick 7)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--blas-threads", type=int, default=None, help="limit OpenBLAS to this many threads")
    args = p.parse_args(argv)
    blas = "default"
    if args.blas_threads is not None:
        try:
            from threadpoolctl import threadpool_limits
        except ImportError:
            print("--blas-threads needs threadpoolctl (pip install threadpoolctl)", file=sys.stderr)
            return 2
        np.linalg.eigh(np.eye(2))  # load the BLAS libraries so the limit reaches them
        import scipy.linalg  # noqa: F401

        threadpool_limits(args.blas_threads, user_api="blas")
        blas = str(args.blas_threads)
    dn = args.dense_n or (300 if args.quick else 1000)
    gn = args.diagonal_n or (10_000 if args.quick else 100_000)
    rounds = args.rounds or (7 if args.quick else 15)
    load = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    print(f"bench_attack: jax {jax.__version__} on {jax.devices()[0].platform}; load average {load}; "
          f"{os.cpu_count()} CPUs; BLAS threads {blas}")
    print("figures are medians over rounds; ratios are medians of per-round ratios [quartiles]")
    res = [bench(dn, True, rounds, args.seed), bench(gn, False, rounds, args.seed)]
    print("\nsummary: cost of one attack iteration (objective, gradient, step, projection)")
    ok = True
    for r in res:
        print(f"  N = {r['n']:>7d} {r['mode']:10s}  {r['iter_ms']:9.2f} ms = {r['ratio_fwd']:.2f}x a float64 scipy "
              f"forward ({r['fwd_ms']:.2f} ms), {r['ratio_prod']:.1f}x one S @ X ({r['prod_ms']:.2f} ms)")
        if r["err"] > 1e-3:
            ok = False
            print(f"  MISMATCH: the objective differs from the float64 re-measurement by {r['err']:.1e}")
    load = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    print(f"end: load average {load}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
