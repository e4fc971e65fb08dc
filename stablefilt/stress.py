"""Hold certificates against real and adversarial changes of the graph:
seeded perturbations of a shift operator, distances between two graphs, the
worst-perturbation search for a filter, the adversarial attack on a model,
and the stress test of a trained run.
"""

from ._attack import AttackResult as AttackResult
from ._attack import attack as attack
from ._distance import Distance as Distance
from ._distance import distance as distance
from ._distance import misalignment as misalignment
from ._perturb import Perturbed as Perturbed
from ._perturb import additive as additive
from ._perturb import delete as delete
from ._perturb import diagonal as diagonal
from ._perturb import jitter as jitter
from ._perturb import relabel as relabel
from ._perturb import relative as relative
from ._perturb import relative_product as relative_product
from ._perturb import rewire as rewire
from ._perturb import scaling as scaling
from ._search import SearchResult as SearchResult
from ._search import worst_perturbation as worst_perturbation
from ._stress import StressRow as StressRow
from ._stress import stress_run as stress_run
