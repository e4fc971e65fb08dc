"""What an input-specific bound computes that does not depend on eps, kept
between the sizes at which the same signals are bounded (a certified radius
evaluates the bound at up to 20 sizes; stress at every sample's size).

Each entry records the objects it was computed from (the input array, the
factorisation), and is used only when a later call passes those same
objects (``is``, or equal coefficients for a remainder): a stale entry is
recomputed, never reused. Nothing here changes a bound; it only saves the
layers' float64 forward passes, the sparse quadratic forms of the joint
bounds (docs/theory.md 9.2, without eigenvectors) and the remainders'
``||X g_j||_F`` (9.7, 9.8).
"""

from __future__ import annotations

from typing import Callable

import numpy as np


class InputMemo:
    """A cache of eps-free parts for one set of signals; create one per
    signal array and pass it to every call on that array (with any of the
    model's constants: the layers' outputs are shared between them)."""

    def __init__(self):
        self._array = None
        self._layers: dict = {}
        self._quads: dict = {}
        self._norms: list = []

    def array(self, x) -> np.ndarray:
        """``x`` in float64, the same array object on every call with the same
        ``x`` (what the other entries are checked against)."""
        if self._array is None or self._array[0] is not x:
            self._array = (x, np.asarray(x, dtype=np.float64))
        return self._array[1]

    def layer(self, i: int, z, compute: Callable):
        """``compute(i, z) -> (pre, out)`` of layer ``i``, or the kept result when ``z`` is the same array."""
        hit = self._layers.get(i)
        if hit is not None and hit[0] is z:
            return hit[1]
        res = compute(i, z)
        if hit is None:  # the first array kept: a subset of the signals never displaces it
            self._layers[i] = (z, res)
        return res

    def quadratics(self, key, z, factors, compute: Callable):
        """``compute(factors, z)`` (their :func:`stablefilt._joint.sparse_quadratics`),
        or the kept result for the same ``z`` and factors."""
        # Keyed by the factors' ids too, so two sets of constants can share a
        # memo; the entry holds the factors, so their ids are not reused meanwhile.
        key = (key, tuple(id(f) for f in factors))
        hit = self._quads.get(key)
        if hit is not None and hit[0] is z and all(a is b for a, b in zip(hit[1], factors)):
            return hit[2]
        res = compute(factors, z)
        self._quads[key] = (z, tuple(factors), res)
        return res

    def norms(self, z, remainder) -> np.ndarray:
        """``remainder.input_norms(z)`` (a
        :class:`~stablefilt._filterbounds.BankRemainder`), or the kept result
        for the same ``z`` and equal coefficients."""
        g = remainder.coefficients
        for zk, gk, res in self._norms:
            if zk is z and gk.shape == g.shape and np.array_equal(gk, g):
                return res
        res = remainder.input_norms(z)
        self._norms.append((z, np.array(g, copy=True), res))
        return res
