"""glibc's malloc tunable for transparent huge pages, as an environment
holds it: ``GLIBC_TUNABLES`` is a ``:``-separated list of ``name=value``
items, and ``glibc.malloc.hugetlb`` takes 0, 1 or 2 [glibc manual, "Memory
Allocation Tunables"]. Read by the command's start (:mod:`stablefilt._launch`),
by the filter bank's choice of form (:mod:`stablefilt._looped`) and by the
benchmarks' ``--malloc-hugepages``."""

from __future__ import annotations

#: The tunable's name, and the item that turns it on.
NAME = "glibc.malloc.hugetlb"
TUNABLE = f"{NAME}=1"


def hugetlb_setting(environ) -> str | None:
    """The value ``glibc.malloc.hugetlb`` has in ``environ``'s
    ``GLIBC_TUNABLES``, or None where it is not set."""
    for item in environ.get("GLIBC_TUNABLES", "").split(":"):
        name, _, value = item.strip().partition("=")
        if name == NAME:
            return value
    return None


def hugepages_on(environ) -> bool:
    """Whether ``environ`` starts processes with malloc on huge pages (1 or 2)."""
    return hugetlb_setting(environ) in ("1", "2")


def with_hugepages(environ) -> dict:
    """A copy of ``environ`` with :data:`TUNABLE` added to ``GLIBC_TUNABLES``
    (after any items already there)."""
    env = dict(environ)
    env["GLIBC_TUNABLES"] = ":".join(filter(None, [environ.get("GLIBC_TUNABLES", ""), TUNABLE]))
    return env
