"""Round-off allowances of the float64 certificates, and a filter as a numpy
polynomial series. The exact changes of basis behind the certificates are in
:mod:`stablefilt._exact` (docs/theory.md, sections 4 and 6).
"""

from __future__ import annotations

import numpy as np
from numpy.polynomial import Chebyshev, Polynomial

from ._filters import Basis

#: Relative and absolute allowance added to every rigorous supremum, far above
#: the float64 round-off in evaluating a short series (common practice).
REL_ALLOW = 1e-9
ABS_ALLOW = 1e-12


def as_series(taps_1d, basis: Basis):
    """The filter ``h`` as a numpy series: ``Polynomial`` (monomial basis) or
    ``Chebyshev`` with ``domain=basis.interval`` (numpy maps the domain onto
    ``[-1, 1]`` exactly as :class:`Basis` does)."""
    c = np.asarray(taps_1d, dtype=np.float64)
    if basis.kind == "monomial":
        return Polynomial(c)
    return Chebyshev(c, domain=list(basis.interval))
