"""Drop the stability penalty and a per-epoch certificate into a flax (nnx) model.

A two-layer graph filter network written as ``flax.nnx`` modules
(stablefilt's own model is not used), trained to denoise signals on a random
sensor graph. The penalty reads the ``taps`` parameters of the model's
state; every epoch the
float64 certificate of the whole network comes from ``certify_layers``,
which takes the taps, biases, basis, spectral interval and activation. At
the end the network is run on a perturbed graph ``S + E S + S E`` and the
measured change is held against the certificate.

Run: python examples/flax_penalty.py [--nodes 80] [--epochs 8]
"""

import argparse

import jax
import jax.numpy as jnp
import numpy as np
import optax
from flax import nnx
from sensor_scenario import perturbed_operator, sensor_graph, smooth_signals

import stablefilt as sf

p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
p.add_argument("--nodes", type=int, default=80)
p.add_argument("--epochs", type=int, default=8)
args = p.parse_args()

# A sensor graph, its normalised Laplacian and certified spectral interval.
rng = np.random.default_rng(0)
graph = sensor_graph(args.nodes, rng)
interval = sf.spectral_interval(graph)
iv = (interval.lower, interval.upper)
op = sf.jax_operator(graph)
basis = sf.Basis("chebyshev", (0.0, 2.0))  # the normalised Laplacian's spectrum lies in [0, 2]

# Smooth clean signals, noisy inputs: (signals, N, 1).
clean = smooth_signals(graph, 48, rng).T[:, :, None]
noisy = clean + 0.3 * rng.standard_normal(clean.shape)
x, y = jnp.asarray(noisy, jnp.float32), jnp.asarray(clean, jnp.float32)
rho = float(np.max(np.linalg.norm(noisy.reshape(len(noisy), -1), axis=1)))  # inputs' largest norm


class Bank(nnx.Module):
    """A filter bank ``H(S) x + b`` with taps of shape (K, F_in, F_out)."""

    def __init__(self, k, fin, fout, rngs: nnx.Rngs):
        scale = 1.0 / jnp.sqrt(k * fin) / jnp.arange(1, k + 1)[:, None, None]
        self.taps = nnx.Param(jax.random.normal(rngs.params(), (k, fin, fout)) * scale)
        self.bias = nnx.Param(jnp.zeros(fout))

    def __call__(self, op, x):  # x: (N, F_in)
        return sf.apply_filter(op, self.taps[...], x, basis) + self.bias[...]


class Net(nnx.Module):
    def __init__(self, rngs: nnx.Rngs):
        self.first, self.second = Bank(4, 1, 8, rngs), Bank(4, 8, 1, rngs)

    def __call__(self, op, x):
        return self.second(op, jax.nn.relu(self.first(op, x)))


def loss(net, op, x, y):
    task = jnp.mean((jax.vmap(lambda s: net(op, s))(x) - y) ** 2)
    # The penalty finds every parameter whose path holds ``taps``; basis given explicitly.
    return task + 0.05 * sf.penalty(nnx.state(net, nnx.Param), iv, basis=basis)


net = Net(nnx.Rngs(0))
optimizer = nnx.Optimizer(net, optax.adam(1e-2), wrt=nnx.Param)


@nnx.jit
def step(net, optimizer, op, x, y):
    val, grads = nnx.value_and_grad(loss)(net, op, x, y)
    optimizer.update(net, grads)
    return val


def certificate(net):
    """The float64 certificate of the network as it stands."""
    return sf.certify_layers([net.first.taps[...], net.second.taps[...]], basis, interval, [1e-3, 1e-2], rho=rho,
                             nodes=graph.nodes, nonlinearity="relu",
                             biases=[net.first.bias[...], net.second.bias[...]], readout="none", matrix=graph.matrix)


for epoch in range(1, args.epochs + 1):
    for _ in range(25):
        val = step(net, optimizer, op, x, y)
    cert = certificate(net)
    print(f"epoch {epoch}: loss {float(val):.4f}  certified@0.001 {cert.at(1e-3).certified:.4g}  "
          f"certified@0.01 {cert.at(1e-2).certified:.4g}")

# Hold the certificate against one perturbed graph S_hat = S + E S + S E, ||E||_2 = eps.
eps = 1e-2
hat = perturbed_operator(graph, eps, rng)
out = jax.vmap(lambda z: net(op, z))(x)
out_hat = jax.vmap(lambda z: net(hat, z))(x)
measured = float(np.max(np.linalg.norm(np.asarray(out - out_hat).reshape(len(x), -1), axis=1)))
bound = certificate(net).at(eps).certified
print(f"measured change at eps {eps:g}: {measured:.4g} <= certified {bound:.4g}: {measured <= bound}")
raise SystemExit(0 if measured <= bound else 1)
