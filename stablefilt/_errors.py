"""Exception types a user can trigger. The command line turns each into one
sentence on stderr and exit status 2."""


class StablefiltError(ValueError):
    """Base class: bad input named in one sentence."""


class GraphError(StablefiltError):
    """A graph or shift operator is malformed."""


class FilterError(StablefiltError):
    """Filter taps, basis or interval are malformed."""


class ConfigError(StablefiltError):
    """A configuration file or option is malformed."""


class RunError(StablefiltError):
    """A run directory is missing, incomplete or unreadable."""


class TrainingDiverged(RunError):
    """Training stopped on a non-finite loss or exploding parameters; the
    last good checkpoint is kept. The command line exits with status 1."""


class OverflowFigure(StablefiltError):
    """A certificate or figure does not fit in float64 (overflow, or a
    computation that broke down on numbers that large)."""
