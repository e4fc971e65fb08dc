"""The second-order term of a filter bank through its own kernel
(docs/theory.md 9.8).

For ``S_hat = S + D``, ``D = E S + S E``, the words of ``H(S + D)`` with
exactly two factors ``D`` are, in the eigenbasis of ``S``,
``sum_k E~_ik E~_kj K(lam_i, lam_k, lam_j)`` with the kernel
``K(lam, mu, nu) = (lam + mu)(mu + nu) h^[2](lam, mu, nu)``. Writing
``K_fg = sum T_fg[s, b, t] phi_s(lam) phi_b(mu) phi_t(nu)`` (Chebyshev basis
``phi`` of a split interval holding the spectrum) gives

    ||Q(X)||_F <= eps^2 K b ||X||_F,   b = sup_mu ||beta(mu)||_2,

``beta(mu)_(g,s),(f,t) = sum_b T_fg[s, b, t] phi_b(mu)``, and the words with
three or more factors ``D`` are bounded by ``t3_j = (r + d)^j - sum_{i<=2}
C(j, i) d^i r^(j-i)`` on the coefficients in powers of ``(lam - m)``.
"""

from __future__ import annotations

import dataclasses
from math import comb

import numpy as np

from ._exact import UNIT, second_transform
from ._filterbounds import BankRemainder, bank_remainder, combine
from ._filters import Basis, basis_values
from ._joint import Cover, _sup_lambda_max, split_coefficients
from ._series import with_allowance


@dataclasses.dataclass(frozen=True)
class SecondKernel:
    """The eps-free part of 9.8 for one bank: the coefficients
    ``T_fg[s, b, t]`` on a Chebyshev split, and ``b = sup ||beta(mu)||_2``
    over a cover of the spectrum of ``S``.

    Attributes:
      coefficients: ``T`` ``(F_in, F_out, K, K, K)`` in float64.
      errors: entrywise bounds on their float64 error.
      split: the Chebyshev basis ``phi``.
      sup: ``b``, rigorous (``b'`` of the scaled kernel when ``factor`` is set).
      cover: where ``b`` was taken (recorded with the certificate).
      factor: ``sqrt(left right)`` of the diagonal scalings, or None (``K``, no scaling).
      scales: the scalings ``(d, e)`` per Chebyshev index, or None.
    """

    coefficients: np.ndarray
    errors: np.ndarray
    split: Basis
    sup: float
    cover: str
    factor: float | None = None
    scales: tuple | None = None

    @property
    def operator(self) -> float:
        """``||Q(X)||_F <= eps^2 * operator * ||X||_F``: ``K b``, or
        ``sqrt(left right) b'`` with the diagonal scalings (docs/theory.md 9.8)."""
        k = self.coefficients.shape[2]
        return float(k * self.sup if self.factor is None else self.factor * self.sup)


def second_kernel(taps, basis: Basis, cover: Cover, optimise: bool = False) -> SecondKernel:
    """The :class:`SecondKernel` of a bank ``(K, F_in, F_out)`` (or one filter
    ``(K,)``): ``b`` a rigorous upper bound on ``sup ||beta(mu)||_2`` over the
    points ``cover`` covers (docs/theory.md 9.8); with ``optimise``, also the
    rebalanced form with diagonal scalings, kept when smaller (a second or
    a few for a 16 x 16 bank, so only for the final and ``certify``
    certificates, like the rebalanced factorisations of 9.4)."""
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        taps = taps[:, None, None]
    k, fin, fout = taps.shape
    t, t_err = _kernel_coefficients(taps, basis, cover.split)
    if k < 3:  # degree <= 1: no second-order term
        return SecondKernel(t, t_err, cover.split, 0.0, cover.description)
    plain = _beta_sup(t, t_err, cover)
    kern = SecondKernel(t, t_err, cover.split, plain, cover.description)
    if optimise and plain > 0.0:
        kern = _rescaled(kern, cover, k * plain)
    t.setflags(write=False)
    t_err.setflags(write=False)
    return kern


def _kernel_coefficients(taps, basis: Basis, split: Basis) -> tuple[np.ndarray, np.ndarray]:
    """``T_fg[s, b, t]`` of a bank ``(K, F_in, F_out)`` on the Chebyshev
    ``split`` (``(F_in, F_out, K, K, K)``, float64) and an entrywise bound on
    their error (docs/theory.md 9.8); zeros for degree at most 1."""
    k, fin, fout = taps.shape
    if k < 3:
        z = np.zeros((fin, fout, k, k, k))
        return z, z
    tr = second_transform(k, basis, split)  # (s, b, t, j)
    t = np.einsum("sbtj,jfg->fgsbt", tr, taps, optimize=True)
    t_err = 2.0 * (k + 2) * UNIT * np.einsum("sbtj,jfg->fgsbt", np.abs(tr), np.abs(taps), optimize=True)
    return t, t_err


def product_kernel(taps, prev_taps, basis: Basis, cover: Cover, optimise: bool = False) -> SecondKernel:
    """The second-order kernel of the bank ``taps`` (``(K, F_in, F_out)``,
    ``K >= 3``) after the bank ``prev_taps`` (``H'``, ``(K', F_p, F_in)``):
    ``K''_pg(lam, mu, nu) = sum_f K_fg(lam, mu, nu) h'_pf(nu)`` on ``cover``'s
    split, so that ``||Q(H' x)||_F <= eps^2 operator ||x||_F`` with
    ``operator = sqrt(l r'') b''`` (docs/theory.md 9.8, "Through the previous
    bank"); ``optimise`` adds diagonal scalings, kept when smaller."""
    t, t_err = _kernel_coefficients(np.asarray(taps, dtype=np.float64), basis, cover.split)  # [s, b, t]
    fin, fout, k = t.shape[:3]
    c, dc = split_coefficients(prev_taps, basis, cover.split)  # (K', F_p, F_in)
    kp, fp = c.shape[0], c.shape[1]
    ku = k + kp - 1
    out = np.zeros((fp, fout, k, k, ku))
    err = np.zeros_like(out)
    size = np.zeros_like(out)  # sum of |terms| added into each entry, for the rounding of the sums
    at = np.abs(t)
    for ti in range(k):
        for m in range(kp):
            part = 0.5 * np.einsum("fgsb,pf->pgsb", t[..., ti], c[m])
            part_err = 0.5 * (np.einsum("fgsb,pf->pgsb", t_err[..., ti], np.abs(c[m]))
                              + np.einsum("fgsb,pf->pgsb", at[..., ti] + t_err[..., ti], dc[m]))
            part_abs = 0.5 * np.einsum("fgsb,pf->pgsb", at[..., ti], np.abs(c[m]))
            for u in (ti + m, abs(ti - m)):
                out[..., u] += part
                err[..., u] += part_err
                size[..., u] += part_abs
    # Each entry is a float64 sum of at most 2 k kp fin products (each rounded once).
    err = err + 2.0 * (2 * k * kp * fin + 2) * UNIT * size
    sup = _beta_sup(out, err, cover)
    factor = float(np.sqrt(_weighted_sup(np.ones(k), cover) * _weighted_sup(np.ones(ku), cover))) * (1 + 8 * UNIT)
    prod = SecondKernel(out, err, cover.split, sup, cover.description, factor, None)
    if optimise and sup > 0.0:
        prod = _rescaled(prod, cover, factor * sup)
    out.setflags(write=False)
    err.setflags(write=False)
    return prod


def _rescaled(kern: SecondKernel, cover: Cover, current: float) -> SecondKernel:
    """``kern`` with the diagonal scalings per Chebyshev index of
    docs/theory.md 9.8 ("Rebalanced") when its checked bound ``sqrt(l r) b'``
    is below ``current`` (the operator bound without them), else ``kern``.
    The float64 scaling adds two roundings per coefficient to the error bound."""
    t, t_err = kern.coefficients, kern.errors
    d, e = _scalings(t, cover)
    if np.all(d == 1.0) and np.all(e == 1.0):
        return kern
    de = d[None, None, :, None, None] * e[None, None, None, None, :]
    ts = t / de
    es = (t_err / de) * (1 + 4 * UNIT) + 4 * UNIT * np.abs(ts)
    scaled = _beta_sup(ts, es, cover)
    factor = float(np.sqrt(_weighted_sup(d, cover) * _weighted_sup(e, cover))) * (1 + 8 * UNIT)
    if factor * scaled < current:
        return dataclasses.replace(kern, sup=scaled, factor=factor, scales=(d, e))
    return kern


#: Objective evaluations and points of the search for the diagonal scalings
#: (the bound is checked on every point of the cover).
SCALE_EVALS = 600
SCALE_POINTS = 16
SCALE_ROUNDS = 3


def _beta_sup(t, t_err, cover: Cover) -> float:
    """Rigorous ``sup ||beta(mu)||_2`` over ``cover`` for coefficients ``t``
    ``(F_in, F_out, K, K, K_t)`` given to within ``t_err``."""
    fin, fout, k = t.shape[:3]
    kt = t.shape[4]  # the nu-side index: K, or K + K' - 1 for a product kernel
    # P[(f,t), b, (f',u), c] = sum_{g,s} T_fg[s,b,t] T_f'g[s,c,u]
    p = np.einsum("fgsbt,hgscu->ftbhuc", t, t, optimize=True).reshape(1, fin * kt * k, fin * kt * k)
    terms = fout * k
    at = np.abs(t)
    p_err = (np.einsum("fgsbt,hgscu->ftbhuc", at, t_err, optimize=True)
             + np.einsum("fgsbt,hgscu->ftbhuc", t_err, at + t_err, optimize=True)
             + 2.0 * (terms + 2) * UNIT * np.einsum("fgsbt,hgscu->ftbhuc", at, at, optimize=True))
    # Points in chunks, so that the matrices evaluated at once stay near 4M entries.
    step = max(1, 4_000_000 // (fin * kt * k) ** 2)
    top = max(float(_sup_lambda_max(p, p_err.reshape(p.shape), fin * kt, k,
                                    dataclasses.replace(cover, t=cover.t[i:i + step]))[0])
              for i in range(0, len(cover.t), step))
    return float(with_allowance(np.sqrt(max(top, 0.0)), 0.0))


def _weighted_sup(w, cover: Cover) -> float:
    """Rigorous ``sup sum_s w_s^2 T_s(t)^2`` over ``cover`` (a scalar polynomial
    ``phi^T diag(w^2) phi``; ``w^2`` rounded once)."""
    k = len(w)
    p = np.diag(np.asarray(w, dtype=np.float64) ** 2)[None]
    return float(_sup_lambda_max(p, 2 * UNIT * p, 1, k, cover)[0])


def _largest_top(gram) -> float:
    """``max_p lambda_max(gram[p])`` for positive semidefinite ``gram``
    ``(P, n, n)``, skipping the points whose Frobenius norm (never below
    ``lambda_max``) is already below the largest found: the same value as
    over every point, computed first at the point of largest norm."""
    fro = np.sqrt(np.einsum("pij,pij->p", gram, gram))
    order = np.argsort(-fro)
    best = float(np.linalg.eigvalsh(gram[order[0]])[-1])
    rest = order[1:][fro[order[1:]] * (1 + 1e-9) >= best]
    if rest.size:
        best = max(best, float(np.max(np.linalg.eigvalsh(gram[rest])[:, -1])))
    return best


def _scalings(t, cover: Cover) -> tuple[np.ndarray, np.ndarray]:
    """Scalings ``(d, e)`` per Chebyshev index lowering
    ``sqrt(sup sum d_s^2 T_s^2 sup sum e_t^2 T_t^2) sup ||D^-1 beta E^-1||``
    at up to ``SCALE_POINTS`` points of the cover (Nelder-Mead on the
    logarithms, ``SCALE_EVALS`` evaluations at most; scipy.optimize). Only a
    proposal: the bound is recomputed for it on the whole cover."""
    from scipy.optimize import minimize

    fin, fout, k = t.shape[:3]
    kt = t.shape[4]  # K, or K + K' - 1 for a product kernel
    pts = cover.t[np.unique(np.linspace(0, len(cover.t) - 1, SCALE_POINTS).astype(int))]
    phi = np.polynomial.chebyshev.chebvander(pts, k - 1)  # (P, K)
    phi_t = np.polynomial.chebyshev.chebvander(pts, kt - 1)  # (P, K_t)
    beta = np.einsum("fgsbt,mb->mgsft", t, phi, optimize=True)  # (P, F_out, K, F_in, K_t)

    def objective(x):
        x = np.clip(x, -30.0, 30.0)
        d, e = np.exp(x[:k]), np.exp(x[k:])
        left, right = np.max(phi**2 @ d**2), np.max(phi_t**2 @ e**2)
        b = beta / d[None, None, :, None, None] / e[None, None, None, None, :]
        b = b.reshape(len(pts), fout * k, fin * kt)
        if not np.all(np.isfinite(b)):
            return np.inf
        # The largest singular value from the smaller Gram matrix's largest
        # eigenvalue: the same figure to rounding, at about half an SVD's cost
        # (measured on the shapes of the demo banks).
        gram = b @ b.transpose(0, 2, 1) if b.shape[1] <= b.shape[2] else b.transpose(0, 2, 1) @ b
        mid = np.sqrt(max(_largest_top(gram), 0.0))
        val = 0.5 * np.log(left * right) + np.log(max(mid, 1e-300))
        return val if np.isfinite(val) else np.inf

    # Nelder-Mead restarted from its own result: a fresh simplex escapes the
    # collapsed one (measured on the demo's second bank: 2 x 600 evaluations
    # lowered K b' from 915 to 791, one run of 3000 to 807).
    x, val = np.zeros(k + kt), objective(np.zeros(k + kt))
    for _ in range(SCALE_ROUNDS):
        res = minimize(objective, x, method="Nelder-Mead", options={"maxfev": SCALE_EVALS, "xatol": 1e-3, "fatol": 1e-5})
        if not (np.all(np.isfinite(res.x)) and res.fun < val):
            break
        done = res.fun > val - 1e-3  # less than 0.1% lower: the simplex has settled
        x, val = res.x, res.fun
        if done:
            break
    x = np.clip(x - 0.5 * (x[:k].mean() + x[k:].mean()), -30, 30)  # unchanged by d -> c d, e -> e / c
    return np.exp(x[:k]), np.exp(x[k:])


#: Weights ``W = (G / ||G|| + tau I)^-1`` tried for a given input (``inf``: ``W = I``).
TAUS = (np.inf, 0.3, 0.1, 0.03, 0.01)


@dataclasses.dataclass(frozen=True)
class SecondOrder:
    """The bank's remainder at one eps through its second-order kernel
    (docs/theory.md 9.8): ``eps^2 K b ||X||_F + sum_j t3_j ||X g_j||_F``,
    or, for a given input with the eigenpairs of ``S``, the weighted form.

    Attributes:
      kernel: the eps-free :class:`SecondKernel`.
      eps: the perturbation size.
      quadratic: ``eps^2 K b``, the bound on the two-factor words per unit ``||X||_F``.
      third: the words with three or more factors ``D``: a
        :class:`~stablefilt._filterbounds.BankRemainder` with tails ``t3_j``.
    """

    kernel: SecondKernel
    eps: float
    quadratic: float
    third: BankRemainder

    def operator(self) -> float:
        """For every ``||X||_F <= 1``."""
        return float(with_allowance(self.quadratic + self.third.operator(), self.quadratic))

    def inputs(self, x, norms=None) -> np.ndarray:
        """Per signal of ``x`` ``(B, N, F_in)``: ``eps^2 K b ||X||_F + sum_j t3_j ||X g_j||_F``
        (``norms``: the ``||X g_j||_F`` of ``self.third``, when already computed)."""
        x = np.asarray(x, dtype=np.float64)
        return self._with_third(self.quadratic * np.sqrt(np.sum(x**2, axis=(1, 2))), self.third.inputs(x, norms))

    @staticmethod
    def _with_third(quad, third):
        return with_allowance(quad + third, quad)

    def spectral(self, x, lam, vecs, slack: float) -> np.ndarray:
        """Per signal of ``x`` ``(B, N, F_in)``, the weighted form of
        docs/theory.md 9.8 with the computed eigenpairs ``lam``, ``vecs`` of
        ``S`` (eigenvalues within ``slack``): ``eps^2 sqrt(K) min_W
        sqrt(c_W tr(W G))`` plus the third-order tail, never above :meth:`inputs`."""
        x = np.asarray(x, dtype=np.float64)
        third = self.third.inputs(x)
        plain = self._with_third(self.quadratic * np.sqrt(np.sum(x**2, axis=(1, 2))), third)
        kern = self.kernel
        t = kern.coefficients
        fin, fout, k = t.shape[0], t.shape[1], t.shape[2]
        if kern.sup == 0.0:
            return plain
        lam = np.asarray(lam, dtype=np.float64)
        n = lam.size
        lo, hi = kern.split.interval
        phi = basis_values(lam, k, kern.split)  # (N, K)
        beta = np.einsum("fgsbt,mb->mgsft", t, phi, optimize=True).reshape(n, fout * k, fin * k)
        gram = np.einsum("mab,mac->mbc", beta, beta, optimize=True)
        # ||beta(mu) - beta(lam_m)||_2 for mu within slack (Markov, |T_b'| <= b^2 in the
        # split's variable), the coefficients' errors, and the evaluation (|phi| <= 1).
        kb = np.arange(k, dtype=np.float64)
        per_b = np.linalg.norm(np.moveaxis(t, 3, 0).reshape(k, -1), axis=1)
        move = slack * float(np.sum(2.0 * kb**2 / (hi - lo) * per_b)) + float(np.linalg.norm(kern.errors)) * k \
            + 4.0 * k * UNIT * float(np.linalg.norm(np.abs(t)))
        dz = slack * float(np.max(2.0 * kb**2 / (hi - lo)))  # |phi_t| moves by at most this
        out = np.empty(x.shape[0])
        for i in range(x.shape[0]):
            xt = vecs.T @ x[i]  # (N, F_in)
            z = np.einsum("jf,jt->jft", xt, phi).reshape(n, fin * k)
            dzn = dz * float(np.linalg.norm(xt)) * np.sqrt(k)
            g = z.T @ z
            gv, gq = np.linalg.eigh(0.5 * (g + g.T))
            top = max(float(gv[-1]), 1e-300)
            best = np.inf
            for tau in TAUS:
                if np.isinf(tau):
                    a = np.eye(fin * k)
                else:
                    a = (gq * np.sqrt(np.maximum(gv, 0.0) / top + tau)) @ gq.T  # W^(-1/2)
                c = np.linalg.eigvalsh(a @ gram @ a)[:, -1].max()
                a_norm = float(np.linalg.norm(a, 2))
                root_c = np.sqrt(max(c, 0.0)) * (1 + 64 * fin * k * UNIT) + move * a_norm
                zw = np.linalg.solve(a, z.T)  # (W^(1/2) Z^T): ||Z W^(1/2)||_F^2 = tr(W G)
                root_tr = float(np.linalg.norm(zw)) * (1 + 64 * n * UNIT) + dzn * float(np.linalg.norm(
                    np.linalg.inv(a), 2))
                best = min(best, root_c * root_tr)
            quad = self.eps * self.eps * np.sqrt(k) * best
            out[i] = quad
        return np.minimum(plain, self._with_third(out, third))


def _tails3(x: float, y: float, k: int) -> np.ndarray:
    """``sum_{i>=3} C(j, i) y^i x^(j-i)`` for ``j < k``, term by term."""
    return np.array([sum(comb(j, i) * y**i * x ** (j - i) for i in range(3, j + 1)) for j in range(k)])


def second_order(taps, basis: Basis, interval, eps: float, kernel: SecondKernel) -> SecondOrder:
    """The :class:`SecondOrder` remainder of a bank at ``eps`` on a graph with
    spectrum in ``interval``, from its :class:`SecondKernel`."""
    br = bank_remainder(taps, basis, interval, eps)
    k = br.coefficients.shape[0]
    a, b = float(interval[0]), float(interval[1])
    mid = 0.5 * (a + b)
    half = max(b - mid, mid - a) * (1 + 4 * UNIT)
    d = 2.0 * eps * max(abs(a), abs(b))
    quad = float(with_allowance(eps * eps * kernel.operator, 0.0))
    third = BankRemainder(_tails3(half, d, k), br.coefficients, br.errors, br.powers)
    return SecondOrder(kernel, float(eps), quad, third)


def operator_remainder(bank: BankRemainder | None, second: SecondOrder | None) -> tuple[float, str] | None:
    """The smaller, for every unit-norm input, of the whole-bank remainder
    (docs/theory.md 9.7) and the second-order kernel form (9.8), with the
    name the certificate's method gives it; None when neither is known."""
    forms = []
    if bank is not None:
        forms.append((bank.operator(), "whole bank, s.9.7"))
    if second is not None:
        forms.append((second.operator(), "second-order kernel, s.9.8"))
    return min(forms, key=lambda f: f[0]) if forms else None


def smallest_remainder(per_filter, bank: BankRemainder | None, second: SecondOrder | None) -> tuple[float, str]:
    """The smallest, for every unit-norm input, of the per-filter remainders
    combined by ``||.||_2`` (docs/theory.md section 5), the whole-bank form
    (9.7) and the second-order kernel form (9.8), with its name."""
    per = (combine(per_filter), "per filter, s.5")
    other = operator_remainder(bank, second)
    return per if other is None or per[0] <= other[0] else other
