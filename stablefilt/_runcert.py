"""Certificates of a trained run, in float64: the run's spectral data computed
once (certified interval, and the eigenvalues and eigenvectors when the graph
is small enough to decompose; the input norm bound ``rho``), the
operator-level model certificate and the input-specific bounds on the run's
test signals (docs/theory.md sections 5 and 8)."""

from __future__ import annotations

import dataclasses

import numpy as np

from ._certify import deployed_interval
from ._interval import SpectralInterval, spectral_interval
from ._modelcert import ModelCertificate, ModelConstants, certify_inputs, certify_model, eps_key, model_constants
from ._runs import Run


@dataclasses.dataclass(frozen=True)
class RunSpectrum:
    """A run's graph, measured once.

    Attributes:
      interval: certified spectral interval of ``S``.
      eigenvalues, eigenvectors: of ``S`` (``numpy.linalg.eigh``) when the
        interval was computed exactly, else None.
      rho: the input norm bound (the manifest's, else the largest test-signal
        norm).
    """

    interval: SpectralInterval
    eigenvalues: np.ndarray | None
    eigenvectors: np.ndarray | None
    rho: float


def run_spectrum(run: Run, progress=None) -> RunSpectrum:
    """The :class:`RunSpectrum` of a run (``progress``: a message printer
    for the costly steps, or None)."""
    iv = spectral_interval(run.op, progress=progress)
    lam, vecs = None, None
    if iv.eigenvalues is not None:
        lam, vecs = np.linalg.eigh(run.op.dense())
    rho = float(run.manifest.get("rho") or np.max(np.linalg.norm(run.test_x.reshape(len(run.test_x), -1), axis=1)))
    return RunSpectrum(iv, lam, vecs, rho)


def run_constants(run: Run, spectrum: RunSpectrum, deployed=None) -> ModelConstants:
    """The eps-free constants of the run's model on its graph (rebalanced
    factorisations, docs/theory.md 9.4); ``deployed`` as in
    :func:`stablefilt.model_constants`."""
    return model_constants(run.params, run.spec, spectrum.interval, run.op.nodes, spectrum.eigenvalues,
                           matrix=run.op.matrix, deployed=deployed, rebalance=True, eigenvectors=spectrum.eigenvectors)


#: At most this many test signals get their input-specific bound refined
#: (docs/theory.md 9.5), the largest first, until the largest is refined.
REFINE = 8


def input_bounds(run: Run, spectrum: RunSpectrum, eps: float, constants: ModelConstants | None = None,
                 refine: int = REFINE, memo=None) -> np.ndarray:
    """Input-specific bounds ``(signals,)`` of the run's test signals at
    ``eps``; the largest are refined for their own inputs (at most ``refine``).
    ``memo``: an :class:`~stablefilt._memo.InputMemo` kept between sizes, or None."""
    return certify_inputs(run.params, run.spec, run.op.matrix, spectrum.interval, run.test_x, eps,
                          spectrum.eigenvalues, spectrum.eigenvectors, constants, refine=refine, memo=memo)


@dataclasses.dataclass(frozen=True)
class RunCertificate:
    """A run's certificate.

    Attributes:
      run: the run directory.
      nodes: ``N``.
      spectrum: the run's :class:`RunSpectrum`.
      model: the operator-level :class:`ModelCertificate`.
      input_test_max: per eps of ``model.bounds``, the largest
        input-specific bound over the test signals.
      signal_bounds: per eps, the input-specific bounds ``(signals,)`` of
        the test signals.
      constants: the eps-free constants the bounds came from.
    """

    run: str
    nodes: int
    spectrum: RunSpectrum
    model: ModelCertificate
    input_test_max: tuple[float, ...]
    signal_bounds: dict = dataclasses.field(default_factory=dict, repr=False)
    constants: ModelConstants | None = dataclasses.field(default=None, repr=False)

    def input_at(self, eps: float) -> float:
        """The largest input-specific bound over the test signals at ``eps``."""
        found = [v for b, v in zip(self.model.bounds, self.input_test_max) if b.eps == float(eps)]
        if not found:
            raise KeyError(f"no bound at eps {eps:g}.")
        return found[-1]

    @property
    def input_method(self) -> str:
        """How the input-specific bounds were made (recorded with them)."""
        if self.spectrum.eigenvectors is not None:
            return (f"eigenvectors of S: each bank's joint bound for its input (theory s.9.2), the {REFINE} largest "
                    "refined for their own inputs (s.9.5, s.9.6)")
        return ("interval only, no eigenvectors: each bank's joint bound for its input from float64 sparse "
                "products (theory s.9.2)")

    def as_dict(self) -> dict:
        """The ``certify --json`` form."""
        iv = self.spectrum.interval
        d = self.model.as_dict()
        d.update({"run": self.run, "nodes": self.nodes, "interval": [iv.lower, iv.upper],
                  "interval_method": iv.method, "interval_ends": iv.ends(),
                  "input_specific_test_max": {eps_key(b.eps): v for b, v in zip(self.model.bounds, self.input_test_max)},
                  "input_specific_method": self.input_method})
        return d


def certify_run(run: Run, eps_list, *, same_kind: bool = False, progress=None) -> RunCertificate:
    """Float64 certificate of a run: over the eigenvalues when the graph is
    small enough to decompose, else over its interval; plus the
    input-specific bound on the run's test signals. With ``same_kind`` the
    deployed graph is assumed rebuilt as the same kind of operator as the
    training graph (its spectrum then lies in the kind's interval; recorded
    in the assumptions; docs/theory.md 9.1)."""
    spectrum = run_spectrum(run, progress)
    deployed = deployed_interval(run.op.kind) if same_kind else None
    constants = run_constants(run, spectrum, deployed)
    cert = certify_model(run.params, run.spec, spectrum.interval, run.op.nodes, eps_list, rho=spectrum.rho,
                         eigenvalues=spectrum.eigenvalues, constants=constants)
    per_signal = {float(e): input_bounds(run, spectrum, e, constants) for e in dict.fromkeys(float(e) for e in eps_list)}
    inputs = tuple(float(per_signal[float(e)].max()) for e in eps_list)
    return RunCertificate(run.path, run.op.nodes, spectrum, cert, inputs, per_signal, constants)
