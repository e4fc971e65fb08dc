"""``stablefilt demo``: the main job on the invented orchard."""

from __future__ import annotations

import numpy as np

from ._certify import certify_filter
from ._filters import Basis
from ._graph import shift_operator
from .scenario import make_orchard


def run_demo() -> int:
    orchard = make_orchard(seed=0)
    op = shift_operator(orchard.adjacency, "normalized-laplacian")
    print(f"orchard sensor graph: {op.nodes} sensors, {op.edges} links, normalised Laplacian")
    basis = Basis("chebyshev", (0.0, 2.0))
    filters = {
        "sharp low-pass": np.array([0.5, -0.6, 0.2, -0.1, 0.05]),
        "smooth low-pass": np.array([0.5, -0.45, 0.0, 0.0, 0.0]),
    }
    from .cli import _fmt, _table

    rows = []
    for name, taps in filters.items():
        cert = certify_filter(op, taps, basis, [1e-3, 1e-2])
        for b in cert.bounds:
            rows.append([name, _fmt(b.eps), _fmt(b.certified), _fmt(b.published), _fmt(b.lower)])
    print(_table(rows, ["filter", "eps", "certified", "published", "lower"]))
    return 0
