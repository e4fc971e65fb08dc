"""A GNN as pure functions on a params pytree.

``x_l = sigma(H_l(S) x_{l-1} + b_l)`` for ``l = 1..L`` (no ``sigma`` after the
last layer when ``final_nonlinearity`` is false), then a readout: per-node
linear (node tasks), mean/sum pooling then linear (graph tasks), or, when
the node set is fixed (pixels, fixed sensors), the ``N x F_L`` features
flattened then linear (graph tasks that keep node identity). A single
linear filter is the one-layer case with ``nonlinearity="none"`` and no
readout. Params::

    {"layers": [{"taps": (K, F_in, F_out), "bias": (F_out,)}, ...],
     "readout": {"weight": (F_L, C), "bias": (C,)}}        # absent if C == 0

with ``weight`` of shape ``(N F_L, C)`` for the flat readout (row
``n F_L + f`` reads feature ``f`` of node ``n``).
"""

from __future__ import annotations

import dataclasses

import jax
import jax.numpy as jnp
import numpy as np

from ._errors import ConfigError
from ._filters import Basis, run_filter

NONLINEARITIES = ("relu", "leaky_relu", "tanh", "none")
READOUTS = ("node", "mean", "sum", "flat", "none")


@dataclasses.dataclass(frozen=True)
class ModelSpec:
    """Architecture of a GNN (hashable: a static argument of ``jit``).

    Attributes:
      features: widths ``(F_0, F_1, ..., F_L)``; ``F_0`` input features.
      taps: ``K``, taps per filter (polynomial degree ``K - 1``).
      basis: basis of every filter bank.
      nonlinearity: pointwise, 1-Lipschitz, ``sigma(0) = 0``.
      bias: add a bias per output feature of each layer.
      readout: ``node`` (per-node linear), ``mean``/``sum`` (pool, then
        linear), ``flat`` (the ``N x F_L`` features flattened, then linear;
        not permutation invariant: the node order is part of the model), or
        ``none`` (output is the last layer).
      outputs: ``C``, outputs of the readout (classes, or 1 for regression).
      final_nonlinearity: apply ``sigma`` after the last layer too.
      nodes: ``N``, needed by the flat readout only (its weight has
        ``N F_L`` rows); 0 otherwise.
    """

    features: tuple[int, ...]
    taps: int = 5
    basis: Basis = Basis()
    nonlinearity: str = "relu"
    bias: bool = True
    readout: str = "node"
    outputs: int = 1
    final_nonlinearity: bool = True
    nodes: int = 0

    def __post_init__(self):
        if len(self.features) < 2 or any(int(f) < 1 for f in self.features):
            raise ConfigError(f"model features must list at least two positive widths; got {list(self.features)}.")
        if int(self.taps) < 1:
            raise ConfigError(f"model taps must be at least 1; got {self.taps}.")
        if self.nonlinearity not in NONLINEARITIES:
            raise ConfigError(f"unknown nonlinearity {self.nonlinearity!r}; expected one of {', '.join(NONLINEARITIES)}.")
        if self.readout not in READOUTS:
            raise ConfigError(f"unknown readout {self.readout!r}; expected one of {', '.join(READOUTS)}.")
        if self.readout != "none" and int(self.outputs) < 1:
            raise ConfigError(f"model outputs must be at least 1; got {self.outputs}.")
        if self.readout == "flat" and int(self.nodes) < 1:
            raise ConfigError("model.readout = 'flat' needs the number of nodes (the graph's) to size its weight.")

    @property
    def depth(self) -> int:
        return len(self.features) - 1

    def activation(self, z, xp=jnp):
        """The pointwise nonlinearity, in JAX (``xp=jnp``, the training path)
        or float64 numpy (``xp=np``, the certification path)."""
        if self.nonlinearity == "none":
            return z
        return _ACTIVATIONS[xp is np][self.nonlinearity](z)


#: Per path (numpy?): the nonlinearities, the leaky slope 0.1 in both.
_ACTIVATIONS = {
    False: {"relu": jax.nn.relu, "leaky_relu": lambda z: jax.nn.leaky_relu(z, 0.1), "tanh": jnp.tanh},
    True: {"relu": lambda z: np.maximum(z, 0), "leaky_relu": lambda z: np.where(z >= 0, z, 0.1 * z),
           "tanh": np.tanh},
}


def spec_from(m: dict, basis: Basis, in_features: int, outputs: int, nodes: int = 0) -> ModelSpec:
    """The :class:`ModelSpec` of a config's ``[model]`` table on a graph of
    ``nodes`` nodes. Without a readout the last layer is linear (no
    nonlinearity on the output)."""
    return ModelSpec(tuple([in_features] + list(m["features"])), taps=m["taps"], basis=basis,
                     nonlinearity=m["nonlinearity"], bias=m["bias"], readout=m["readout"], outputs=outputs,
                     final_nonlinearity=m["readout"] != "none", nodes=int(nodes) if m["readout"] == "flat" else 0)


def init_params(spec: ModelSpec, seed: int | jax.Array) -> dict:
    """Deterministic initialisation: taps ``~ N(0, 1/(F_in K))`` scaled down
    by ``1/(k+1)`` for tap ``k`` (so responses start smooth), zero biases,
    readout ``~ N(0, 1/F_L)``."""
    key = jax.random.PRNGKey(seed) if isinstance(seed, int) else seed
    layers = []
    for fin, fout in zip(spec.features[:-1], spec.features[1:]):
        key, sub = jax.random.split(key)
        decay = 1.0 / jnp.arange(1, spec.taps + 1, dtype=jnp.float32)
        taps = jax.random.normal(sub, (spec.taps, fin, fout), jnp.float32)
        taps = taps * decay[:, None, None] / jnp.sqrt(fin * spec.taps / 2.0)
        layer = {"taps": taps}
        if spec.bias:
            layer["bias"] = jnp.zeros((fout,), jnp.float32)
        layers.append(layer)
    params = {"layers": layers}
    if spec.readout != "none":
        key, sub = jax.random.split(key)
        f = spec.features[-1] * (spec.nodes if spec.readout == "flat" else 1)
        params["readout"] = {
            "weight": jax.random.normal(sub, (f, spec.outputs), jnp.float32) / jnp.sqrt(f),
            "bias": jnp.zeros((spec.outputs,), jnp.float32),
        }
    return params


def forward(params: dict, op, x, spec: ModelSpec, xp=jnp, activation=None):
    """Model output: ``(B, N, C)`` for node readouts, ``(B, C)`` for pooled
    and flat readouts, ``(B, N, F_L)`` without a readout, for ``x`` of shape
    ``(B, N, F_0)``.

    ``op``: a :class:`JaxShift`, a matrix (scipy sparse, numpy, anything with
    ``@``), or a function ``v -> S v`` on ``(N, M)`` arrays (a perturbed
    operator, say). ``xp=jnp`` is the float32 training path; ``xp=np`` runs
    the same model in float64 numpy (the certification path; tests check the
    two agree). The batch is folded into the feature axis of the sparse
    products (vmap would fall back to a slow kernel). ``activation``: a
    function used in place of the spec's nonlinearity (a smoothed relu, say),
    or None."""
    if xp is np:
        params = jax.tree_util.tree_map(lambda a: np.asarray(a, dtype=np.float64), params)
        x = np.asarray(x, dtype=np.float64)
    z = xp.swapaxes(xp.asarray(x), 0, 1)  # (N, B, F)
    n = z.shape[0]
    prod = op if callable(op) else (lambda v: op @ v)

    def mv(v):
        return xp.asarray(prod(v.reshape(n, -1))).reshape(v.shape)

    last = spec.depth - 1
    for i, layer in enumerate(params["layers"]):
        z = run_filter(mv, layer["taps"], z, spec.basis, xp=xp)
        if "bias" in layer:
            z = z + layer["bias"]
        if i < last or spec.final_nonlinearity:
            z = spec.activation(z, xp) if activation is None else activation(z)
    return apply_readout(params, xp.swapaxes(z, 0, 1), spec, xp)


def apply_readout(params: dict, h, spec: ModelSpec, xp=jnp):
    """The readout of features ``h`` ``(B, N, F_L)``: per node, pooled or flat
    (node-major), then ``W`` and the bias; ``h`` itself without a readout."""
    if spec.readout == "none":
        return h
    r = params["readout"]
    if spec.readout == "mean":
        h = xp.mean(h, axis=1)
    elif spec.readout == "sum":
        h = xp.sum(h, axis=1)
    elif spec.readout == "flat":
        h = h.reshape(h.shape[0], -1)  # (B, N F_L), node-major
    return h @ r["weight"] + r["bias"]


def forward_np(params: dict, op, x, spec: ModelSpec) -> np.ndarray:
    """:func:`forward` with ``xp=np`` (float64)."""
    return forward(params, op, x, spec, xp=np)
