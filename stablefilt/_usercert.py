"""The model certificate of a user's own GNN, built in any framework (plain
JAX, equinox, flax): described by its per-layer taps, biases, activation and
readout instead of stablefilt's params layout and :class:`ModelSpec`.

The certificate is operator-level (every input with ``||x||_F <= rho``) and
needs no forward function: it is :func:`~stablefilt._modelcert.certify_model`
of the same architecture, ``x_l = sigma(H_l(S) x_{l-1} + b_l)`` then a
linear readout (docs/theory.md sections 5 item 6, 8 and 9). Its assumptions
are the user's to keep: the model must compute exactly that, with the taps
in ``basis`` over ``S``.
"""

from __future__ import annotations

import numpy as np

from ._errors import ConfigError
from ._filters import Basis
from ._interval import SpectralInterval
from ._model import NONLINEARITIES, ModelSpec
from ._modelcert import ModelCertificate, certify_model

#: Readouts a user model can have (the flat readout keeps node identity and
#: is left to stablefilt's own model).
USER_READOUTS = ("node", "mean", "sum", "none")


def _bank(t, i: int) -> np.ndarray:
    a = np.asarray(t, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None, None]
    if a.ndim != 3 or a.shape[0] < 1 or not np.all(np.isfinite(a)):
        raise ConfigError(f"taps of layer {i + 1} must be finite, of shape (K,) or (K, F_in, F_out); got shape "
                          f"{np.shape(t)}.")
    return a


def certify_layers(taps, basis: Basis, interval: SpectralInterval, eps_list, *, rho: float, nodes: int,
                   nonlinearity: str = "relu", biases=None, readout: str = "none", readout_weight=None,
                   last_nonlinearity: bool | None = None, eigenvalues=None, matrix=None) -> ModelCertificate:
    """Certified bound on ``||Phi(S) x - Phi(S_hat) x||_F`` for every input
    with ``||x||_F <= rho`` and every relative perturbation
    ``S_hat = P^T (S + E S + S E) P``, ``||E||_2 <= eps``, of a GNN given by
    its parts.

    Args:
      taps: per layer, the filter bank's taps, shape ``(K, F_in, F_out)``
        (``(K,)`` for one feature in and out); consecutive layers must
        chain (``F_out`` of one is ``F_in`` of the next); one ``K`` for all.
      basis: the taps' basis (with its interval for Chebyshev).
      interval: the certified spectral interval of ``S``
        (:func:`~stablefilt.spectral_interval`).
      eps_list: perturbation sizes.
      rho: the input norm bound.
      nodes: ``N``.
      nonlinearity: ``relu``, ``leaky_relu`` (slope 0.1), ``tanh`` or
        ``none``: pointwise, 1-Lipschitz, ``sigma(0) = 0``.
      biases: per layer, the bias ``(F_out,)`` added after the filter, or
        None for none (they enter the bound through ``||x_l||``).
      readout: ``none`` (the output is the last layer), ``node`` (the same
        linear map at every node), ``mean`` or ``sum`` (pool over nodes,
        then linear); its bias cancels in the difference.
      readout_weight: ``(F_L, C)``, needed unless ``readout`` is ``none``.
      last_nonlinearity: apply ``sigma`` after the last layer (default: yes
        with a readout, no without).
      eigenvalues, matrix: as :func:`~stablefilt.certify_model` (all
        eigenvalues of ``S`` and ``S`` itself tighten the bound).

    Returns:
      the :class:`~stablefilt.ModelCertificate`, assumptions recorded.
    """
    if not isinstance(taps, (list, tuple)) or not taps:
        raise ConfigError("taps must be a list with one array per layer.")
    banks = [_bank(t, i) for i, t in enumerate(taps)]
    k = banks[0].shape[0]
    for i, b in enumerate(banks):
        if b.shape[0] != k:
            raise ConfigError(f"every layer needs the same number of taps; layer 1 has {k}, layer {i + 1} has "
                              f"{b.shape[0]}.")
        if i and b.shape[1] != banks[i - 1].shape[2]:
            raise ConfigError(f"layer {i + 1} takes {b.shape[1]} features but layer {i} gives {banks[i - 1].shape[2]}.")
    if nonlinearity not in NONLINEARITIES:
        raise ConfigError(f"nonlinearity {nonlinearity!r} is not one of {', '.join(NONLINEARITIES)} (pointwise, "
                          "1-Lipschitz, sigma(0) = 0).")
    if readout not in USER_READOUTS:
        raise ConfigError(f"readout {readout!r} is not one of {', '.join(USER_READOUTS)}.")
    features = (banks[0].shape[1],) + tuple(b.shape[2] for b in banks)
    params = {"layers": [{"taps": b} for b in banks]}
    if biases is not None:
        if len(biases) != len(banks):
            raise ConfigError(f"give one bias per layer ({len(banks)}); got {len(biases)}.")
        for i, (layer, b) in enumerate(zip(params["layers"], biases)):
            b = np.asarray(b, dtype=np.float64).reshape(-1)
            if b.shape != (features[i + 1],):
                raise ConfigError(f"bias of layer {i + 1} must have {features[i + 1]} values; got {b.size}.")
            layer["bias"] = b
    outputs = 1
    if readout != "none":
        if readout_weight is None:
            raise ConfigError(f"readout {readout!r} needs readout_weight, shape (F_L, C).")
        w = np.asarray(readout_weight, dtype=np.float64)
        if w.ndim != 2 or w.shape[0] != features[-1]:
            raise ConfigError(f"readout_weight must have shape ({features[-1]}, C); got {w.shape}.")
        outputs = w.shape[1]
        params["readout"] = {"weight": w, "bias": np.zeros(outputs)}
    final = readout != "none" if last_nonlinearity is None else bool(last_nonlinearity)
    spec = ModelSpec(features, taps=k, basis=basis, nonlinearity=nonlinearity, bias=biases is not None,
                     readout=readout, outputs=outputs, final_nonlinearity=final)
    return certify_model(params, spec, interval, int(nodes), [float(e) for e in eps_list], rho=float(rho),
                         eigenvalues=eigenvalues, matrix=matrix)
