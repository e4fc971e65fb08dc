"""stablefilt: train graph filters and GNNs that stay stable under relative
perturbations of the graph, and certify how far their output can move.

The float64 numpy/scipy path certifies; the float32 JAX path trains.
Perturbations, distances, searches, attacks and stress tests are in
:mod:`stablefilt.stress`.

The public names are loaded on first use (the lazy loading of Scientific
Python's SPEC 1): ``import stablefilt`` costs no JAX import, so the
command line starts, and can read its arguments, before the numerical
stack is loaded.
"""

# ruff: noqa: I001

from __future__ import annotations

import importlib

from ._version import __version__ as __version__
from ._errors import ConfigError as ConfigError
from ._errors import FilterError as FilterError
from ._errors import GraphError as GraphError
from ._errors import RunError as RunError
from ._errors import StablefiltError as StablefiltError
from ._errors import TrainingDiverged as TrainingDiverged

#: Each public name and the module that defines it, grouped by concept.
_PUBLIC = {
    # Shift operators and their spectral intervals.
    "KINDS": "_graph",
    "ShiftOperator": "_graph",
    "from_edges": "_graph",
    "reorder": "_graph",
    "shift_operator": "_graph",
    "SpectralInterval": "_interval",
    "spectral_interval": "_interval",
    "JaxShift": "_sparse",
    "apply_filter": "_sparse",
    "jax_operator": "_sparse",
    # Bases and filters.
    "Basis": "_filters",
    "frequency_response": "_filters",
    "make_basis": "_filters",
    "response_derivative": "_filters",
    "run_filter": "_filters",
    # Filter certificates.
    "Certificate": "_certify",
    "EpsBound": "_certify",
    "certify_filter": "_certify",
    "FilterBound": "_filterbounds",
    "FilterConstants": "_filterbounds",
    "filter_bounds": "_filterbounds",
    "filter_constants": "_filterbounds",
    # The model and its certificates.
    "ModelSpec": "_model",
    "forward": "_model",
    "forward_np": "_model",
    "init_params": "_model",
    "LayerBound": "_modelcert",
    "LayerConstants": "_modelcert",
    "ModelCertificate": "_modelcert",
    "ModelConstants": "_modelcert",
    "ModelEpsBound": "_modelcert",
    "certify_inputs": "_modelcert",
    "certify_model": "_modelcert",
    "model_bounds": "_modelcert",
    "model_constants": "_modelcert",
    "certify_layers": "_usercert",
    # Penalties (grid constants in JAX, the pluggable penalty, the optax transformation).
    "bank_sup_norm": "_constants",
    "integral_lipschitz": "_constants",
    "kernel_bound": "_constants",
    "lipschitz": "_constants",
    "pairwise_constant": "_constants",
    "spectral_grid": "_constants",
    "sup_norm": "_constants",
    "CertifiedSetup": "_certpenalty",
    "certified_penalty": "_certpenalty",
    "certified_setup": "_certpenalty",
    "find_taps": "_penalty",
    "model_penalty": "_penalty",
    "penalty": "_penalty",
    "stability_penalty": "_penalty",
    # Configs, training and runs.
    "Config": "_config",
    "load_config": "_config",
    "parse_config": "_config",
    "RunCertificate": "_runcert",
    "certify_run": "_runcert",
    "Run": "_runs",
    "compare_rows": "_runs",
    "open_run": "_runs",
    "train": "_train",
    # Several devices: the graph's nodes split over devices (docs/devices.md).
    "HaloPlan": "_partition",
    "halo_plan": "_partition",
    "node_parts": "_partition",
    "partition_plan": "_partition",
    "ShardedShift": "_sharded",
    "node_mesh": "_sharded",
    "sharded_filter": "_sharded",
    "sharded_forward": "_sharded",
    "sharded_operator": "_sharded",
    "sharded_product": "_sharded",
}

__all__ = ["__version__", "ConfigError", "FilterError", "GraphError", "RunError", "StablefiltError",
           "TrainingDiverged", *_PUBLIC]


def __getattr__(name: str):
    """Load a public name's module on first use, and keep the name here."""
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))
