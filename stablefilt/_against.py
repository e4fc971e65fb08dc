"""A trained run against one concrete new version of its graph: how far the
new graph is in the relative model, whether the certificate covers it, and
what the model's outputs and predictions actually do on it (derived: see
docs/theory.md section 10.6).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from ._distance import distance
from ._errors import GraphError
from ._graph import ShiftOperator
from ._model import forward_np
from ._predictions import certified_mask, margins, prediction_rows, run_outputs

#: The certificate is taken at ``relative (1 + EPS_ALLOWANCE)`` to cover the
#: round-off in the computed ``E`` (theory s.10.6).
EPS_ALLOWANCE = 1e-6


@dataclasses.dataclass(frozen=True)
class Against:
    """A run measured and certified on one new graph.

    Attributes:
      relative: ``||E||_2`` from the training graph (after alignment when asked).
      residual, tolerance: what the relative model cannot express, and the
        round-off allowance below which it counts as zero.
      expressible: ``residual <= tolerance``.
      aligned: whether nodes were aligned first (then ``relative`` is an
        upper bound over relabellings).
      kept_order: whether the alignment kept every node in place.
      measured: ``(signals,)`` measured ``||Y_hat - Y||_F`` per test signal.
      flipped: fraction of predictions whose class changed (classify), else None.
      eps: the size the certificate was taken at.
      certified: ``(signals,)`` input-specific bounds at ``eps``.
      certified_predictions: fraction of predictions certified at ``eps`` (classify).
      certified_flipped: certified predictions that changed class anyway
        (classify; any would be a soundness failure).
      exceeded: signals whose measured change is above their bound.
      covered: whether the certificate applies to this graph.
      reason: one sentence when not covered, else None.
      assumptions: what the figures rest on.
    """

    relative: float
    residual: float
    tolerance: float
    expressible: bool
    aligned: bool
    kept_order: bool
    measured: np.ndarray
    flipped: float | None
    eps: float
    certified: np.ndarray
    certified_predictions: float | None
    certified_flipped: int | None
    exceeded: int
    covered: bool
    reason: str | None
    assumptions: dict

    def as_dict(self) -> dict:
        """The ``"against"`` object of ``certify --against --json``."""
        return {
            "relative": self.relative, "residual": self.residual, "tolerance": self.tolerance,
            "expressible": self.expressible, "aligned": self.aligned, "kept_order": self.kept_order,
            "measured_max": float(np.max(self.measured)), "measured_mean": float(np.mean(self.measured)),
            "flipped": self.flipped,
            "eps": self.eps,
            "certified": _finite(np.max(self.certified)),
            "certified_mean": _finite(np.mean(self.certified)),
            "certified_predictions": self.certified_predictions,
            "certified_flipped": self.certified_flipped,
            "exceeded": self.exceeded,
            "covered": self.covered, "reason": self.reason,
            "assumptions": self.assumptions,
        }


def _finite(x) -> float | None:
    """A figure for strict JSON: None when the bound overflowed."""
    x = float(x)
    return x if np.isfinite(x) else None


def _why_not(expressible: bool, residual: float, tolerance: float, flat: bool, kept_order: bool,
             same_kind: bool, train_kind: str, new_kind: str) -> str | None:
    if not expressible:
        return (f"the new graph differs from the training graph by a change that no relative perturbation "
                f"S + E S + S E expresses (residual {residual:.3g} above the round-off allowance {tolerance:.3g}), "
                "so the certificate does not apply to it.")
    if flat and not kept_order:
        return ("the alignment moved nodes, and a flat readout's certificate keeps the node order "
                "(docs/theory.md s.8.1), so it does not apply to this graph.")
    if same_kind and new_kind != train_kind:
        return (f"the certificate assumes the new graph keeps the kind {train_kind!r} of the training graph, "
                f"but it was read as {new_kind!r}, so it does not apply.")
    return None


def against(run, new: ShiftOperator, bound_at, *, align: bool = False, same_kind: bool = False) -> Against:
    """Run ``run`` against the shift operator ``new`` (built as the training
    graph was): the distance (:func:`stablefilt._distance.distance`), the
    measured output change and flips on the run's test signals, and the
    per-signal bounds ``bound_at(eps)`` at ``eps = relative (1 + 1e-6)``.

    Raises:
      GraphError: the graphs differ in size or are too large to decompose.
    """
    d = distance(run.op, new, align_nodes=align)
    perm = np.arange(new.nodes) if d.perm is None else np.asarray(d.perm)
    kept = bool(np.array_equal(perm, np.arange(new.nodes)))
    s_hat = sp.csr_array(new.dense()[perm][:, perm])  # new node perm[i] read as training node i
    y = run_outputs(run)
    y_hat = forward_np(run.params, s_hat, run.test_x, run.spec)
    diff = (y_hat - y).reshape(len(y), -1)
    measured = np.linalg.norm(diff, axis=1)
    eps = float(d.relative) * (1 + EPS_ALLOWANCE)
    bounds = np.asarray(bound_at(eps), dtype=np.float64)
    task = run.manifest.get("task", "classify")
    flipped = cert_frac = cert_flipped = None
    if task == "classify":
        rows, rows_hat = prediction_rows(y, run.spec), prediction_rows(y_hat, run.spec)
        changed = margins(rows)[0] != margins(rows_hat)[0]
        mask = certified_mask(rows, bounds)
        flipped, cert_frac, cert_flipped = float(np.mean(changed)), float(np.mean(mask)), int(np.sum(mask & changed))
    reason = _why_not(d.expressible, d.residual, d.tolerance, run.spec.readout == "flat", kept, same_kind,
                      run.op.kind, new.kind)
    assumptions = {
        "perturbation_model": "P^T S_hat P = S + E S + S E with E from the Sylvester equation (docs/theory.md s.2)"
                              + (", P found by alignment (an upper bound over relabellings)" if align else ", P = I"),
        "eps": f"relative (1 + {EPS_ALLOWANCE:g}) to cover round-off in the computed E (s.10.6)",
        "measured": "||Y_hat - Y||_F per test signal, the model in float64 on both graphs",
        "new_graph_kind": new.kind,
        "deployed_graph": ("same kind as the training graph (s.9.1)" if same_kind else
                           "any S_hat (its spectrum in the relative enclosure of s.9.1)"),
    }
    return Against(float(d.relative), float(d.residual), float(d.tolerance), bool(d.expressible), bool(align), kept,
                   measured, flipped, eps, bounds, cert_frac, cert_flipped, int(np.sum(measured > bounds)),
                   reason is None, reason, assumptions)


def read_new_graph(run, path: str, kind: str | None = None, **csv_options) -> ShiftOperator:
    """The graph file ``path`` (.npz, .npy or CSV edge list) as a shift
    operator built as the run's training graph was (its kind unless ``kind``
    is given). A CSV edge list is read in the run's node order when the run
    saved one (``nodes.csv``) and no other node list is given."""
    import os

    from ._edgelist import read_node_list
    from ._graph import shift_operator
    from ._io import read_graph

    saved = os.path.join(run.path, "nodes.csv")
    if path.lower().endswith(".csv") and csv_options.get("nodes") is None and os.path.isfile(saved):
        csv_options = {**csv_options, "nodes": read_node_list(saved)}
    matrix, _ = read_graph(path, **csv_options)
    new = shift_operator(matrix, kind or run.op.kind, name=f"graph file {path!r}")
    if new.nodes != run.op.nodes:
        raise GraphError(f"graph file {path!r} has {new.nodes} nodes and the run's graph {run.op.nodes}; "
                         "the new version must have the same nodes.")
    return new
