"""The ``certified`` penalty: the eps-linear coefficient of the model
certificate, as a differentiable function of the params (docs/theory.md
section 11).

``certified(eps) = eps P + O(eps^2)`` for the interval certificate of
sections 9.2-9.3; :func:`certified_penalty` evaluates ``P`` in JAX with every
supremum over the spectral interval replaced by a maximum over grid points.
Grid maxima, power steps and Newton-Schulz steps lower the estimate, and
leaving out the per-filter form raises it, so it is an estimate of ``P``
(0.27% below on the demo run), not a bound: a training surrogate, never a
certificate (the reported figures stay the float64 ones of
:mod:`stablefilt._modelcert`).
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np

from ._constants import spectral_grid, split_basis
from ._exact import kernel_transform, response_map
from ._filters import Basis, basis_values, run_filter
from ._model import ModelSpec

#: Least slope of each nonlinearity (as :data:`stablefilt._compose.SLOPE_LOW`).
SLOPE_LOW = {"relu": 0.0, "leaky_relu": 0.1, "tanh": 0.0, "none": 1.0}
_TINY = 1e-30
#: Grid points of the certified penalty at most: on the demo model 64 and 256
#: points gave the same value to 7 digits, at 60% of the cost.
CERT_GRID = 64


#: Iterations of the matrix-product methods below (no eigensolver inside
#: the compiled step: with LAPACK's symmetric eigensolver in the gradient the
#: compiled demo step hung on its second call, jax 0.10.2 on CPU).
POWER_STEPS = 20
SIGN_STEPS = 25


def top_eigenvalue(x, steps: int = POWER_STEPS):
    """Largest eigenvalue of a positive semidefinite matrix (batched over
    leading axes) by the power method: the Rayleigh quotient ``v^T X v`` at
    the iterate ``v`` held fixed, so its gradient is ``v v^T``, the
    derivative of a simple top eigenvalue (Bhatia, "Matrix Analysis", 1997,
    ch. VI). A Rayleigh quotient is at most ``lambda_max`` (Courant-Fischer),
    so the estimate never exceeds the true value."""
    n = x.shape[-1]
    v0 = jnp.broadcast_to(1.0 + 0.1 * jnp.arange(n, dtype=x.dtype) / n, x.shape[:-1])
    xs = jax.lax.stop_gradient(x)

    def body(_, v):
        w = jnp.einsum("...ij,...j->...i", xs, v)
        return w / (jnp.linalg.norm(w, axis=-1, keepdims=True) + _TINY)

    v = jax.lax.fori_loop(0, steps, body, v0 / jnp.linalg.norm(v0, axis=-1, keepdims=True))
    v = jax.lax.stop_gradient(v)
    return jnp.einsum("...i,...ij,...j->...", v, x, v)


def polar_factor(m, steps: int = SIGN_STEPS):
    """The orthogonal polar factor ``U = U_s W_s^T`` of ``M = U_s Sigma W_s^T``
    by the Newton-Schulz iteration ``U <- (3 U - U U^T U) / 2`` from
    ``U_0 = M / ||M||_F`` (Higham, "Functions of Matrices", SIAM 2008,
    ch. 8): singular values of ``U_0`` in ``(0, 1]`` move to 1; those below
    about ``1.5^-steps ||M||_F`` only part way, which lowers ``M U^T`` and
    ``M^T U`` by at most that much. Matrix products only, differentiable."""
    scale = jnp.linalg.norm(m) + _TINY

    def body(_, u):
        return 1.5 * u - 0.5 * (u @ (u.T @ u))

    return jax.lax.fori_loop(0, steps, body, m / scale)


def _top(g):
    """``lambda_max`` of ``(..., F, F)``; the entry itself when ``F = 1``."""
    return g[..., 0, 0] if g.shape[-1] == 1 else top_eigenvalue(g)


def _sqrt(x):
    return jnp.sqrt(jnp.maximum(x, _TINY))


@dataclasses.dataclass(frozen=True)
class CertifiedSetup:
    """What :func:`certified_penalty` needs besides the params: fixed per
    training graph, computed once.

    Attributes:
      spec: the model's :class:`ModelSpec` (its basis travels with it).
      interval: ``(a, b)``, the spectral interval the suprema are over.
      rho: the input norm bound of the certificate.
      nodes: ``N``.
      grid: grid points over the interval.
      gram: ``(K, K)`` Gram matrix of ``p_k(S) 1`` (bias cross terms) as
        nested tuples (hashable: the record keys a cache of compiled
        steps), or None (then the plain clean-path bound
        ``B n + sqrt(N) ||b||``).
    """

    spec: ModelSpec
    interval: tuple[float, float]
    rho: float
    nodes: int
    grid: int = CERT_GRID
    gram: tuple | None = None


def ones_gram(matrix, k: int, basis: Basis) -> np.ndarray:
    """``G_{kl} = <p_k(S) 1, p_l(S) 1>`` in float64 (``K - 1`` sparse products)."""
    n = matrix.shape[0]
    eye = np.eye(k)
    cols = np.stack([run_filter(lambda z: matrix @ z, eye[j], np.ones(n), basis) for j in range(k)], axis=1)
    return cols.T @ cols


def certified_setup(spec: ModelSpec, interval, *, rho: float, nodes: int, matrix=None,
                    grid: int = CERT_GRID) -> CertifiedSetup:
    """A :class:`CertifiedSetup`; ``matrix`` (the training graph's ``S``)
    enables the bias cross term of the clean path, as in the certificate."""
    gram = None if (matrix is None or not spec.bias) else ones_gram(matrix, spec.taps, spec.basis)
    if gram is not None:
        gram = tuple(tuple(float(v) for v in row) for row in gram)
    return CertifiedSetup(spec, (float(interval[0]), float(interval[1])), float(rho), int(nodes), int(grid), gram)


def _points(setup: CertifiedSetup):
    pts = spectral_grid(setup.interval, setup.grid)
    split = split_basis(setup.interval)
    return pts, split


def _block(taps, basis, split, right=None, right_map=None):
    """The bank's block kernel ``(F_out K, F_in K_r)`` in the split basis
    (rows ``(g, a)``, columns ``(f, b)``; docs/theory.md 9.2), optionally
    followed on the right by the bank ``right`` (9.3)."""
    k, fin, fout = taps.shape
    tr = jnp.asarray(kernel_transform(k, basis, split), dtype=taps.dtype)
    m = jnp.einsum("abj,jfg->fgab", tr, taps)  # (F_in, F_out, K, K)
    if right is None:
        return jnp.einsum("fgab->gafb", m).reshape(fout * k, fin * k), m, k
    kk = right.shape[0]
    h = (jnp.asarray(right_map, dtype=taps.dtype) @ right.reshape(kk, -1)).reshape(-1, *right.shape[1:])
    kh = h.shape[0]
    kr = k + kh - 1
    pt = np.zeros((k, kh, kr))
    for b in range(k):
        for j in range(kh):
            pt[b, j, b + j] += 0.5
            pt[b, j, abs(b - j)] += 0.5
    m2 = jnp.einsum("fgab,jef,bjn->egan", m, h, jnp.asarray(pt, dtype=taps.dtype))  # (F_0, F_out, K, K_r)
    f0 = right.shape[1]
    return jnp.einsum("egan->gaen", m2).reshape(fout * k, f0 * kr), m2, kr


def joint_constant(big, fout, fin, k, kr, phi_l, phi_r):
    """``J = sqrt(max a) sqrt(max b)`` on the grid (docs/theory.md 9.2) with
    the polar factorisation ``A^T A = (M M^T)^(1/2)``, ``B^T B = (M^T M)^(1/2)``:
    ``M U^T`` and ``M^T U`` with ``U`` the polar factor of ``M``."""
    u = polar_factor(big)
    pa = big @ u.T  # (M M^T)^(1/2) = U Sigma U^T
    pb = big.T @ u  # (M^T M)^(1/2) = W Sigma W^T
    pa = (0.5 * (pa + pa.T)).reshape(fout, k, fout, k)
    pb = (0.5 * (pb + pb.T)).reshape(fin, kr, fin, kr)
    ga = jnp.einsum("ta,gahb,tb->tgh", phi_l, pa, phi_l)
    gb = jnp.einsum("ta,gahb,tb->tgh", phi_r, pb, phi_r)
    return _sqrt(jnp.max(_top(ga)) * jnp.max(_top(gb)))


def gain(taps, basis, pts):
    """``max_grid ||H(lam)||_2`` of a bank."""
    h = jnp.einsum("ta,afg->tfg", jnp.asarray(basis_values(pts, taps.shape[0], basis), dtype=taps.dtype), taps)
    if h.shape[1] * h.shape[2] == 1:
        return jnp.max(jnp.abs(h))
    hh = jnp.swapaxes(h, 1, 2) @ h if h.shape[2] <= h.shape[1] else h @ jnp.swapaxes(h, 1, 2)
    return _sqrt(jnp.max(_top(hh)))


def _bank(taps, basis, split, pts, phi, right=None, right_map=None):
    """``(J, Jr)``: the bank's joint first-order constant and, with
    ``right``, the joint constant of the bank after ``right``. (The
    certificate also tries the per-filter form ``||kappa||_2``; it is left
    out here: batched small absolute values cost more than the rest of the
    penalty, and for one filter the two coincide.)"""
    k, fin, fout = taps.shape
    big, _, _ = _block(taps, basis, split)
    d = joint_constant(big, fout, fin, k, k, phi, phi)
    if right is None:
        return d, None
    big2, _, kr = _block(taps, basis, split, right, right_map)
    phi_r = jnp.asarray(basis_values(pts, kr, split), dtype=taps.dtype)
    return d, joint_constant(big2, fout, right.shape[1], k, kr, phi, phi_r)


def _left(prev, taps, basis, split, pts, phi, right_map):
    """``K``, the joint constant of the bank ``taps`` after the first-order
    change of ``prev``: the transposed banks' right composite (docs/theory.md
    9.3, the carried change)."""
    tp, tt = jnp.swapaxes(prev, 1, 2), jnp.swapaxes(taps, 1, 2)
    k, fin, fout = tp.shape
    big2, _, kr = _block(tp, basis, split, tt, right_map)
    phi_r = jnp.asarray(basis_values(pts, kr, split), dtype=tp.dtype)
    return joint_constant(big2, fout, tt.shape[1], k, kr, phi, phi_r)


def _carried(a, d, n, g, left, d_prev, ca, cb):
    """Per unit eps, ``a_l`` of docs/theory.md 9.3 (the carried change) at
    first order: ``min(g (d + a), c_a min(K, Delta_l g) n + c_b g d + g a)``."""
    plain = g * (d + a)
    if left is None:
        return plain
    return jnp.minimum(plain, ca * jnp.minimum(left, d_prev * g) * n + cb * g * d + g * a)


def _clean_norm(n, b, cross, beta):
    plain = b * n + beta
    if cross is None:
        return plain
    return jnp.minimum(plain, _sqrt(b * b * n * n + 2.0 * n * cross + beta * beta))


def _through(i, d, right, norms, gains, betas, ca, cb, bias_d=None):
    """Per unit eps, the change of layer ``i``'s output before the
    nonlinearity (docs/theory.md s.11; 9.3 at first order); ``bias_d`` the
    change of the previous bias through the bank (the one-input bank of taps
    ``c_k^T b`` on ``1_N``), or None."""
    plain = d * norms[i]
    if i == 0 or right is None:
        return plain
    through_prev = ca * jnp.minimum(right, d * gains[i - 1]) * norms[i - 1]
    nested = through_prev + cb * d * gains[i - 1] * norms[i - 1] + d * betas[i - 1]
    if bias_d is not None:
        nested = jnp.minimum(nested, through_prev + ca * jnp.minimum(bias_d, d * betas[i - 1]) + cb * d * norms[i])
    return jnp.minimum(plain, nested)


def _bias_d(taps, bias, basis, split, pts, phi, nodes: int):
    """``sqrt(N) J`` of the one-input bank of taps ``c_k^T b`` (docs/theory.md
    9.3), or None without a bias."""
    if bias is None:
        return None
    beta = jnp.einsum("kfg,f->kg", taps, jnp.asarray(bias))[:, None, :]
    return np.sqrt(nodes) * _bank(beta, basis, split, pts, phi)[0]


def certified_penalty(params, setup: CertifiedSetup):
    """The eps-linear coefficient ``P`` of the model's interval certificate
    (``certified(eps) = eps P + O(eps^2)``) on a grid: a differentiable
    surrogate, an estimate of ``P``, not a bound (docs/theory.md s.11).

    Args:
      params: the model's params (``{"layers": [...], "readout": ...}``).
      setup: :func:`certified_setup` of the model and training graph.
    """
    spec = setup.spec
    basis = spec.basis
    pts, split = _points(setup)
    layers = params["layers"]
    dtype = jnp.asarray(layers[0]["taps"]).dtype
    k = spec.taps
    phi = jnp.asarray(basis_values(pts, k, split), dtype=dtype)
    rmap = response_map(k, basis, split.interval[0], split.interval[1], "h") if split.kind == "chebyshev" else None
    gains, ds, rights, lefts, betas, crosses = [], [], [], [], [], []
    for i, layer in enumerate(layers):
        taps = jnp.asarray(layer["taps"])
        prev = None if (i == 0 or rmap is None) else jnp.asarray(layers[i - 1]["taps"])
        d, r = _bank(taps, basis, split, pts, phi, prev, rmap)
        ds.append(d)
        rights.append(r)
        lefts.append(None if prev is None else _left(prev, taps, basis, split, pts, phi, rmap))
        gains.append(gain(taps, basis, pts))
        bias = layer.get("bias")
        if bias is None:
            betas.append(0.0)
            crosses.append(None)
            continue
        betas.append(np.sqrt(setup.nodes) * _sqrt(jnp.sum(bias**2)))
        if setup.gram is None:
            crosses.append(None)
        else:
            u = jnp.einsum("kfg,g->kf", taps, bias)
            crosses.append(_sqrt(jnp.einsum("kl,kf,lf->", jnp.asarray(setup.gram, dtype=dtype), u, u)))
    norms = [jnp.asarray(setup.rho, dtype)]
    for g, c, be in zip(gains, crosses, betas):
        norms.append(_clean_norm(norms[-1], g, c, be))
    alpha = SLOPE_LOW.get(spec.nonlinearity, 0.0)
    ca, cb = 0.5 * (1 + alpha), 0.5 * (1 - alpha)
    depth = len(layers)
    a, a_before, dl = 0.0, 0.0, []
    for i in range(depth):
        bias_d = None if i == 0 else _bias_d(jnp.asarray(layers[i]["taps"]), layers[i - 1].get("bias"), basis, split,
                                             pts, phi, setup.nodes)
        dl.append(_through(i, ds[i], rights[i], norms, gains, betas, ca, cb, bias_d))
        if i < depth - 1:
            a_before = a
            a = _carried(a, dl[i], norms[i], gains[i + 1], lefts[i + 1], ds[i], ca, cb)
    e = dl[-1] + a
    out = e * _readout_factor(params, spec, setup.nodes)
    if spec.readout == "node":
        w = jnp.asarray(params["readout"]["weight"])
        comp = jnp.einsum("kfg,gc->kfc", jnp.asarray(layers[-1]["taps"]), w)
        prev = None if (depth < 2 or rmap is None) else jnp.asarray(layers[-2]["taps"])
        dw, rw = _bank(comp, basis, split, pts, phi, prev, rmap)
        bias_w = None if depth < 2 else _bias_d(comp, layers[-2].get("bias"), basis, split, pts, phi, setup.nodes)
        g = 0.0
        if depth >= 2:
            lw = None if rmap is None else _left(jnp.asarray(layers[-2]["taps"]), comp, basis, split, pts, phi, rmap)
            g = _carried(a_before, dl[-2], norms[depth - 2], gain(comp, basis, pts), lw, ds[-2], ca, cb)
        through = _through(depth - 1, dw, rw, norms, gains, betas, ca, cb, bias_w) + g
        al = alpha if spec.final_nonlinearity else 1.0
        wn = _sqrt(_top(w.T @ w if w.shape[1] <= w.shape[0] else w @ w.T))
        out = jnp.minimum(out, 0.5 * (1 + al) * through + 0.5 * (1 - al) * wn * e)
    return out


def _readout_factor(params, spec: ModelSpec, nodes: int):
    """``||W||_2`` scaled as :func:`stablefilt._modelcert.readout_factor`."""
    if spec.readout == "none":
        return 1.0
    w = jnp.asarray(params["readout"]["weight"])
    wn = _sqrt(_top(w.T @ w if w.shape[1] <= w.shape[0] else w @ w.T))
    if spec.readout == "mean":
        return wn / np.sqrt(nodes)
    if spec.readout == "sum":
        return wn * np.sqrt(nodes)
    return wn
