"""Checks of the numbers a user gives: a perturbation size eps and a
spectral interval. Each raises the library's own error with one sentence."""

from __future__ import annotations

import math

import numpy as np

from ._errors import FilterError, OverflowFigure, StablefiltError


def check_eps(eps, what: str = "eps", *, positive: bool = False, error: type = StablefiltError) -> float:
    """``eps`` as a float, finite and ``>= 0`` (``> 0`` with ``positive``); a
    negative or non-finite size would give a negative or NaN figure called
    certified.

    Args:
      eps: the value as given (a number or a string).
      what: its name in the message (``eps``, ``--eps``, ``jitter size``).
      positive: refuse 0 too.
      error: the exception type to raise.
    """
    try:
        e = float(eps)
    except (TypeError, ValueError):
        raise error(f"{what} {eps!r} is not a number.") from None
    if not math.isfinite(e) or e < 0 or (positive and e == 0):
        raise error(f"{what} must be a finite number {'> 0' if positive else '>= 0'}; got {eps!r}.")
    return e


def check_interval(interval) -> tuple[float, float]:
    """``(a, b)`` as floats, both finite with ``a <= b``."""
    try:
        iv = np.asarray(interval, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        iv = np.zeros(0)
    if iv.shape != (2,) or not np.all(np.isfinite(iv)) or iv[0] > iv[1]:
        raise FilterError(f"the spectral interval must be two finite numbers a <= b; got {interval!r}.")
    return float(iv[0]), float(iv[1])




def basis_range_warning(lower: float, upper: float, basis) -> str | None:
    """One sentence when a graph's spectral interval ``[lower, upper]``
    leaves the interval a Chebyshev basis was built on, else None.

    The certificate stays a valid bound for the filter as evaluated there,
    but outside its interval a Chebyshev polynomial grows like ``cosh``:
    the filter is not the one designed, and the figures usually show it.
    """
    iv = getattr(basis, "interval", None)
    if getattr(basis, "kind", None) != "chebyshev" or iv is None:
        return None
    a, b = float(iv[0]), float(iv[1])
    slack = 1e-9 * max(abs(a), abs(b), 1.0)
    if lower >= a - slack and upper <= b + slack:
        return None
    return (f"the graph's spectrum [{lower:.4g}, {upper:.4g}] leaves the Chebyshev basis interval [{a:g}, {b:g}] "
            "the filter was built on, so the certificate is for the filter evaluated outside its design range; "
            "pick the shift operator it was designed for (--shift).")


def first_non_finite(obj, path: str = "") -> str | None:
    """The key path (``bounds[0].lower``) of the first float in a JSON-like
    ``obj`` that is NaN or infinite, or None when every float is finite."""
    if isinstance(obj, dict):
        items = ((f"{path}.{k}" if path else str(k), v) for k, v in obj.items())
    elif isinstance(obj, list | tuple):
        items = ((f"{path}[{i}]", v) for i, v in enumerate(obj))
    elif isinstance(obj, float | np.floating):
        return None if math.isfinite(obj) else path or "value"
    elif isinstance(obj, np.ndarray) and obj.dtype.kind == "f":
        return None if np.all(np.isfinite(obj)) else path or "value"
    else:
        return None
    for p, v in items:
        got = first_non_finite(v, p)
        if got is not None:
            return got
    return None


def check_finite(obj, what: str) -> None:
    """Raise :class:`OverflowFigure` naming the first non-finite figure of
    ``obj`` (the JSON form of ``what``): a certificate of Infinity certifies
    nothing, and NaN and Infinity are not JSON (RFC 8259)."""
    bad = first_non_finite(obj)
    if bad is not None:
        raise OverflowFigure(f"the {what} overflows float64 (its figure {bad} is not finite); the taps, parameters "
                             "or eps are too large for a finite bound, so rescale them or give a smaller eps")
