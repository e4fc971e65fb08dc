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

import numpy as np

from ._certify import MODEL, NORM
from ._filterbounds import combine, filter_bounds, filter_constants, gain_constants
from ._filters import frequency_response
from ._interval import SpectralInterval
from ._kernel import spectral_first_order
from ._model import ModelSpec, forward_np
from ._series import with_allowance


def _np(params):
    import jax

    return jax.tree_util.tree_map(lambda a: np.asarray(a, dtype=np.float64), params)


def readout_factor(params, spec: ModelSpec, nodes: int) -> float:
    """Bound on the readout's Lipschitz constant in the Frobenius norm:
    ``||W||_2`` (node), ``/ sqrt(N)`` (mean), ``* sqrt(N)`` (sum), 1 (none)."""
    if spec.readout == "none":
        return 1.0
    w = float(np.linalg.norm(np.asarray(params["readout"]["weight"], dtype=np.float64), 2)) * (1 + 1e-9)
    if spec.readout == "mean":
        return w / np.sqrt(nodes)
    if spec.readout == "sum":
        return w * np.sqrt(nodes)
    return w


@dataclasses.dataclass(frozen=True)
class LayerReport:
    """Per-layer constants (max over the bank's filters) and bounds."""

    integral_lipschitz: float
    kernel: float
    sup: float
    change: dict  # eps (str) -> Delta_l


@dataclasses.dataclass(frozen=True)
class ModelCertificate:
    """Certified and reference bounds of a model on one graph.

    Attributes:
      certified: eps -> rigorous bound on ``||Phi(S) x - Phi(S_hat) x||_F``
        for every input with ``||x||_F <= rho``.
      published: eps -> the published GNN form (first order, reference only).
      per_unit: eps -> ``certified / eps``.
      layers: per-layer constants and ``Delta_l``.
      assumptions: model, norm, interval, rho, methods.
    """

    certified: dict
    published: dict
    per_unit: dict
    layers: tuple[LayerReport, ...]
    rho: float
    assumptions: dict

    def as_dict(self) -> dict:
        return {
            "certified": self.certified,
            "published": self.published,
            "per_unit": self.per_unit,
            "layers": [dataclasses.asdict(x) for x in self.layers],
            "rho": self.rho,
            "assumptions": self.assumptions,
        }


def _eps_key(e: float) -> str:
    return f"{e:g}"


def _bank_sup_eig(taps, basis, lam):
    """``max_i ||H(lam_i)||_2``: the exact norm of ``H(S)`` when ``lam`` are
    all the eigenvalues, with a round-off allowance."""
    cols = taps.reshape(taps.shape[0], -1)
    h = frequency_response(cols, lam, basis).reshape(len(lam), *taps.shape[1:])
    return float(np.max(np.linalg.norm(h, ord=2, axis=(1, 2)))) * (1 + 1e-9) + 1e-12


def layer_bounds(params, spec: ModelSpec, interval: SpectralInterval, eps: float, eigenvalues=None,
                 consts=None, with_parts: bool = False):
    """Per layer: ``(beta_l, B_l, B_hat_l)``: the ``F_in x F_out`` matrix of
    per-filter change bounds, a bound on ``||H_l(S)||`` and on
    ``||H_l(S_hat)||`` (spectrum of ``S_hat`` within ``2 eps R`` of that of
    ``S``, Weyl's inequality)."""
    p = _np(params)
    a, b = interval.lower, interval.upper
    w = 2.0 * eps * interval.radius
    out = []
    for i, layer in enumerate(p["layers"]):
        taps = layer["taps"]
        c = consts[i] if consts is not None else filter_constants(taps, spec.basis, (a, b), eigenvalues, pairwise=False)
        fb = filter_bounds(taps, spec.basis, (a, b), eps, c, eigenvalues)
        first, rem = fb.first_order, fb.remainder
        beta = first + rem
        b_hat, c0_wide = gain_constants(taps, spec.basis, (a - w, b + w)) if w > 0 else (c.bank_sup, c.lipschitz)
        if eigenvalues is not None:
            b_now = min(c.bank_sup, _bank_sup_eig(taps, spec.basis, eigenvalues))
            # ||H(mu) - H(lam_i)||_2 <= |mu - lam_i| ||C0||_F over the widened interval.
            b_hat = min(b_hat, b_now + w * float(np.linalg.norm(np.asarray(c0_wide))) * (1 + 1e-9))
        else:
            b_now = c.bank_sup
        out.append((np.asarray(beta), b_now, b_hat) + ((np.asarray(rem),) if with_parts else ()))
    return out


def certify_model(params, spec: ModelSpec, interval: SpectralInterval, nodes: int, eps_list, *, rho: float,
                  eigenvalues=None, delta: float = 8.0) -> ModelCertificate:
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
    """
    p = _np(params)
    consts = [filter_constants(layer["taps"], spec.basis, (interval.lower, interval.upper), eigenvalues,
                               pairwise=False) for layer in p["layers"]]
    rf = readout_factor(p, spec, nodes)
    certified, published, per_unit = {}, {}, {}
    changes = [dict() for _ in consts]
    for eps in eps_list:
        eps = float(eps)
        lb = layer_bounds(p, spec, interval, eps, eigenvalues, consts)
        norm_in = float(rho)
        diff = 0.0
        for i, (beta, b_now, b_hat) in enumerate(lb):
            delta_l = combine(beta)
            changes[i][_eps_key(eps)] = delta_l
            diff = delta_l * norm_in + b_hat * diff
            bias = p["layers"][i].get("bias")
            norm_in = b_now * norm_in + (np.sqrt(nodes) * float(np.linalg.norm(bias)) if bias is not None else 0.0)
        certified[_eps_key(eps)] = float(with_allowance(rf * diff, 0.0))
        per_unit[_eps_key(eps)] = certified[_eps_key(eps)] / eps if eps > 0 else 0.0
        c_max = max(float(np.max(c.integral_lipschitz)) for c in consts)
        f_max = max(spec.features[1:])
        published[_eps_key(eps)] = float(2 * c_max * (1 + delta * np.sqrt(nodes)) * spec.depth
                                         * f_max ** (spec.depth - 1) * eps * rf * rho)
    layers = tuple(
        LayerReport(float(np.max(c.integral_lipschitz)),
                    float(np.max(c.kernel if c.kernel_spectrum is None else np.minimum(c.kernel, c.kernel_spectrum))),
                    float(c.bank_sup), ch)
        for c, ch in zip(consts, changes))
    assumptions = {
        "perturbation_model": MODEL,
        "norm": NORM + "; model output in the Frobenius norm",
        "inputs": f"every input with ||x||_F <= rho = {rho:.6g}",
        "spectral_interval": [float(interval.lower), float(interval.upper)],
        "interval_method": {"lower": interval.lower_method, "upper": interval.upper_method},
        "over_eigenvalues": eigenvalues is not None,
        "nonlinearity": f"{spec.nonlinearity} (1-Lipschitz, sigma(0) = 0)",
        "composition": "triangle inequality through layers (theory s.5 item 6, s.8)",
        "published": f"2 C (1 + delta sqrt(N)) L F^(L-1) eps rho ||readout||, delta = {delta:g}, first order, "
                     "assumes |h| <= 1 (Gama, Bruna, Ribeiro 2020, Thm 4; form from memory); reference only",
    }
    return ModelCertificate(certified, published, per_unit, layers, float(rho), assumptions)


def certify_inputs(params, spec: ModelSpec, op_matrix, interval: SpectralInterval, x, eps: float,
                   eigenvalues=None, eigenvectors=None) -> np.ndarray:
    """Input-specific certificate per signal: for ``x`` of shape
    ``(B, N, F_0)``, a bound on ``||Phi(S) x_b - Phi(S_hat) x_b||_F`` for each
    ``b``, using the measured per-feature norms of the unperturbed path
    (``||beta_l^T n_{l-1}||_2`` in place of ``||beta_l||_2 ||x_{l-1}||``) and,
    when ``eigenvectors`` of ``S`` are given (with ``eigenvalues``), the
    spectrum of each feature (:func:`spectral_first_order`)."""
    p = _np(params)
    n = op_matrix.shape[0]
    lb = layer_bounds(p, spec, interval, eps, eigenvalues, with_parts=True)
    rf = readout_factor(p, spec, n)
    z = np.asarray(x, dtype=np.float64)
    diff = np.zeros(z.shape[0])
    no_readout = dataclasses.replace(spec, readout="none", final_nonlinearity=True)
    use_spec = eigenvalues is not None and eigenvectors is not None
    for i, (beta, b_now, b_hat, rem) in enumerate(lb):
        feat = np.sqrt(np.sum(z**2, axis=1))  # (B, F_in) per-feature norms
        per = feat[:, :, None] * beta[None]  # (B, F_in, F_out): beta_fg ||x_f||
        if use_spec:
            spec_first = spectral_first_order(p["layers"][i]["taps"], spec.basis, eigenvalues, eigenvectors, z, eps)
            per = np.minimum(per, spec_first + feat[:, :, None] * rem[None])
        contrib = np.linalg.norm(per.sum(axis=1), axis=1)  # ||sum_f beta_fg n_f||_2 over g
        diff = contrib * (1 + 1e-9) + b_hat * diff
        sub = dataclasses.replace(no_readout, features=spec.features[i:i + 2],
                                  final_nonlinearity=(i < spec.depth - 1) or spec.final_nonlinearity)
        z = forward_np({"layers": [p["layers"][i]]}, op_matrix, z, sub)
    return rf * diff * (1 + 1e-9)
