"""stablefilt: train graph filters and GNNs that stay stable under relative
perturbations of the graph, and certify how far their output can move.

The float64 numpy/scipy path certifies; the float32 JAX path trains.
"""

from ._certify import Certificate as Certificate
from ._certify import EpsBound as EpsBound
from ._certify import FilterConstants as FilterConstants
from ._certify import certify_filter as certify_filter
from ._certify import filter_bounds as filter_bounds
from ._certify import filter_constants as filter_constants
from ._certify import lower_change as lower_change
from ._certify import remainder as remainder
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
from ._sparse import JaxShift as JaxShift
from ._sparse import apply_filter as apply_filter
from ._sparse import jax_operator as jax_operator
from ._sparse import shift_product as shift_product

__version__ = "0.1.0"
