"""The relu's sign pattern through the graph's own quadratic form
(docs/theory.md 9.9).

For relu and leaky relu, ``sigma(v) = c_a v + c_b |v|``, and the composition
of 9.3 bounds the sign term ``||(H - H_hat) |V| ||`` by ``Delta ||V||``. When
the off-diagonal entries of ``S`` all have one sign, ``|V|^T S |V|`` is on one
side of ``V^T S V`` (no larger for a Laplacian), so a linear majorant
``G_B(lam) <= (alpha_0 + beta lam) I`` of the joint factorisation's input
side gives

``||first-order change of |V| || <= eps sqrt(sup a) ||(alpha_0 I + beta S)^(1/2) V||_F + eps ||Res|| K_max ||V||``

and, for ``V = H' x + 1_N b^T`` with ``||x|| <= n'``,
``||(alpha_0 I + beta S)^(1/2) V||_F <= sqrt(m) n' + sqrt(alpha_0 N ||b||^2 + beta ||b||^2 1^T S 1)``
with ``m = sup (alpha_0 + beta lam) ||H'(lam)||^2``. Everything is spectral:
no eigenvectors.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from ._exact import UNIT, gamma
from ._filters import Basis, run_filter
from ._joint import Cover, JointFactor, gain_gram, point_tops, split_coefficients
from ._series import REL_ALLOW

#: Slopes ``|beta|`` of the linear majorant tried, relative to ``sup b / (hi - lo)``.
BETA_STEPS = np.concatenate([[0.0], np.geomspace(1e-2, 1e2, 25)])


@dataclasses.dataclass(frozen=True)
class SignTerm:
    """Eps-free pieces of the sign-term bound of one bank whose input is
    ``sigma(V)``, ``V = H' x + c`` (docs/theory.md 9.9).

    With ``W = alpha_0 I + beta S``, ``||W^(1/2) (H' x + c)||^2 = x^T H'^T W H' x
    + 2 x^T H'^T W c + c^T W c <= m n'^2 + 2 n' ||H'^T W c|| + c^T W c``
    (Cauchy-Schwarz on the cross term only, as for the clean path of 9.3).

    Attributes:
      root_a: ``sqrt(sup a)`` of the bank's joint factorisation.
      residual: ``||Res|| K_max``, the factorisation residual's share.
      m: per slope tried, ``m``.
      cross: per slope tried, a bound on ``||H'^T W c||_F``.
      bias2: per slope tried, a bound on ``c^T W c``.
      betas: the slopes tried.
    """

    root_a: float
    residual: float
    m: np.ndarray
    cross: np.ndarray
    bias2: np.ndarray
    betas: np.ndarray

    def weighted_norm(self, n_input: float) -> float:
        """A bound on ``min_beta ||W^(1/2) V||_F`` over ``||x|| <= n_input``."""
        plain = np.sqrt(self.m) * n_input + np.sqrt(self.bias2)
        quad = np.sqrt(np.maximum(self.m * n_input**2 + 2.0 * n_input * self.cross + self.bias2, 0.0))
        return float(np.min(np.minimum(plain, quad * (1 + REL_ALLOW))))

    def bound(self, eps: float, n_input: float, n: float, remainder: float) -> float:
        """Bound on ``||(H - H_hat) |V| ||`` for ``||x|| <= n_input``, ``||V|| <= n``,
        ``remainder`` the bank's remainder for every unit input."""
        first = eps * self.root_a * self.weighted_norm(n_input)
        return float((first + (eps * self.residual + remainder) * n) * (1 + REL_ALLOW))


def off_diagonal_sign(matrix) -> int:
    """``+1`` when every off-diagonal entry of ``S`` is ``<= 0``, ``-1`` when every
    one is ``>= 0``, else 0 (the contraction then gives nothing)."""
    m = sp.csr_matrix(matrix)
    coo = m.tocoo()
    off = coo.data[coo.row != coo.col]
    if off.size == 0 or np.all(off <= 0):
        return 1
    if np.all(off >= 0):
        return -1
    return 0


def _point_tops(p, p_err, f: int, k: int, cover):
    """Per point of ``cover``, ``lambda_max(G)`` plus the error bound of ``G``
    (``G = phi^T P phi``), and the slope bound (:func:`stablefilt._joint.point_tops`)."""
    tops, err, slope = point_tops(p[None], p_err[None], f, k, cover)
    return tops[0] + float(err[0]), float(slope[0])


@dataclasses.dataclass(frozen=True)
class PreviousBank:
    """What the sign term needs of the bank ``H'`` and bias ``b`` before the
    nonlinearity, on one cover (shared by every bank that reads that layer's
    output: the next layer and the readout composite).

    Attributes:
      sign: :func:`off_diagonal_sign` of ``S`` (never 0 here).
      cover: the cover ``gain`` is on.
      gain: per cover point, ``||H'||^2`` bounded on the point's neighbourhood.
      nodes: ``N``.
      bias2: ``||b||^2`` rounded up (0 without bias).
      ones: ``(1^T S 1, a bound on its float64 error)``.
      u1, u2: ``H'^T c`` and ``H'^T S c`` (``c = 1_N b^T``) in float64, or None.
    """

    sign: int
    cover: Cover
    gain: np.ndarray
    nodes: int
    bias2: float
    ones: tuple
    u1: np.ndarray | None
    u2: np.ndarray | None


def previous_bank(prev_taps, basis: Basis, prev_bias, matrix, cover) -> PreviousBank | None:
    """The :class:`PreviousBank` of ``H'`` (taps ``prev_taps``) and bias
    ``prev_bias`` (or None) on the graph ``matrix``, over ``cover``; None when
    the off-diagonal entries of ``S`` have both signs."""
    sgn = off_diagonal_sign(matrix)
    if sgn == 0:
        return None
    p, p_err, fh, kh = gain_gram(*split_coefficients(prev_taps, basis, cover.split))
    tops_h, slope_h = _point_tops(p, p_err, fh, kh, cover)
    hv = np.maximum(tops_h + cover.gap * slope_h, 0.0)  # ||H'||^2 on each point's neighbourhood
    m = sp.csr_matrix(matrix).astype(np.float64)
    n = m.shape[0]
    if prev_bias is None:
        return PreviousBank(sgn, cover, hv, n, 0.0, (0.0, 0.0), None, None)
    b = np.asarray(prev_bias, dtype=np.float64)
    b2 = float(np.sum(b**2)) * (1 + 4 * UNIT)
    ones = (float(m.sum()), gamma(m.nnz + 1) * float(np.abs(m.data).sum()))
    # H'^T c and H'^T S c in float64 by the recurrence with the transposed
    # taps (H' symmetric in the graph); ||H'^T W c|| = ||alpha_0 u1 + beta u2||.
    c = np.ones((n, 1)) * b[None, :]
    t = np.swapaxes(np.asarray(prev_taps, dtype=np.float64), 1, 2)
    u1 = run_filter(lambda z: m @ z, t, c, basis)
    u2 = run_filter(lambda z: m @ z, t, m @ c, basis)
    return PreviousBank(sgn, cover, hv, n, b2, ones, u1, u2)


def sign_term(joint: JointFactor, prev: PreviousBank | None) -> SignTerm | None:
    """The :class:`SignTerm` of a bank (its ``joint`` factorisation) whose input
    is ``sigma(H' x + 1_N b^T)``, ``prev`` the :class:`PreviousBank` of ``H'``
    and ``b`` on the same cover; None when ``prev`` is None."""
    if prev is None:
        return None
    cover = joint.cover
    if prev.cover is not cover:
        raise ValueError("the sign term needs the previous bank on the cover of the joint factorisation.")
    lo, hi = cover.split.interval
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    lam = mid + half * cover.t
    lam_pad = 4 * UNIT * (abs(mid) + half)  # float64 error of lam_i (a few roundings)
    dlam = cover.gap * half + lam_pad  # every covered point is within dlam of some lam_i
    tops_b, slope_b = _point_tops(joint.pb, joint.pb_err, joint.fin, joint.kr, cover)
    scale = float(np.max(tops_b)) / max(hi - lo, 1e-300)
    betas = prev.sign * BETA_STEPS * scale
    ms, cross, bias2 = [], [], []
    for beta in betas:
        alpha0 = float(np.max(tops_b - beta * lam)) + cover.gap * (slope_b + abs(beta) * half) + abs(beta) * lam_pad
        weight = np.maximum(alpha0 + beta * lam + abs(beta) * dlam, 0.0)
        ms.append(float(np.max(weight * prev.gain)))
        if prev.u1 is None:
            cross.append(0.0)
            bias2.append(0.0)
        else:
            # 1^T S 1 rounded up in the direction beta multiplies it; the
            # cross term with the allowance of bias_cross (1e-9 relative, common practice).
            s1 = prev.ones[0] + np.sign(beta) * prev.ones[1]
            bias2.append(max(alpha0 * prev.nodes * prev.bias2 + beta * prev.bias2 * s1, 0.0))
            cross.append(float(np.linalg.norm(alpha0 * prev.u1 + beta * prev.u2)) * (1 + 1e-9)
                         + 1e-9 * (alpha0 * float(np.linalg.norm(prev.u1))
                                   + abs(beta) * float(np.linalg.norm(prev.u2))))
    up = 1 + 8 * UNIT
    return SignTerm(float(np.sqrt(max(joint.sup_a, 0.0))), float(joint.res) * np.sqrt(joint.k * joint.kr),
                    np.asarray(ms) * up, np.asarray(cross) * up, np.asarray(bias2) * up, np.asarray(betas))
