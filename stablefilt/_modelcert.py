"""Certified bounds, in float64, on how much a GNN's output can move under a
relative perturbation of its graph (docs/theory.md section 5 item 6 and
section 8).

For layers ``x_l = sigma(H_l(S) x_{l-1} + b_l)`` with ``sigma`` 1-Lipschitz:
``||x_l - x_hat_l|| <= Delta_l ||x_{l-1}|| + B_hat_l ||x_{l-1} - x_hat_{l-1}||``
where ``Delta_l`` bounds ``||H_l(S) - H_l(S_hat)||`` and ``B_hat_l`` bounds
``||H_l(S_hat)||``; biases cancel in the difference. Operator level (every
input with ``||x||_F <= rho``): ``||x_l|| <= B_l ||x_{l-1}|| + sqrt(N) ||b_l||``
(needs ``sigma(0) = 0``). Input-specific: the measured per-feature norms of the
unperturbed path, weighted per filter.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import numpy as np

from ._certify import MODEL, NORM, deployed_text
from ._compose import (
    CompositionConstants,
    composed_bound,
    composed_inputs,
    composition_constants,
    layer_changes,
    perturbed_cover,
    radius_and_slack,
    widened,
)
from ._filterbounds import (
    BankRemainder,
    FilterConstants,
    bank_remainder,
    combine,
    filter_bounds,
    filter_constants,
    gain_constants,
)
from ._filters import frequency_response
from ._interval import SpectralInterval
from ._joint import cover_gain, eigen_cover
from ._kernel import eigenvalue_slack, spectral_first_order
from ._model import ModelSpec, forward_np
from ._second import SecondOrder, second_kernel, second_order, smallest_remainder
from ._series import REL_ALLOW, with_allowance


def _np(params):
    import jax

    return jax.tree_util.tree_map(lambda a: np.asarray(a, dtype=np.float64), params)


def eps_key(eps: float) -> str:
    """An eps as a JSON key (the run log, summary.json and --json formats)."""
    return f"{eps:g}"


def readout_factor(params, spec: ModelSpec, nodes: int) -> float:
    """Bound on the readout's Lipschitz constant in the Frobenius norm:
    ``||W||_2`` (node; flat, with ``W`` of shape ``(N F_L, C)``: theory
    s.8.1), ``/ sqrt(N)`` (mean), ``* sqrt(N)`` (sum), 1 (none)."""
    if spec.readout == "none":
        return 1.0
    w = float(with_allowance(np.linalg.norm(np.asarray(params["readout"]["weight"], dtype=np.float64), 2), 0.0))
    if spec.readout == "mean":
        return w / np.sqrt(nodes)
    if spec.readout == "sum":
        return w * np.sqrt(nodes)
    return w


@dataclasses.dataclass(frozen=True)
class LayerConstants:
    """A layer's reported constants, the max over its bank's filters:
    integral Lipschitz ``C``, kernel ``kappa`` (over the eigenvalues when
    known) and ``sup ||H||``."""

    integral_lipschitz: float
    kernel: float
    sup: float


@dataclasses.dataclass(frozen=True)
class ModelConstants:
    """The eps-free part of a model's certificate on one graph, computed once
    (:func:`model_constants`) and reused for every eps (:func:`model_bounds`).

    Attributes:
      params: the model's params in float64 numpy.
      spec: the :class:`ModelSpec`.
      interval: the certified spectral interval of ``S``.
      nodes: ``N``.
      eigenvalues: all eigenvalues of ``S``, or None.
      filters: per layer, the bank's :class:`FilterConstants` (no ``C2``).
      gains: per layer, a bound ``B_l`` on ``||H_l(S)||_2``.
      readout: bound on the readout's Lipschitz constant.
      layers: per layer, the reported :class:`LayerConstants`.
      composition: the eps-free constants of the tighter composition
        (docs/theory.md section 9), or None.
      second: per layer, the :class:`~stablefilt._second.SecondKernel` of
        the bank over the eigenvalues (docs/theory.md 9.8), or None.
    """

    params: dict
    spec: ModelSpec
    interval: SpectralInterval
    nodes: int
    eigenvalues: np.ndarray | None
    filters: tuple[FilterConstants, ...]
    gains: tuple[float, ...]
    readout: float
    layers: tuple[LayerConstants, ...]
    composition: CompositionConstants | None = None
    second: tuple | None = None


def _bank_sup_eig(taps, basis, lam):
    """``max_i ||H(lam_i)||_2``: the exact norm of ``H(S)`` when ``lam`` are
    all the eigenvalues, with a round-off allowance."""
    cols = taps.reshape(taps.shape[0], -1)
    h = frequency_response(cols, lam, basis).reshape(len(lam), *taps.shape[1:])
    return float(with_allowance(np.max(np.linalg.norm(h, ord=2, axis=(1, 2))), 1.0))


def model_constants(params, spec: ModelSpec, interval: SpectralInterval, nodes: int,
                    eigenvalues=None, *, matrix=None, deployed=None, rebalance: bool = False,
                    eigenvectors=None) -> ModelConstants:
    """The eps-free constants of a model on a graph with spectrum in
    ``interval`` (and, when given, these ``eigenvalues``).

    ``matrix`` (the graph's ``S``) enables the bias cross term of the clean
    path; ``deployed`` is the interval holding the deployed graph's spectrum
    when it keeps its kind (docs/theory.md 9.1), else None (Weyl's widening);
    ``rebalance`` optimises the joint factorisations (slower, tighter;
    docs/theory.md 9.4); ``eigenvectors`` of ``S`` (with ``eigenvalues``)
    tighten the previous layers' biases' changes (9.3, about a second per
    bias at N = 120)."""
    p = _np(params)
    iv = (interval.lower, interval.upper)
    filters, gains, layers = [], [], []
    for layer in p["layers"]:
        taps = layer["taps"]
        c = filter_constants(taps, spec.basis, iv, eigenvalues, pairwise=False)
        filters.append(c)
        gains.append(c.bank_sup if eigenvalues is None else min(c.bank_sup, _bank_sup_eig(taps, spec.basis, eigenvalues)))
        kap = c.kernel if c.kernel_spectrum is None else np.minimum(c.kernel, c.kernel_spectrum)
        layers.append(LayerConstants(float(np.max(c.integral_lipschitz)), float(np.max(kap)), float(c.bank_sup)))
    comp = composition_constants(p, spec, interval, int(nodes), filters, eigenvalues, matrix, deployed=deployed,
                                 rebalance=rebalance, eigenvectors=eigenvectors)
    second = None
    if eigenvalues is not None:
        cover = eigen_cover(eigenvalues, eigenvalue_slack(eigenvalues))
        second = tuple(second_kernel(layer["taps"], spec.basis, cover, optimise=rebalance) for layer in p["layers"])
    return ModelConstants(p, spec, interval, int(nodes), eigenvalues, tuple(filters), tuple(gains),
                          readout_factor(p, spec, nodes), tuple(layers), comp, second)


class LayerBound(NamedTuple):
    """One layer's bounds at one eps.

    Attributes:
      beta: ``(F_in, F_out)`` per-filter bounds on the change of ``H_l``.
      remainder: ``(F_in, F_out)`` their second-order remainder part.
      gain: a bound ``B_l`` on ``||H_l(S)||_2``.
      gain_perturbed: a bound ``B_hat_l`` on ``||H_l(S_hat)||_2``.
      bank: the whole bank's remainder (docs/theory.md 9.7), or None.
      second: the remainder through the second-order kernel (9.8), or None.
    """

    beta: np.ndarray
    remainder: np.ndarray
    gain: float
    gain_perturbed: float
    bank: BankRemainder | None = None
    second: SecondOrder | None = None

    def remainder_choice(self) -> tuple[float, str]:
        """The bank's remainder for every unit-norm input, the smallest of
        ``||remainder||_2`` (per filter), the whole-bank form and the
        second-order kernel form, and the name of the one kept."""
        return smallest_remainder(self.remainder, self.bank, self.second)

    def bank_remainder(self) -> float:
        """:meth:`remainder_choice`'s value."""
        return self.remainder_choice()[0]

    def input_remainder(self, x, memo=None) -> np.ndarray:
        """Per signal of ``x`` ``(B, N, F_in)``, the smallest of the per-filter
        remainders weighted by feature norms, the whole-bank form and the
        second-order kernel form (``memo``: an
        :class:`~stablefilt._memo.InputMemo` for ``x``, or None)."""
        feat = np.sqrt(np.sum(np.asarray(x, dtype=np.float64) ** 2, axis=1))
        out = np.linalg.norm(feat @ np.atleast_2d(self.remainder), axis=1) * (1 + REL_ALLOW)
        if self.bank is not None:
            out = np.minimum(out, self.bank.inputs(x, None if memo is None else memo.norms(x, self.bank)))
        if self.second is not None:
            third = self.second.third
            out = np.minimum(out, self.second.inputs(x, None if memo is None else memo.norms(x, third)))
        return out

    def spectral_remainder(self, x, lam, vecs, slack: float) -> np.ndarray:
        """:meth:`input_remainder`, or the weighted second-order form of
        docs/theory.md 9.8 for these inputs with the eigenpairs of ``S``
        when smaller (about a second per bank and signal at N = 120, F = 16)."""
        out = self.input_remainder(x)
        if self.second is None:
            return out
        return np.minimum(out, self.second.spectral(x, lam, vecs, slack))


def layer_bounds(constants: ModelConstants, eps: float) -> tuple[LayerBound, ...]:
    """Per layer, its :class:`LayerBound` at ``eps``. The spectrum of
    ``S_hat`` lies in the relative enclosure of that of ``S`` (docs/theory.md
    9.1; within ``w = 2 eps R`` of it by Weyl's inequality), so ``B_hat_l`` is
    the supremum of ``||H_l||_2`` over the enclosure of the interval, and, with
    the eigenvalues, the smaller of ``B_l + w ||C0||_F`` and the supremum over
    the enclosures of the eigenvalues."""
    spec, interval, lam = constants.spec, constants.interval, constants.eigenvalues
    a, b = interval.lower, interval.upper
    w = 2.0 * eps * interval.radius
    cc = constants.composition
    deployed = None if cc is None else cc.deployed
    wide = widened((a, b), eps, interval.radius, deployed)
    pcover = None
    if lam is not None and w > 0:
        pcover = perturbed_cover(lam, (a, b), eps, *radius_and_slack(interval, lam), deployed)
    out = []
    for layer, c, b_now in zip(constants.params["layers"], constants.filters, constants.gains):
        taps = layer["taps"]
        fb = filter_bounds(taps, spec.basis, (a, b), eps, c, lam)
        b_hat, c0_wide = gain_constants(taps, spec.basis, wide) if w > 0 else (c.bank_sup, c.lipschitz)
        if pcover is not None:
            # ||H(mu) - H(lam_i)||_2 <= |mu - lam_i| ||C0||_F within 2 eps R of an eigenvalue, or
            # the supremum over the enclosures of the eigenvalues.
            b_hat = min(b_hat, b_now + float(with_allowance(w * float(np.linalg.norm(np.asarray(c0_wide))), 0.0)),
                        cover_gain(taps, spec.basis, pcover))
        second = None if constants.second is None else second_order(taps, spec.basis, (a, b), eps,
                                                                     constants.second[len(out)])
        out.append(LayerBound(np.asarray(fb.first_order + fb.remainder), np.asarray(fb.remainder), b_now, b_hat,
                              bank_remainder(taps, spec.basis, (a, b), eps), second))
    return tuple(out)


@dataclasses.dataclass(frozen=True)
class ModelEpsBound:
    """A model's bounds at one ``eps``.

    Attributes:
      eps: the size of the relative perturbation.
      certified: rigorous bound on ``||Phi(S) x - Phi(S_hat) x||_F`` for
        every input with ``||x||_F <= rho``.
      published: the published GNN form (first order, reference only).
      per_unit: ``certified / eps`` (0 at eps 0).
      layer_changes: per layer, ``Delta_l``, the bound on the change of ``H_l``.
      method: how ``certified`` was obtained.
    """

    eps: float
    certified: float
    published: float
    per_unit: float
    layer_changes: tuple[float, ...]
    method: str = "composition through layers (theory s.5 item 6)"


def _chain(constants: ModelConstants, bounds, rho: float) -> tuple[float, list]:
    """The section 5 item 6 composition for inputs with ``||x||_F <= rho``:
    ``(certified, per-layer Delta_l)``."""
    p, nodes = constants.params, constants.nodes
    norm_in = float(rho)
    diff = 0.0
    changes = []
    for i, lb in enumerate(bounds):
        delta_l = combine(lb.beta)
        changes.append(delta_l)
        diff = delta_l * norm_in + lb.gain_perturbed * diff
        bias = p["layers"][i].get("bias")
        norm_in = lb.gain * norm_in + (np.sqrt(nodes) * float(np.linalg.norm(bias)) if bias is not None else 0.0)
    return float(with_allowance(constants.readout * diff, 0.0)), changes


def model_bounds(constants: ModelConstants, eps: float, *, rho: float, delta: float = 8.0) -> ModelEpsBound:
    """The model's bounds at ``eps`` for inputs with ``||x||_F <= rho``, by
    the layer recursion of the module docstring (docs/theory.md s.5 item 6,
    s.8); ``delta`` is the eigenvector misalignment of the published form."""
    eps = float(eps)
    spec, nodes = constants.spec, constants.nodes
    bounds = layer_bounds(constants, eps)
    certified, changes = _chain(constants, bounds, rho)
    method = "composition through layers (theory s.5 item 6)"
    if constants.composition is not None:
        cb = composed_bound(constants, constants.composition, bounds, eps, rho)
        changes = [min(c, ch.certified) for c, ch in zip(changes, cb.changes)]
        if cb.certified < certified:
            certified = cb.certified
            method = ("trivial bound ||W|| (n_L + n_hat_L)" if cb.trivial <= cb.composed else
                      "tighter composition (theory s.9): per layer " + "; ".join(ch.method for ch in cb.changes))
    rf = constants.readout
    c_max = max(float(np.max(c.integral_lipschitz)) for c in constants.filters)
    f_max = max(spec.features[1:])
    published = float(2 * c_max * (1 + delta * np.sqrt(nodes)) * spec.depth * f_max ** (spec.depth - 1) * eps * rf * rho)
    return ModelEpsBound(eps, certified, published, certified / eps if eps > 0 else 0.0, tuple(changes), method)


@dataclasses.dataclass(frozen=True)
class ModelCertificate:
    """Certified and reference bounds of a model on one graph.

    Attributes:
      bounds: one :class:`ModelEpsBound` per eps, in the order asked.
      layers: per-layer constants.
      rho: the input norm bound.
      assumptions: model, norm, interval, rho, methods.
    """

    bounds: tuple[ModelEpsBound, ...]
    layers: tuple[LayerConstants, ...]
    rho: float
    assumptions: dict

    def at(self, eps: float) -> ModelEpsBound:
        """The bounds at ``eps`` (the last of them if ``eps`` was given twice)."""
        found = [b for b in self.bounds if b.eps == float(eps)]
        if not found:
            raise KeyError(f"no bound at eps {eps:g}; this certificate has eps "
                           f"{', '.join(eps_key(b.eps) for b in self.bounds)}.")
        return found[-1]

    def as_dict(self) -> dict:
        """The JSON form (run log, summary.json, ``certify --json``): per-eps
        figures keyed by ``f"{eps:g}"``."""
        return {
            "certified": {eps_key(b.eps): b.certified for b in self.bounds},
            "published": {eps_key(b.eps): b.published for b in self.bounds},
            "per_unit": {eps_key(b.eps): b.per_unit for b in self.bounds},
            "layers": [dict(dataclasses.asdict(lc), change={eps_key(b.eps): b.layer_changes[i] for b in self.bounds})
                       for i, lc in enumerate(self.layers)],
            "rho": self.rho,
            "methods": {eps_key(b.eps): b.method for b in self.bounds},
            "assumptions": self.assumptions,
        }


def certify_model(params, spec: ModelSpec, interval: SpectralInterval, nodes: int, eps_list, *, rho: float,
                  eigenvalues=None, delta: float = 8.0, constants: ModelConstants | None = None, matrix=None,
                  deployed=None, rebalance: bool = False) -> ModelCertificate:
    """Operator-level certificate of a model for inputs with ``||x||_F <= rho``.

    Args:
      params: model params (JAX or numpy arrays).
      spec: the :class:`ModelSpec`.
      interval: certified spectral interval of ``S``.
      nodes: ``N``.
      eps_list: perturbation sizes.
      rho: input norm bound.
      eigenvalues: all eigenvalues of ``S`` (tighter bounds) or None.
      delta: eigenvector misalignment in the published form.
      constants: the :func:`model_constants` of these arguments, when
        already computed.
      matrix, deployed, rebalance: as :func:`model_constants`.
    """
    if constants is None:
        constants = model_constants(params, spec, interval, nodes, eigenvalues, matrix=matrix, deployed=deployed,
                                    rebalance=rebalance)
    comp = constants.composition
    bounds = tuple(model_bounds(constants, eps, rho=rho, delta=delta) for eps in eps_list)
    assumptions = {
        "perturbation_model": MODEL if spec.readout != "flat" else
        MODEL.replace("P a permutation", "P = I (a flat readout keeps the node order; theory s.8.1)"),
        "norm": NORM + "; model output in the Frobenius norm",
        "inputs": f"every input with ||x||_F <= rho = {rho:.6g}",
        "spectral_interval": [float(interval.lower), float(interval.upper)],
        "interval_method": {"lower": interval.lower_method, "upper": interval.upper_method},
        "over_eigenvalues": eigenvalues is not None,
        "nonlinearity": f"{spec.nonlinearity} (1-Lipschitz, sigma(0) = 0)",
        "composition": "the smaller of: triangle inequality through layers (theory s.5 item 6, s.8); per layer the "
                       "smallest of per-filter, joint, whole-path and trivial bank bounds (remainders: the smallest "
                       "of per filter, whole bank s.9.7 and second-order kernel s.9.8), changes carried through the "
                       "previous bank with its bias apart, into the next bank through its composite with the "
                       "previous change (s.9.3, the carried change) and through the readout by averaging, capped by "
                       "the trivial bound (theory s.9)"
                       + ("; joint factorisations rebalanced (s.9.4)" if comp is not None and comp.balanced else "")
                       + ("; clean-path norms through the relu (s.9.10) for layers "
                          + ", ".join(str(i + 1) for i, r in enumerate(comp.relu_norms) if r is not None)
                          if comp is not None and any(r is not None for r in comp.relu_norms) else ""),
        "deployed_graph": deployed_text(None if comp is None else comp.deployed),
        "published": f"2 C (1 + delta sqrt(N)) L F^(L-1) eps rho ||readout||, delta = {delta:g}, first order, "
                     "assumes |h| <= 1 (Gama, Bruna, Ribeiro 2020, Thm 4; form from memory); reference only",
    }
    return ModelCertificate(bounds, constants.layers, float(rho), assumptions)


def certify_inputs(params, spec: ModelSpec, op_matrix, interval: SpectralInterval, x, eps: float,
                   eigenvalues=None, eigenvectors=None, constants: ModelConstants | None = None,
                   refine: int = 0, memo=None) -> np.ndarray:
    """Input-specific certificate per signal: for ``x`` of shape
    ``(B, N, F_0)``, a bound on ``||Phi(S) x_b - Phi(S_hat) x_b||_F`` for each
    ``b``, using the measured per-feature norms of the unperturbed path
    (``||beta_l^T n_{l-1}||_2`` in place of ``||beta_l||_2 ||x_{l-1}||``) and,
    when ``eigenvectors`` of ``S`` are given (with ``eigenvalues``), the
    spectrum of each feature (:func:`spectral_first_order`). ``constants``:
    the :func:`model_constants` of these arguments, when already computed.
    ``refine``: that many signals with the largest bounds are bounded again
    with each bank's largest first-order change for their own input
    (docs/theory.md 9.5; about a second per bank and signal). ``memo``: an
    :class:`~stablefilt._memo.InputMemo` kept by the caller between calls
    on the same ``x`` at other sizes (the eps-free parts are then computed
    once), or None."""
    n = op_matrix.shape[0]
    if constants is None:
        constants = model_constants(params, spec, interval, n, eigenvalues, matrix=op_matrix)
    p = constants.params
    z = x0 = _input_array(x, memo)
    diff = np.zeros(z.shape[0])
    use_spec = eigenvalues is not None and eigenvectors is not None
    bounds = layer_bounds(constants, eps)

    def plain_layer(i, v):
        return _layer(p, spec, op_matrix, i, v)

    def forward_layer(i, v):
        return plain_layer(i, v) if memo is None else memo.layer(i, v, plain_layer)

    contribs = []
    for i, lb in enumerate(bounds):
        feat = np.sqrt(np.sum(z**2, axis=1))  # (B, F_in) per-feature norms
        per = feat[:, :, None] * lb.beta[None]  # (B, F_in, F_out): beta_fg ||x_f||
        if use_spec:
            spec_first = spectral_first_order(p["layers"][i]["taps"], spec.basis, eigenvalues, eigenvectors, z, eps)
            per = np.minimum(per, spec_first + feat[:, :, None] * lb.remainder[None])
        contrib = with_allowance(np.linalg.norm(per.sum(axis=1), axis=1), 0.0)  # ||sum_f beta_fg n_f||_2 over g
        contribs.append(contrib)
        diff = contrib + lb.gain_perturbed * diff
        z = forward_layer(i, z)[1]
    old = with_allowance(constants.readout * diff, 0.0)
    # Each signal is also an input of norm at most its own norm: the
    # operator-level bounds at rho = ||x_b|| hold for it.
    norms = np.sqrt(np.sum(np.asarray(x, dtype=np.float64) ** 2, axis=(1, 2)))
    comp = constants.composition
    lc = None if comp is None else layer_changes(constants, comp, bounds, eps)
    for b, rho_b in enumerate(norms):
        cap = _chain(constants, bounds, rho_b)[0]
        if comp is not None:
            cap = min(cap, composed_bound(constants, comp, bounds, eps, rho_b, changes=lc).certified)
        old[b] = min(old[b], cap)
    if comp is None:
        return old
    new = composed_inputs(constants, comp, bounds, x0, eps, eigenvectors=eigenvectors,
                          forward_layer=forward_layer, known=contribs, changes=lc,
                          refine=refine, matrix=op_matrix, memo=memo)
    return np.minimum(old, new)


def _input_array(x, memo) -> np.ndarray:
    """``x`` in float64; with a ``memo``, the same array object on every
    call with the same ``x`` (what the memo's entries are checked against)."""
    return np.asarray(x, dtype=np.float64) if memo is None else memo.array(x)


def _layer(p, spec: ModelSpec, matrix, i: int, z):
    """Layer ``i`` in float64: ``(pre-activation, output)`` for ``z`` ``(B, N, F)``."""
    sub = dataclasses.replace(spec, readout="none", features=spec.features[i:i + 2], final_nonlinearity=False)
    pre = forward_np({"layers": [p["layers"][i]]}, matrix, z, sub)
    act = (i < spec.depth - 1) or spec.final_nonlinearity
    return pre, (np.asarray(spec.activation(pre, xp=np)) if act else pre)
