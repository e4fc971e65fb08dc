"""Wall-time budgets for steps that cannot stop themselves.

A sparse factorisation (SuperLU) runs in C and cannot be interrupted from
Python; its fill-in, and so its time and memory, is not known in advance.
:func:`call_within` runs such a step in a forked child process and ends the
child when its time is up, so the caller waits at most the budget and then
falls back to a cheaper method. Where ``fork`` is not available (Windows,
or a platform whose default start method is not ``fork`` and has none) the
step runs in this process without a time limit, and the result says so.
"""

from __future__ import annotations

import dataclasses
import multiprocessing
import os
import time
import warnings


@dataclasses.dataclass(frozen=True)
class Outcome:
    """What became of a budgeted call.

    Attributes:
      status: ``done`` (``value`` holds the result), ``timeout`` (ended at
        the budget), ``failed`` (the child died or raised: out of memory,
        a crash) or ``unbounded`` (no fork here: ran in this process).
      value: the result, when ``done`` or ``unbounded``.
      seconds: wall time spent.
    """

    status: str
    value: object = None
    seconds: float = 0.0


def _child(conn, fn, args):
    try:
        conn.send(("ok", fn(*args)))
    except BaseException as exc:  # the child reports every failure and exits
        conn.send(("error", f"{type(exc).__name__}: {exc}"))
    finally:
        conn.close()


def can_fork() -> bool:
    return hasattr(os, "fork") and "fork" in multiprocessing.get_all_start_methods()


def call_within(fn, args: tuple, seconds: float) -> Outcome:
    """``fn(*args)`` in a forked child, ended after ``seconds``.

    ``fn`` and its result must be picklable (the result goes back through a
    pipe); ``args`` are inherited through the fork, never pickled.
    """
    t0 = time.perf_counter()
    if not can_fork():
        return Outcome("unbounded", fn(*args), time.perf_counter() - t0)
    ctx = multiprocessing.get_context("fork")
    recv, send = ctx.Pipe(duplex=False)
    with warnings.catch_warnings():
        # JAX warns that fork and its threads do not mix; the child runs
        # only scipy and numpy, never JAX.
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", DeprecationWarning)
        proc = ctx.Process(target=_child, args=(send, fn, args), daemon=True)
        proc.start()
    send.close()
    try:
        if recv.poll(max(seconds, 0.0)):
            try:
                tag, value = recv.recv()
            except (EOFError, OSError):
                return Outcome("failed", None, time.perf_counter() - t0)
            return Outcome("done" if tag == "ok" else "failed", value if tag == "ok" else None,
                           time.perf_counter() - t0)
        return Outcome("timeout", None, time.perf_counter() - t0)
    finally:
        recv.close()
        if proc.is_alive():
            proc.kill()
        proc.join(5)
