"""A monomial filter bank's recurrence as an XLA loop, for large signals on
the JAX path.

Written out tap by tap (:func:`stablefilt._filters.run_filter`), the
products ``X c_k`` of a bank depend only on ``X``, so XLA's scheduler
computes them all first and keeps ``K`` temporaries of ``N x F_out`` alive
at once: 64 MB at ``N = 10^5``, ``F = 32``, ``K = 5`` (float32). A block that
large is above glibc's largest threshold for reusing freed memory (32 MiB on
64-bit systems, ``M_MMAP_THRESHOLD``, mallopt(3)), so it is mapped afresh on
every call and faulted in page by page (about 15,600 minor faults per
forward, measured). Inside ``jax.lax.fori_loop`` the running term is the
loop's carry and one product is alive per step: the forward's temporaries
fall to one ``N x F_out`` block (12.8 MB there), its faults to none after
the first call, and forward+backward's temporaries from 102 to 38 MB. The
arithmetic is the same, in the same order: Horner's rule ``b = x c_k + S b``
from the last tap down when ``F_out <= F_in``, else the powers ``S^k x``
from the first tap up. Reverse-mode differentiation goes through the loop
(a scan with a fixed trip count).

Chebyshev banks keep the written-out recurrence: their two running terms
make the loop pass one carried term on as the other, which XLA copies, and
measured at ``N = 10^5`` (``K = 5`` and 8) the loop kept 64 MB of
temporaries and was 1.2-1.4x slower.
"""

from __future__ import annotations

import math
import os
from typing import Callable

import jax

from ._malloc import hugepages_on

#: Smallest ``N * F`` of one signal block for which the loop is used. Both
#: forms timed in interleaved rounds, the loop forced on (``F = 32``, ``K = 5``,
#: 15 rounds): at ``N = 10^4`` and ``3 * 10^4`` about even (0.91-0.98x forward,
#: 0.97-1.01x forward+backward), at ``10^5`` 0.62-0.64x and 0.81-0.83x;
#: ``python benchmarks/bench_filter.py --sizes 1e5`` prints the same
#: comparison (0.71x and 0.89x in one 9-round run).
LOOP_MIN_ELEMENTS = 1 << 20


def loop_threshold() -> float:
    """``LOOP_MIN_ELEMENTS``, or infinity (never loop) when the process
    runs with glibc's malloc huge pages (``glibc.malloc.hugetlb`` set to 1 or
    2 in ``GLIBC_TUNABLES``): the fresh mappings the loop avoids then cost
    little, and the written-out bank measured faster (the loop 1.14x its
    forward and 1.34x its forward+backward at ``N = 10^5``, ``python
    benchmarks/bench_filter.py --sizes 1e5 --malloc-hugepages``)."""
    if hugepages_on(os.environ):
        return math.inf
    return LOOP_MIN_ELEMENTS


def _tap(taps, j):
    return jax.lax.dynamic_index_in_dim(taps, j, keepdims=False)


def bank_from_last(matvec: Callable, taps, x):
    """``sum_k S^k x c_k`` for a bank by Horner's rule from the last tap
    down, as a loop (``x`` of shape ``(N, F_in)``, taps ``(K, F_in, F_out)``,
    ``K >= 2``)."""
    k = taps.shape[0]

    def horner(i, b):
        return x @ _tap(taps, k - 2 - i) + matvec(b)

    return jax.lax.fori_loop(0, k - 1, horner, x @ taps[k - 1])


def bank_from_first(matvec: Callable, taps, x):
    """The same bank from the first tap up, ``y += (S^k x) c_k`` (``K >= 2``):
    used when ``F_out > F_in``, where the products are the narrower ``N x F_in``."""
    k = taps.shape[0]

    def body(i, carry):
        cur, y = carry
        cur = matvec(cur)
        return cur, y + cur @ _tap(taps, i + 1)

    return jax.lax.fori_loop(0, k - 1, body, (x, x @ taps[0]))[1]
