"""Joining a run over several processes (one per host) with JAX's
multi-process runtime, from environment variables:

    STABLEFILT_COORDINATOR   host:port of process 0, reachable by every process
    STABLEFILT_PROCESSES     number of processes
    STABLEFILT_PROCESS_ID    this process's number, 0 .. processes - 1

Every process runs the same command on the same config; ``jax.devices()``
then lists the devices of all processes and ``train.devices`` may count
them all (docs/devices.md). On CPU the cross-process collectives use gloo
(``jax_cpu_collectives_implementation``), which must be chosen before the
backend starts, hence before any JAX computation.
"""

from __future__ import annotations

import os

from ._errors import ConfigError, RunError

VARIABLES = ("STABLEFILT_COORDINATOR", "STABLEFILT_PROCESSES", "STABLEFILT_PROCESS_ID")

#: How long a process waits for the others to join before giving up.
JOIN_SECONDS = 300

_joined = False


def _int(environ, name: str, low: int, high: int | None = None) -> int:
    raw = environ.get(name, "")
    try:
        v = int(raw)
    except ValueError:
        v = None
    if v is None or v < low or (high is not None and v > high):
        top = f" and at most {high}" if high is not None else ""
        raise ConfigError(f"{name} = {raw!r} is invalid; expected an integer at least {low}{top}.")
    return v


def join_from_env(environ=None) -> bool:
    """Start JAX's multi-process runtime if ``STABLEFILT_COORDINATOR`` is
    set; True if this process joined (now or earlier)."""
    global _joined
    environ = os.environ if environ is None else environ
    addr = environ.get("STABLEFILT_COORDINATOR", "")
    if not addr or _joined:
        return _joined
    if ":" not in addr:
        raise ConfigError(f"STABLEFILT_COORDINATOR = {addr!r} is invalid; expected host:port of process 0.")
    count = _int(environ, "STABLEFILT_PROCESSES", 1)
    index = _int(environ, "STABLEFILT_PROCESS_ID", 0, count - 1)
    import jax

    try:
        jax.config.update("jax_cpu_collectives_implementation", "gloo")
        jax.distributed.initialize(coordinator_address=addr, num_processes=count, process_id=index,
                                   initialization_timeout=JOIN_SECONDS)
    except Exception as exc:  # the runtime reports timeouts and late starts as several types
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise RunError(f"could not join the {count}-process run at {addr} as process {index} ({first}).") from None
    _joined = True
    return True
