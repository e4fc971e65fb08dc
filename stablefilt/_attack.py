"""Adversarial search for the relative perturbation that moves a trained
model's output the most.

Projected gradient ascent in JAX over ``E`` in the ball ``||E||_2 <= eps``
(projection: clip the eigenvalues of ``E``), dense up to a few thousand nodes;
over diagonal ``E = diag(e)``, ``|e_i| <= eps`` (projection: clip entries),
matrix-free; and, beyond the dense limit, over ``E = diag(d) + U diag(s)
U^T`` with ``max|d| + max|s| <= eps`` (stablefilt._lowrank), never forming
an ``N x N`` array, started from the diagonal attack's winner. Restarts from
scaling, the worst eigenvector pair of the first layer's kernel, the first
bank's own strongest perturbation, and random points.

With a free input (the operator-level question: every input of norm
``rho``), dense and diagonal ``E`` are searched by the block ascent of
stablefilt._freeattack: alternating input moves (power steps on the sphere
``||x||_F = rho``) and perturbation moves (jumps to the extreme point of the
ball that maximises the linearised change), each kept only if the change
grows, from every restart paired with its own input direction or with the
given signals in turn. Its gradient in ``x`` counts the clean output's
dependence on ``x`` too. Every figure returned is measured in
float64 on an actually perturbed operator, so it brackets the true worst case
from below.
"""

from __future__ import annotations

import dataclasses
import functools

import jax
import jax.numpy as jnp
import numpy as np

from ._adamattack import random_starts
from ._adamattack import search as adam_search
from ._freeattack import POLISH_LIMIT, POLISH_STEPS, block_ascent, free_starts
from ._freeattack import polish as adam_polish
from ._graph import ShiftOperator
from ._lowrank import LowRankE, apply_e, finalise, orthonormalise, split_budget
from ._model import ModelSpec, forward, forward_np
from ._perturb import project_ball, relative_product
from ._search import change_operator, divided_differences, worst_perturbation
from ._sparse import JaxShift, jax_operator, shift_product

#: Largest ``F_in F_out N^2`` of the first bank for which its own strongest
#: perturbation is searched as a start (a dense SVD of the bank's change).
SEARCH_START_LIMIT = 400_000

#: Largest graph attacked with a dense ``E``.
DENSE_ATTACK_LIMIT = 2000


@dataclasses.dataclass(frozen=True)
class AttackResult:
    """The strongest perturbation found.

    Attributes:
      change: measured ``||Phi(S_hat) x - Phi(S) x||_F`` (float64).
      e: the perturbation: dense ``(N, N)``, diagonal ``(N,)``, or a
        :class:`~stablefilt._lowrank.LowRankE` (``diag(d) + U diag(s) U^T``,
        never formed).
      x: the input it was measured on ``(N, F)``.
      mode: ``dense``, ``diagonal`` or ``lowrank``; ``free_input`` whether
        ``x`` moved.
      start: the restart that won.
      history: objective per iteration of the winning restart (float32).
    """

    change: float
    e: np.ndarray
    x: np.ndarray
    mode: str
    free_input: bool
    start: str
    history: tuple


def measure(params, spec: ModelSpec, op: ShiftOperator, e: np.ndarray, x: np.ndarray) -> float:
    """``||Phi(S + E S + S E) x - Phi(S) x||_F`` in float64 (``x``: ``(N, F)``)."""
    s = op.matrix
    e = e.matvec if isinstance(e, LowRankE) else np.asarray(e, dtype=np.float64)

    xb = np.asarray(x, dtype=np.float64)[None]
    y0 = forward_np(params, s, xb, spec)
    y1 = forward_np(params, functools.partial(relative_product, s, e), xb, spec)
    return float(np.linalg.norm(y1 - y0))


@functools.partial(jax.jit, static_argnames=("spec",))
def _objective_grad(params, sop: JaxShift, e, x, y0, spec: ModelSpec):
    """``||Phi(S + E S + S E) x - y0||^2`` and its gradient in ``(E, x)``;
    ``E`` dense ``(N, N)`` or diagonal ``(N,)``."""
    def obj(e, x):
        def mv(v):
            return relative_product(functools.partial(shift_product, sop), e, v)

        y = forward(params, mv, x[None], spec)
        return jnp.sum((y - y0) ** 2)

    return jax.value_and_grad(obj, argnums=(0, 1))(e, x)


# The free-input loop needs the clean output at every iterate; eagerly that
# cost about 80 ms a call on a 34-node graph (custom_vjp traced per call).
_forward = jax.jit(forward, static_argnames=("spec",))


def _starts(op: ShiftOperator, params, spec: ModelSpec, eps: float, dense: bool, restarts: int, rng,
            x_fixed: np.ndarray | None = None):
    """``(name, E0, X0)`` per restart; ``X0`` is the input direction that goes
    with ``E0`` (unit norm, used when the input is free) or None.

    The pair starts are ranked by the first layer's first-order change
    (theory.md s. 4): with ``x_fixed`` given, on that input, whose spectral
    coefficients ``xt = V^T x`` decide which pair moves it (a pair that misses
    the input moves it only at second order, and with repeated eigenvalues
    many pairs tie on ``|Gamma_ij|`` alone); otherwise by ``|Gamma_ij|``
    (Frobenius norm over the bank), the input then being free to follow."""
    n = op.nodes
    out = [("scaling+", np.full(n, eps), None), ("scaling-", np.full(n, -eps), None)]
    if dense and n <= 600:
        w, v = np.linalg.eigh(op.dense())
        taps = np.asarray(params["layers"][0]["taps"], dtype=np.float64)
        cols = taps.reshape(taps.shape[0], -1)
        gam = (w[:, None] + w[None, :]) * divided_differences(cols, w, spec.basis)  # (F_in F_out, N, N)
        if x_fixed is None:
            g = np.sqrt(np.sum(gam**2, axis=0))
        else:
            # E~ = e_i e_j^T + e_j e_i^T moves row i of V^T Y by G_ij^T xt_j and
            # row j by G_ij^T xt_i (G symmetric in i, j); E~ = e_i e_i^T (norm 1,
            # half the pair's) moves row i by G_ii^T xt_i. Scores are per unit ||E||.
            xt = v.T @ np.asarray(x_fixed, dtype=np.float64)  # (N, F_in)
            t = np.einsum("foij,jf->ijo", gam.reshape(*taps.shape[1:], n, n), xt)
            t2 = np.sum(t**2, axis=2)
            g = np.sqrt(t2 + t2.T)
            g[np.diag_indices(n)] = np.sqrt(np.diag(t2))
        for idx in np.argsort(g, axis=None, kind="stable")[::-1][:2]:
            i, j = divmod(int(idx), n)
            e = np.outer(v[:, i], v[:, j])
            # The pair's construction acts on x = v_j u^T: the first layer's
            # first-order change is eps v_i (G^T u) with G = Gamma_ij per filter
            # (F_in x F_out), largest for u the top left singular vector of G.
            u = np.linalg.svd(gam[:, i, j].reshape(taps.shape[1:]))[0][:, 0]
            out.append((f"pair {i},{j}", eps * (e + e.T) / max(np.linalg.norm(e + e.T, 2), 1e-300),
                        np.outer(v[:, j], u)))
        if taps.shape[1] * taps.shape[2] * n * n <= SEARCH_START_LIMIT:
            # The strongest perturbation of the first bank alone (generalised
            # power method, stablefilt._search), with the input its change
            # moves most: the top right singular vector of H(S_hat) - H(S).
            s = op.dense()
            found = _first_bank_search(s, taps, spec.basis, eps, int(rng.integers(1 << 30)))
            d = change_operator(s, relative_product(lambda z: s @ z, found.e, np.eye(n)), taps, spec.basis)
            top = np.linalg.svd(d, full_matrices=False)[2][0].reshape(taps.shape[1], n).T  # vec(X) is column-stacked
            out.append(("first-bank search", found.e, top / max(np.linalg.norm(top), 1e-300)))
    while len(out) < restarts:
        if dense:
            e = rng.standard_normal((n, n))
            e = 0.5 * (e + e.T)
            out.append(("random", eps * e / np.max(np.abs(np.linalg.eigvalsh(e))), None))
        else:
            out.append(("random", rng.uniform(-eps, eps, n), None))
    return out


#: The first bank's strongest perturbations found, by their inputs (stress
#: attacks several signals at one eps with the same seed: the search, the
#: costliest start, is then made once). A few entries, the latest kept.
_FIRST_BANK_CACHE: dict = {}
_FIRST_BANK_CACHE_SIZE = 4


def _first_bank_search(s, taps, basis, eps: float, seed: int):
    """:func:`~stablefilt._search.worst_perturbation` of the bank ``taps`` on
    dense ``s`` (1 random restart, 10 iterations), memoised on its inputs."""
    key = (hash(s.tobytes()), s.shape, hash(taps.tobytes()), taps.shape, basis, float(eps), seed)
    if key not in _FIRST_BANK_CACHE:
        while len(_FIRST_BANK_CACHE) >= _FIRST_BANK_CACHE_SIZE:
            _FIRST_BANK_CACHE.pop(next(iter(_FIRST_BANK_CACHE)))
        _FIRST_BANK_CACHE[key] = worst_perturbation(s, taps, basis, eps, restarts=1, iters=10, seed=seed)
    return _FIRST_BANK_CACHE[key]


@jax.jit
def _basis_diagonal(q, g):
    """``diag(Q^T G Q)`` (one matrix product, ``O(N^3)`` in BLAS 3)."""
    return jnp.sum(q * (g @ q), axis=0)


@jax.jit
def _from_basis(q, w):
    out = (q * w) @ q.T
    return 0.5 * (out + out.T)


@functools.partial(jax.jit, static_argnames=("eps",))
def _clip(e, eps):
    """:func:`~stablefilt._perturb.project_ball` keeping the eigenbasis."""
    e = 0.5 * (e + e.T)
    w, q = jnp.linalg.eigh(e)
    w = jnp.clip(w, -eps, eps)
    return _from_basis(q, w), q, w


#: Dense projections: ``clip`` clips the eigenvalues at every step (one dense
#: ``eigh`` a step, ``O(N^3)`` with a large constant: 112 of 137 ms a step at
#: N = 1000); ``basis`` clips exactly every ``CLIP_EVERY``-th step and in
#: between moves only the eigenvalues, by the step's diagonal in the last
#: eigenbasis (``diag(Q^T G Q)``: one matrix product), whose clipping is exact
#: too. Every iterate of both lies in the ball.
PROJECTIONS = ("clip", "basis")
CLIP_EVERY = 2

#: Modes of :func:`attack` (``auto``: dense up to ``DENSE_ATTACK_LIMIT``
#: nodes, low-rank beyond).
MODES = ("auto", "dense", "diagonal", "lowrank")
#: Searches of the free-input attack: block ascent, or the multi-start Adam
#: search over the smoothed model (stablefilt._adamattack).
SEARCHES = ("ascent", "adam")

#: Rank of the low-rank part of a ``lowrank`` attack.
LOWRANK_RANK = 8


def _ascent(params, spec, op, sop, x, x0, y0, eps, dense, free_input, rho, starts, iters, projection,
            progress=None):
    """Projected gradient ascent over dense or diagonal ``E`` from each start;
    the best re-measured (float64) :class:`AttackResult`. Its free-input
    branch (the clean output held at the starting input) is the previous
    free-input search, which :func:`attack` no longer uses (it runs
    stablefilt._freeattack); tests/test_attack.py compares the two."""
    n = op.nodes
    best = None
    for name, e0, xs in starts:
        e = jnp.asarray(np.diag(e0) if (dense and e0.ndim == 1) else e0, jnp.float32)
        xc = jnp.asarray(rho * xs, jnp.float32) if (free_input and xs is not None) else x0
        hist = []
        top = None  # the best iterate: the ascent is not monotone
        step = 0.5 * eps
        basis = None  # (Q, w) of the last exact clip, E = Q diag(w) Q^T
        done = 0
        for it in range(iters):
            if progress is not None:
                progress(1)
                done += 1
            y_ref = _forward(params, sop, xc[None], spec) if free_input else y0
            val, (ge, gx) = _objective_grad(params, sop, e, xc, y_ref, spec)
            hist.append(float(val))
            if top is None or hist[-1] > top[0]:
                top = (hist[-1], e, xc)
            gn = jnp.linalg.norm(ge)
            if not np.isfinite(float(gn)) or float(gn) == 0.0:
                break
            lr = step / (1 + 0.1 * it)
            if dense and projection == "basis" and basis is not None and (it + 1) % CLIP_EVERY:
                # The step's diagonal in the eigenbasis of the last clip: only
                # the eigenvalues move, and clipping them is exact.
                q, w = basis
                w = jnp.clip(w + lr * np.sqrt(n) * _basis_diagonal(q, ge / gn), -eps, eps)
                basis = (q, w)
                e = _from_basis(q, w)
            elif dense:
                e, q, w = _clip(e + lr * ge / gn * np.sqrt(n), eps)
                basis = (q, w)
            else:
                e = project_ball(e + lr * ge / gn * np.sqrt(n), eps, xp=jnp)
            if free_input:
                gxn = jnp.linalg.norm(gx)
                if float(gxn) > 0:
                    xc = xc + 0.2 * rho * gx / gxn
                    xc = xc * (rho / jnp.linalg.norm(xc))
        if progress is not None and done < iters:  # the restart stopped early
            progress(iters - done)
        cands = [(e, xc)] + ([top[1:]] if top is not None and top[1] is not e else [])
        for ec, xcc in cands:
            # The exact projection in float64: the result lies in the ball.
            e_np = project_ball(np.asarray(ec, dtype=np.float64), eps)
            x_np = _final_input(x, xcc, free_input, rho)
            val = measure(params, spec, op, e_np, x_np)
            if best is None or val > best.change:
                best = AttackResult(val, e_np, x_np, "dense" if dense else "diagonal", free_input, name, tuple(hist))
    return best


def _free_search(params, spec, op, sop, eps, dense, rho, starts, inputs, iters, progress=None):
    """The free-input block ascent (stablefilt._freeattack) from every start,
    paired with its own input direction or the ``inputs`` in turn; the best
    re-measured (float64) :class:`AttackResult`."""
    best = None
    for name, e0, x0 in free_starts(starts, inputs):
        e0 = np.diag(e0) if (dense and np.ndim(e0) == 1) else e0
        e, xb, hist = block_ascent(params, spec, sop, e0, x0, eps, rho, iters, progress)
        val = measure(params, spec, op, e, xb)
        if best is None or val > best.change:
            best = AttackResult(val, e, xb, "dense" if dense else "diagonal", True, name, hist)
    return best


def _refine(params, spec, op, sop, best: AttackResult, eps, iters, progress=None) -> AttackResult:
    """The fixed-input winner polished by perturbation moves alone (the
    generalised power method with acceptance, stablefilt._freeattack), at
    most ``iters`` evaluations; kept only if its float64 change is larger, so
    never below the projected-gradient winner."""
    rho = float(np.linalg.norm(best.x))
    if rho == 0.0:
        if progress is not None:
            progress(iters)
        return best
    e, _, hist = block_ascent(params, spec, sop, best.e, best.x, eps, rho, iters, progress, move_input=False)
    val = measure(params, spec, op, e, best.x)
    if val > best.change:
        return dataclasses.replace(best, change=val, e=e, start=best.start + ", polished",
                                   history=best.history + hist)
    return best


def polish_steps(nodes: int, iters: int) -> int:
    """Adam steps :func:`attack` adds to polish its winner on a graph of
    ``nodes`` nodes with ``iters`` iterations per restart: twice ``iters``,
    at most ``POLISH_STEPS``, none above ``POLISH_LIMIT`` nodes."""
    return min(POLISH_STEPS, 2 * iters) if nodes <= POLISH_LIMIT else 0


def _polished(params, spec, op, sop, best: AttackResult, eps, iters, progress=None) -> AttackResult:
    """The winner moved on by Adam inside the ball (stablefilt._freeattack.polish,
    the input too when it is free), on graphs of at most ``POLISH_LIMIT``
    nodes; kept only if its float64 change is larger."""
    steps = polish_steps(op.nodes, iters)
    rho = float(np.linalg.norm(best.x))
    if steps == 0 or rho == 0.0:
        return best
    e, xb = adam_polish(params, spec, sop, best.e, best.x, eps, rho, steps, move_input=best.free_input,
                        progress=progress)
    val = measure(params, spec, op, e, xb)
    if val > best.change:
        return dataclasses.replace(best, change=val, e=e, x=xb, start=best.start + ", Adam-polished")
    return best


#: The Adam search's first stage: block ascent from the structured starts
#: (scaling both ways, two eigenvector pairs, the first bank's own search; at
#: most ``SHAPED_STARTS``), each at most ``min(iters, SHAPED_ITERS)``
#: evaluations. On small untrained relu models (the karate club, 3 layers of
#: 6 features) these starts found up to 1.5 times what the Adam search from
#: random points did; on the trained demo runs the Adam search found more.
SHAPED_STARTS = 5
SHAPED_ITERS = 150


def adam_evaluations(restarts: int, iters: int) -> int:
    """Progress count of :func:`attack` with ``search="adam"``."""
    return SHAPED_STARTS * min(iters, SHAPED_ITERS) + restarts * iters


def _adam_free(params, spec, op, pool, eps, dense, rho, restarts, iters, rng, progress=None) -> AttackResult:
    """The free-input attack with ``search="adam"``: block ascent from the
    structured starts, then the Adam search of stablefilt._adamattack from
    its winner and ``restarts - 1`` random points inside the ball; the larger
    float64 change of the two. ``pool``: the signals the starts may take."""
    shaped = [st for st in _starts(op, params, spec, eps, dense, 0, rng) if st[0] != "random"][:SHAPED_STARTS]
    first_iters = min(iters, SHAPED_ITERS)
    first = _free_search(params, spec, op, jax_operator(op), eps, dense, rho, shaped, pool, first_iters, progress)
    if progress is not None and len(shaped) < SHAPED_STARTS:
        progress((SHAPED_STARTS - len(shaped)) * first_iters)  # the count promised to the caller's bar
    initial = [(first.e, first.x)] + random_starts(restarts - 1, op.nodes, spec.features[0], eps, dense, pool, rng)
    e, xb = adam_search(params, spec, op.dense(), eps, rho, initial, steps=iters, dense=dense, progress=progress)
    val = measure(params, spec, op, e, xb)
    if val > first.change:
        return AttackResult(val, e, xb, "dense" if dense else "diagonal", True, "smoothed Adam", ())
    return first


def _final_input(x, xc, free_input, rho):
    if free_input:
        x_np = np.asarray(xc, dtype=np.float64)
        return x_np * (rho / np.linalg.norm(x_np))
    # Measure on the signal as given (float64), not its float32 copy:
    # callers compare with that signal's certificate.
    return np.asarray(x, dtype=np.float64)


@functools.partial(jax.jit, static_argnames=("spec", "free"))
def _lowrank_grad(params, sop: JaxShift, d, u, s, x, y0, spec: ModelSpec, free: bool = False):
    """``||Phi(S_hat) x - y0||^2`` and its gradient in ``(d, U, s, x)`` for
    ``E = diag(d) + U diag(s) U^T``, never forming ``E``: each product is
    ``S v + E (S v) + S (E v)``, ``O(nnz F + N r F)``. With ``free`` the
    clean output is ``Phi(S) x`` (``y0`` unused), so the gradient in ``x``
    counts its dependence on ``x``."""
    def obj(d, u, s, x):
        def mv(v):
            sv = shift_product(sop, v)
            return sv + apply_e(d, u, s, sv, jnp) + shift_product(sop, apply_e(d, u, s, v, jnp))

        y = forward(params, mv, x[None], spec)
        ref = forward(params, sop, x[None], spec) if free else y0
        return jnp.sum((y - ref) ** 2)

    return jax.value_and_grad(obj, argnums=(0, 1, 2, 3))(d, u, s, x)


def _input_subspace(op: ShiftOperator, x: np.ndarray, rank: int, rng) -> np.ndarray:
    """``(N, rank)`` orthonormal columns spanning the Krylov block ``[x, S x,
    S^2 x, ...]`` of the input (the directions a perturbation can move it
    along), padded with random columns."""
    n = op.nodes
    blocks, z = [], np.asarray(x, dtype=np.float64).reshape(n, -1)
    while sum(b.shape[1] for b in blocks) < rank and len(blocks) < rank:
        blocks.append(z)
        z = op.matrix @ z
    m = np.concatenate(blocks + [rng.standard_normal((n, rank))], axis=1)[:, : max(rank, 1)]
    q = np.linalg.qr(m)[0]
    return q[:, :rank]


def _lowrank_ascent(params, spec, op, sop, x, x0, y0, eps, free_input, rho, diag_best, rank, restarts, iters, rng,
                    progress=None):
    """Ascent over ``E = diag(d) + U diag(s) U^T`` in ``max|d| + max|s| <= eps``
    (stablefilt._lowrank); starts: the diagonal attack's winner (``s = 0``),
    the input's Krylov subspace with ``s = +-eps``, half of each, random."""
    n = op.nodes
    r = max(1, min(rank, n))
    u_in = _input_subspace(op, diag_best.x, r, rng)
    d_w = np.asarray(diag_best.e, dtype=np.float64)
    zero = np.zeros(n)
    starts = [("diagonal winner + low rank", d_w, u_in, np.zeros(r)),
              ("input subspace +", zero, u_in, np.full(r, eps)),
              ("input subspace -", zero, u_in, np.full(r, -eps)),
              ("half diagonal winner, half input subspace", 0.5 * d_w, u_in, np.full(r, 0.5 * eps))]
    while len(starts) < restarts:
        starts.append(("random low rank", zero, np.linalg.qr(rng.standard_normal((n, r)))[0],
                       rng.choice([-eps, eps], r)))
    best = None
    for name, d, u, s in starts[: max(restarts, 1)]:
        xc = jnp.asarray(diag_best.x, jnp.float32) if free_input else x0
        hist, top = [], None
        for it in range(iters):
            if progress is not None:
                progress(1)
            val, (gd, gu, gs, gx) = _lowrank_grad(params, sop, jnp.asarray(d, jnp.float32),
                                                   jnp.asarray(u, jnp.float32), jnp.asarray(s, jnp.float32),
                                                   xc, y0, spec, free_input)
            hist.append(float(val))
            if top is None or hist[-1] > top[0]:
                top = (hist[-1], d, u, s, xc)
            gd, gu, gs = (np.asarray(g, dtype=np.float64) for g in (gd, gu, gs))
            if not all(np.all(np.isfinite(g)) for g in (gd, gu, gs)):
                break
            lr = 0.5 / (1 + 0.1 * it)
            for g, name_ in ((gd, "d"), (gs, "s"), (gu, "u")):
                gn = float(np.linalg.norm(g))
                if gn == 0.0:
                    continue
                if name_ == "d":
                    d = d + lr * eps * g / gn * np.sqrt(n)
                elif name_ == "s":
                    s = s + lr * eps * g / gn * np.sqrt(r)
                else:
                    u = u + 0.6 * lr * g / gn * np.sqrt(r)
            u, s = orthonormalise(u, s)
            d, s = split_budget(d, s, eps)
            if free_input:
                gxn = jnp.linalg.norm(gx)
                if float(gxn) > 0:
                    xc = xc + 0.2 * rho * gx / gxn
                    xc = xc * (rho / jnp.linalg.norm(xc))
        cands = [(d, u, s, xc)] + ([top[1:]] if top is not None else [])
        for dc, uc, sc, xcc in cands:
            e = finalise(dc, uc, sc, eps)
            x_np = _final_input(x, xcc, free_input, rho)
            val = measure(params, spec, op, e, x_np)
            if best is None or val > best.change:
                best = AttackResult(val, e, x_np, "lowrank", free_input, name, tuple(hist))
    return best


def attack(params, spec: ModelSpec, op: ShiftOperator, x, eps: float, *, mode: str = "auto", free_input: bool = False,
           rho: float | None = None, restarts: int = 5, iters: int = 40, seed: int = 0, projection: str = "clip",
           rank: int = LOWRANK_RANK, inputs=None, polish: bool = False, search: str = "ascent",
           progress=None) -> AttackResult:
    """Strongest relative perturbation found for one input ``x`` (``(N, F)``).

    Args:
      params, spec: the model.
      op: the unperturbed shift operator.
      x: the input signal; with ``free_input`` the starting point, rescaled
        to ``||x||_F = rho``.
      eps: radius of the ball.
      mode: ``dense``, ``diagonal``, ``lowrank`` or ``auto`` (dense up to
        ``DENSE_ATTACK_LIMIT`` nodes, low-rank beyond). ``lowrank`` runs the
        diagonal attack first, then ascends over ``diag(d) + U diag(s)
        U^T`` (rank ``rank``) from its winner and other starts, and returns
        the best of both: never less than the diagonal attack with the same
        seed. Cost per iteration ``O(nnz F + N r F)``; no ``N x N`` array.
      projection: dense mode only, one of ``PROJECTIONS``: ``basis`` halves
        the dense eigendecompositions per step (about as strong as ``clip``
        with 1.7 times the iterations; tests/test_lowrank.py).
      inputs: with ``free_input``, more starting signals ``(M, N, F)``
        (any norm; rescaled to ``rho``), given to the restarts that have no
        input direction of their own after ``x`` itself, in turn.
      polish: move the winner on by Adam inside the ball (below).
      search: ``ascent``, or ``adam`` for the free-input search of
        stablefilt._adamattack in place of the block ascent (dense or
        diagonal ``E``, graphs of at most ``POLISH_LIMIT`` nodes):
        block ascent from the structured starts (``SHAPED_STARTS``), then
        ``iters`` Adam steps from its winner and ``restarts - 1`` random
        points inside the ball, run together, over the model with its relus
        smoothed and annealed back (progress count
        :func:`adam_evaluations`); no polish follows.
      progress: called with a count of iterations done (``restarts *
        iters`` per ascent, ``iters`` more for the polish of a fixed
        input's winner, and with ``polish`` ``polish_steps(N, iters)`` for
        the Adam polish of the winner), or None.

    With a fixed input, the dense or diagonal winner is polished by at most
    ``iters`` perturbation moves of stablefilt._freeattack, kept only if
    the change grows. With ``free_input`` the dense and diagonal searches
    are the block ascent of stablefilt._freeattack (``iters`` evaluations
    per restart at most; ``projection`` does not apply); the low-rank one
    keeps its projected gradient ascent, with the gradient in ``x`` of the
    whole change. With ``polish``, the dense or diagonal winner is then
    moved on by Adam inside the ball (stablefilt._freeattack.polish,
    ``polish_steps(N, iters)`` steps, graphs of at most ``POLISH_LIMIT``
    nodes), kept only if the change grows.
    """
    if mode not in MODES:
        raise ValueError(f"unknown attack mode {mode!r}; expected one of {', '.join(MODES)}.")
    if projection not in PROJECTIONS:
        raise ValueError(f"unknown projection {projection!r}; expected one of {', '.join(PROJECTIONS)}.")
    if search not in SEARCHES:
        raise ValueError(f"unknown search {search!r}; expected one of {', '.join(SEARCHES)}.")
    n = op.nodes
    if mode == "auto":
        mode = "dense" if n <= DENSE_ATTACK_LIMIT else "lowrank"
    dense = mode == "dense"
    rng = np.random.default_rng(seed)
    pool = None  # with a free input: the signals its starts may take, x first
    if free_input:
        rho = float(rho if rho is not None else np.linalg.norm(x))
        pool = [np.asarray(z, dtype=np.float64) for z in (x, *(() if inputs is None else inputs))]
    if search == "adam":
        if not free_input or mode == "lowrank" or n > POLISH_LIMIT:
            raise ValueError(f"the Adam search needs a free input, a dense or diagonal E and at most {POLISH_LIMIT} "
                             f"nodes; got free_input={free_input}, mode {mode!r}, {n} nodes.")
        return _adam_free(params, spec, op, pool, eps, dense, rho, restarts, iters, rng, progress)
    sop = jax_operator(op)
    x0 = jnp.asarray(x, jnp.float32)
    if free_input:
        x0 = x0 * (rho / jnp.maximum(jnp.linalg.norm(x0), 1e-30))
    y0 = _forward(params, sop, x0[None], spec)
    fixed = None if free_input else np.asarray(x, dtype=np.float64)
    starts = _starts(op, params, spec, eps, dense, restarts, rng, fixed)
    if free_input:
        best = _free_search(params, spec, op, sop, eps, dense, rho, starts, pool, iters, progress)
    else:
        best = _ascent(params, spec, op, sop, x, x0, y0, eps, dense, free_input, rho, starts, iters, projection,
                       progress)
        best = _refine(params, spec, op, sop, best, eps, iters, progress)
    if polish:
        best = _polished(params, spec, op, sop, best, eps, iters, progress)
    if mode == "lowrank":
        low = _lowrank_ascent(params, spec, op, sop, x, x0, y0, eps, free_input, rho, best, rank, restarts, iters,
                              rng, progress)
        if low.change > best.change:
            best = low
    return best
