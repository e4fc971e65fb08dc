"""Shared pieces of the benchmarks: graph generators and interleaved timing.

The machine these run on is shared and noisy, so methods are never timed in
separate blocks. Each round cycles through every method a few times (in a
rotating order, fast methods repeated to a sample of about 20 ms), keeps each
method's best sample of the round, and the figures quoted are medians over
rounds of these per-round times and of the per-round ratios against a
reference.
"""

from __future__ import annotations

import os
import resource
import sys
import time

import numpy as np
import scipy.sparse as sp
from scipy.spatial import cKDTree


def geometric_adjacency(n: int, degree: float, rng: np.random.Generator, *, weighted: bool = False) -> sp.csr_array:
    """Random geometric graph on ``n`` uniform points in the unit square:
    nodes closer than ``r`` are joined, ``r`` chosen so the expected degree
    (away from the border) is ``degree`` (``n pi r^2 = degree``). Nodes come in
    the random order the points were drawn in. Weights are 1, or
    ``exp(-(d / r)^2)`` when ``weighted``."""
    pts = rng.random((n, 2))
    r = np.sqrt(degree / (np.pi * n))
    pairs = cKDTree(pts).query_pairs(r, output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    if weighted:
        d = np.linalg.norm(pts[i] - pts[j], axis=1)
        w = np.exp(-((d / r) ** 2))
    else:
        w = np.ones(len(i))
    a = sp.coo_array((np.concatenate([w, w]), (np.concatenate([i, j]), np.concatenate([j, i]))), shape=(n, n))
    return sp.csr_array(a)


def _clock(fn, reps: int, budget: float = float("inf")) -> float:
    """Mean wall time of up to ``reps`` calls of ``fn`` (which must block
    until its result is ready), in seconds; stops early once ``budget``
    seconds have passed, so a method that turns slow under load cannot
    stretch a sample far beyond its target."""
    t0 = time.perf_counter()
    done = 0
    while done < reps:
        fn()
        done += 1
        if time.perf_counter() - t0 > budget:
            break
    return (time.perf_counter() - t0) / done


def calibrate(fn, target: float = 0.02, cap: int = 200) -> int:
    """Calls of ``fn`` needed for one timed sample of about ``target`` s
    (from the median of five calls)."""
    t = float(np.median([_clock(fn, 1) for _ in range(5)]))
    return int(max(1, min(cap, round(target / max(t, 1e-7)))))


def interleaved(methods: dict, rounds: int, *, samples: int = 3, target: float = 0.02) -> dict:
    """Per-round times (seconds per call) of each method, interleaved.

    Args:
      methods: name -> zero-argument callable that blocks until done.
        Every callable is run once before timing (warm-up, compilation).
      rounds: number of rounds.
      samples: in each round the methods are cycled this many times (the
        order rotating) and each method's time for the round is the smallest
        of its samples: a sample hit by another process's time slice is
        dropped, while all methods still see the same stretch of load.
      target: wall time of one sample; fast methods are repeated to reach it.

    Returns:
      name -> numpy array of shape ``(rounds,)``.
    """
    names = list(methods)
    for name in names:
        methods[name]()
    reps = {name: calibrate(methods[name], target) for name in names}
    out = {name: np.full(rounds, np.inf) for name in names}
    turn = 0
    for r in range(rounds):
        for _ in range(samples):
            # Rotate the order so no method always runs right after another.
            order = names[turn % len(names):] + names[: turn % len(names)]
            turn += 1
            for name in order:
                out[name][r] = min(out[name][r], _clock(methods[name], reps[name], 3 * target))
    return out


def ratio(times: dict, name: str, ref: str) -> float:
    """Median over rounds of ``times[name] / times[ref]``."""
    return float(np.median(times[name] / times[ref]))


def spread(times: dict, name: str, ref: str) -> tuple[float, float]:
    """Quartiles of the per-round ratio, to show how noisy the run was."""
    q = np.quantile(times[name] / times[ref], [0.25, 0.75])
    return float(q[0]), float(q[1])


def ms(x: np.ndarray) -> float:
    """Median of per-round times, in milliseconds."""
    return 1e3 * float(np.median(x))


def blas_threads():
    """A function ``set(n)`` that sets the thread count of numpy's BLAS
    (OpenBLAS) without a context-manager round trip (about a microsecond), or
    None when threadpoolctl is not installed.

    Why: on this 2-core shared machine, OpenBLAS with 2 threads spins when the
    other core is busy; a ``(10^5, 32) @ (32, 32)`` float32 product took
    16 ms against 2.5 ms on one thread (measured by hand, interleaved, load
    average about 2.5). A reference slowed that way would flatter whatever it
    is compared with.
    """
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:
        return None
    libs = ThreadpoolController().select(user_api="blas").lib_controllers
    if not libs:
        return None
    default = [lib.num_threads for lib in libs]

    def set_threads(n):
        for lib, d in zip(libs, default, strict=True):
            lib.set_num_threads(d if n is None else n)

    return set_threads


def faults_per_call(fn, reps: int = 3) -> float:
    """Minor page faults per call of ``fn`` (after one warm-up call).

    Counted because fresh mappings are expensive here: buffers of 32 MiB and
    more come from a new ``mmap`` on every call and are faulted in page by
    page. The count is exact where times are noisy."""
    fn()
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(reps):
        fn()
    return (resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / reps


HUGEPAGES_HELP = ("re-run this script with GLIBC_TUNABLES=glibc.malloc.hugetlb=1 (transparent huge pages for "
                  "malloc) to measure what fresh page mappings cost")


def rerun_with_hugepages(script: str) -> None:
    """Replace this process by ``script`` run again with malloc's huge-page
    tunable set (glibc reads tunables only at start-up). No return."""
    from stablefilt._malloc import hugetlb_setting, with_hugepages

    if hugetlb_setting(os.environ) is not None:
        return
    os.execve(sys.executable, [sys.executable, os.path.abspath(script), *sys.argv[1:]], with_hugepages(os.environ))


def machine_note() -> str:
    """Load average and malloc tunables, printed so a reader can judge the
    run (the machine is shared)."""
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    tun = os.environ.get("GLIBC_TUNABLES", "")
    return f"load average {load}; {os.cpu_count()} CPUs; GLIBC_TUNABLES={tun or '(unset)'}"


def print_summary(title: str, lines) -> None:
    """The closing block of a benchmark: ``title``, its summary lines
    indented, and the machine note."""
    print(f"\n{title}")
    for line in lines:
        print("  " + line)
    print(f"end: {machine_note()}")


def verdict(value: float, limit: float) -> str:
    return "PASS" if value <= limit else "MISS"


def parse_sizes(text: str) -> list[int]:
    """``"1e4,100000"`` -> ``[10000, 100000]``."""
    out = []
    for part in text.split(","):
        part = part.strip()
        if part:
            out.append(int(float(part)))
    return out
