"""Certified predictions: which test predictions provably keep their class
under every relative perturbation of size at most ``eps``, the certified
accuracy, each prediction's certified radius, and per-node bounds for
regression (derived: see docs/theory.md section 10).

A prediction is one row ``z`` of a signal's output (node ``i``'s for per-node
readouts, the signal's for pooled and flat readouts). With ``c(x)`` a bound on
the signal's whole output change ``||Y_hat - Y||_F``, every row changes by at
most ``c(x)`` in the 2-norm (s.10.1), and a prediction with margin
``m = z_k - max_{j != k} z_j`` keeps its class when ``m > sqrt(2) c(x)``
(s.10.2).
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np

from ._memo import InputMemo
from ._model import ModelSpec
from ._modelcert import eps_key

#: Relative and absolute round-off allowances of the margin test (theory s.10.2).
REL_MARGIN = 1e-12
ABS_MARGIN = 1e-9
#: Sizes evaluated for the certified radius (theory s.10.4).
RADIUS_STEPS = 20
#: Ladder points of those (the rest bisect for the median), and its ratio.
LADDER = 12
RATIO = 2.0


def prediction_rows(out: np.ndarray, spec: ModelSpec) -> np.ndarray:
    """The model output ``(B, N, C)`` or ``(B, C)`` as predictions
    ``(B, R, C)``: ``R = N`` rows per signal for per-node readouts (and no
    readout), ``R = 1`` for pooled and flat readouts."""
    out = np.asarray(out, dtype=np.float64)
    if spec.readout in ("mean", "sum", "flat"):
        return out[:, None, :]
    return out


def margins(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(classes, margins)`` of predictions ``(..., C)``: the ``argmax`` and
    ``z_k - max_{j != k} z_j`` (0 on ties; needs ``C >= 2``)."""
    rows = np.asarray(rows, dtype=np.float64)
    if rows.shape[-1] < 2:
        raise ValueError("a margin needs at least two classes.")
    top2 = np.sort(rows, axis=-1)[..., -2:]
    return np.argmax(rows, axis=-1), top2[..., 1] - top2[..., 0]


def certified_mask(rows: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """Which predictions ``rows`` ``(B, R, C)`` are certified when signal
    ``b``'s output changes by at most ``bounds[b]`` in the Frobenius norm:
    ``m > sqrt(2) c (1 + REL_MARGIN) + ABS_MARGIN max(1, max |z|)``
    (theory s.10.2, strict: ties are never certified). ``(B, R)`` booleans."""
    _, m = margins(rows)
    c = np.asarray(bounds, dtype=np.float64).reshape(-1, 1)
    scale = np.maximum(1.0, np.max(np.abs(rows), axis=-1))
    return m > np.sqrt(2.0) * c * (1 + REL_MARGIN) + ABS_MARGIN * scale


def correct_mask(rows: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """``(B, R)``: whether each prediction's ``argmax`` equals its label
    (labels ``(B, N)`` per node or ``(B,)`` per signal)."""
    y = np.asarray(labels).reshape(rows.shape[0], -1)
    return np.argmax(rows, axis=-1) == y


def certified_accuracy(rows: np.ndarray, labels: np.ndarray, bounds: np.ndarray) -> float:
    """Fraction of predictions both correct and certified (theory s.10.3)."""
    return float(np.mean(correct_mask(rows, labels) & certified_mask(rows, bounds)))


@dataclasses.dataclass(frozen=True)
class Radii:
    """Certified radii (theory s.10.4).

    Attributes:
      radius: ``(B, R)`` per prediction, the largest evaluated size at which
        it was certified (a rigorous lower bound on its radius; ``upper`` for
        those certified at ``upper``, 0 when none passed).
      evaluated: the sizes at which the certificate was computed, ascending.
      upper: the largest size tried.
    """

    radius: np.ndarray
    evaluated: tuple[float, ...]
    upper: float

    @property
    def median(self) -> float:
        return float(np.median(self.radius))


def certified_radii(rows: np.ndarray, bound_at: Callable[[float], np.ndarray], upper: float,
                    steps: int = RADIUS_STEPS, known: dict | None = None) -> Radii:
    """Per prediction, the largest size ``eps <= upper`` at which it is
    certified, among at most ``steps`` evaluations of ``bound_at(eps)`` (the
    per-signal bounds ``(B,)`` at ``eps``): a geometric ladder ``upper 2^-k``
    (:data:`LADDER` points, fewer if ``steps`` is small), then a bisection for
    the median radius on the fraction of passing predictions. ``known``:
    ``{eps: bounds}`` already computed (also used). By inclusion each pass is
    a lower bound on the radius whether or not ``bound_at`` is monotone
    (theory s.10.4)."""
    if not upper > 0:
        raise ValueError("the upper size of the radius search must be positive.")
    passed: dict[float, np.ndarray] = {}

    def test(e: float) -> float:
        if e not in passed:
            b = known[e] if known and e in known else bound_at(e)
            passed[e] = certified_mask(rows, b)
        return float(np.mean(passed[e]))

    for e, b in (known or {}).items():
        if 0 < e <= upper:
            passed[float(e)] = certified_mask(rows, b)
    passed[0.0] = certified_mask(rows, np.zeros(rows.shape[0]))
    ladder = min(LADDER, max(1, steps - 8))
    points = [upper * RATIO ** -k for k in range(ladder)]
    # Every ladder point, so radii far from the median get a point too; then
    # the bracket of the median: the largest passing point and the smallest
    # failing one above it.
    half = {e: test(e) >= 0.5 for e in points}
    lo = max([e for e, ok in half.items() if ok], default=0.0)
    hi = min([e for e, ok in half.items() if not ok and e > lo], default=None)
    if hi is not None:
        for _ in range(max(0, steps - ladder)):
            mid = 0.5 * (lo + hi) if lo > 0 else hi / RATIO
            if test(mid) >= 0.5:
                lo = mid
            else:
                hi = mid
            if lo > 0 and hi - lo <= 1e-6 * hi:
                break
    radius = np.zeros(rows.shape[:2])
    for e in sorted(passed):
        radius = np.where(passed[e], np.maximum(radius, e), radius)
    return Radii(radius, tuple(sorted(passed)), float(upper))


@dataclasses.dataclass(frozen=True)
class PredictionCertificate:
    """Certified predictions of a run's test signals.

    Attributes:
      task: ``classify`` or ``regress``.
      predictions: how many predictions (signals times rows).
      per: ``node`` or ``signal``: what one prediction is.
      eps: the sizes.
      bound: how the per-signal bound ``c(x)`` was obtained.
      accuracy: fraction of correct predictions (classify), else None.
      certified: per eps, fraction of predictions certified (classify).
      certified_accuracy: per eps, fraction correct and certified (classify).
      radii: the :class:`Radii`, or None when not computed.
      node_bound_max, node_bound_median: per eps, the largest and the median
        over predictions of the bound on one prediction's output change
        (regress; theory s.10.5).
      rms_bound_max, rms_bound_median: per eps, of the root-mean-square bound
        ``c(x) / sqrt(N)`` over a signal's nodes (regress, per-node readouts).
    """

    task: str
    predictions: int
    per: str
    eps: tuple[float, ...]
    bound: str
    accuracy: float | None = None
    certified: tuple[float, ...] = ()
    certified_accuracy: tuple[float, ...] = ()
    radii: Radii | None = None
    node_bound_max: tuple[float, ...] = ()
    node_bound_median: tuple[float, ...] = ()
    rms_bound_max: tuple[float, ...] = ()
    rms_bound_median: tuple[float, ...] = ()

    def as_dict(self) -> dict:
        """The JSON form (``certify --json`` and ``summary.json``)."""
        k = [eps_key(e) for e in self.eps]
        d = {"task": self.task, "predictions": self.predictions, "per": self.per, "bound": self.bound,
             "rule": "a prediction is certified when its logit margin exceeds sqrt(2) times the bound on its "
                     "signal's output change (docs/theory.md s.10.2)"}
        if self.task == "classify":
            d.update({"accuracy": self.accuracy, "certified": dict(zip(k, self.certified)),
                      "certified_accuracy": dict(zip(k, self.certified_accuracy))})
            if self.radii is not None:
                r = self.radii.radius
                d["radius"] = {"median": self.radii.median, "quartiles": [float(np.quantile(r, q)) for q in (0.25, 0.75)],
                               "upper": self.radii.upper, "at_upper": float(np.mean(r >= self.radii.upper)),
                               "evaluations": len(self.radii.evaluated) - 1,
                               "method": "largest evaluated eps at which the prediction is certified: a ladder "
                                         "from upper down by factors of 2, then bisection for the median "
                                         "(docs/theory.md s.10.4); each a lower bound on the true radius"}
        else:
            d.update({"output_bound_max": dict(zip(k, self.node_bound_max)),
                      "output_bound_median": dict(zip(k, self.node_bound_median))})
            if self.rms_bound_max:
                d.update({"rms_bound_max": dict(zip(k, self.rms_bound_max)),
                          "rms_bound_median": dict(zip(k, self.rms_bound_median))})
        return d


def certify_predictions(out: np.ndarray, labels: np.ndarray, spec: ModelSpec, task: str, eps_list,
                        bounds: dict, bound: str, radius_at: Callable[[float], np.ndarray] | None = None,
                        radius_upper: float | None = None, steps: int = RADIUS_STEPS) -> PredictionCertificate:
    """Certified predictions of signals with model outputs ``out`` and
    targets ``labels``, given per-signal bounds ``bounds[eps]`` ``(B,)``
    (described by ``bound``). With ``radius_at`` (per-signal bounds at any
    eps) and ``radius_upper``, the certified radii (classify only)."""
    rows = prediction_rows(out, spec)
    per = "signal" if rows.shape[1] == 1 and spec.readout in ("mean", "sum", "flat") else "node"
    eps = tuple(float(e) for e in eps_list)
    n = rows.shape[0] * rows.shape[1]
    if task == "classify":
        masks = [certified_mask(rows, bounds[e]) for e in eps]
        correct = correct_mask(rows, labels)
        radii = None
        if radius_at is not None and radius_upper is not None:
            radii = certified_radii(rows, radius_at, radius_upper, steps, known={e: bounds[e] for e in eps})
        return PredictionCertificate(task, n, per, eps, bound, float(np.mean(correct)),
                                     tuple(float(np.mean(m)) for m in masks),
                                     tuple(float(np.mean(m & correct)) for m in masks), radii)
    per_row = [np.repeat(np.asarray(bounds[e], dtype=np.float64), rows.shape[1]) for e in eps]
    out_d = dict(node_bound_max=tuple(float(np.max(b)) for b in per_row),
                 node_bound_median=tuple(float(np.median(b)) for b in per_row))
    if per == "node":
        rms = [np.asarray(bounds[e], dtype=np.float64) / np.sqrt(rows.shape[1]) for e in eps]
        out_d.update(rms_bound_max=tuple(float(np.max(b)) for b in rms),
                     rms_bound_median=tuple(float(np.median(b)) for b in rms))
    return PredictionCertificate(task, n, per, eps, bound, **out_d)


def run_outputs(run) -> np.ndarray:
    """The run's model on its test signals, in float64 (the certificate's path)."""
    from ._model import forward_np

    return forward_np(run.params, run.op.matrix, run.test_x, run.spec)


def run_predictions(run, rc, eps_list, *, radius_upper: float | None = None,
                    steps: int = RADIUS_STEPS) -> PredictionCertificate:
    """Certified predictions of a run's test signals from its
    :class:`~stablefilt._runcert.RunCertificate` ``rc`` (the per-signal
    input-specific bounds at ``eps_list``); with ``radius_upper``, the radii
    too, evaluating the input-specific bound without refinement (s.10.4)."""
    task = run.manifest.get("task", "classify")
    memo = InputMemo()  # one for both constants: the layers' outputs are shared
    plain = plain_bounds(run, rc, memo)
    bounds = {float(e): np.minimum(rc.signal_bounds[float(e)], plain(float(e))) for e in eps_list}
    at = signal_bounds_at(run, rc, plain, memo) if radius_upper is not None and task == "classify" else None
    return certify_predictions(run_outputs(run), run.test_y, run.spec, task, eps_list, bounds,
                               "input-specific bound of each test signal, the smaller of those with rebalanced and "
                               "with plain factorisations (docs/theory.md s.5 item 6, s.9)", at, radius_upper, steps)


def plain_bounds(run, rc, memo=None) -> Callable[[float], np.ndarray]:
    """``eps -> (signals,)``: the run's input-specific test bounds with the
    factorisations not rebalanced and no deployment assumption (Weyl's
    widening). Rebalancing (docs/theory.md 9.4) tightens the operator-level
    bound but not always each signal's, so both are kept and the smaller
    used; each is sound. ``memo``: the :class:`~stablefilt._memo.InputMemo`
    of the test signals to use (a new one when None)."""
    from ._modelcert import certify_inputs, model_constants

    sp_ = rc.spectrum
    constants = model_constants(run.params, run.spec, sp_.interval, run.op.nodes, sp_.eigenvalues,
                                matrix=run.op.matrix)
    memo = InputMemo() if memo is None else memo  # the eps-free parts, computed at the first size
    return lambda e: certify_inputs(run.params, run.spec, run.op.matrix, sp_.interval, run.test_x, e,
                                    sp_.eigenvalues, sp_.eigenvectors, constants, memo=memo)


OPERATOR_BOUND = ("operator-level certificate, for every input with ||x||_F <= rho (docs/theory.md s.5 item 6, s.9), "
                  "the same for every signal")


def training_predictions(params, spec: ModelSpec, matrix, x, y, task: str, cert, *,
                         constants=None, eigenvectors=None) -> PredictionCertificate:
    """Certified predictions during training, cheap: the model in float64 on
    signals ``x`` ``(B, N, F_0)`` with targets ``y``, and per signal the
    operator-level bound of the :class:`~stablefilt._modelcert.ModelCertificate`
    ``cert`` (every signal has ``||x||_F <= rho``). With ``constants`` (the
    :func:`~stablefilt._modelcert.model_constants` on this graph), the smaller
    of that and each signal's input-specific bound without refinement."""
    from ._model import forward_np
    from ._modelcert import certify_inputs

    out = forward_np(params, matrix, x, spec)
    eps = [b.eps for b in cert.bounds]
    bounds = {b.eps: np.full(len(x), b.certified) for b in cert.bounds}
    how = OPERATOR_BOUND
    if constants is not None:
        memo = InputMemo()  # the eps-free parts once for every size
        for e in eps:
            own = certify_inputs(params, spec, matrix, constants.interval, x, e, constants.eigenvalues, eigenvectors,
                                 constants, memo=memo)
            bounds[e] = np.minimum(bounds[e], own)
        how = ("the smaller of the operator-level certificate and each signal's input-specific bound "
               "(docs/theory.md s.5 item 6, s.9)")
    return certify_predictions(out, y, spec, task, eps, bounds, how)


def signal_bounds_at(run, rc, plain=None, memo=None) -> Callable[[float], np.ndarray]:
    """``eps -> (signals,)``: the smaller of the run's input-specific test
    bounds with rebalanced factorisations (``rc.constants``, no per-signal
    refinement) and with plain ones (:func:`plain_bounds`); ``memo`` as there."""
    from ._runcert import input_bounds

    memo = InputMemo() if memo is None else memo  # one for both constants: the layers' outputs are shared
    plain = plain or plain_bounds(run, rc, memo)
    return lambda e: np.minimum(input_bounds(run, rc.spectrum, e, rc.constants, refine=0, memo=memo), plain(e))
