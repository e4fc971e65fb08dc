"""Memory a step needs, checked against what the machine has before the step
starts: a step that cannot fit is refused in one sentence instead of being
killed by the system half-way (or swapping for hours).

The available memory is ``MemAvailable`` from ``/proc/meminfo`` (Linux: the
kernel's estimate of memory that can be handed out without swapping), else
``os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")`` (free pages);
where neither exists nothing is refused.
"""

from __future__ import annotations

import os

from ._errors import StablefiltError

#: Share of the available memory one step may plan to use; the rest is left
#: for the interpreter, the arrays already held and other programs (common
#: practice).
SHARE = 0.8


class MemoryRefused(StablefiltError):
    """A step would need more memory than the machine has available."""


def available_bytes() -> int | None:
    """Memory available to this process now, in bytes, or None if unknown."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def dense_bytes(n: int, copies: float = 1.0, m: int | None = None) -> int:
    """Bytes of ``copies`` float64 arrays of shape ``(n, m)`` (``m = n``)."""
    return int(8 * copies * n * (n if m is None else m))


def _size(b: float) -> str:
    for unit, k in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if b >= k:
            return f"{b / k:.3g} {unit}"
    return f"{b / 1e3:.3g} kB"


def require(need: int, what: str, available: int | None = None) -> None:
    """Refuse ``what`` when it needs more than :data:`SHARE` of the
    available memory.

    Args:
      need: estimated bytes of the step's largest working set.
      what: the step, as the subject of the sentence ("a dense
        eigendecomposition of 50000 nodes").
      available: bytes available (default :func:`available_bytes`).

    Raises:
      MemoryRefused: one sentence naming the step, the need and what is
        available.
    """
    have = available_bytes() if available is None else available
    if have is None:
        return
    if need > SHARE * have:
        raise MemoryRefused(f"{what} needs about {_size(need)} of memory and this machine has {_size(have)} "
                            "available; it was not started")
