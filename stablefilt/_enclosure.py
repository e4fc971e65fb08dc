"""Where the spectrum of a relatively perturbed graph lies (docs/theory.md 9.1,
"A relative enclosure of the perturbed spectra").

For ``S_t = S + t (E S + S E)``, ``t in [0, 1]``, ``||E||_2 <= eps < 1`` and
``||S||_2 <= R``, the ``k``-th eigenvalue of ``S_t`` lies in

``J_k = [max(l_k - eps^2 R, lam_k - 2 eps R), min(u_k + eps^2 R, lam_k + 2 eps R)]``

with ``l_k, u_k`` the smaller and larger of ``(1 - eps)^2 lam_k`` and
``(1 + eps)^2 lam_k``: ``S_t = (I + F) S (I + F) - F S F`` with ``F = t E``,
Ostrowski's theorem (Horn and Johnson, "Matrix Analysis", 2nd ed., 2013,
Thm 4.5.9) for the congruence and Weyl's inequality for ``F S F`` and for
``t (E S + S E)``. The sets grow with ``eps``, so those for ``eps`` hold the
spectra along the whole path. An eigenvalue at 0 stays within
``+- eps^2 R``, where Weyl's inequality alone allows ``+- 2 eps R``.
"""

from __future__ import annotations

import numpy as np

from ._exact import UNIT


def bands(lam, eps: float, radius: float, slack: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """``(lo, hi)``: the ends of ``J_k`` for eigenvalues known to within
    ``slack`` of ``lam`` (arrays of the shape of ``lam``), moved outward by
    ``8 u (|lam| + R)`` for their own float64 rounding.

    Args:
      lam: eigenvalues of ``S`` (or the ends of an interval holding them).
      eps: ``||E||_2 <= eps`` (from 1 on, ``I + F`` may be singular and
        Weyl's ``+- 2 eps R`` alone is used).
      radius: ``R >= ||S||_2``.
      slack: how far each true eigenvalue may be from ``lam``.
    """
    eps = float(eps)
    lam = np.asarray(lam, dtype=np.float64)
    r = float(radius)
    low, high = lam - slack, lam + slack
    pad = 8.0 * UNIT * (np.abs(lam) + slack + r)
    if eps >= 1.0:
        return low - 2.0 * eps * r - pad, high + 2.0 * eps * r + pad
    down, up = (1.0 - eps) ** 2, (1.0 + eps) ** 2
    tail = eps * eps * r
    # theta * lam is nondecreasing in lam for theta > 0: each end is taken at the matching end of [low, high].
    lo = np.maximum(np.minimum(down * low, up * low) - tail, low - 2.0 * eps * r)
    hi = np.minimum(np.maximum(down * high, up * high) + tail, high + 2.0 * eps * r)
    return lo - pad, hi + pad


def interval_band(interval, eps: float, radius: float, deployed=None) -> tuple[float, float]:
    """``[lo(a), hi(b)]``, the union of the ``J_k`` over eigenvalues in
    ``interval = (a, b)`` (each ``J(lam)`` holds ``lam`` and its ends are
    nondecreasing in ``lam``), intersected with ``deployed`` when given."""
    a, b = float(interval[0]), float(interval[1])
    lo = float(bands(a, eps, radius)[0])
    hi = float(bands(b, eps, radius)[1])
    if deployed is not None:
        lo, hi = max(lo, float(deployed[0])), min(hi, float(deployed[1]))
    return lo, hi
