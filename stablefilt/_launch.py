"""Starting the ``stablefilt`` command: glibc's malloc on transparent huge pages.

On Linux, glibc's malloc maps every block of 32 MiB and more afresh
(``mmap``) and the kernel faults it in 4-KiB page by page on first touch:
at 10^6 nodes each sparse product's 128 MB output cost 31,251 minor faults
per call, and the products reached 18% of a memory copy's bandwidth
(benchmarks/README.md). The tunable ``glibc.malloc.hugetlb=1`` (glibc 2.35
and later) makes malloc ask for transparent huge pages (``madvise(...,
MADV_HUGEPAGE)``), so such a block is faulted in 2-MiB pieces [glibc manual,
"Memory Allocation Tunables"]. Measured at 10^6 nodes: a training epoch
5.6 s instead of 8.1 s at the same peak memory (3.7 GB); at the demo's size
no difference (README, "Large graphs").

glibc reads tunables only when a process starts, so the command line
replaces its own process (``os.execve``) once, before anything heavy is
loaded, with the tunable added to ``GLIBC_TUNABLES``. It does so only where
it can help: Linux, glibc 2.35 or later, transparent huge pages not turned
off. A ``glibc.malloc.hugetlb`` setting already in ``GLIBC_TUNABLES`` (for
instance ``=0``, to turn this off) is left as it is. The library never does
this: a process that imports stablefilt keeps its own environment.
"""

from __future__ import annotations

import os
import platform
import sys

from ._malloc import hugetlb_setting, with_hugepages

#: The first glibc with that tunable (glibc 2.35 release notes).
GLIBC_MIN = (2, 35)
#: Where Linux states the transparent huge page mode, e.g. ``always [madvise] never``.
THP_MODE_FILE = "/sys/kernel/mm/transparent_hugepage/enabled"


def thp_mode(path: str = THP_MODE_FILE) -> str | None:
    """The selected transparent huge page mode (``always``, ``madvise`` or
    ``never``), or None where the kernel does not say."""
    try:
        with open(path) as fh:
            text = fh.read()
    except OSError:
        return None
    start, end = text.find("["), text.find("]")
    return text[start + 1:end] if 0 <= start < end else None


def _version(text: str) -> tuple[int, ...]:
    parts = []
    for piece in text.split("."):
        if not piece.isdigit():
            break
        parts.append(int(piece))
    return tuple(parts)


def relaunch_env(environ, system: str, libc: tuple[str, str], mode: str | None) -> dict | None:
    """The environment to start again with, or None to go on as is.

    Args:
      environ: the present environment.
      system: ``platform.system()``.
      libc: ``platform.libc_ver()``, e.g. ``("glibc", "2.36")``.
      mode: :func:`thp_mode`.
    """
    if hugetlb_setting(environ) is not None:
        return None  # already set, or set otherwise on purpose
    if system != "Linux" or libc[0] != "glibc" or _version(libc[1]) < GLIBC_MIN:
        return None
    if mode not in ("always", "madvise"):
        return None
    return with_hugepages(environ)


def relaunch() -> None:
    """Replace this process by the same command with :data:`stablefilt._malloc.TUNABLE` set,
    when :func:`relaunch_env` says it helps; otherwise, or if the new start
    fails, return and go on unchanged."""
    env = relaunch_env(os.environ, platform.system(), platform.libc_ver(), thp_mode())
    argv = getattr(sys, "orig_argv", None)
    if env is None or not argv or not sys.executable:
        return
    sys.stdout.flush()
    sys.stderr.flush()
    try:
        os.execve(sys.executable, [sys.executable, *argv[1:]], env)
    except OSError:
        return


def main() -> int:
    """The ``stablefilt`` command: :func:`relaunch`, then :func:`stablefilt.cli.main`.
    This module loads nothing heavy, so a new start costs little."""
    relaunch()
    from .cli import main as cli_main

    return cli_main()
