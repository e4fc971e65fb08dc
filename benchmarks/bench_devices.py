"""A graph split over devices: bytes exchanged per shift product for RCM and
METIS partitions, and the sharded product timed against one device.

Graph: a random geometric graph (average degree about 10, nodes in the
random order the points were drawn in), ``N`` nodes, split over ``D``
devices (default 4, simulated on CPU with
``XLA_FLAGS=--xla_force_host_platform_device_count=D``, which this script
sets before JAX starts). One product ``S X`` on ``F = 32`` float32 columns.
Per partition (``stablefilt._partition``):

- ``halo rows``: rows every device needs from others, summed over devices;
- ``halo MB``: those rows' bytes, the least any exchange must move;
- ``permute MB``: what the default exchange moves (one ``ppermute`` per
  shift ``s``, ``D W_s`` rows, ``W_s`` the widest pair of that shift);
- ``gather MB``: what the ``all_gather`` exchange moves (``D (D-1) W``
  rows, ``W`` the widest device's boundary);
- ``local MB``: bytes of the rows the devices own (``N F 4``);
- ``cut``: edges between parts; ``seconds``: time to find the partition.

Times (interleaved rounds, medians): ``one device`` is ``jit`` of the
library's single-device product (BCSR) in the trainer's node order (RCM),
the reference; ``sharded rcm`` and ``sharded metis`` run
``stablefilt._sharded.sharded_product`` with the permute exchange (signal
in node order: spread to the devices' slots, product, gathered back);
``slots <partition> <exchange>`` the exchange and local products alone on
a signal already split (what each layer of a sharded model does). The simulated
devices share this machine's cores and memory, so the sharded times show
the overhead of the exchange and the scatter-add kernel, not the speed-up
of real devices. Every product is checked against scipy's CSR product.

Memory: bytes per node of one forward+backward of a two-layer GNN, from
XLA's compiled memory analysis, on one device, with the batch split and
with the nodes split (docs/devices.md uses these figures).

    python benchmarks/bench_devices.py [--sizes 1e4,1e5] [--devices 4] [--rounds 7]
"""

from __future__ import annotations

import argparse
import os
import sys
import time


def _force_devices(argv) -> int:
    count = 4
    for i, a in enumerate(argv):
        if a == "--devices" and i + 1 < len(argv):
            count = int(argv[i + 1])
        elif a.startswith("--devices="):
            count = int(a.split("=", 1)[1])
    flags = [f for f in os.environ.get("XLA_FLAGS", "").split() if "force_host_platform_device_count" not in f]
    os.environ["XLA_FLAGS"] = " ".join(flags + [f"--xla_force_host_platform_device_count={count}"])
    return count


_force_devices(sys.argv[1:])  # before JAX starts

import jax  # noqa: E402
import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402
from _common import geometric_adjacency, interleaved, machine_note, ms, parse_sizes, ratio, spread  # noqa: E402
from jax.sharding import NamedSharding, PartitionSpec  # noqa: E402

import stablefilt as sf  # noqa: E402
from stablefilt._partition import EXCHANGES, METHODS, halo_plan, node_parts  # noqa: E402
from stablefilt._sharded import (  # noqa: E402
    node_mesh,
    sharded_forward,
    sharded_operator,
    sharded_product,
    slot_product,
)
from stablefilt._sparse import jax_operator, shift_product  # noqa: E402

F = 32
DEGREE = 10.0
MB = 1e-6


def _slots(plan, x, devices: int) -> np.ndarray:
    """``x`` spread over the plan's padded slots (zero padding rows)."""
    out = np.zeros((devices * plan.block,) + x.shape[1:], x.dtype)
    out[plan.position] = x
    return out


def methods_available() -> list[str]:
    try:
        import pymetis  # noqa: F401
    except ImportError:
        print("pymetis is not installed: METIS rows skipped (pip install 'stablefilt[partition]')")
        return ["rcm"]
    return list(METHODS)


def run(n: int, devices: int, rounds: int, rng) -> bool:
    a = geometric_adjacency(n, DEGREE, rng)
    op = sf.shift_operator(a, "normalized-laplacian")
    s = sp.csr_array(op.matrix)
    x = rng.standard_normal((n, F)).astype(np.float32)
    ref = s @ x.astype(np.float64)
    mesh = node_mesh(devices)
    print(f"\nN = {n}, edges {op.edges}, {devices} devices, F = {F} float32 columns")
    print(f"{'partition':10s} {'seconds':>8s} {'cut':>7s} {'halo rows':>10s} {'halo MB':>8s} {'permute MB':>11s} "
          f"{'gather MB':>10s} {'local MB':>9s} {'halo/local':>10s} {'permute/local':>13s} {'gather/local':>12s}")
    fns, ok = {}, True
    # One device in the trainer's node order (reverse Cuthill-McKee): the
    # random order would slow it by cache misses and flatter the split.
    ordered, perm = sf.reorder(op)
    jop, xo = jax_operator(ordered), x[perm]
    one = jax.jit(shift_product)
    fns["one device"] = lambda: one(jop, xo).block_until_ready()
    for method in methods_available():
        t0 = time.perf_counter()
        parts = node_parts(s, devices, method)
        seconds = time.perf_counter() - t0
        plans = {ex: halo_plan(s, parts, method, devices, ex) for ex in EXCHANGES}
        coo = s.tocoo()
        cut = int(np.sum(parts[coo.row] != parts[coo.col]) // 2)
        pm, gm = plans["permute"], plans["gather"]
        h, lo = pm.halo_bytes(F), pm.local_bytes(F)
        mp, mg = pm.moved_bytes(F), gm.moved_bytes(F)
        print(f"{method:10s} {seconds:8.3f} {cut:7d} {int(pm.halo.sum()):10d} {h * MB:8.3f} {mp * MB:11.3f} "
              f"{mg * MB:10.3f} {lo * MB:9.3f} {h / lo:10.4f} {mp / lo:13.4f} {mg / lo:12.4f}")
        for ex, plan in plans.items():
            sh = sharded_operator(plan, mesh)
            f = jax.jit(lambda o, v: sharded_product(o, v, mesh))
            err = float(np.max(np.abs(np.asarray(f(sh, x)) - ref)) / np.max(np.abs(ref)))
            if err > 1e-5:
                print(f"WRONG RESULT: sharded {method} {ex} product differs from scipy's by {err:.2e} (relative)")
                ok = False
            if ex == "permute":
                fns[f"sharded {method}"] = (lambda f=f, sh=sh: f(sh, x).block_until_ready())
            # The exchange and local products alone, on a signal already split in slot order.
            xs = jax.device_put(_slots(plan, x, devices), NamedSharding(mesh, PartitionSpec("nodes")))
            fs = jax.jit(lambda o, v: slot_product(o, v, mesh))
            fns[f"slots {method} {ex}"] = (lambda fs=fs, sh=sh, xs=xs: fs(sh, xs).block_until_ready())
    times = interleaved(fns, rounds)
    print(f"{'product':22s} {'median ms':>10s} {'x one device':>13s} {'quartiles':>16s}")
    for name in fns:
        q = spread(times, name, "one device")
        print(f"{name:22s} {ms(times[name]):10.3f} {ratio(times, name, 'one device'):13.2f} "
              f"{q[0]:7.2f}-{q[1]:<7.2f}")
    return ok


def memory(n: int, devices: int, rng, batch: int = 32, width: int = 16, taps: int = 5) -> None:
    """Bytes per node of one forward+backward of a two-layer GNN (``width``
    features, ``taps`` taps, mean readout, a batch of ``batch`` one-feature
    signals), from XLA's compiled memory analysis (arguments + temporaries)
    of the jitted gradient: on one device, per device with the batch split
    (data parallel), and per device with the nodes split (METIS if
    installed, else RCM), the last divided by the nodes a device owns."""
    from stablefilt._model import ModelSpec, forward, init_params

    a = geometric_adjacency(n, DEGREE, rng)
    op = sf.shift_operator(a, "normalized-laplacian")
    spec = ModelSpec((1, width, width), taps=taps, basis=sf.Basis("chebyshev", (0.0, 2.0)), readout="mean",
                     outputs=3)
    params = init_params(spec, 0)
    jop = jax_operator(op)

    def one(b):
        x = np.zeros((b, n, 1), np.float32)
        f = jax.jit(jax.grad(lambda p, o, x: jax.numpy.sum(forward(p, o, x, spec))))
        m = f.lower(params, jop, x).compile().memory_analysis()
        return m.argument_size_in_bytes + m.temp_size_in_bytes

    mesh = node_mesh(devices)
    plan = halo_plan(op.matrix, node_parts(op.matrix, devices, methods_available()[-1]), "", devices, "permute")
    sh = sharded_operator(plan, mesh)
    g = jax.jit(jax.grad(lambda p, o, x: jax.numpy.sum(sharded_forward(p, o, x, spec, mesh))))
    m = g.lower(params, sh, np.zeros((batch, n, 1), np.float32)).compile().memory_analysis()
    # The program is the same on every device; its figures are one device's.
    split_nodes = m.temp_size_in_bytes + m.argument_size_in_bytes
    print(f"\nmemory of one forward+backward, N = {n}, batch {batch}, 2 layers of {width} features, K = {taps} "
          "(XLA memory analysis: arguments + temporaries)")
    print(f"  one device:                    {one(batch) / n:9.0f} bytes per node")
    print(f"  batch split over {devices} devices:   {one(-(-batch // devices)) / n:9.0f} bytes per node, per device")
    print(f"  nodes split over {devices} devices:   {split_nodes / plan.block:9.0f} bytes per owned node, per device "
          f"({plan.block} nodes each)")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--sizes", default="1e4,1e5", help="node counts, comma-separated (default 1e4,1e5)")
    p.add_argument("--devices", type=int, default=4, help="simulated CPU devices (default 4)")
    p.add_argument("--rounds", type=int, default=7, help="timing rounds (default 7)")
    args = p.parse_args(argv)
    print("simulated devices share one machine: sharded times show overhead, not real speed-up")
    print(machine_note())
    rng = np.random.default_rng(0)
    sizes = parse_sizes(args.sizes)
    ok = all([run(n, args.devices, args.rounds, rng) for n in sizes])
    memory(sizes[0], args.devices, rng)
    print(machine_note())
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
