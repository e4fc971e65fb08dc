"""Drop the stability penalty into a plain JAX + optax loop.

A two-layer graph filter model of our own making (not stablefilt's model),
trained to denoise signals on a random sensor graph. Shows both ways in:
(1) add ``penalty(params, interval, basis=basis)`` to the loss (the basis is
required: the same taps are another filter in another basis), with the
float64 certificate of the whole model every epoch (``certify_layers``:
taps, basis, interval, activation, readout); (2) chain the
``stability_penalty`` optax transformation before the optimiser. Then the
float64 certificate of the first filter alone, and the model's certificate
held against one perturbed graph ``S + E S + S E``.

Run: python examples/plain_jax_penalty.py [--nodes 80] [--epochs 6]
"""

import argparse

import jax
import jax.numpy as jnp
import numpy as np
import optax
from sensor_scenario import perturbed_operator, sensor_graph, smooth_signals

import stablefilt as sf

p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
p.add_argument("--nodes", type=int, default=80)
p.add_argument("--epochs", type=int, default=6)
args = p.parse_args()
n = args.nodes

rng = np.random.default_rng(0)
graph = sensor_graph(n, rng)
interval = sf.spectral_interval(graph)
iv = (interval.lower, interval.upper)
op = sf.jax_operator(graph)
basis = sf.Basis("chebyshev", (0.0, 2.0))

# Smooth targets, noisy inputs: 64 signals folded into the feature axis.
clean = smooth_signals(graph, 64, rng)
noisy = clean + 0.3 * rng.standard_normal(clean.shape)
x, y = jnp.asarray(noisy, jnp.float32), jnp.asarray(clean, jnp.float32)
rho = float(np.max(np.linalg.norm(noisy, axis=0)))  # each signal (column) is one input

# The user's own pytree: taps live under "taps" keys, anything else is ignored.
params = {
    "smooth": {"taps": jnp.asarray(rng.standard_normal(5) * 0.3, jnp.float32)},
    "sharpen": {"taps": jnp.asarray(rng.standard_normal(5) * 0.3, jnp.float32), "gain": jnp.float32(1.0)},
}


def model(p, op, x):
    h = sf.apply_filter(op, p["smooth"]["taps"], x, basis)
    return p["sharpen"]["gain"] * sf.apply_filter(op, p["sharpen"]["taps"], jnp.tanh(h), basis)


def task_loss(p, op, x, y):
    return jnp.mean((model(p, op, x) - y) ** 2)


# (1) Penalty inside the loss.
def loss(p, op, x, y):
    return task_loss(p, op, x, y) + 0.05 * sf.penalty(p, iv, basis=basis)


tx = optax.adam(1e-2)
state = tx.init(params)


@jax.jit
def step(p, s, op, x, y):
    val, g = jax.value_and_grad(loss)(p, op, x, y)
    u, s = tx.update(g, s, p)
    return optax.apply_updates(p, u), s, val


def certificate(p, eps_list=(1e-3, 1e-2)):
    """The model as certify_layers sees it: filter, tanh, filter, then the
    gain as a 1 x 1 readout at every node; one signal (column) per input."""
    return sf.certify_layers([p["smooth"]["taps"], p["sharpen"]["taps"]], basis, interval, eps_list, rho=rho,
                             nodes=graph.nodes, nonlinearity="tanh", readout="node",
                             readout_weight=np.asarray(p["sharpen"]["gain"]).reshape(1, 1), last_nonlinearity=False)


p1 = params
for epoch in range(1, args.epochs + 1):
    for _ in range(50):
        p1, state, val = step(p1, state, op, x, y)
    cert = certificate(p1)
    print(f"(1) epoch {epoch}: task loss {float(task_loss(p1, op, x, y)):.4f}, "
          f"integral Lipschitz {float(sf.penalty(p1, iv, basis=basis)):.3f}, "
          f"certified@0.001 {cert.at(1e-3).certified:.4g}, certified@0.01 {cert.at(1e-2).certified:.4g}")

# (2) The optax transformation adds the penalty's gradient to the updates.
tx2 = optax.chain(sf.stability_penalty(0.05, lambda p: sf.penalty(p, iv, basis=basis)), optax.adam(1e-2))
state2 = tx2.init(params)


@jax.jit
def step2(p, s, op, x, y):
    val, g = jax.value_and_grad(task_loss)(p, op, x, y)
    u, s = tx2.update(g, s, p)
    return optax.apply_updates(p, u), s, val


p2 = params
for _ in range(50 * args.epochs):
    p2, state2, val = step2(p2, state2, op, x, y)
print(f"(2) optax transformation: task loss {float(task_loss(p2, op, x, y)):.4f}, "
      f"integral Lipschitz {float(sf.penalty(p2, iv, basis=basis)):.3f}")

cert = sf.certify_filter(graph, np.asarray(p1["smooth"]["taps"], np.float64), basis, [1e-3, 1e-2])
for b in cert.bounds:
    print(f"first filter, eps {b.eps:g}: certified {b.certified:.4g}, realised {b.lower:.4g}, published {b.published:.4g}")

# The model's certificate against one perturbed graph S_hat = S + E S + S E, ||E||_2 = eps.
eps = 1e-2
hat = perturbed_operator(graph, eps, rng)
measured = float(np.max(np.linalg.norm(np.asarray(model(p1, op, x) - model(p1, hat, x)), axis=0)))
bound = certificate(p1, [eps]).at(eps).certified
print(f"measured change at eps {eps:g}: {measured:.4g} <= certified {bound:.4g}: {measured <= bound}")
raise SystemExit(0 if measured <= bound else 1)
