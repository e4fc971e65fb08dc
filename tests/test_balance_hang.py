"""The rebalancing optimiser (stablefilt._balance) never waits on XLA's CPU
thread pool against itself.

A batched eigenvalue routine in the optimiser ran LAPACK on that pool, and
two such calls at once could each wait for the other's tasks: on a 2-core
machine ``model_constants(..., rebalance=True)`` then never returned, as for
the model below (found by a random audit; the stacks showed both pool
threads in the eigenvalue kernel's wait). The stand-in for the largest
eigenvalue now uses matrix products only.

Sources: numpy's ``eigvalsh`` for the reference eigenvalues; that
``tr(G^p)^(1/p)`` lies between ``lambda_max(G)`` and ``F^(1/p)
lambda_max(G)`` for a positive semidefinite ``F x F`` matrix is a handbook
fact (the p-norm of the eigenvalues against their maximum).
"""

from __future__ import annotations

import os
import subprocess
import sys

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from stablefilt import _balance

HERE = os.path.dirname(os.path.abspath(__file__))


def test_no_lapack_eigenvalue_call_in_the_optimiser():
    alpha = jnp.ones((1, 8, 6, 5))
    beta = jnp.ones((1, 8, 6, 2))
    text = jax.jit(_balance._run, static_argnames=("steps",)).lower(alpha, beta, steps=3).as_text()
    assert "syev" not in text and "eigh" not in text.lower()


@pytest.mark.parametrize("f", [2, 5, 16, 40])
def test_stand_in_brackets_the_largest_eigenvalue(f):
    rng = np.random.default_rng(f)
    x = rng.standard_normal((7, 9, f)) * rng.uniform(0.01, 100.0, (7, 1, 1))
    x[0] = 0.0
    x[1, :, 1:] = 0.0  # rank one
    top = np.linalg.eigvalsh(np.swapaxes(x, -1, -2) @ x)[..., -1]
    with jax.enable_x64(True):
        got = np.asarray(_balance._lmax(jnp.asarray(x)))
    assert np.all(np.isfinite(got))
    assert np.all(got >= top * (1 - 1e-12)) and np.all(got <= top * f ** (1 / 2**_balance.SQUARINGS) * (1 + 1e-12))
    assert got[1] == pytest.approx(top[1], rel=1e-12)


SNIPPET = """
import sys
sys.path.insert(0, {here!r})
from test_model import _graphs, _random_params, case_spec
from stablefilt import model_constants, shift_operator, spectral_interval
case = dict(graph='bipartite', kind='laplacian', basis='chebyshev', bias=True, nonlinearity='tanh', layers=2,
            width=5, taps=3, readout='sum', seed=802918313)
op = shift_operator(_graphs()[case['graph']], case['kind'])
iv = spectral_interval(op)
spec = case_spec(case, iv, op.nodes)
params = _random_params(spec, seed=case['seed'], scale=0.5)
mc = model_constants(params, spec, iv, op.nodes, matrix=op.matrix, rebalance=True)
print('done', mc.composition.balanced)
"""


def test_model_that_hung_completes():
    out = subprocess.run([sys.executable, "-c", SNIPPET.format(here=HERE)], capture_output=True, text=True,
                         timeout=240)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.split() == ["done", "True"]


def test_batched_routines_run_one_matrix_at_a_time():
    """``one_by_one`` gives numpy's eigenvalues and norms (numpy ``eigh``,
    ``norm(ord=2)``) for a batch of matrices."""
    from stablefilt._constants import one_by_one

    rng = np.random.default_rng(3)
    m = rng.standard_normal((4, 3, 6, 6))
    m = m + np.swapaxes(m, -1, -2)
    with jax.enable_x64(True):
        w, _ = one_by_one(jnp.linalg.eigh, jnp.asarray(m))
        n = one_by_one(lambda a: jnp.linalg.norm(a, ord=2), jnp.asarray(m[..., :4]))
    np.testing.assert_allclose(np.asarray(w), np.linalg.eigvalsh(m), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(np.asarray(n), np.linalg.norm(m[..., :4], ord=2, axis=(-2, -1)), rtol=1e-10)


PENALTY = """
import jax, jax.numpy as jnp, numpy as np
import stablefilt as sf
from stablefilt._penalty import model_penalty
rng = np.random.default_rng(0)
params = {'layers': [{'taps': jnp.asarray(rng.standard_normal((5, 1 if i == 0 else 32, 32)).astype(np.float32) * 0.3)}
                     for i in range(3)], 'readout': {'weight': jnp.asarray(rng.standard_normal((32, 1)).astype(np.float32))}}
basis = sf.Basis('chebyshev', (0.0, 2.0))
f = jax.jit(jax.grad(lambda p: model_penalty(p, (0.0, 2.0), basis=basis)))
for _ in range(40):
    jax.block_until_ready(f(params))
print('done')
"""


def test_model_penalty_at_32_features_completes():
    """The ``model`` penalty's gradient at 32 features, 3 layers: it hung
    within 100 steps on a 2-core machine before (a batched eigenvalue
    routine and a batched SVD in one step)."""
    out = subprocess.run([sys.executable, "-c", PENALTY], capture_output=True, text=True, timeout=240)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.split() == ["done"]
