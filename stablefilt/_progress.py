"""Progress display for long steps, on standard error.

A thin wrapper over ``tqdm`` (the optional ``progress`` extra), imported
only inside :func:`bar` when a display is wanted: without tqdm, or when
standard error is not a terminal (a pipe, a file, CI), or after
:func:`set_quiet`, every bar is a silent stand-in with the same methods. The
display never touches standard output, so ``--json`` output stays strict
JSON.

The core (operators, intervals, certificates) never imports this module: it
takes a plain ``progress`` callable where it reports at all.
"""

from __future__ import annotations

import contextlib
import os
import sys

_STATE = {"quiet": False, "force": None}


def set_quiet(quiet: bool = True) -> None:
    """Silence (or restore) every bar of this process (``--quiet``)."""
    _STATE["quiet"] = bool(quiet)


def force_display(on: bool | None) -> None:
    """Show bars even when standard error is not a terminal (``True``),
    never (``False``), or decide by the terminal (``None``, the default)."""
    _STATE["force"] = on


def wanted(stream=None) -> bool:
    """Whether a display goes to ``stream`` (default standard error): not
    quiet, and forced or a terminal."""
    if _STATE["quiet"]:
        return False
    if _STATE["force"] is not None:
        return bool(_STATE["force"])
    stream = sys.stderr if stream is None else stream
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError, OSError):  # closed or replaced streams
        return False


class _Silent:
    """A bar that shows nothing."""

    n = 0

    def __init__(self, total=None):
        self.total = total

    def update(self, k: int = 1) -> None:
        self.n += k

    def set_description_str(self, text: str) -> None:
        pass

    def set_postfix_str(self, text: str) -> None:
        pass

    def close(self) -> None:
        pass

    @contextlib.contextmanager
    def external_write_mode(self):
        yield

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def bar(total: int | None, desc: str, unit: str = "it", leave: bool = False):
    """A progress bar over ``total`` steps (None: unknown) with a time
    estimate, on standard error; silent when no display is wanted or tqdm
    is not installed. Use as a context manager; ``update(k)`` after each
    step; wrap other terminal output in ``external_write_mode()``."""
    if not wanted():
        return _Silent(total)
    try:
        from tqdm import tqdm
    except ImportError:  # the optional extra is missing: no display
        return _Silent(total)
    # A terminal that reports no size (a bare pseudo-terminal, some
    # emulators) would get an empty or hidden bar: give it 80 x 24.
    try:
        size = os.get_terminal_size(sys.stderr.fileno())
    except (OSError, ValueError, AttributeError):
        size = os.terminal_size((0, 0))
    sized = size.columns > 0 and size.lines > 0
    return tqdm(total=total, desc=desc, unit=unit, leave=leave, file=sys.stderr, dynamic_ncols=sized,
                ncols=None if sized else 80, nrows=None if sized else 24, mininterval=0.5, disable=False)


def say_through(b, show):
    """``show`` (a message printer, or None) wrapped so its lines do not
    break the bar ``b``."""
    if show is None:
        return None

    def out(msg: str) -> None:
        with b.external_write_mode():
            show(msg)

    return out


@contextlib.contextmanager
def steps(desc: str):
    """Context of an open-ended task shown as its current step: yields
    ``(progress, bar)`` where ``progress(message)`` is the plain callable the
    core takes (it names the step on the bar and counts it). The bar closes
    when the context ends."""
    b = bar(None, desc, unit="step")

    def cb(msg: str) -> None:
        b.set_description_str(f"{desc}: {msg}")
        b.update(1)

    with b:
        yield cb, b
