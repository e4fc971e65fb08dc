"""stablefilt: train graph filters and GNNs that stay stable under relative
perturbations of the graph, and certify how far their output can move.

The float64 numpy/scipy path certifies; the float32 JAX path trains.
Perturbations, distances, searches, attacks and stress tests are in
:mod:`stablefilt.stress`.
"""

# The public API, grouped by concept rather than sorted by module.
# ruff: noqa: I001

from ._version import __version__ as __version__

# Errors.
from ._errors import ConfigError as ConfigError
from ._errors import FilterError as FilterError
from ._errors import GraphError as GraphError
from ._errors import RunError as RunError
from ._errors import StablefiltError as StablefiltError
from ._errors import TrainingDiverged as TrainingDiverged

# Shift operators and their spectral intervals.
from ._graph import KINDS as KINDS
from ._graph import ShiftOperator as ShiftOperator
from ._graph import from_edges as from_edges
from ._graph import reorder as reorder
from ._graph import shift_operator as shift_operator
from ._interval import SpectralInterval as SpectralInterval
from ._interval import spectral_interval as spectral_interval
from ._sparse import JaxShift as JaxShift
from ._sparse import apply_filter as apply_filter
from ._sparse import jax_operator as jax_operator

# Bases and filters.
from ._filters import Basis as Basis
from ._filters import frequency_response as frequency_response
from ._filters import make_basis as make_basis
from ._filters import response_derivative as response_derivative
from ._filters import run_filter as run_filter

# Filter certificates.
from ._certify import Certificate as Certificate
from ._certify import EpsBound as EpsBound
from ._certify import certify_filter as certify_filter
from ._filterbounds import FilterBound as FilterBound
from ._filterbounds import FilterConstants as FilterConstants
from ._filterbounds import filter_bounds as filter_bounds
from ._filterbounds import filter_constants as filter_constants

# The model and its certificates.
from ._model import ModelSpec as ModelSpec
from ._model import forward as forward
from ._model import forward_np as forward_np
from ._model import init_params as init_params
from ._modelcert import LayerBound as LayerBound
from ._modelcert import LayerConstants as LayerConstants
from ._modelcert import ModelCertificate as ModelCertificate
from ._modelcert import ModelConstants as ModelConstants
from ._modelcert import ModelEpsBound as ModelEpsBound
from ._modelcert import certify_inputs as certify_inputs
from ._modelcert import certify_model as certify_model
from ._modelcert import model_bounds as model_bounds
from ._modelcert import model_constants as model_constants
from ._usercert import certify_layers as certify_layers

# Penalties (grid constants in JAX, the pluggable penalty, the optax transformation).
from ._constants import bank_sup_norm as bank_sup_norm
from ._constants import integral_lipschitz as integral_lipschitz
from ._constants import kernel_bound as kernel_bound
from ._constants import lipschitz as lipschitz
from ._constants import pairwise_constant as pairwise_constant
from ._constants import spectral_grid as spectral_grid
from ._constants import sup_norm as sup_norm
from ._certpenalty import CertifiedSetup as CertifiedSetup
from ._certpenalty import certified_penalty as certified_penalty
from ._certpenalty import certified_setup as certified_setup
from ._penalty import find_taps as find_taps
from ._penalty import model_penalty as model_penalty
from ._penalty import penalty as penalty
from ._penalty import stability_penalty as stability_penalty

# Configs, training and runs.
from ._config import Config as Config
from ._config import load_config as load_config
from ._config import parse_config as parse_config
from ._runcert import RunCertificate as RunCertificate
from ._runcert import certify_run as certify_run
from ._runs import Run as Run
from ._runs import compare_rows as compare_rows
from ._runs import open_run as open_run
from ._train import train as train

# Several devices: the graph's nodes split over devices (docs/devices.md).
from ._partition import HaloPlan as HaloPlan
from ._partition import halo_plan as halo_plan
from ._partition import node_parts as node_parts
from ._partition import partition_plan as partition_plan
from ._sharded import ShardedShift as ShardedShift
from ._sharded import node_mesh as node_mesh
from ._sharded import sharded_filter as sharded_filter
from ._sharded import sharded_forward as sharded_forward
from ._sharded import sharded_operator as sharded_operator
from ._sharded import sharded_product as sharded_product
