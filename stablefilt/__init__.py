"""stablefilt: train graph filters and GNNs that stay stable under relative
perturbations of the graph, and certify how far their output can move.

The float64 numpy/scipy path certifies; the float32 JAX path trains.
"""

from ._certify import Certificate as Certificate
from ._certify import EpsBound as EpsBound
from ._certify import certify_filter as certify_filter
from ._config import Config as Config
from ._config import load_config as load_config
from ._config import parse_config as parse_config
from ._constants import bank_sup_norm as bank_sup_norm
from ._constants import integral_lipschitz as integral_lipschitz
from ._constants import kernel_bound as kernel_bound
from ._constants import lipschitz as lipschitz
from ._constants import pairwise_constant as pairwise_constant
from ._constants import spectral_grid as spectral_grid
from ._constants import sup_norm as sup_norm
from ._errors import ConfigError as ConfigError
from ._errors import FilterError as FilterError
from ._errors import GraphError as GraphError
from ._errors import RunError as RunError
from ._errors import StablefiltError as StablefiltError
from ._errors import TrainingDiverged as TrainingDiverged
from ._filterbounds import FilterConstants as FilterConstants
from ._filterbounds import filter_bounds as filter_bounds
from ._filterbounds import filter_constants as filter_constants
from ._filterbounds import remainder as remainder
from ._filters import Basis as Basis
from ._filters import basis_values as basis_values
from ._filters import frequency_response as frequency_response
from ._filters import make_basis as make_basis
from ._filters import response_derivative as response_derivative
from ._filters import run_filter as run_filter
from ._graph import KINDS as KINDS
from ._graph import ShiftOperator as ShiftOperator
from ._graph import from_edges as from_edges
from ._graph import reorder as reorder
from ._graph import shift_operator as shift_operator
from ._interval import SpectralInterval as SpectralInterval
from ._interval import spectral_interval as spectral_interval
from ._model import ModelSpec as ModelSpec
from ._model import forward as forward
from ._model import forward_np as forward_np
from ._model import init_params as init_params
from ._modelcert import ModelCertificate as ModelCertificate
from ._modelcert import certify_inputs as certify_inputs
from ._modelcert import certify_model as certify_model
from ._penalty import find_taps as find_taps
from ._penalty import model_penalty as model_penalty
from ._penalty import penalty as penalty
from ._penalty import stability_penalty as stability_penalty
from ._search import SearchResult as SearchResult
from ._search import lower_change as lower_change
from ._search import worst_perturbation as worst_perturbation
from ._sparse import JaxShift as JaxShift
from ._sparse import apply_filter as apply_filter
from ._sparse import jax_operator as jax_operator
from ._sparse import shift_product as shift_product
from ._train import open_run as open_run
from ._train import train as train

__version__ = "0.1.0"
