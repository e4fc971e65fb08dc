"""Wall time of a small sweep of demo runs with ``--jobs 2``, each run
process limited to one thread (the default) against the same sweep with
``--no-thread-limits`` (XLA's and BLAS's own thread pools, one per core).

    python benchmarks/bench_sweep_threads.py [--rounds 2] [--epochs 1] [--jobs 2]

Each round runs the two variants in turn (order alternating between
rounds) into fresh temporary folders; the figures are medians over rounds
of the wall time of each variant and of the per-round ratio
(unlimited / limited: above 1 means the limits help). Also printed: the
CPU time the runs used (children's user + system) and the 1-minute load
average before and after. The sweep is `stablefilt sweep configs/demo.toml
--vary penalty.weight=0,0.5 --vary model.taps=3,5` (4 runs).
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _sweep(out: str, epochs: int, jobs: int, limited: bool) -> tuple[float, float]:
    """``(wall seconds, CPU seconds of the run processes)`` of one sweep."""
    cmd = [sys.executable, "-m", "stablefilt.cli", "sweep", os.path.join(ROOT, "configs", "demo.toml"),
           "--vary", "penalty.weight=0,0.5", "--vary", "model.taps=3,5", "--epochs", str(epochs),
           "--jobs", str(jobs), "--out", out, "--quiet"]
    if not limited:
        cmd.append("--no-thread-limits")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (ROOT, os.environ.get("PYTHONPATH", "")) if p)}
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run(cmd, env=env, check=True, stdout=subprocess.DEVNULL, timeout=3600)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--rounds", type=int, default=2)
    p.add_argument("--epochs", type=int, default=1)
    p.add_argument("--jobs", type=int, default=2)
    args = p.parse_args(argv)
    print(f"cores {os.cpu_count()}, load average before {os.getloadavg()[0]:.2f}")
    times = {True: [], False: []}
    cpu = {True: [], False: []}
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(args.rounds):
            for limited in ((True, False) if r % 2 == 0 else (False, True)):
                wall, used = _sweep(os.path.join(tmp, f"r{r}-{limited}"), args.epochs, args.jobs, limited)
                times[limited].append(wall)
                cpu[limited].append(used)
                print(f"round {r + 1}: {'limited  ' if limited else 'unlimited'} {wall:7.1f} s wall, "
                      f"{used:7.1f} s CPU, load {os.getloadavg()[0]:.2f}", flush=True)
    ratio = np.median(np.asarray(times[False]) / np.asarray(times[True]))
    print(f"median wall: limited {np.median(times[True]):.1f} s, unlimited {np.median(times[False]):.1f} s, "
          f"ratio unlimited/limited {ratio:.2f}")
    print(f"median CPU:  limited {np.median(cpu[True]):.1f} s, unlimited {np.median(cpu[False]):.1f} s")
    print(f"load average after {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
