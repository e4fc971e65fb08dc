"""Polynomial graph filters and filter banks: bases, frequency responses and
application to signals by sparse products.

A filter is ``h(lam) = sum_k c_k p_k(lam)`` with taps ``c`` of shape ``(K,)``;
a bank has taps of shape ``(K, F_in, F_out)`` and maps ``X`` (``N x F_in``) to
``Y = sum_k p_k(S) X c_k`` (``N x F_out``). Bases: monomials ``lam^k``, or
Chebyshev polynomials ``T_k(t)`` of ``t = (2 lam - a - b) / (b - a)`` for a
mapping interval ``[a, b]``.

The same code serves the float32 JAX path (``xp=jax.numpy``) and the float64
numpy path (``xp=numpy``); only the product function differs.
"""

from __future__ import annotations

from typing import Callable, NamedTuple

import numpy as np

from ._errors import FilterError

BASES = ("monomial", "chebyshev")


class Basis(NamedTuple):
    """Polynomial basis of a filter.

    Attributes:
      kind: ``"monomial"`` or ``"chebyshev"``.
      interval: ``(a, b)`` with ``a < b``, the interval mapped to ``[-1, 1]``
        for Chebyshev; ``None`` for monomials.

    Hashable, so it can be a static argument of ``jax.jit``.
    """

    kind: str = "monomial"
    interval: tuple[float, float] | None = None

    def mapping(self) -> tuple[float, float]:
        """``(alpha, beta)`` with ``t = alpha * lam + beta``."""
        a, b = self.interval
        return 2.0 / (b - a), -(a + b) / (b - a)


def make_basis(kind: str = "monomial", interval=None) -> Basis:
    """Validated :class:`Basis`.

    Raises:
      FilterError: unknown kind, Chebyshev without an interval, or an
        interval that is not two finite numbers with ``a < b``.
    """
    if kind not in BASES:
        raise FilterError(f"unknown basis {kind!r}; expected one of {', '.join(BASES)}.")
    if kind == "monomial":
        return Basis("monomial", None)
    if interval is None:
        raise FilterError("a Chebyshev basis needs an interval [a, b] to map onto [-1, 1].")
    try:
        iv = np.asarray(interval, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        iv = np.full(1, np.nan)  # not numbers: reported below
    if iv.shape != (2,) or not np.all(np.isfinite(iv)):
        raise FilterError(f"the Chebyshev interval must be two finite numbers [a, b]; got {np.asarray(interval).tolist()}.")
    if not iv[0] < iv[1]:
        raise FilterError(f"the Chebyshev interval [a, b] needs a < b; got [{iv[0]:g}, {iv[1]:g}].")
    return Basis("chebyshev", (float(iv[0]), float(iv[1])))


def check_taps(taps, name: str = "taps") -> np.ndarray:
    """Taps as a float array of shape ``(K,)`` or ``(K, F_in, F_out)``."""
    arr = np.asarray(taps)
    if arr.ndim not in (1, 3):
        raise FilterError(f"{name} must have shape (K,) or (K, F_in, F_out); got shape {arr.shape}.")
    if arr.shape[0] < 1 or arr.size == 0:
        raise FilterError(f"{name} must hold at least one tap; got shape {arr.shape}.")
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise FilterError(f"{name} must be real numbers.")
    if not np.all(np.isfinite(arr)):
        raise FilterError(f"{name} hold NaN or infinite values.")
    return arr


def basis_values(lam, k: int, basis: Basis, xp=np):
    """``p_j(lam)`` for ``j < k``, shape ``lam.shape + (k,)``."""
    lam = xp.asarray(lam)
    if basis.kind == "monomial":
        x = lam
    else:
        al, be = basis.mapping()
        x = al * lam + be
    out = [xp.ones_like(x)]
    if k > 1:
        out.append(x)
    for _ in range(2, k):
        if basis.kind == "monomial":
            out.append(out[-1] * x)
        else:
            out.append(2 * x * out[-1] - out[-2])
    return xp.stack(out, axis=-1)


def basis_derivatives(lam, k: int, basis: Basis, xp=np):
    """``p_j'(lam)`` for ``j < k``, shape ``lam.shape + (k,)``.

    Chebyshev: ``T_j'(t) = j U_{j-1}(t)`` times ``dt/dlam`` (handbook fact,
    Abramowitz & Stegun 22.8); monomials: ``j lam^(j-1)``.
    """
    lam = xp.asarray(lam)
    zero = xp.zeros_like(lam)
    if basis.kind == "monomial":
        vals = basis_values(lam, max(k - 1, 1), basis, xp)
        out = [zero] + [j * vals[..., j - 1] for j in range(1, k)]
        return xp.stack(out, axis=-1)
    al, be = basis.mapping()
    t = al * lam + be
    u = [xp.ones_like(t), 2 * t]
    while len(u) < k - 1:
        u.append(2 * t * u[-1] - u[-2])
    out = [zero] + [al * j * u[j - 1] for j in range(1, k)]
    return xp.stack(out, axis=-1)


def frequency_response(taps, lam, basis: Basis, xp=np):
    """``h(lam)``: shape ``lam.shape`` for taps ``(K,)``, or
    ``lam.shape + (F_in, F_out)`` for a bank."""
    taps = xp.asarray(taps)
    phi = basis_values(lam, taps.shape[0], basis, xp)
    return xp.tensordot(phi, taps, axes=([-1], [0]))


def response_derivative(taps, lam, basis: Basis, xp=np):
    """``h'(lam)``, shapes as :func:`frequency_response`."""
    taps = xp.asarray(taps)
    dphi = basis_derivatives(lam, taps.shape[0], basis, xp)
    return xp.tensordot(dphi, taps, axes=([-1], [0]))


def run_filter(matvec: Callable, taps, x, basis: Basis, xp=np):
    """``sum_k p_k(S) x c_k`` by ``K - 1`` products ``matvec(z) = S z``.

    Args:
      matvec: the product with the shift operator, on arrays shaped like ``x``.
      taps: ``(K,)`` or ``(K, F_in, F_out)``.
      x: ``(N,)`` or ``(N, F)`` for taps ``(K,)`` (every column filtered
        alike); ``(N, F_in)`` for a bank.
      basis: the :class:`Basis`.
      xp: ``numpy`` or ``jax.numpy``.

    Returns:
      ``y`` shaped like ``x`` (taps ``(K,)``) or ``(N, F_out)`` (bank).
    """
    taps = xp.asarray(taps)
    k = taps.shape[0]
    bank = taps.ndim == 3
    if bank and x.ndim > 2:
        # Batch axes folded into rows for the tap products (a dense product
        # with one contracted axis; its gradient a plain matrix product too):
        # the sparse products see the original shape.
        y = run_filter(lambda z: matvec(z.reshape(x.shape[:-1] + z.shape[-1:])).reshape(z.shape), taps,
                       x.reshape(-1, x.shape[-1]), basis, xp=xp)
        return y.reshape(x.shape[:-1] + y.shape[-1:])
    if bank and k > 1 and xp is not np and basis.kind == "monomial" and x.shape[0] * x.shape[1] >= _loop_threshold():
        from . import _looped  # the JAX path only: the numpy path never imports jax here

        if taps.shape[2] <= taps.shape[1]:
            return _looped.bank_from_last(matvec, taps, x)
        return _looped.bank_from_first(matvec, taps, x)
    if bank and k > 1 and taps.shape[2] <= taps.shape[1]:
        return run_filter_backward(matvec, taps, x, basis)

    def term(z, c):
        return z @ c if bank else z * c

    if basis.kind == "chebyshev":
        al, be = basis.mapping()

        def step(z):
            return al * matvec(z) + be * z
    else:
        step = matvec
    prev = x
    y = term(x, taps[0])
    if k == 1:
        return y
    cur = step(x)
    y = y + term(cur, taps[1])
    for j in range(2, k):
        if basis.kind == "chebyshev":
            prev, cur = cur, 2 * step(cur) - prev
        else:
            prev, cur = cur, step(cur)
        y = y + term(cur, taps[j])
    return y


def _loop_threshold() -> int:
    from ._looped import loop_threshold

    return loop_threshold()


def run_filter_backward(matvec: Callable, taps, x, basis: Basis):
    """A bank ``sum_k p_k(S) x c_k`` summed from the last tap down:
    Horner's rule for monomials, ``b = x c_k + S b``, and Clenshaw's
    recurrence for Chebyshev polynomials, ``b_k = x c_k + 2 t(S) b_{k+1} -
    b_{k+2}``, ``y = x c_0 + t(S) b_1 - b_2`` (Clenshaw, "A note on the
    summation of Chebyshev series", 1955; handbook fact). ``K - 1`` products
    of width ``F_out`` (the forward recurrence's are ``F_in`` wide, so this
    is used when ``F_out <= F_in``); only two ``N x F_out`` running terms
    and no ``p_k(S) x`` to keep for the gradient, which in ``S`` linear
    needs only ``x``."""
    k = taps.shape[0]
    if x.ndim > 2:
        # Batches folded into rows for the tap products: a dense product with
        # one contracted axis (its gradient a plain matrix product too).
        y = run_filter_backward(lambda z: matvec(z.reshape(x.shape[:-1] + z.shape[-1:])).reshape(z.shape),
                                taps, x.reshape(-1, x.shape[-1]), basis)
        return y.reshape(x.shape[:-1] + y.shape[-1:])
    if basis.kind == "chebyshev":
        al, be = basis.mapping()

        def step(z):
            return al * matvec(z) + be * z

        b1 = x @ taps[k - 1]
        b2 = None
        for j in range(k - 2, 0, -1):
            b = x @ taps[j] + 2 * step(b1)
            if b2 is not None:
                b = b - b2
            b2, b1 = b1, b
        y = x @ taps[0] + step(b1)
        return y if b2 is None else y - b2
    b = x @ taps[k - 1]
    for j in range(k - 2, -1, -1):
        b = x @ taps[j] + matvec(b)
    return b
