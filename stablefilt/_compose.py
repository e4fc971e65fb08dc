"""Combining bounds: the change of one bank as the smallest of several valid
bounds, and the tighter composition through a model's layers
(docs/theory.md section 9).

Per bank, ``Delta`` is the smallest of the per-filter kernel bounds combined
by ``||beta||_2`` (section 5), the joint first-order bound plus the
per-filter remainders (9.2), the whole-path bound (9.1) and the trivial
``B + B_hat``. Through the layers, ``e_l = D_l (delta_l + H_hat_l e_{l-1})``
with ``D_l`` diagonal in ``[alpha, 1]``; ``delta_l`` is bounded through the
previous bank where that is smaller, the clean-path norms use the bias cross
term, a per-node readout passes through the last nonlinearity by averaging,
and the result never exceeds the trivial bound ``||W|| (n_L + n_hat_L)``
(9.3). Input-specific bounds use the measured features, their spectra and
the last layer's activation pattern.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._enclosure import bands, interval_band
from ._filterbounds import FilterConstants, bank_remainder, combine, filter_bounds, filter_constants, gain_constants
from ._filters import run_filter
from ._joint import (
    JointFactor,
    band_cover,
    cover_gain,
    eigen_cover,
    input_first_order,
    interval_cover,
    joint_factor,
    path_bound,
    schur_constant,
    sparse_first_orders,
    sparse_quadratics,
)
from ._kernel import eigenvalue_slack
from ._relunorm import relu_norm
from ._second import SecondKernel, SecondOrder, product_kernel, second_kernel, second_order, smallest_remainder
from ._series import ABS_ALLOW, REL_ALLOW, with_allowance
from ._signterm import SignTerm, previous_bank, sign_term

#: Slopes of each nonlinearity lie in ``[alpha, 1]`` (relu and tanh: 0; leaky relu: 0.1; none: D = I).
SLOPE_LOW = {"relu": 0.0, "leaky_relu": 0.1, "tanh": 0.0, "none": 1.0}


@dataclasses.dataclass(frozen=True)
class BankChange:
    """Bounds on ``||H(S_hat) - H(S)||`` at one eps by each method, and the one kept.

    Attributes:
      per_filter, joint, path, trivial: the four bounds (docs/theory.md 9).
      certified: the smallest; ``first`` its first-order part, ``second`` the rest.
      method: which one was kept.
    """

    per_filter: float
    joint: float
    path: float
    trivial: float
    certified: float
    first: float
    second: float
    method: str


def radius_and_slack(interval, lam) -> tuple[float, float]:
    """``(R, slack)``: ``R >= ||S||_2`` (the interval's, or the largest
    eigenvalue in absolute value plus its slack when smaller) and how far the
    computed eigenvalues may be from the true ones (0 without eigenvalues)."""
    slack = 0.0 if lam is None else eigenvalue_slack(lam)
    radius = interval.radius if lam is None else min(interval.radius, float(np.max(np.abs(lam))) + slack)
    return float(radius), float(slack)


def change_cover(lam, interval, slack: float, deployed=None):
    """Points covering the eigenvalues (or the interval) widened by
    ``slack``, intersected with ``deployed`` when given."""
    if lam is not None:
        return eigen_cover(lam, slack, deployed)
    lo, hi = interval[0] - slack, interval[1] + slack
    if deployed is not None:
        lo, hi = max(lo, deployed[0]), min(hi, deployed[1])
    return interval_cover(lo, hi)


def perturbed_cover(lam, interval, eps: float, radius: float, slack: float = 0.0, deployed=None):
    """Points covering where the spectra of every ``S + t (E S + S E)``,
    ``t in [0, 1]``, may lie: the relative enclosure of each eigenvalue
    (known to within ``slack``), or of the interval, intersected with the
    deployed graph's interval when it keeps its kind (docs/theory.md 9.1)."""
    if lam is not None:
        lo, hi = bands(lam, eps, radius, slack)
        return band_cover(lo, hi, deployed, what=f"relative enclosure of the eigenvalues at eps {eps:g}")
    return interval_cover(*widened(interval, eps, radius, deployed))


def widened(interval, eps: float, radius: float, deployed=None) -> tuple[float, float]:
    """The relative enclosure of ``interval`` (at most ``[a - 2 eps R, b + 2 eps R]``,
    Weyl), intersected with ``deployed`` (docs/theory.md 9.1)."""
    return interval_band(interval, eps, radius, deployed)


def bank_change(taps, basis, eps: float, *, first_order, remainder, joint: float, radius: float,
                path_cover, gains, bank_remainder: float | None = None,
                remainder_form: str = "whole bank, s.9.7") -> BankChange:
    """``Delta`` of one filter or bank at ``eps``.

    Args:
      first_order, remainder: the per-filter bounds of :func:`filter_bounds`.
      joint: the joint first-order constant ``J`` (per unit eps).
      radius: ``R >= ||S||_2``.
      path_cover: a cover of the spectra along the path (:func:`change_cover`).
      gains: ``(B, B_hat)``, bounds on ``||H(S)||`` and ``||H(S_hat)||``.
      bank_remainder: the whole bank's remainder (docs/theory.md 9.7, 9.8), when known.
      remainder_form: how ``bank_remainder`` was obtained (named in ``method``).
    """
    fo, rem = np.asarray(first_order), np.asarray(remainder)
    per = combine(fo + rem)
    rem_c, form = combine(rem), "per filter, s.5"
    if bank_remainder is not None and bank_remainder < rem_c:
        rem_c, form = bank_remainder, remainder_form
    joint_b = float(eps * joint * (1 + REL_ALLOW) + rem_c)
    path = path_bound(taps, basis, eps, radius, path_cover)
    trivial = float(gains[0] + gains[1])
    options = [(per, combine(fo), "per-filter kernel + remainder"),
               (joint_b, float(eps * joint), f"joint kernel + remainder ({form})"),
               (path.certified, path.first, f"whole path ({path.form})"),
               (trivial, trivial, "trivial: B + B_hat")]
    best = min(options, key=lambda o: o[0])
    # An absolute allowance on the scale of the gains: a float64 evaluation of
    # the model errs by about that much even where the exact change is 0.
    cert = best[0] + ABS_ALLOW * trivial
    return BankChange(per, joint_b, path.certified, trivial, cert, min(best[1], cert), max(cert - best[1], 0.0),
                      best[2])


@dataclasses.dataclass(frozen=True)
class BiasBank:
    """The previous layer's bias ``c = 1_N b^T`` through a bank: ``H(S) c =
    G(S) 1_N`` for the one-input bank ``G`` of taps ``beta_k = c_k^T b``
    (docs/theory.md 9.3), so ``||(H - H_hat) c|| <= sqrt(N) Delta(G)``, and
    ``<= eps J(1_N) + sqrt(N) r(G)`` for that one input.

    Attributes:
      taps: ``beta`` ``(K, 1, F_out)``.
      filters: its :class:`FilterConstants`.
      joint: its joint factorisation.
      rows: ``sqrt(N) = ||1_N||``.
      ones_first: ``J(1_N)``, a bound on ``sup_{||E|| <= 1} ||L(E) 1_N||``
        (first order, per unit eps), or None.
      second: its second-order kernel (9.8), with eigenvalues, or None.
    """

    taps: np.ndarray
    filters: FilterConstants
    joint: JointFactor
    rows: float
    ones_first: float | None = None
    second: SecondKernel | None = None


def ones_first_order(joint: JointFactor, taps, basis, matrix, interval, lam=None, vecs=None,
                     slack: float = 0.0) -> float | None:
    """``J(1_N)`` of a one-input bank (docs/theory.md 9.3): the input-specific
    joint form of 9.2 by sparse products on ``matrix`` (``S`` in float64;
    ``interval`` the certified one holding its spectrum), and with the
    eigenpairs ``lam``, ``vecs`` also the concave bound of 9.5; the smaller,
    or None without ``matrix`` (or when neither can be claimed)."""
    from ._inputworst import input_worst

    if matrix is None:
        return None
    ones = np.ones((1, matrix.shape[0], 1))
    val = float(sparse_first_orders([joint], matrix, ones, 1.0, interval)[0][0])
    if lam is not None and vecs is not None:
        val = min(val, float(input_worst(taps, basis, lam, vecs, ones, slack)[0]) * (1 + REL_ALLOW))
    return val if np.isfinite(val) else None


def _bias_bank(taps, bias, basis, interval, lam, cover, nodes: int, rebalance: bool, matrix=None, vecs=None,
               slack: float = 0.0) -> BiasBank | None:
    if bias is None:
        return None
    beta = np.einsum("kfg,f->kg", np.asarray(taps, dtype=np.float64), np.asarray(bias, dtype=np.float64))[:, None, :]
    jf = joint_factor(beta, basis, cover, optimise=rebalance)
    second = None if lam is None else second_kernel(beta, basis, eigen_cover(lam, slack), optimise=rebalance)
    return BiasBank(beta, filter_constants(beta, basis, interval, lam, pairwise=False), jf, float(np.sqrt(nodes)),
                    ones_first_order(jf, beta, basis, matrix, interval, lam, vecs, slack), second)


@dataclasses.dataclass(frozen=True)
class LayerExtra:
    """Eps-free constants of one layer for the composition.

    Attributes:
      joint: the joint factorisation of the bank's first-order kernel.
      right: ``J`` of the bank after the previous one (per unit eps), or None.
      cross: a bound on ``||H^T c||_F`` for the bias ``c = 1_N b^T``, or None.
      bias_norm: ``||c||_F = sqrt(N) ||b||``.
      bias_bank: the previous layer's bias through this bank, or None.
      left: ``K``, a bound on ``sup ||H L_prev(E)||`` over ``||E|| <= 1``: this
        bank after the previous bank's first-order change (docs/theory.md
        9.3, the carried change), or None.
      sign: the sign term of a relu input through ``S``'s quadratic form
        (docs/theory.md 9.9), or None.
      right_second: the second-order kernel of the bank after the previous
        one (9.8, "Through the previous bank"), or None.
      left_second: the same for the previous bank's transposed taps followed
        by this bank's transposed: ``||H Q_prev(E)|| = ||Q_prev^T(E) H^T||``
        (9.3, the carried change), or None.
    """

    joint: JointFactor
    right: float | None
    cross: float | None
    bias_norm: float
    bias_bank: BiasBank | None = None
    left: float | None = None
    sign: SignTerm | None = None
    right_second: SecondKernel | None = None
    left_second: SecondKernel | None = None


@dataclasses.dataclass(frozen=True)
class ReadoutExtra:
    """The last bank followed by a per-node readout ``W``: the bank with taps ``c_k W``."""

    taps: np.ndarray
    filters: FilterConstants
    joint: JointFactor
    right: float | None
    bias_bank: BiasBank | None = None
    left: float | None = None
    second: SecondKernel | None = None
    sign: SignTerm | None = None
    right_second: SecondKernel | None = None
    left_second: SecondKernel | None = None


@dataclasses.dataclass(frozen=True)
class CompositionConstants:
    """Eps-free part of the tighter model certificate.

    Attributes:
      layers: per layer, its :class:`LayerExtra`.
      readout: the readout composite (per-node readouts), or None.
      weight_norm: ``||W||_2`` with an allowance (1 without readout).
      slope_low: ``alpha``, the least slope of the nonlinearity.
      deployed: the deployed graph's interval when it keeps its kind, or None.
      radius, slack: ``R >= ||S||`` and the eigenvalues' float64 error.
      balanced: whether factorisations were rebalanced.
      relu_norms: per layer, its output norm through the relu
        (:class:`~stablefilt._relunorm.ReluNorm`, docs/theory.md 9.10), or
        None (another nonlinearity, no relu after the layer, no matrix or
        eigenvalues, or above its size limit); empty when none is known.
    """

    layers: tuple[LayerExtra, ...]
    readout: ReadoutExtra | None
    weight_norm: float
    slope_low: float
    deployed: tuple | None
    radius: float
    slack: float
    balanced: bool
    relu_norms: tuple = ()


def bias_cross(taps, basis, matrix, bias) -> float:
    """``||H^T c||_F`` for ``c = 1_N b^T``, computed in float64 by the filter
    recurrence with the transposed taps (``H`` symmetric in the graph);
    callers add ``1e-9 B ||c||``, an allowance far above its round-off
    (common practice)."""
    n = matrix.shape[0]
    c = np.ones((n, 1)) * np.asarray(bias, dtype=np.float64)[None, :]
    t = np.swapaxes(np.asarray(taps, dtype=np.float64), 1, 2)
    val = float(np.linalg.norm(run_filter(lambda z: matrix @ z, t, c, basis)))
    return val * (1 + REL_ALLOW)


def composition_constants(params, spec, interval, nodes: int, filters, eigenvalues=None, matrix=None, *,
                          deployed=None, rebalance: bool = False, eigenvectors=None) -> CompositionConstants:
    """The eps-free constants of :func:`composed_bound` (``params`` in
    float64 numpy; ``filters`` the layers' :class:`FilterConstants`;
    ``eigenvectors`` of ``S``, with ``eigenvalues``, tighten the biases'
    changes, docs/theory.md 9.3)."""
    a, b = interval.lower, interval.upper
    lam = None if eigenvalues is None else np.asarray(eigenvalues, dtype=np.float64)
    radius, slack = radius_and_slack(interval, lam)
    vecs = None if lam is None or eigenvectors is None else np.asarray(eigenvectors, dtype=np.float64)
    cover0 = change_cover(lam, (a, b), slack)
    kcover = None if lam is None else eigen_cover(lam, slack)  # the second-order kernels' (9.8)
    products = rebalance and kcover is not None  # the product kernels of 9.8 for rebalanced constants
    layers = params["layers"]
    # relu and leaky relu: sigma(v) = c_a v + c_b |v| (docs/theory.md 9.9), on a graph given as a matrix.
    # previous[i]: what the sign term needs of layer i's bank and bias, shared by the banks that read
    # its output (the next layer, and the readout composite after the last but one).
    relu_like = spec.nonlinearity in ("relu", "leaky_relu") and matrix is not None
    previous = [previous_bank(layer["taps"], spec.basis, layer.get("bias"), matrix, cover0) if relu_like else None
                for layer in layers[:-1]]
    extras = []
    for i, layer in enumerate(layers):
        taps = layer["taps"]
        jf = joint_factor(taps, spec.basis, cover0, optimise=rebalance)
        right = None if i == 0 else schur_constant(taps, spec.basis, cover0, "gamma", True, right=layers[i - 1]["taps"])
        bias = layer.get("bias")
        bias_norm = float(np.sqrt(nodes) * np.linalg.norm(bias)) * (1 + REL_ALLOW) if bias is not None else 0.0
        cross = bias_cross(taps, spec.basis, matrix, bias) + 1e-9 * float(filters[i].bank_sup) * bias_norm \
            if (bias is not None and matrix is not None) else None
        bb = None if i == 0 else _bias_bank(taps, layers[i - 1].get("bias"), spec.basis, (a, b), lam, cover0, nodes,
                                            rebalance, matrix, vecs, slack)
        left = None if i == 0 else left_constant(layers[i - 1]["taps"], taps, spec.basis, cover0)
        sg = None if i == 0 else sign_term(jf, previous[i - 1])
        rs, ls = None, None
        if i > 0 and products:
            rs = product_kernel(taps, layers[i - 1]["taps"], spec.basis, kcover, True)
            ls = left_kernel(layers[i - 1]["taps"], taps, spec.basis, kcover)
        extras.append(LayerExtra(jf, right, cross, bias_norm, bb, left, sg, rs, ls))
    readout = None
    w = params.get("readout", {}).get("weight") if spec.readout != "none" else None
    wn = float(np.linalg.norm(np.asarray(w, dtype=np.float64), 2)) * (1 + REL_ALLOW) if w is not None else 1.0
    if spec.readout == "node":
        comp = np.einsum("kfg,gc->kfc", layers[-1]["taps"], np.asarray(w, dtype=np.float64))
        cw = filter_constants(comp, spec.basis, (a, b), lam, pairwise=False)
        jw = joint_factor(comp, spec.basis, cover0, optimise=rebalance)
        rw = None if len(layers) < 2 else schur_constant(comp, spec.basis, cover0, "gamma", True, right=layers[-2]["taps"])
        rb = None if len(layers) < 2 else _bias_bank(comp, layers[-2].get("bias"), spec.basis, (a, b), lam, cover0,
                                                     nodes, rebalance, matrix, vecs, slack)
        lw = None if len(layers) < 2 else left_constant(layers[-2]["taps"], comp, spec.basis, cover0)
        # The composite's second-order kernel (9.8) over the eigenvalues, as for the layers' banks.
        sw = None if lam is None else second_kernel(comp, spec.basis, kcover, optimise=rebalance)
        sg = None if len(layers) < 2 else sign_term(jw, previous[-1])
        rs, ls = None, None
        if len(layers) >= 2 and products:
            rs = product_kernel(comp, layers[-2]["taps"], spec.basis, kcover, True)
            ls = left_kernel(layers[-2]["taps"], comp, spec.basis, kcover)
        readout = ReadoutExtra(comp, cw, jw, rw, rb, lw, sw, sg, rs, ls)
    alpha = SLOPE_LOW.get(spec.nonlinearity, 0.0)
    # 9.10: ||x_l|| through the relu, for every layer but the last (whose
    # output norm enters the trivial bound only).
    relus = ()
    if spec.nonlinearity == "relu" and matrix is not None and lam is not None:
        relus = tuple(relu_norm(layer["taps"], layer.get("bias"), spec.basis, matrix) if i < len(layers) - 1
                      else None for i, layer in enumerate(layers))
    return CompositionConstants(tuple(extras), readout, wn, alpha, None if deployed is None else tuple(deployed),
                                float(radius), float(slack), bool(rebalance), relus)


def left_kernel(prev_taps, taps, basis, cover) -> SecondKernel:
    """The product kernel bounding ``||H Q_prev(E)||`` (``Q_prev`` the
    second-order term of the bank ``prev_taps``, ``H`` the bank ``taps``
    after it): for ``S`` and ``E`` symmetric the adjoint of ``Q_prev(E)`` is
    the second-order term of the bank with taps ``c_k^T`` (each word
    ``S^a D S^b D S^c`` has its reverse in the same sum), so
    ``||H Q_prev(E)|| = ||Q_prev^T(E) H^T||``, the product kernel of that bank
    followed on the right by ``taps`` transposed (docs/theory.md 9.3, 9.8)."""
    t = lambda z: np.swapaxes(np.asarray(z, dtype=np.float64), 1, 2)  # noqa: E731
    return product_kernel(t(prev_taps), t(taps), basis, cover, True)


def left_constant(prev_taps, taps, basis, cover) -> float:
    """``K >= sup ||H L_prev(E)||_2`` over ``||E||_2 <= 1`` (``L_prev`` the
    first-order change of the bank ``prev_taps``, ``H`` the bank ``taps``
    after it), by transposition: the right-composite bound of the bank with
    taps ``c_k^T`` of ``prev_taps`` followed on the right by ``taps``
    transposed (``S``, ``E`` symmetric; docs/theory.md 9.3, the carried change)."""
    t = lambda z: np.swapaxes(np.asarray(z, dtype=np.float64), 1, 2)  # noqa: E731
    return float(schur_constant(t(prev_taps), basis, cover, "gamma", True, right=t(taps)))


def carried(a_prev: float, d: float, n_prev: float, gain_hat: float, gain: float, change: float,
            left: float | None, eps: float, rem_prev: float, change_prev: float, ca: float, cb: float,
            rem_left: float | None = None) -> float:
    """``a_l``, a bound on ``||H_hat e_l||`` for the bank ``H`` that follows
    layer ``l`` (docs/theory.md 9.3, the carried change)::

        min(B_hat (d_l + a_{l-1}), c_a kappa n_{l-1} + c_b B_hat d_l + B_hat a_{l-1})
        kappa = min(min(eps K + r_l B, Delta_l B) + Delta Delta_l, B_hat Delta_l)

    Args:
      a_prev: ``a_{l-1}`` (0 for the first layer).
      d: ``d_l``, the bound on ``||(H_l - H_hat_l) x_{l-1}||``.
      n_prev: ``n_{l-1}``, the clean-path bound on ``||x_{l-1}||``.
      gain_hat, gain, change: ``B_hat``, ``B`` and ``Delta`` of the bank ``H``.
      left: ``K`` (:func:`left_constant`) of ``H`` after layer ``l``, or None.
      rem_prev, change_prev: ``r_l`` and ``Delta_l``, layer ``l``'s bank remainder and change.
      rem_left: a bound on ``||H R_l(E)||`` (layer ``l``'s remainder followed by
        ``H``; 9.8, "Through the previous bank", by transposition), or None
        (then ``r_l B``).
    """
    plain = gain_hat * (d + a_prev)
    if left is None:
        return plain
    rem_after = rem_prev * gain if rem_left is None else min(rem_prev * gain, rem_left)
    kappa = min(eps * left + rem_after, change_prev * gain) + change * change_prev
    kappa = min(kappa, gain_hat * change_prev)
    return min(plain, ca * kappa * n_prev + cb * gain_hat * d + gain_hat * a_prev)


def clean_norm(n_prev: float, gain: float, cross: float | None, bias_norm: float) -> float:
    """``sup ||H x + c||`` over ``||x|| <= n_prev``: ``sqrt(B^2 n^2 + 2 n ||H^T c|| + ||c||^2)``,
    never above ``B n + ||c||`` (docs/theory.md 9.3)."""
    plain = gain * n_prev + bias_norm
    if cross is None:
        return plain
    val = np.sqrt(max(gain * gain * n_prev * n_prev + 2.0 * n_prev * cross + bias_norm * bias_norm, 0.0))
    return float(min(plain, val * (1 + REL_ALLOW) + 1e-12 * plain))


@dataclasses.dataclass(frozen=True)
class LayerChanges:
    """Per-layer bank changes at one eps, the gains over ``spec S_hat``, and
    the readout composite's change, gain and per-filter remainders (or None),
    the bias banks' changes, the readout composite's remainder for every
    unit-norm input (the smallest of per filter, 9.7 and 9.8), or None, and
    its second-order remainder (9.8) at this eps, or None."""

    changes: tuple[BankChange, ...]
    gains_hat: tuple[float, ...]
    readout_change: BankChange | None
    readout_gain_hat: float | None
    readout_remainder: np.ndarray | None = None
    bias_changes: tuple = ()
    readout_bias_change: float | None = None
    readout_bank_remainder: float | None = None
    readout_second: SecondOrder | None = None


def _composite_change(taps, filters, joint, spec, eps: float, interval, lam, pcover, wide, radius: float,
                      kernel: SecondKernel | None = None):
    """``(BankChange, B_hat, per-filter bounds, remainder, SecondOrder or None)`` of a bank built
    from the model's (the readout composite, a bias bank) at ``eps``, from
    its eps-free ``filters``, ``joint`` constants and, when known, its
    second-order ``kernel``; ``remainder`` is the smallest of the per-filter,
    whole-bank (9.7) and second-order kernel (9.8) remainders, as for the
    layers' banks."""
    fb = filter_bounds(taps, spec.basis, interval, eps, filters, lam)
    g_hat = gain_hat(taps, spec.basis, wide, lam, pcover)
    so = None if kernel is None else second_order(taps, spec.basis, interval, eps, kernel)
    rem, form = smallest_remainder(fb.remainder, bank_remainder(taps, spec.basis, interval, eps), so)
    ch = bank_change(taps, spec.basis, eps, first_order=fb.first_order, remainder=fb.remainder,
                     joint=joint.constant, radius=radius, path_cover=pcover,
                     gains=(float(filters.bank_sup), g_hat), bank_remainder=rem, remainder_form=form)
    return ch, g_hat, fb, rem, so


def gain_hat(taps, basis, wide, lam, pcover) -> float:
    """``B_hat``, a bound on ``||H(S_hat)||_2``: the supremum of ``||H||_2`` over
    the enclosing interval ``wide``, and with eigenvalues the smaller
    supremum over the cover ``pcover`` of their enclosures (docs/theory.md 9.1)."""
    g = float(gain_constants(taps, basis, wide)[0])
    if lam is not None:
        g = min(g, cover_gain(taps, basis, pcover))
    return g


def _bias_change(bb: BiasBank | None, spec, eps: float, interval, lam, pcover, wide, radius: float):
    """The smaller of ``sqrt(N) Delta(G)`` and ``eps J(1_N) + sqrt(N) r(G)``
    for a :class:`BiasBank` at ``eps`` (docs/theory.md 9.3), or None."""
    if bb is None:
        return None
    ch, _, _, rem, _ = _composite_change(bb.taps, bb.filters, bb.joint, spec, eps, interval, lam, pcover, wide, radius,
                                      bb.second)
    out = bb.rows * ch.certified
    if bb.ones_first is not None:
        out = min(out, eps * bb.ones_first + bb.rows * rem + ABS_ALLOW * bb.rows * ch.trivial)
    return float(out * (1 + REL_ALLOW))


def layer_changes(mc, cc: CompositionConstants, bounds, eps: float) -> LayerChanges:
    """The :class:`BankChange` of every layer at ``eps``; ``mc`` the model's
    constants, ``bounds`` its per-layer ``LayerBound`` records at ``eps``."""
    spec, iv, lam = mc.spec, mc.interval, mc.eigenvalues
    a, b = iv.lower, iv.upper
    pcover = perturbed_cover(lam, (a, b), eps, cc.radius, cc.slack, cc.deployed)
    wide = widened((a, b), eps, iv.radius, cc.deployed)
    changes, gains_hat = [], []
    for layer, lb, extra in zip(mc.params["layers"], bounds, cc.layers):
        b_hat = lb.gain_perturbed  # over the enclosure, with the deployed interval (layer_bounds)
        gains_hat.append(float(b_hat))
        rem, form = lb.remainder_choice()
        changes.append(bank_change(layer["taps"], spec.basis, eps, first_order=lb.beta - lb.remainder,
                                   remainder=lb.remainder, joint=extra.joint.constant, radius=cc.radius,
                                   path_cover=pcover, gains=(lb.gain, b_hat), bank_remainder=rem,
                                   remainder_form=form))
    rc, rg, rr, rbr, rso = None, None, None, None, None
    if cc.readout is not None:
        ro = cc.readout
        rc, rg, fb, rbr, rso = _composite_change(ro.taps, ro.filters, ro.joint, spec, eps, (a, b), lam, pcover, wide,
                                            cc.radius, ro.second)
        rr = np.asarray(fb.remainder)
    biases = tuple(_bias_change(extra.bias_bank, spec, eps, (a, b), lam, pcover, wide, cc.radius)
                   for extra in cc.layers)
    rbias = None if cc.readout is None else _bias_change(cc.readout.bias_bank, spec, eps, (a, b), lam, pcover, wide,
                                                         cc.radius)
    return LayerChanges(tuple(changes), tuple(gains_hat), rc, rg, rr, biases, rbias, rbr, rso)


@dataclasses.dataclass(frozen=True)
class ComposedBound:
    """The tighter operator-level model bound at one eps.

    Attributes:
      eps: the perturbation size.
      certified: ``min(composed, trivial)`` with an allowance.
      composed: the layer composition (docs/theory.md 9.3).
      trivial: ``||readout|| (n_L + n_hat_L)``.
      changes: per layer, :class:`BankChange`.
      clean_norms: bounds ``n_0 = rho, ..., n_L`` on the clean path.
    """

    eps: float
    certified: float
    composed: float
    trivial: float
    changes: tuple[BankChange, ...]
    clean_norms: tuple[float, ...]


def _through(i, delta, rem, right, cc, norms, gains, ca, cb, bias_change=None, sign=None, eps=0.0,
             rem_right=None):
    """Bound on ``||(H_i - H_hat_i) x_{i-1}||`` over the inputs: ``Delta
    n_{i-1}``, or through the previous bank, with the previous bias apart
    when ``bias_change`` bounds ``||(H_i - H_hat_i) c||`` (docs/theory.md 9.3),
    and the sign term through ``S``'s quadratic form when ``sign`` (a
    :class:`SignTerm`) is given (9.9). ``rem_right``: a bound on the
    remainder of ``(H_i - H_hat_i) H_{i-1}`` per unit input, when known
    (9.8, "Through the previous bank"; else ``rem B_{i-1}``)."""
    plain = delta * norms[i]
    if i == 0 or (right is None and bias_change is None):
        return plain
    prev = cc.layers[i - 1]
    # ||(H_i - H_hat_i) |v| ||, v the previous pre-activation (||v|| <= norms[i]).
    abs_part = delta * norms[i]
    if sign is not None:
        abs_part = min(abs_part, sign.bound(eps, norms[i - 1], norms[i], rem))
    rem_prod = rem * gains[i - 1] if rem_right is None else min(rem * gains[i - 1], rem_right)
    d_right = delta * gains[i - 1] if right is None else min(right + rem_prod, delta * gains[i - 1])
    nested = ca * d_right * norms[i - 1] + cb * min(delta * gains[i - 1] * norms[i - 1], abs_part) \
        + delta * prev.bias_norm
    if bias_change is not None:
        nested = min(nested, ca * d_right * norms[i - 1] + ca * min(bias_change, delta * prev.bias_norm)
                     + cb * abs_part)
    return min(plain, nested)


def product_remainder(kernel: SecondKernel | None, second: SecondOrder | None, eps: float,
                      gain_prev: float) -> float | None:
    """A bound on the remainder of ``(H - H_hat) H'`` per unit input (or, by
    transposition, of ``H' (H - H_hat)``): the second-order term through the
    product ``kernel`` plus the bank's words with three or more factors (the
    ``third`` part of its :class:`~stablefilt._second.SecondOrder` at
    ``eps``) times ``gain_prev >= ||H'||`` (docs/theory.md 9.8, "Through the
    previous bank"); None when either is unknown."""
    if kernel is None or second is None:
        return None
    quad = float(with_allowance(eps * eps * kernel.operator, 0.0))
    val = float((quad + second.third.operator() * gain_prev) * (1 + REL_ALLOW))
    return val if np.isfinite(val) else np.inf  # never a NaN: callers keep the smaller of two bounds


def composed_bound(mc, cc: CompositionConstants, bounds, eps: float, rho: float,
                   changes: LayerChanges | None = None) -> ComposedBound:
    """Operator-level bound on ``||Phi(S) x - Phi(S_hat) x||_F`` for every
    ``||x||_F <= rho`` (docs/theory.md 9.3)."""
    spec = mc.spec
    lc = changes or layer_changes(mc, cc, bounds, eps)
    gains = [lb.gain for lb in bounds]
    norms, norms_hat = [float(rho)], [float(rho)]
    for lb, extra, g_hat in zip(bounds, cc.layers, lc.gains_hat):
        relu = cc.relu_norms[len(norms) - 1] if cc.relu_norms else None
        n_next = clean_norm(norms[-1], lb.gain, extra.cross, extra.bias_norm)
        norms.append(n_next if relu is None else min(n_next, relu.bound(norms[-1])))  # through the relu (9.10)
        norms_hat.append(g_hat * norms_hat[-1] + extra.bias_norm)
    ca, cb = 0.5 * (1 + cc.slope_low), 0.5 * (1 - cc.slope_low)
    deltas, rems = [], []
    a, a_before = 0.0, 0.0  # a: bound on ||H_hat_{i+1} e_i|| (theory 9.3, the carried change)
    for i, (ch, lb) in enumerate(zip(lc.changes, bounds)):
        rem = lb.bank_remainder()
        right = None if cc.layers[i].right is None else eps * cc.layers[i].right
        bias_ch = lc.bias_changes[i] if lc.bias_changes else None
        rem_right = None if i == 0 else product_remainder(cc.layers[i].right_second, lb.second, eps, gains[i - 1])
        d = _through(i, ch.certified, rem, right, cc, norms, gains, ca, cb, bias_ch, cc.layers[i].sign, eps,
                     rem_right)
        deltas.append(d)
        rems.append(rem)
        if i < spec.depth - 1:
            a_before = a
            rem_left = product_remainder(cc.layers[i + 1].left_second, lb.second, eps, gains[i + 1])
            a = carried(a, d, norms[i], lc.gains_hat[i + 1], gains[i + 1], lc.changes[i + 1].certified,
                        cc.layers[i + 1].left, eps, rem, ch.certified, ca, cb, rem_left)
    e_last = deltas[-1] + a
    rf = mc.readout
    out = rf * e_last
    if cc.readout is not None and lc.readout_change is not None:
        alpha_l = cc.slope_low if spec.final_nonlinearity else 1.0
        right = None if cc.readout.right is None else eps * cc.readout.right
        rem_w = combine(lc.readout_remainder) if lc.readout_bank_remainder is None else lc.readout_bank_remainder
        rem_right = None if spec.depth < 2 else product_remainder(cc.readout.right_second, lc.readout_second, eps,
                                                                  gains[spec.depth - 2])
        dw = _through(spec.depth - 1, lc.readout_change.certified, rem_w, right, cc, norms,
                      gains, ca, cb, lc.readout_bias_change, cc.readout.sign, eps, rem_right)
        g = 0.0  # bound on ||G_hat e_{L-2}||, G = H_L W
        if spec.depth >= 2:
            k = spec.depth - 2
            gain_w = float(cc.readout.filters.bank_sup)
            rem_left = product_remainder(cc.readout.left_second, bounds[k].second, eps, gain_w)
            g = carried(a_before, deltas[k], norms[k], lc.readout_gain_hat, gain_w,
                        lc.readout_change.certified, cc.readout.left, eps, rems[k], lc.changes[k].certified, ca, cb,
                        rem_left)
        through = dw + g
        out = min(out, 0.5 * (1 + alpha_l) * through + 0.5 * (1 - alpha_l) * cc.weight_norm * e_last)
    trivial = rf * (norms[-1] + norms_hat[-1])
    cert = min(out, trivial) * (1 + REL_ALLOW) + ABS_ALLOW * trivial
    return ComposedBound(float(eps), float(cert), float(out), float(trivial), lc.changes, tuple(norms))


def _unique_rows(mask) -> np.ndarray:
    """The distinct rows of a boolean ``(N, F)`` array: rows packed into
    bytes and compared as such (``numpy.unique`` on the rows sorts them
    column by column, seconds at 10^5 nodes)."""
    mask = np.asarray(mask, dtype=bool)
    if mask.shape[1] == 0 or mask.shape[0] == 0:
        return mask[:1]
    packed = np.packbits(mask, axis=1)
    keys = np.ascontiguousarray(packed).view(np.dtype((np.void, packed.shape[1])))[:, 0]
    _, first = np.unique(keys, return_index=True)
    return mask[np.sort(first)]


def _masked_readout(w, pre, beta, nonlinearity) -> np.ndarray:
    """Per signal, ``max_i ||W[U_i, :]||_2`` over nodes ``i``, ``U_i`` the last
    layer's units whose clean pre-activation is below ``beta`` (off, or able
    to switch; units at or above ``beta`` stay on, slope 1). For relu and
    leaky relu only; other nonlinearities get ``||W||_2`` (docs/theory.md 9.3)."""
    w = np.asarray(w, dtype=np.float64)
    out = np.full(pre.shape[0], float(np.linalg.norm(w, 2)))
    if nonlinearity not in ("relu", "leaky_relu"):
        return out * (1 + REL_ALLOW)
    for b in range(pre.shape[0]):
        worst = 0.0
        for pattern in _unique_rows(pre[b] < beta[b]):
            if pattern.any():
                worst = max(worst, float(np.linalg.norm(w[pattern], 2)))
        out[b] = worst
    return out * (1 + REL_ALLOW)


def composed_inputs(mc, cc: CompositionConstants, bounds, x, eps: float, *, eigenvectors=None,
                    forward_layer, known=None, changes: LayerChanges | None = None, refine: int = 0,
                    matrix=None, memo=None) -> np.ndarray:
    """Input-specific bound per signal on ``||Phi(S) x_b - Phi(S_hat) x_b||_F``
    (``x``: ``(B, N, F_0)``; docs/theory.md 9.2, 9.3, 9.5). Per layer the
    smaller of the joint spectral bound (with eigenvectors) and the bank's
    operator bound times the measured feature norm; a per-node readout enters
    through the last layer's activation pattern. The signal with the largest
    bound is bounded again with each bank's largest first-order change for its
    own input (:func:`stablefilt._inputworst.input_worst`, about a second per
    bank and signal) and with the whole network's change for that input
    (:mod:`stablefilt._networst`, docs/theory.md 9.6, a few seconds), until
    the largest bound is a refined one or ``refine`` signals are done. ``forward_layer(i, z) -> (pre, out)``
    runs layer ``i`` in float64; ``known[i]``, when given, are other valid
    bounds on layer ``i``'s change of these signals (the smaller is kept).
    Without eigenvectors, ``matrix`` (``S`` in float64) gives each bank's
    joint bound for its input by sparse products (9.2, without eigenvectors).
    ``memo``: an :class:`~stablefilt._memo.InputMemo` for ``x`` (its sparse
    quadratic forms and remainder norms kept between sizes), or None."""
    lc = changes or layer_changes(mc, cc, bounds, eps)
    z = np.asarray(x, dtype=np.float64)
    out = _input_chain(mc, cc, bounds, lc, z, eps, eigenvectors, forward_layer, known, False, matrix, memo)
    if refine and mc.eigenvalues is not None and eigenvectors is not None:
        # Refine the signal with the largest bound until the largest is a
        # refined one, or ``refine`` signals are done.
        done = np.zeros(len(out), dtype=bool)
        while done.sum() < min(refine, len(out)):
            top = int(np.argmax(out))
            if done[top]:
                break
            sub = None if known is None else [np.asarray(k)[[top]] for k in known]
            out[top] = min(out[top], float(_input_chain(mc, cc, bounds, lc, z[[top]], eps, eigenvectors,
                                                        forward_layer, sub, True)[0]))
            done[top] = True
    return out


def _input_chain(mc, cc, bounds, lc, z, eps, eigenvectors, forward_layer, known, worst: bool, matrix=None,
                 memo=None):
    """The per-signal chain of :func:`composed_inputs`; ``worst`` adds the
    fixed-input first-order bounds of :mod:`stablefilt._inputworst`."""
    from ._inputworst import input_worst

    spec, lam = mc.spec, mc.eigenvalues
    e = np.zeros(z.shape[0])
    e_prev, last_in, pre = e, z, None
    use_spec = lam is not None and eigenvectors is not None
    ends = (mc.interval.lower, mc.interval.upper)
    sparse = not use_spec and matrix is not None
    chain = []
    x0 = z
    for i, (lb, ch, extra) in enumerate(zip(bounds, lc.changes, cc.layers)):
        d = ch.certified * np.sqrt(np.sum(z**2, axis=(1, 2)))
        if use_spec:
            rem = lb.spectral_remainder(z, lam, eigenvectors, cc.slack) if worst else lb.input_remainder(z, memo)
            d = np.minimum(d, input_first_order(extra.joint, lam, eigenvectors, z, eps) + rem)
            if worst:
                first = eps * input_worst(mc.params["layers"][i]["taps"], spec.basis, lam, eigenvectors, z, cc.slack)
                d = np.minimum(d, first * (1 + REL_ALLOW) + rem)
        elif sparse:
            # The last bank and the readout composite read the same input: their products are shared.
            shared = i == len(bounds) - 1 and cc.readout is not None and spec.final_nonlinearity
            factors = [extra.joint] + ([cc.readout.joint] if shared else [])
            quads = None if memo is None else memo.quadratics(
                i, z, factors, lambda fs, v: sparse_quadratics(fs, matrix, v, ends))
            firsts = sparse_first_orders(factors, matrix, z, eps, ends, quads)
            d = np.minimum(d, firsts[0] + lb.input_remainder(z, memo))
            readout_first = firsts[1] if shared else None
        if known is not None:
            d = np.minimum(d, known[i])
        e_prev, e = e, d + lc.gains_hat[i] * e
        chain.append(e)
        last_in = z
        pre, z = forward_layer(i, z)
    plain = mc.readout * e
    if worst and use_spec:
        net = network_bounds(mc, cc, bounds, lc, x0, eps, eigenvectors, forward_layer, chain)
        plain = np.minimum(plain, [r.certified for r in net])
    if cc.readout is None or not spec.final_nonlinearity:
        return plain * (1 + REL_ALLOW)
    # W D v with D = I - D_off, D_off on units that are off or may switch:
    # ||W D v|| <= ||W^T v|| + ||W_U|| ||v||, and ||W^T v|| through the composite bank.
    ro = cc.readout
    dw = lc.readout_change.certified * np.sqrt(np.sum(last_in**2, axis=(1, 2)))
    feat = np.sqrt(np.sum(last_in**2, axis=1))
    remw = np.linalg.norm(feat @ lc.readout_remainder, axis=1) * (1 + REL_ALLOW)
    if sparse:
        dw = np.minimum(dw, readout_first + remw)
    if use_spec:
        dw = np.minimum(dw, input_first_order(ro.joint, lam, eigenvectors, last_in, eps) + remw)
        if worst:
            first = eps * input_worst(ro.taps, spec.basis, lam, eigenvectors, last_in, cc.slack)
            dw = np.minimum(dw, first * (1 + REL_ALLOW) + remw)
    masked = _masked_readout(mc.params["readout"]["weight"], pre, e, spec.nonlinearity)
    through = dw + lc.readout_gain_hat * e_prev + masked * e
    return np.minimum(plain, through) * (1 + REL_ALLOW)


def network_bounds(mc, cc: CompositionConstants, bounds, lc: LayerChanges, x, eps: float, eigenvectors,
                   forward_layer, chain=None) -> list:
    """Per signal of ``x`` ``(B, N, F_0)``, the whole-network bound of
    docs/theory.md 9.6 (a :class:`stablefilt._networst.NetworkWorst`).
    ``chain[l][b]`` bounds the pre-activation change of layer ``l``; by
    default ``Delta_l ||x_{l-1}|| + B_hat_l chain[l-1]`` (9.3)."""
    from ._networst import network_worst

    z = np.asarray(x, dtype=np.float64)
    if chain is None:
        chain, e, h = [], np.zeros(z.shape[0]), z
        for i, ch in enumerate(lc.changes):
            e = ch.certified * np.sqrt(np.sum(h**2, axis=(1, 2))) + lc.gains_hat[i] * e
            chain.append(e)
            h = forward_layer(i, h)[1]
    return [network_worst(mc.params, mc.spec, mc.eigenvalues, eigenvectors, z[b], eps, slack=cc.slack,
                          chain=[float(c[b]) for c in chain], changes=[ch.certified for ch in lc.changes],
                          remainders=[_spectral(lb, mc.eigenvalues, eigenvectors, cc.slack) for lb in bounds], gains=[lb.gain for lb in bounds],
                          readout_norm=mc.readout, forward_layer=forward_layer) for b in range(z.shape[0])]


def _spectral(lb, lam, vecs, slack: float):
    """``x -> lb.spectral_remainder(x, lam, vecs, slack)`` (docs/theory.md 9.8)."""
    return lambda x: lb.spectral_remainder(x, lam, vecs, slack)
