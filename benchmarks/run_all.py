"""Run every benchmark in turn, each in its own process, and print a summary.

    python benchmarks/run_all.py [--quick] [--malloc-hugepages]

``--quick`` uses smaller sizes (N up to 10^4) and fewer rounds. Exit
status: 1 if a benchmark found a wrong result (a SOUNDNESS FAILURE in the
tightness suite, or JAX and scipy disagreeing), else 0. A missed speed target
is reported, not failed: timings on a shared machine are figures, not tests.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))

FULL = {
    "bench_filter.py": [],
    "bench_penalty.py": [],
    "bench_tightness.py": [],
    "bench_attack.py": [],
    "bench_devices.py": [],
    "bench_predictions.py": [],
}
QUICK = {
    "bench_filter.py": ["--sizes", "1e3,1e4", "--rounds", "9"],
    "bench_penalty.py": ["--sizes", "1e3,1e4", "--rounds", "9"],
    "bench_tightness.py": ["--graphs", "12"],
    "bench_attack.py": ["--quick"],
    "bench_devices.py": ["--sizes", "1e4", "--rounds", "5"],
    "bench_predictions.py": ["--rounds", "2"],
}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="smaller sizes and fewer rounds")
    p.add_argument("--malloc-hugepages", action="store_true",
                   help="pass --malloc-hugepages to the timing benchmarks")
    args = p.parse_args(argv)
    plan = QUICK if args.quick else FULL
    results = []
    for script, extra in plan.items():
        if args.malloc_hugepages and script in ("bench_filter.py", "bench_penalty.py"):
            extra = [*extra, "--malloc-hugepages"]
        cmd = [sys.executable, os.path.join(HERE, script), *extra]
        print(f"\n=== {' '.join(['python', 'benchmarks/' + script, *extra])}", flush=True)
        t0 = time.perf_counter()
        rc = subprocess.call(cmd)
        results.append((script, rc, time.perf_counter() - t0))
    print("\n=== run_all")
    for script, rc, dt in results:
        status = "ok" if rc == 0 else f"FAILED (exit status {rc})"
        print(f"  {script:20s} {dt:6.1f} s  {status}")
    return 0 if all(rc == 0 for _, rc, _ in results) else 1


if __name__ == "__main__":
    sys.exit(main())
