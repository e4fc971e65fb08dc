"""The whole network's change for one given input, bounded through every
layer at once (docs/theory.md section 9.6).

For a fixed input the change of a GNN is, up to small terms, one linear
function of ``E``: ``lambda_l = D_l (Gamma_l[E] x_{l-1} + H_l lambda_{l-1})``
with ``D_l`` the clean activation slopes. Its worst case over
``||E||_2 <= eps`` is bounded by the concave maximisation of 9.5 over the
stacked banks, and the rest (second-order terms, the previous layers'
change through ``H_hat - H``, and units that may switch, by the switching
lemma of 9.6) is bounded in norm.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._exact import UNIT
from ._filters import Basis, basis_values, frequency_response
from ._inputworst import _sqrt_psd, value_and_gradient
from ._joint import block_kernels
from ._series import ABS_ALLOW, REL_ALLOW

#: Frank-Wolfe iterations per target.
ITERS = 12
#: Units that may switch, above which their joint bound is not tried.
SWITCH_UNITS = 1000
#: Candidate units (margin below the change bound), above which the
#: switching term falls back to its norm bound.
UNIT_LIMIT = 4000
#: Least slope of each nonlinearity covered by the switching lemma (tanh is not).
SLOPES = {"relu": 0.0, "leaky_relu": 0.1}


def _readout_matrix(params, spec, n: int, f: int) -> np.ndarray:
    """The readout as a matrix ``(N F_L, d)`` on node-major features (no bias)."""
    if spec.readout == "none":
        return np.eye(n * f)
    w = np.asarray(params["readout"]["weight"], dtype=np.float64)
    if spec.readout == "node":
        return np.kron(np.eye(n), w)
    if spec.readout in ("mean", "sum"):
        scale = 1.0 / n if spec.readout == "mean" else 1.0
        return np.tile(w, (n, 1)) * scale
    return w  # flat: (N F_L, C)


class _Setup:
    """Per-signal pieces shared by every target: eigen-coordinates of the
    layers' inputs, block kernels, slopes and pre-activations."""

    def __init__(self, params, spec, lam, vecs, x, forward_layer, slack):
        self.lam = np.asarray(lam, dtype=np.float64)
        self.vecs = np.asarray(vecs, dtype=np.float64)
        lo, hi = float(self.lam.min()), float(self.lam.max())
        if not hi > lo:
            lo, hi = lo - 1e-6 * max(1.0, abs(lo)), hi + 1e-6 * max(1.0, abs(hi))
        split = Basis("chebyshev", (lo, hi))
        k = spec.taps
        self.k = k
        self.phi = basis_values(self.lam, k, split)  # (N, K)
        n = self.lam.size
        self.n = n
        self.layers = params["layers"]
        self.inputs, self.pre, self.slopes, self.kernels, self.errors, self.responses = [], [], [], [], [], []
        z = np.asarray(x, dtype=np.float64)[None]
        ka = np.arange(k, dtype=np.float64)
        for i, layer in enumerate(self.layers):
            taps = np.asarray(layer["taps"], dtype=np.float64)
            self.inputs.append(z[0])
            m, dm, (fout, fin), _ = block_kernels(taps, spec.basis, split, "gamma", True)
            m, dm = m[0], dm[0]
            dmax = 2.0 / (hi - lo) * float(np.sum(np.abs(m).reshape(fout, k, fin, k)
                                                  * (ka[None, :, None, None] ** 2 + ka[None, None, None, :] ** 2)))
            # As in 9.5: kernel entries, eigenvalue slack, evaluation; per unit input norm.
            self.errors.append(n * (float(np.abs(dm).sum()) + slack * dmax) + 4.0 * k * UNIT * n * float(np.abs(m).sum()))
            self.kernels.append(m)
            self.responses.append(frequency_response(taps, self.lam, spec.basis))  # (N, F_in, F_out)
            pre, z = forward_layer(i, z)
            self.pre.append(pre[0])
            self.outputs = z[0]
            active = (i < spec.depth - 1) or spec.final_nonlinearity
            if not active or spec.nonlinearity == "none":
                self.slopes.append(None)
            else:
                alpha = SLOPES[spec.nonlinearity]
                self.slopes.append(np.where(pre[0] > 0, 1.0, alpha))
        self.xt = [self.vecs.T @ v for v in self.inputs]  # (N, F_{l-1}) each
        self.stacked = {}  # top layer -> C of _stacked_c

    def to_eigen(self, y):
        """``V^T y`` for a batch ``(d, N, F)``."""
        return np.einsum("ni,dnf->dif", self.vecs, y, optimize=True)

    def to_nodes(self, y):
        return np.einsum("ni,dif->dnf", self.vecs, y, optimize=True)

    def adjoint_chain(self, top: int, y_top):
        """``V~_l = (T_{m,l}^* A^* U)~`` for ``l = 1..m`` (``m = top + 1``),
        from ``y_top = A^* U`` in node coordinates ``(d, N, F_m)``."""
        out = [None] * (top + 1)
        cur = self.to_eigen(y_top)
        out[top] = cur
        for l in range(top, 0, -1):
            # H_l^*: per eigenvalue, V~_i H_l(lam_i)^T; then D_{l-1} in node coordinates.
            back = np.einsum("dig,ifg->dif", cur, self.responses[l], optimize=True)
            d = self.slopes[l - 1]
            if d is not None:
                back = self.to_eigen(d[None] * self.to_nodes(back))
            out[l - 1] = back
            cur = back
        return out


def _stacked_c(setup: _Setup, top: int) -> np.ndarray:
    """``C = blockdiag(M_1 .. M_m) (Q^T Q)^(1/2)``, ``Q = [Q_1 .. Q_m]`` with
    rows ``(X~_{l-1, jf} phi_j^T)_f`` (docs/theory.md 9.5, 9.6); computed
    once per layer ``top`` and kept on ``setup`` (the per-unit and the joint
    switching bounds, and the output bound, share it)."""
    if top not in setup.stacked:
        setup.stacked[top] = _build_c(setup, top)
    return setup.stacked[top]


def _build_c(setup: _Setup, top: int) -> np.ndarray:
    n, phi = setup.n, setup.phi
    q = np.concatenate([np.einsum("jf,jb->jfb", xt, phi).reshape(n, -1) for xt in setup.xt[:top + 1]], axis=1)
    r = _sqrt_psd(q.T @ q)
    rows = sum(m.shape[0] for m in setup.kernels[:top + 1])
    cols = sum(m.shape[1] for m in setup.kernels[:top + 1])
    big = np.zeros((rows, cols))
    ro = co = 0
    for m in setup.kernels[:top + 1]:
        big[ro:ro + m.shape[0], co:co + m.shape[1]] = m
        ro, co = ro + m.shape[0], co + m.shape[1]
    return big @ r


def _worst_linear(setup: _Setup, top: int, stacked, iters: int) -> float:
    """Upper bound on ``sup_{||E||_2 <= 1} ||A mu_m(E)||_F`` (per unit eps):
    ``stacked`` ``(d, N, sum F_l)`` holds ``V~_l`` for unit directions
    ``U`` of the target space (docs/theory.md 9.6)."""
    n, k = setup.n, setup.k
    phi = setup.phi
    c = _stacked_c(setup, top)
    d, _, f = stacked.shape
    t = stacked  # (d, N, F)
    scale = float(np.linalg.norm(c, 2)) ** 2 * k + 1e-300
    delta = 1e-12 * scale
    dim = c.shape[1]
    # Layouts for plain matrix products: tt (N, d, F), t2 (d, N F).
    tt = np.ascontiguousarray(np.swapaxes(t, 0, 1))
    t2 = t.reshape(d, n * f)
    w = np.matmul(np.swapaxes(tt, 1, 2), tt) / d  # Omega = I / d: (N, F, F)
    phi2 = np.einsum("ia,ib->iab", phi, phi).reshape(n, k * k)
    best = np.inf
    for it in range(iters):
        val, g = value_and_gradient(c, w, phi2, k, delta)
        gt = np.matmul(tt, np.swapaxes(g, 1, 2))  # (N, d, F): sum_t g[i, s, t] t[k, i, t]
        h = t2 @ np.swapaxes(gt, 0, 1).reshape(d, n * f).T  # T^T G T, (d, d)
        hv, hw = np.linalg.eigh(0.5 * (h + h.T))
        top_val = float(hv[-1])
        inner = float(np.sum(g * w))
        # f(W*) <= f(W) + lambda_max(T^T G T) - <G, W> (concavity); eigensolver
        # allowances relative (common practice).
        bound = val * (1 + 64 * dim * UNIT) + top_val + 1e-9 * abs(top_val) + 1e-9 * abs(inner) \
            + 64 * d * UNIT * float(np.abs(hv).max()) - inner
        best = min(best, bound)
        tu = (hw[:, -1] @ t2).reshape(n, f)
        step = 2.0 / (it + 3.0)
        w *= 1 - step
        w += step * (tu[:, :, None] * tu[:, None, :])
    return max(best, 0.0) * (1 + REL_ALLOW)


def _carried_error(setup: _Setup, top: int, gains, target_norm: float) -> float:
    """Float64 error of the linear part (per unit eps): each layer's kernel
    error times ``||x_{l-1}||``, carried to the target by ``||A|| prod B``."""
    total = 0.0
    for l in range(top + 1):
        carry = target_norm * float(np.prod([gains[j] for j in range(l + 1, top + 1)]))
        total += setup.errors[l] * float(np.linalg.norm(setup.inputs[l])) * carry
    return total


def _unit_sups(setup: _Setup, top: int, stacked) -> np.ndarray:
    """Per unit direction ``u`` (rows of ``stacked``), an upper bound on
    ``sup_{||E||_2 <= 1} |<u, A mu_m(E)>|`` (per unit eps): the relaxation of
    9.6 at the rank-one ``Omega = u u^T``, ``||P C||_*``, evaluated exactly."""
    c = _stacked_c(setup, top)
    phi = setup.phi
    out = np.empty(stacked.shape[0])
    for lo in range(0, stacked.shape[0], 64):
        t = stacked[lo:lo + 64]
        pc = np.einsum("uis,ia->uisa", t, phi, optimize=True).reshape(t.shape[0], setup.n, -1) @ c
        # ||pc||_* from the smaller Gram matrix: the same nonzero eigenvalues,
        # and the allowance below (for the larger) covers either.
        if pc.shape[1] < pc.shape[2]:
            ev = np.linalg.eigvalsh(np.matmul(pc, np.swapaxes(pc, 1, 2)))
        else:
            ev = np.linalg.eigvalsh(np.einsum("uic,uid->ucd", pc, pc, optimize=True))
        top_ev = np.abs(ev).max(axis=1, keepdims=True)
        out[lo:lo + 64] = np.sum(np.sqrt(np.maximum(ev, 0.0)), axis=1) * (1 + 64 * c.shape[1] * UNIT) \
            + c.shape[1] * np.sqrt(64 * c.shape[1] * UNIT * top_ev[:, 0])
    return out * (1 + REL_ALLOW)


@dataclasses.dataclass(frozen=True)
class NetworkWorst:
    """The whole-network bound for one signal at one eps (docs/theory.md 9.6).

    Attributes:
      certified: ``linear + residual``, with an allowance (``inf`` where the
        method does not apply).
      linear: the bound on ``sup_E ||Rd(lambda_L(E))||``, the fixed-pattern
        first-order change.
      residual: ``certified - linear`` before allowances: second-order
        terms, the previous layers' change through ``H_hat - H``, and units
        that may switch (negative parts where the switching units' sign,
        taken under the same ``E`` as the linear part, lowers it).
    """

    certified: float
    linear: float
    residual: float


def network_worst(params, spec, lam, vecs, x, eps: float, *, slack: float, chain, changes, remainders, gains,
                  readout_norm: float, forward_layer, iters: int = ITERS) -> NetworkWorst:
    """Upper bound on ``||Phi(S) x - Phi(S_hat) x||_F`` for one signal ``x``
    ``(N, F_0)`` over ``||E||_2 <= eps`` (docs/theory.md 9.6), or ``inf``
    where the method does not apply (tanh).

    Args:
      lam, vecs: computed eigenpairs of ``S`` (eigenvalues within ``slack``).
      chain: per layer, a bound on ``||q_l||`` (the pre-activation change),
        which also bounds ``||e_l||`` (9.3).
      changes: per layer, ``Delta_l >= ||H_hat_l - H_l||``.
      remainders: per layer, a function ``x (B, N, F_in) -> (B,)`` bounding
        the second-order remainder of the bank's change of ``x``.
      gains: per layer, ``B_l >= ||H_l||``.
      readout_norm: ``||Rd||`` (Frobenius to Frobenius), 1 without readout.
      forward_layer: ``(i, z) -> (pre, out)`` in float64.
    """
    if spec.nonlinearity not in SLOPES and spec.nonlinearity != "none":
        return NetworkWorst(float("inf"), float("inf"), float("inf"))
    setup = _Setup(params, spec, lam, vecs, x, forward_layer, slack)
    alpha = SLOPES.get(spec.nonlinearity, 1.0)
    n = setup.n
    depth = len(setup.layers)
    e_prev, eps_prev = 0.0, 0.0
    last = depth - 1
    nu_last, switch_last, live_last, weights_last = 0.0, 0.0, None, None
    nu_prev, switch_prev, live_prev = 0.0, 0.0, None
    for i in range(depth):
        rho_bar = float(remainders[i](setup.inputs[i][None])[0])
        carried = gains[i] * eps_prev
        if live_prev is not None and switch_prev > 0:
            # epsilon_{i-1} = (g(nu) - g(0)) + g(0), the second part on the
            # units that may switch (docs/theory.md 9.6).
            carried = min(carried, gains[i] * nu_prev + _restricted_gain(setup, i, live_prev, forward_layer,
                                                                         gains[i]) * switch_prev)
        nu = rho_bar + changes[i] * e_prev + carried
        eps_now = nu
        switch_now, live_now = 0.0, None
        if setup.slopes[i] is not None:
            sw, live, weights = _switching(setup, i, eps, float(chain[i]) + nu, gains, iters)
            eps_now = nu + (1.0 - alpha) * sw
            switch_now, live_now = (1.0 - alpha) * sw, live
            if i == last:
                switch_last, live_last, weights_last = switch_now, live, weights
        nu_last = nu
        nu_prev, switch_prev, live_prev = nu, switch_now, live_now
        e_prev, eps_prev = float(chain[i]), eps_now
    f_l = setup.pre[last].shape[1]
    rd = _readout_matrix(params, spec, n, f_l)  # (N F_L, d)
    y = rd.T.reshape(-1, n, f_l)  # A^* of unit directions, before D_L
    if setup.slopes[last] is not None:
        y = y * setup.slopes[last][None]
    stacked = np.concatenate(setup.adjoint_chain(last, y), axis=2)
    lin = _worst_linear(setup, last, stacked, iters) + _carried_error(setup, last, gains, readout_norm)
    # epsilon_L = (g(nu) - g(0)) + g(0): the first part has norm <= nu_bar,
    # the second lives on the units that may switch, where the readout's
    # restriction is used (docs/theory.md 9.6).
    residual = readout_norm * eps_prev
    shift = 0.0  # what the merged form changes in the linear part (may be negative)
    if live_last is not None:
        masked = float(np.linalg.norm(rd[live_last], 2)) * (1 + REL_ALLOW) if live_last.size else 0.0
        switched = masked * switch_last
        if live_last.size and switch_last > 0:
            # g(0) = diag(theta) mu with theta_u between 0 and (1 - alpha) w_u s_u
            # (s_u = +1 on units that are off, -1 on those on): averaging, with the
            # signed half under the same E as the linear part,
            # ||Rd(lambda_L + g(0))|| <= sup ||Rd((D_L + (1 - alpha) w o s / 2) o mu_L)||
            # + ((1 - alpha) / 2) ||Rd P_U|| s_L (docs/theory.md 9.6).
            ws = np.zeros(n * f_l)
            ws[live_last] = weights_last * np.where(setup.pre[last].ravel()[live_last] > 0, -1.0, 1.0)
            y3 = rd.T.reshape(-1, n, f_l) * (setup.slopes[last] + 0.5 * (1.0 - alpha) * ws.reshape(n, f_l))[None]
            stacked3 = np.concatenate(setup.adjoint_chain(last, y3), axis=2)
            merged = _worst_linear(setup, last, stacked3, iters) + _carried_error(setup, last, gains, readout_norm)
            half = 0.5 * masked * switch_last
            if eps * merged + half < eps * lin + switched:
                shift, switched = eps * (merged - lin), half
        residual = min(residual, readout_norm * nu_last + switched + shift)
    linear = eps * lin
    # An absolute allowance on the scale of the outputs: a float64 evaluation
    # of the model errs by about that much even where the exact change is 0
    # (as for the bank bounds, docs/theory.md 9.3; common practice).
    scale = readout_norm * (float(np.linalg.norm(setup.outputs)) + float(np.prod(gains)) * float(np.linalg.norm(x)))
    return NetworkWorst(float((linear + residual) * (1 + REL_ALLOW) + ABS_ALLOW * scale), float(linear),
                        float(residual))


def _restricted_gain(setup: _Setup, i: int, units, forward_layer, gain: float) -> float:
    """``||H_i P_U||_2``: the bank of layer ``i`` on the inputs ``units``
    (flat, node-major) only, from its columns ``H_i e_u = p(e_u) - p(0)``
    in float64, with an allowance on the scale of ``B_i`` (common
    practice); never above ``gain``."""
    if units.size == 0:
        return 0.0
    n, f = setup.inputs[i].shape
    if units.size > UNIT_LIMIT:
        return gain
    z = np.zeros((units.size + 1, n * f))
    z[np.arange(1, units.size + 1), units] = 1.0
    pre = forward_layer(i, z.reshape(-1, n, f))[0]
    cols = (pre[1:] - pre[:1]).reshape(units.size, -1)
    val = float(np.linalg.norm(cols, 2)) * (1 + REL_ALLOW) + 1e-9 * gain
    return min(val, gain)


def _switching(setup: _Setup, i: int, eps: float, reach: float, gains, iters: int):
    """``(bound, units, weights)``: a bound on ``||(|mu_i| - |p_i|)_+||``
    (and on ``||w o mu_i||``), the (flat, node-major) units it lives on, or
    None for all, and their ``w_u`` (docs/theory.md 9.6): units
    whose margin ``|p_u|`` is at least ``reach >= ||mu_i||`` are skipped; for
    the others, per-unit suprema ``M_u``, and the smaller of
    ``||(M_u - |p_u|)_+||`` and the joint ``sup ||w o mu_i||``,
    ``w = (1 - |p_u| / M_u)_+``."""
    pre = setup.pre[i]
    n, f = pre.shape
    margin = np.abs(pre).ravel()
    units = np.flatnonzero(margin < reach)
    if units.size == 0:
        return 0.0, units, np.zeros(0)
    if units.size > UNIT_LIMIT:
        return reach, None, None  # ||(|mu| - |p|)_+|| <= ||mu||
    y = np.zeros((units.size, n * f))
    y[np.arange(units.size), units] = 1.0
    stacked = np.concatenate(setup.adjoint_chain(i, y.reshape(units.size, n, f)), axis=2)
    sups = eps * (_unit_sups(setup, i, stacked) + _carried_error(setup, i, gains, 1.0))
    sups = np.minimum(sups, reach)
    excess = np.maximum(sups - margin[units], 0.0)
    best = float(np.linalg.norm(excess))
    live = np.flatnonzero(excess > 0)
    if 0 < live.size <= SWITCH_UNITS:
        wts = (excess[live] / sups[live])[:, None, None]
        joint = eps * (_worst_linear(setup, i, stacked[live] * wts, iters) + _carried_error(setup, i, gains, 1.0))
        best = min(best, joint)
    return best * (1 + REL_ALLOW), units[live], excess[live] / sups[live]
