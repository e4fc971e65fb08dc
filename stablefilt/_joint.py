"""Joint and whole-path bounds for a filter bank, in float64
(docs/theory.md sections 9.1 and 9.2).

A bank's kernel blocks ``M_fg`` (``Gamma_fg`` or the divided difference
``h^[1]_fg``) are stacked into one ``(F_out K) x (F_in K)`` matrix and
factored ``M = A^T B + Res`` by a singular value decomposition. The Schur
multiplier norm of the block kernel over a set of points ``Lambda`` is then at
most ``sqrt(sup a) sqrt(sup b) + ||Res||_2 sup ||phi||^2`` with ``a(lam) =
lambda_max(G_A(lam))``, ``G_A(lam)_{gg'} = phi(lam)^T (A^T A)_{gg'} phi(lam)``,
and ``b`` likewise from ``B^T B``. Suprema are over a :class:`Cover` of
``Lambda``: points of the Chebyshev variable of a split interval and the gap
within which every point of ``Lambda`` lies of one of them; the gap is charged
at ``sum_n n^2 ||C_n||_2`` per unit (Markov), ``G = sum_n C_n T_n``.

The whole-path bound (section 9.1) for ``||E||_2 <= eps`` and ``R >= ||S||``:
``||H(S_hat) - H(S)|| <= eps J_Gamma(Lambda_eps) + 2 eps^2 R J_div(Lambda_eps)``
with ``Lambda_eps`` holding the spectra of every ``S + t (E S + S E)``.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._exact import UNIT, divided_transform, gamma, kernel_transform, product_error, response_map
from ._filters import Basis
from ._kernel import product_tensor
from ._series import REL_ALLOW

#: Grid points over a split interval for the rigorous suprema.
GRID = 4097
#: Float64 values of Chebyshev columns held at once by :func:`input_first_order_sparse` (128 MB).
CHUNK_VALUES = 2**24


@dataclasses.dataclass(frozen=True)
class Cover:
    """Points covering a set ``Lambda`` of the real line.

    Attributes:
      split: the Chebyshev basis of the split interval ``[lo, hi]``, which
        holds ``Lambda``.
      t: points in the Chebyshev variable ``t = (2 lam - lo - hi)/(hi - lo)``.
      gap: every point of ``Lambda`` lies within ``gap`` (in ``t``) of one of ``t``.
      description: how ``Lambda`` was chosen (recorded with the certificate).
    """

    split: Basis
    t: np.ndarray
    gap: float
    description: str


def _split(lo: float, hi: float) -> Basis:
    if not hi > lo:
        w = 1e-6 * max(1.0, abs(lo))
        lo, hi = lo - w, hi + w
    return Basis("chebyshev", (float(lo), float(hi)))


def interval_cover(lo: float, hi: float, grid: int = GRID) -> Cover:
    """A grid over ``[lo, hi]``: gap ``1 / (grid - 1)``."""
    split = _split(lo, hi)
    return Cover(split, np.linspace(-1.0, 1.0, grid), 1.0 / (grid - 1), f"interval [{lo:.6g}, {hi:.6g}]")


def eigen_cover(lam, slack: float, clip=None, grid: int = GRID) -> Cover:
    """Cover of ``union_i [lam_i - slack, lam_i + slack]`` (intersected with
    ``clip = (lo, hi)`` when given): the eigenvalues themselves when ``slack``
    is below half a grid step, else the grid points within ``slack`` plus half
    a step of an eigenvalue."""
    lam = np.asarray(lam, dtype=np.float64)
    lo, hi = float(lam.min()) - slack, float(lam.max()) + slack
    if clip is not None:
        lo, hi = max(lo, float(clip[0])), min(hi, float(clip[1]))
    split = _split(lo, hi)
    a, b = split.interval
    scale = 2.0 / (b - a)
    tl = np.clip((2 * lam - a - b) / (b - a), -1.0, 1.0)
    st = slack * scale * (1 + 4 * UNIT) + 8 * UNIT
    h = 2.0 / (grid - 1)
    what = f"eigenvalues +- {slack:.3g}" + (f" within [{clip[0]:.6g}, {clip[1]:.6g}]" if clip is not None else "")
    if st <= h / 2:
        return Cover(split, np.unique(tl), st, what)
    g = np.linspace(-1.0, 1.0, grid)
    srt = np.sort(tl)
    pos = np.searchsorted(srt, g)
    right = srt[np.minimum(pos, len(srt) - 1)]
    left = srt[np.maximum(pos - 1, 0)]
    near = np.minimum(np.abs(g - right), np.abs(g - left))
    return Cover(split, g[near <= st + h / 2 + 1e-15], h / 2, what)


def band_cover(lo, hi, clip=None, grid: int = GRID, what: str = "") -> Cover:
    """Cover of ``union_k [lo_k, hi_k]`` (intersected with ``clip = (lo, hi)``
    when given): the grid points within half a step of a band, each point of
    the union lying within half a step of one of them (its nearest grid
    point is one)."""
    lo, hi = np.atleast_1d(np.asarray(lo, dtype=np.float64)), np.atleast_1d(np.asarray(hi, dtype=np.float64))
    a0, b0 = float(lo.min()), float(hi.max())
    if clip is not None:
        a0, b0 = max(a0, float(clip[0])), min(b0, float(clip[1]))
        lo, hi = np.maximum(lo, a0), np.minimum(hi, b0)
    split = _split(a0, b0)
    a, b = split.interval
    scale = 2.0 / (b - a)
    tl = (2 * lo - a - b) / (b - a) - 8 * UNIT * (1 + scale * np.abs(lo))
    th = (2 * hi - a - b) / (b - a) + 8 * UNIT * (1 + scale * np.abs(hi))
    g = np.linspace(-1.0, 1.0, grid)
    h = 2.0 / (grid - 1)
    order = np.argsort(tl)
    tl, th = tl[order], np.maximum.accumulate(th[order])
    # A grid point is kept when some band [tl_k, th_k] comes within h/2 of it:
    # the last band starting at or before g + h/2 reaches furthest (running max of th).
    pos = np.searchsorted(tl, g + h / 2 + 1e-15, side="right") - 1
    keep = (pos >= 0) & (th[np.maximum(pos, 0)] >= g - h / 2 - 1e-15)
    if clip is not None:
        what = what + f" within [{clip[0]:.6g}, {clip[1]:.6g}]"
    return Cover(split, g[keep], h / 2, what)


def split_coefficients(taps, basis: Basis, split: Basis) -> tuple[np.ndarray, np.ndarray]:
    """A bank's Chebyshev coefficients on ``split`` (``(K', F_in, F_out)``) in
    float64 and an entrywise bound on their error."""
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        taps = taps[:, None, None]
    k, fin, fout = taps.shape
    lo, hi = split.interval
    cmap = response_map(k, basis, lo, hi, "h")  # taps -> Chebyshev on the split
    cols = taps.reshape(k, -1)
    return (cmap @ cols).reshape(-1, fin, fout), product_error(cmap, cols).reshape(-1, fin, fout)


def gain_gram(c, dc):
    """``(P, P_err, F_out, K')`` with ``H(t)^T H(t) = phi(t)^T P phi(t)``, ``P = A^T A``,
    from coefficients ``c`` ``(K', F_in, F_out)`` given to within ``dc``."""
    kk, fin, fout = c.shape
    a = np.moveaxis(c, 0, 2).reshape(fin, fout * kk)  # column (g, s)
    da = np.moveaxis(dc, 0, 2).reshape(fin, fout * kk)
    p = a.T @ a
    p_err = 2.0 * (fin + 2) * UNIT * (np.abs(a).T @ np.abs(a)) + np.abs(a).T @ da + da.T @ np.abs(a) + da.T @ da
    return p, p_err, fout, kk


def cover_gain(taps, basis: Basis, cover: Cover) -> float:
    """Rigorous ``sup ||H(mu)||_2`` over the points ``cover`` covers:
    ``H^T H = phi^T P phi`` with ``P = C^T C``, ``C`` the bank's coefficients
    on the cover's split interval (float64, with an entrywise error bound),
    bounded like ``G_A`` (docs/theory.md 9.1, the relative enclosure; 9.2)."""
    p, p_err, fout, kk = gain_gram(*split_coefficients(taps, basis, cover.split))
    top = float(_sup_lambda_max(p[None], p_err[None], fout, kk, cover)[0])
    return float(np.sqrt(max(top, 0.0))) * (1 + REL_ALLOW)


def block_kernels(taps, basis: Basis, split: Basis, which: str, joint: bool, right=None):
    """Block kernel matrices and entrywise bounds on their float64 error.

    Returns ``(M, dM, (F_out, F_in), k_right)`` with ``M`` of shape ``(B,
    F_out K, F_in K_r)``: one batch entry for the whole bank (``joint``) or one
    block per filter (``B = F_in F_out``, in ``(f, g)`` order). ``which``:
    ``gamma`` (the kernel of the first-order change) or ``divided``
    (``h^[1]``). With ``right`` (taps ``(K, F_0, F_in)`` of a bank applied
    before this one, in ``basis``) the kernel is ``Gamma(lam, mu) H_right(mu)``,
    the first-order change of ``H(S) H_right(S)`` (docs/theory.md 9.3), with
    ``K_r = 2K - 1`` Chebyshev terms on the right (``T_b T_m = (T_{b+m} +
    T_{|b-m|}) / 2``).
    """
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        taps = taps[:, None, None]
    k, fin, fout = taps.shape
    tr = (kernel_transform if which == "gamma" else divided_transform)(k, basis, split)
    m = np.einsum("abj,jfg->fgab", tr, taps)  # (F_in, F_out, K, K)
    dm = 2.0 * (k + 2) * UNIT * np.einsum("abj,jfg->fgab", np.abs(tr), np.abs(taps))
    kr = k
    if right is not None:
        rt = np.asarray(right, dtype=np.float64)
        kk = rt.shape[0]
        cmap = response_map(kk, basis, split.interval[0], split.interval[1], "h")  # taps -> Chebyshev on split
        cols = rt.reshape(kk, -1)
        h = (cmap @ cols).reshape(-1, *rt.shape[1:])  # (K', F_0, F_in)
        herr = product_error(cmap, cols).reshape(h.shape)
        kr = k + h.shape[0] - 1
        pt = np.zeros((k, h.shape[0], kr))
        for b in range(k):
            for j in range(h.shape[0]):
                pt[b, j, b + j] += 0.5
                pt[b, j, abs(b - j)] += 0.5
        # M'_{e g}[a, n] = sum_f sum_{b, j} M_fg[a, b] h_{j, e f} P[b, j, n]
        m2 = np.einsum("fgab,jef,bjn->egan", m, h, pt, optimize=True)
        dm2 = (np.einsum("fgab,jef,bjn->egan", np.abs(m), herr + 2.0 * (k + kr) * UNIT * np.abs(h), pt, optimize=True)
               + np.einsum("fgab,jef,bjn->egan", dm, np.abs(h) + herr, pt, optimize=True))
        m, dm, fin = m2, dm2, rt.shape[1]
    if not joint:
        return m.reshape(fin * fout, k, kr), dm.reshape(fin * fout, k, kr), (1, 1), kr
    big = np.einsum("fgab->gafb", m).reshape(1, fout * k, fin * kr)
    dbig = np.einsum("fgab->gafb", dm).reshape(1, fout * k, fin * kr)
    return big, dbig, (fout, fin), kr


def _gram(p, p_err, f: int, k: int, t):
    """``G(t)_{gh} = phi(t)^T P_{gh} phi(t)`` at the points ``t`` (Chebyshev
    variable), per batch entry: ``(G (B, T, F, F), err (B,), slope (B,))`` with
    ``err`` bounding ``||G - G_exact||_2`` at every point (``P`` given to
    within ``p_err`` entrywise; sums and evaluation in float64) and ``slope``
    bounding ``||dG/dt||_2`` on ``[-1, 1]`` (Markov: ``sum_n n^2 ||C_n||_2``)."""
    nb = p.shape[0]
    pk = product_tensor(k)
    pb = p.reshape(nb, f, k, f, k)
    c = np.einsum("zgahb,abn->zghn", pb, pk)  # (B, F, F, 2K-1) Chebyshev coefficients of G
    c = 0.5 * (c + np.swapaxes(c, 1, 2))
    n = np.arange(c.shape[-1], dtype=np.float64)
    # Errors: of P (given), of the product-tensor sums, and of evaluating G; |T_n| <= 1.
    e_entry = np.einsum("zgahb->zgh", p_err.reshape(nb, f, k, f, k) + 2.0 * k * k * UNIT * np.abs(pb))
    v = np.polynomial.chebyshev.chebvander(np.asarray(t, dtype=np.float64), c.shape[-1] - 1)  # (T, 2K-1)
    g = np.einsum("tn,zghn->ztgh", v, c, optimize=True)
    e_eval = 4.0 * c.shape[-1] * UNIT * np.sum(np.abs(c), axis=-1)  # (B, F, F)
    gnorm = np.linalg.norm(g, axis=(2, 3)).max(axis=1)
    slope = np.sum(n**2 * np.linalg.norm(np.moveaxis(c, -1, 1), ord=2, axis=(2, 3)), axis=1)
    err = np.linalg.norm(e_entry, axis=(1, 2)) + np.linalg.norm(e_eval, axis=(1, 2)) + 8.0 * f * UNIT * gnorm
    return g, err, slope


def point_tops(p, p_err, f: int, k: int, cover: Cover):
    """``lambda_max(G)`` at each point of ``cover`` in float64 (``(B, T)``),
    with :func:`_gram`'s bounds on the error of ``G`` (``(B,)``) and on its
    slope (``(B,)``): ``G`` within ``gap`` of a point is within ``gap * slope
    + err`` of the value there."""
    g, err, slope = _gram(p, p_err, f, k, cover.t)
    tops = np.linalg.eigvalsh(g)[..., -1] if f > 1 else g[..., 0, 0]
    return tops, err, slope


def _sup_lambda_max(p, p_err, f: int, k: int, cover: Cover) -> np.ndarray:
    """Rigorous ``sup_Lambda lambda_max(G(lam))`` per batch entry (``p``:
    ``(B, F K, F K)``; ``p_err``: an entrywise bound on how far ``p`` is from
    the exact matrix)."""
    tops, err, slope = point_tops(p, p_err, f, k, cover)
    return np.maximum(tops.max(axis=1), 0.0) + cover.gap * slope + err


def _svd_factor(m):
    """``(A, B)`` with ``A^T B = M`` from the SVD (``A = Sigma^(1/2) U^T``,
    ``B = Sigma^(1/2) W^T``), batched: ``(B, r, rows)``, ``(B, r, cols)``."""
    u, s, wt = np.linalg.svd(m, full_matrices=False)
    sq = np.sqrt(s)
    return sq[:, :, None] * np.swapaxes(u, 1, 2), sq[:, :, None] * wt


def _checked(m, dm, a, b):
    """For float64 factors ``A``, ``B`` of ``M`` (given to within ``dM``):
    ``(P = A^T A, its error, Q = B^T B, its error, a bound on ||M_exact - A^T B||_2)``."""
    r = a.shape[1]
    gr = 2.0 * (r + 2) * UNIT
    pa = np.swapaxes(a, 1, 2) @ a
    pb = np.swapaxes(b, 1, 2) @ b
    pa_err = gr * (np.swapaxes(np.abs(a), 1, 2) @ np.abs(a))
    pb_err = gr * (np.swapaxes(np.abs(b), 1, 2) @ np.abs(b))
    res = (np.linalg.norm(m - np.swapaxes(a, 1, 2) @ b, axis=(1, 2)) + np.linalg.norm(dm, axis=(1, 2))
           + gr * np.linalg.norm(np.swapaxes(np.abs(a), 1, 2) @ np.abs(b), axis=(1, 2)))
    return pa, pa_err, pb, pb_err, res


def _factor(m, dm, cover=None, k=None, kr=None, f=None, optimise: bool = False):
    """A checked factorisation of ``M``; with ``optimise`` the SVD factors are
    rebalanced as ``(T A, T^-T B)`` by :func:`stablefilt._balance.balance` to
    lower ``sup a * sup b`` on the points of ``cover`` (any ``T`` is valid:
    ``(T A)^T T^-T B = A^T B``; the bound is checked afterwards, never taken
    from the optimiser)."""
    a, b = _svd_factor(m)
    if optimise:
        from ._balance import balance

        fout, fin = f
        phi_a = np.polynomial.chebyshev.chebvander(cover.t, k - 1)  # (T, K)
        phi_b = np.polynomial.chebyshev.chebvander(cover.t, kr - 1)
        alpha = np.einsum("zrga,ta->ztrg", a.reshape(a.shape[0], a.shape[1], fout, k), phi_a)
        beta = np.einsum("zrfa,ta->ztrf", b.reshape(b.shape[0], b.shape[1], fin, kr), phi_b)
        t = balance(alpha, beta)
        a = t @ a
        b = np.linalg.solve(np.swapaxes(t, 1, 2), b)
    return _checked(m, dm, a, b)


@dataclasses.dataclass(frozen=True)
class JointFactor:
    """A checked factorisation ``M = A^T B + Res`` of a bank's block kernel
    over a cover (docs/theory.md 9.2), kept for input-specific bounds.

    Attributes:
      cover: the points the suprema are over.
      k, kr: basis sizes on the output and input side.
      fout, fin: the bank's output and input features.
      pb, pb_err: ``B^T B`` (``(F_in K_r, F_in K_r)``) and an entrywise bound on its error.
      res: a bound on ``||Res||_2``.
      sup_a: rigorous ``sup lambda_max(G_A)`` over the cover.
      constant: the joint constant ``J`` (per unit eps).
      balanced: whether the factorisation was rebalanced.
    """

    cover: Cover
    k: int
    kr: int
    fout: int
    fin: int
    pb: np.ndarray
    pb_err: np.ndarray
    res: float
    sup_a: float
    constant: float
    balanced: bool


def joint_factor(taps, basis: Basis, cover: Cover, which: str = "gamma", right=None,
                 optimise: bool = False) -> JointFactor:
    """The joint factorisation of a bank's block kernel over ``cover``: from
    the SVD, and with ``optimise`` also rebalanced (:mod:`stablefilt._balance`),
    keeping the one with the smaller checked constant."""
    taps = np.asarray(taps, dtype=np.float64)
    if taps.ndim == 1:
        taps = taps[:, None, None]
    k = taps.shape[0]
    m, dm, (fout, fin), kr = block_kernels(taps, basis, cover.split, which, True, right)
    best = None
    for opt in ((False, True) if optimise else (False,)):
        pa, pa_err, pb, pb_err, res = _factor(m, dm, cover, k, kr, (fout, fin), opt)
        sa = float(_sup_lambda_max(pa, pa_err, fout, k, cover)[0])
        sb = float(_sup_lambda_max(pb, pb_err, fin, kr, cover)[0])
        # ||phi|| ||psi|| <= sqrt(K K_r) for Chebyshev values in [-1, 1].
        val = (np.sqrt(sa * sb) + float(res[0]) * np.sqrt(k * kr)) * (1 + REL_ALLOW)
        if best is None or val < best.constant:
            best = JointFactor(cover, k, kr, fout, fin, pb[0], pb_err[0], float(res[0]), sa, float(val), opt)
    return best


def schur_constant(taps, basis: Basis, cover: Cover, which: str = "gamma", joint: bool = True,
                   right=None, optimise: bool = False) -> np.ndarray:
    """Rigorous bound on the Schur multiplier norm of the bank's block kernel
    over the points ``cover`` covers: a scalar for the whole bank (``joint``),
    else ``(F_in, F_out)`` per filter (one filter: shape ``()``).

    The bank form: ``||sum_f V (E~ o Gamma_fg) V^T x_f||_F <= J ||E||_2 ||X||_F``
    for every ``E`` and ``X`` when the eigenvalues lie in the covered set
    (docs/theory.md section 9.2)."""
    taps = np.asarray(taps, dtype=np.float64)
    shape = taps.shape[1:]
    k = taps.shape[0]
    if joint:
        return joint_factor(taps, basis, cover, which, right, optimise).constant
    m, dm, (fout, fin), kr = block_kernels(taps, basis, cover.split, which, False, right)
    val = None
    for opt in ((False, True) if optimise else (False,)):
        pa, pa_err, pb, pb_err, res = _factor(m, dm, cover, k, kr, (fout, fin), opt)
        sa = _sup_lambda_max(pa, pa_err, fout, k, cover)
        sb = _sup_lambda_max(pb, pb_err, fin, kr, cover)
        v = (np.sqrt(sa * sb) + res * np.sqrt(k * kr)) * (1 + REL_ALLOW)
        val = v if val is None else np.minimum(val, v)
    if right is not None:
        return val.reshape(np.shape(right)[1], shape[1])
    return val.reshape(shape) if shape else val.reshape(())


@dataclasses.dataclass(frozen=True)
class PathBound:
    """Whole-path bound on ``||H(S_hat) - H(S)||`` at one ``eps``
    (docs/theory.md section 9.1): ``certified = first + second``.

    Attributes:
      eps: the perturbation size.
      certified: the bound (for a bank, the smaller of the joint and
        per-filter forms).
      first: ``eps J_Gamma`` of the form kept.
      second: ``2 eps^2 R J_div`` of the form kept.
      form: ``joint`` or ``per-filter``.
      cover: how the set holding the spectra along the path was covered.
    """

    eps: float
    certified: float
    first: float
    second: float
    form: str
    cover: str


def path_bound(taps, basis: Basis, eps: float, radius: float, cover: Cover) -> PathBound:
    """The whole-path bound of a filter or bank for ``||E||_2 <= eps``,
    ``radius >= ||S||_2``, with ``cover`` covering a set holding the spectrum
    of every ``S + t (E S + S E)``, ``t in [0, 1]``."""
    taps = np.asarray(taps, dtype=np.float64)
    out = []
    for joint in (True, False):
        g = np.asarray(schur_constant(taps, basis, cover, "gamma", joint))
        d = np.asarray(schur_constant(taps, basis, cover, "divided", joint))
        first = eps * g
        second = 2.0 * eps * eps * radius * d
        if not joint and taps.ndim == 3:
            f = _spectral_norm(first + second)
            out.append((f, _spectral_norm(first), f - _spectral_norm(first), "per-filter"))
        else:
            tot = float(np.max(first + second))
            out.append((tot, float(np.max(first)), float(np.max(second)), "joint" if joint else "per-filter"))
    best = min(out, key=lambda o: o[0])
    return PathBound(float(eps), best[0] * (1 + REL_ALLOW), best[1], max(best[0] - best[1], 0.0), best[3],
                     cover.description)


def _spectral_norm(beta) -> float:
    """``||beta||_2`` of a matrix of per-filter bounds (docs/theory.md s. 8)."""
    return float(np.linalg.norm(np.asarray(beta, dtype=np.float64), ord=2)) * (1 + REL_ALLOW)


def chebyshev_columns(matrix, z, split: Basis, kr: int) -> tuple[np.ndarray, np.ndarray]:
    """``T_a(t(S)) z`` for ``a < kr`` by the three-term recurrence in float64
    (``z``: ``(B, N, F)``; result ``(B, N, F, kr)``), and ``eta`` ``(kr,)``:
    each computed column is within ``eta_a ||z_f||`` of the exact one when
    ``spec S`` lies in the split interval (docs/theory.md 9.2, without
    eigenvectors); ``eta`` is inf where that cannot be claimed."""
    z = np.asarray(z, dtype=np.float64)
    nb, n, f = z.shape
    al, be = split.mapping()
    flat = np.moveaxis(z, 0, 1).reshape(n, nb * f)
    cols = [flat]
    if kr > 1:
        cols.append(al * (matrix @ flat) + be * flat)
    for _ in range(2, kr):
        cols.append(2.0 * (al * (matrix @ cols[-1]) + be * cols[-1]) - cols[-2])
    out = np.stack([c.reshape(n, nb, f) for c in cols], axis=-1).transpose(1, 0, 2, 3)
    # Rounding: |fl(S v) - S v| <= gamma_m |S| |v|, m the most nonzeros in a row.
    absm = abs(matrix)
    rows = np.asarray(absm.sum(axis=1)).ravel()
    m = int(np.max(matrix.getnnz(axis=1))) if hasattr(matrix, "getnnz") else n
    c = abs(al) * float(np.max(rows)) + abs(be)  # || |S| ||_2 <= max row sum of |S| (symmetric)
    local = gamma(m + 4) * (2.0 * c + 1.0) * 1.01
    a = np.arange(kr, dtype=np.float64)
    eta = a * (a + 1.0) / 2.0 * local
    if not np.max(eta) < 0.01:
        eta = np.full(kr, np.inf)
    return out, eta


def gram_quadratic(factor: JointFactor, matrix, z, columns=None) -> tuple[np.ndarray, np.ndarray]:
    """Per signal ``(q, err)``: ``q = <P, Z^T Z>`` computed in float64, equal to
    ``sum_j z~_j^T G_B(lam_j) z~_j`` in exact arithmetic, and ``err`` bounding
    ``|q - exact|`` (docs/theory.md 9.2, without eigenvectors; inf where it
    cannot be claimed). ``columns``: :func:`chebyshev_columns` of ``z`` for
    the factor's split and ``K_r``, when already computed."""
    cols, eta = columns if columns is not None else chebyshev_columns(matrix, z, factor.cover.split, factor.kr)
    nb, n, f, kr = cols.shape
    zm = cols.reshape(nb, n, f * kr)  # layout (f, a), as P = B^T B
    gram = np.swapaxes(zm, 1, 2) @ zm  # batched BLAS product
    feat = np.sqrt(np.sum(np.asarray(z, dtype=np.float64) ** 2, axis=1))  # (B, F)
    scale = np.repeat(feat, kr, axis=1)  # ||z_f|| per column
    e = np.tile(eta, f)
    d_gram = (e[:, None] + e[None, :] + e[:, None] * e[None, :]
              + gamma(n) * (1 + e[:, None]) * (1 + e[None, :]))[None] * scale[:, :, None] * scale[:, None, :]
    p, p_err = factor.pb, factor.pb_err
    quad = np.einsum("pq,bpq->b", p, gram)
    err = (np.einsum("pq,bpq->b", np.abs(p) + p_err, d_gram + gamma(p.size) * np.abs(gram))
           + np.einsum("pq,bpq->b", p_err, np.abs(gram)))
    return quad, np.where(np.isfinite(err), err, np.inf)


def input_first_order_sparse(factor: JointFactor, matrix, z, eps: float, interval) -> np.ndarray:
    """Input-specific joint first-order bound per signal without
    eigenvectors (docs/theory.md 9.2): as :func:`input_first_order` with
    ``sum_j z~_j^T G_B(lam_j) z~_j`` from :func:`gram_quadratic`.
    ``matrix``: ``S`` in float64 (scipy sparse or dense); ``interval``: the
    certified ``(a, b)`` holding ``spec S``, which the factor's split
    interval must hold too (else, or where rounding cannot be bounded, inf)."""
    return sparse_first_orders([factor], matrix, z, eps, interval)[0]


def sparse_first_orders(factors, matrix, z, eps: float, interval, quadratics=None) -> list[np.ndarray]:
    """:func:`input_first_order_sparse` for several banks on the same input
    ``z``; ``quadratics``: their :func:`sparse_quadratics` for ``z``, when
    already computed (they do not depend on ``eps``)."""
    z = np.asarray(z, dtype=np.float64)
    zn = np.sqrt(np.sum(z**2, axis=(1, 2)))
    quads = quadratics if quadratics is not None else sparse_quadratics(factors, matrix, z, interval)
    out = []
    for f, q in zip(factors, quads):
        if q is None:
            out.append(np.full(z.shape[0], np.inf))
            continue
        val = np.sqrt(max(f.sup_a, 0.0)) * np.sqrt(q) + f.res * np.sqrt(f.k * f.kr) * zn
        out.append(eps * val * (1 + REL_ALLOW))
    return out


def sparse_quadratics(factors, matrix, z, interval) -> list:
    """Per bank, ``max(q + err, 0)`` per signal of ``z`` (:func:`gram_quadratic`),
    or None where the factor's split interval does not hold ``interval``:
    the eps-free part of :func:`sparse_first_orders`. Banks with the same
    split interval and ``K_r`` share the sparse products; signals go in
    chunks of at most ``CHUNK_VALUES`` column values."""
    z = np.asarray(z, dtype=np.float64)
    out: list = [None for _ in factors]
    groups: dict = {}
    for i, f in enumerate(factors):
        lo, hi = f.cover.split.interval
        if lo <= interval[0] and interval[1] <= hi:
            groups.setdefault((lo, hi, f.kr), []).append(i)
    for (_, _, kr), members in groups.items():
        split = factors[members[0]].cover.split
        step = max(1, CHUNK_VALUES // max(1, z.shape[1] * z.shape[2] * kr))
        parts = {i: [] for i in members}
        for b in range(0, z.shape[0], step):
            cols = chebyshev_columns(matrix, z[b:b + step], split, kr)
            for i in members:
                parts[i].append(gram_quadratic(factors[i], matrix, z[b:b + step], cols))
        for i in members:
            quad = np.concatenate([q for q, _ in parts[i]])
            err = np.concatenate([e for _, e in parts[i]])
            out[i] = np.maximum(quad + err, 0.0)
    return out


def input_first_order(factor: JointFactor, lam, vecs, z, eps: float) -> np.ndarray:
    """Input-specific joint first-order bound per signal (docs/theory.md 9.2):
    ``eps [sqrt(sup a) sqrt(sum_j z~_j^T G_B(lam_j) z~_j) + ||Res||_2
    sqrt(K K_r) ||z||_F]`` with ``z~ = V^T z`` the signals' spectra (``z``:
    ``(B, N, F_in)``). ``factor`` must come from a cover of the computed
    eigenvalues ``lam`` (:func:`eigen_cover`); ``vecs`` the eigenvectors."""
    lo, hi = factor.cover.split.interval
    t = np.clip((2 * np.asarray(lam, dtype=np.float64) - lo - hi) / (hi - lo), -1.0, 1.0)
    gb, err, slope = _gram(factor.pb[None], factor.pb_err[None], factor.fin, factor.kr, t)
    move = err[0] + factor.cover.gap * slope[0]
    z = np.asarray(z, dtype=np.float64)
    zt = np.einsum("ni,bnf->bif", vecs, z)  # (B, N, F)
    quad = np.einsum("bif,ifh,bih->b", zt, gb[0], zt) + move * np.sum(zt**2, axis=(1, 2))
    zn = np.sqrt(np.sum(z**2, axis=(1, 2)))
    val = np.sqrt(max(factor.sup_a, 0.0)) * np.sqrt(np.maximum(quad, 0.0)) + factor.res * np.sqrt(factor.k * factor.kr) * zn
    return eps * val * (1 + REL_ALLOW)
