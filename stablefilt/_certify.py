"""Certified bounds, in float64, on how much a polynomial filter or filter bank
can change under a relative perturbation of the graph: the assembly of a
filter's certificate on one graph from its constants
(:mod:`stablefilt._filterbounds`) and a realised lower figure
(:mod:`stablefilt._search`).

Model: ``P^T S_hat P = S + E S + S E`` with ``E`` symmetric, ``||E||_2 <= eps``
and ``P`` a permutation (Gama, Bruna, Ribeiro, "Stability Properties of Graph
Neural Networks", IEEE Trans. Signal Processing 68, 2020; this is the form
without a factor 1/2). Bounds are on ``||H(S_hat) - P H(S) P^T||`` in the
operator 2-norm over signals (for a bank: from ``N x F_in`` to ``N x F_out``
signals, Frobenius norm on both). Every formula is in docs/theory.md,
sections 3-6.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._checks import check_eps
from ._compose import bank_change, change_cover, gain_hat, perturbed_cover, radius_and_slack, widened
from ._filterbounds import FilterConstants, bank_remainder, combine, filter_bounds, filter_constants
from ._filters import Basis, check_taps
from ._graph import ShiftOperator
from ._interval import SpectralInterval, construction_interval, spectral_interval
from ._joint import eigen_cover, interval_cover, joint_factor
from ._search import LOWER_EIG_LIMIT, lower_change
from ._second import operator_remainder, second_kernel, second_order


def deployed_interval(kind: str):
    """The interval holding the deployed graph's spectrum when it is rebuilt
    as an operator of the same ``kind`` (docs/theory.md 9.1), with infinite
    ends where the kind fixes none; None for ``as-is`` (nothing is known)."""
    lo, hi = construction_interval(kind)
    if lo is None and hi is None:
        return None
    return (-np.inf if lo is None else float(lo), np.inf if hi is None else float(hi))


def deployed_text(deployed) -> str:
    """The deployment assumption, as recorded beside a certificate."""
    if deployed is None:
        return ("any S_hat = S + E S + S E: its k-th eigenvalue lies within 2 eps R of that of S (Weyl's inequality) "
                "and between (1 - eps)^2 lam_k - eps^2 R and (1 + eps)^2 lam_k + eps^2 R for lam_k >= 0 (mirrored "
                "for lam_k < 0; Ostrowski's theorem; theory s.9.1)")
    return (f"S_hat keeps the kind of S (rebuilt as the same kind of operator after the change), so its spectrum "
            f"lies in [{deployed[0]:g}, {deployed[1]:g}] by construction, and so does every S + t (E S + S E) "
            "(a convex set; theory s.9.1); an assumption about the deployment, not checked here")


MODEL = "relative: P^T S_hat P = S + E S + S E, E symmetric, ||E||_2 <= eps, P a permutation"


NORM = "operator 2-norm over signals (Frobenius over N x F for a bank)"


@dataclasses.dataclass(frozen=True)
class EpsBound:
    """Bounds at one ``eps``. ``certified = first_order + remainder`` is
    rigorous; ``published`` and ``aligned`` are first-order figures (no
    remainder); ``lower`` is a change actually realised."""

    eps: float
    certified: float
    first_order: float
    remainder: float
    published: float
    aligned: float
    lower: float | None
    lower_perturbation: str | None = None
    method: str = "per-filter kernel + remainder"

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


@dataclasses.dataclass(frozen=True)
class Certificate:
    """A filter's certificate on one graph, with its assumptions."""

    nodes: int
    interval: SpectralInterval
    basis: Basis
    delta: float
    constants: FilterConstants
    bounds: tuple[EpsBound, ...]
    assumptions: dict

    def as_dict(self) -> dict:
        return {
            "nodes": self.nodes,
            "interval": [self.interval.lower, self.interval.upper],
            "interval_method": self.interval.method,
            "interval_ends": self.interval.ends(),
            "basis": {"kind": self.basis.kind, "interval": None if self.basis.interval is None else list(self.basis.interval)},
            "constants": self.constants.as_dict(),
            "bounds": [b.as_dict() for b in self.bounds],
            "assumptions": self.assumptions,
        }


def certify_filter(op: ShiftOperator, taps, basis: Basis, eps_list, *, delta: float = 8.0,
                   interval: SpectralInterval | None = None, use_eigenvalues: bool | None = None,
                   lower: bool = True, deployed=None, rebalance: bool = True) -> Certificate:
    """Certificate of a filter or bank on one graph for each ``eps``.

    Args:
      op: the shift operator ``S``.
      taps: ``(K,)`` or ``(K, F_in, F_out)``.
      basis: the filter's basis.
      eps_list: sizes of the relative perturbation, each ``>= 0``.
      delta: eigenvector misalignment in the published bound; 8 is the
        largest possible value (docs/theory.md section 2).
      interval: a certified spectral interval; computed when omitted.
      use_eigenvalues: also bound over the graph's eigenvalues (default:
        when the interval computed them).
      lower: compute the realised ``lower`` figure.
      deployed: the interval holding the deployed graph's spectrum when it
        keeps the kind of ``op`` (:func:`deployed_interval`), or None.
      rebalance: optimise the joint factorisation (docs/theory.md 9.4).

    Returns:
      :class:`Certificate`.
    """
    taps = check_taps(taps).astype(np.float64)
    eps_list = [check_eps(e) for e in eps_list]
    if interval is None:
        interval = spectral_interval(op)
    lam = interval.eigenvalues if (use_eigenvalues or use_eigenvalues is None) else None
    iv = (interval.lower, interval.upper)
    consts = filter_constants(taps, basis, iv, lam)
    n = op.nodes
    eig = None
    if lower and lam is not None and n <= LOWER_EIG_LIMIT:
        w, v = np.linalg.eigh(op.dense())
        eig = (w, v)
    radius, slack = radius_and_slack(interval, lam)
    joint = joint_factor(taps, basis, change_cover(lam, iv, slack), optimise=rebalance).constant
    kern = _second_kernel(taps, basis, lam, slack, iv, rebalance)
    bounds = []
    for eps in eps_list:
        eps = float(eps)
        fb = filter_bounds(taps, basis, iv, eps, consts, lam)
        wide = widened(iv, eps, interval.radius, deployed)
        rem, form = operator_remainder(bank_remainder(taps, basis, iv, eps),
                                       None if kern is None else second_order(taps, basis, iv, eps, kern))
        pcover = perturbed_cover(lam, iv, eps, radius, slack, deployed)
        g_hat = gain_hat(taps, basis, wide, lam, pcover)
        ch = bank_change(taps, basis, eps, first_order=fb.first_order, remainder=fb.remainder, joint=joint,
                         radius=radius, path_cover=pcover, gains=(float(consts.bank_sup), g_hat),
                         bank_remainder=rem, remainder_form=form)
        published = combine(2 * np.asarray(consts.integral_lipschitz) * (1 + delta * np.sqrt(n)) * eps)
        al = consts.aligned_spectrum if consts.aligned_spectrum is not None else 2 * np.asarray(consts.integral_lipschitz)
        aligned = combine(np.asarray(al) * eps)
        low, how = (lower_change(op, taps, basis, eps, eig=eig) if lower else (None, None))
        bounds.append(EpsBound(eps, ch.certified, ch.first, ch.second, published, aligned, low, how, ch.method))
    assumptions = {
        "perturbation_model": MODEL,
        "norm": NORM,
        "spectral_interval": [float(interval.lower), float(interval.upper)],
        "interval_method": {"lower": interval.lower_method, "upper": interval.upper_method},
        "first_order": "kernel (Schur) bound: PSD split of the Gamma kernel in Chebyshev and monomial bases, "
                       + ("min over the interval and the graph's eigenvalues" if lam is not None else "over the interval"),
        "remainder": "non-asymptotic second-order remainder, min of origin and centred forms (theory s.5 item 5), "
                     "of the whole-bank form (s.9.7) and of the second-order kernel form (s.9.8)",
        "certified": "the smallest of: per-filter kernel bounds + remainders (bank: spectral norm of the per-filter "
                     "bounds); joint kernel bound + remainders (theory s.9.2); the whole-path bound (s.9.1); the "
                     "trivial sup ||H|| over spec S plus over spec S_hat; each with a round-off allowance; "
                     "first_order and remainder are the parts of the one kept (its 'method')"
                     + ("; joint factorisation rebalanced (s.9.4)" if rebalance else ""),
        "deployed_graph": deployed_text(deployed),
        "published": f"2 C (1 + delta sqrt(N)) eps with delta = {delta:g}, first order only "
                     "(Gama, Bruna, Ribeiro 2020, Thm 2; exact form from memory)",
        "aligned": "2 max |lam h'(lam)| eps, first order, for E commuting with S",
        "lower": "largest change realised by constructed perturbations (power iteration on the change, at most "
                 "40 iterations and 3 s in all)",
        "suprema": consts.method,
    }
    return Certificate(n, interval, basis, float(delta), consts, tuple(bounds), assumptions)


#: Largest ``F_in K`` for which the second-order kernel's supremum is taken
#: over the interval (a grid of matrices of that size); with the eigenvalues
#: it is always taken.
SECOND_INTERVAL_LIMIT = 64


def _second_kernel(taps, basis, lam, slack: float, iv, optimise: bool = False):
    """The bank's :class:`~stablefilt._second.SecondKernel` over the
    eigenvalues, or over the interval for small banks, or None."""
    t = np.asarray(taps)
    fin_k = t.shape[0] * (t.shape[1] if t.ndim == 3 else 1)
    if lam is not None:
        return second_kernel(taps, basis, eigen_cover(lam, slack), optimise)
    if fin_k <= SECOND_INTERVAL_LIMIT:
        return second_kernel(taps, basis, interval_cover(*iv), optimise)
    return None
