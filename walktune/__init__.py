"""walktune: tune random-walk Metropolis samplers from the geometry of the target.

Point it at a Python log-density; it runs short pilot chains, analyses the
geometry of the posterior, advises a proposal, proves the gain by fixed-proposal
re-runs, and exports the tuned proposal covariance. It also diagnoses chains
from any sampler.

Diagnostics can show that chains have not converged; they can never prove that
they have. A pilot can miss modes. Confirm results with independent runs.
"""

from . import diagnostics
from .checkpoint import Checkpoint, Interrupted
from .engine import Chains, sample
from .errors import SamplingError, TargetError, WalktuneError
from .inspection import InspectionResult, inspect
from .reparam import SamplingMap, load_sampling_map
from .tune import TuneResult, tune

__version__ = "0.1.0"

__all__ = [
    "Chains",
    "Checkpoint",
    "Interrupted",
    "InspectionResult",
    "SamplingMap",
    "SamplingError",
    "TargetError",
    "TuneResult",
    "WalktuneError",
    "diagnostics",
    "inspect",
    "load_sampling_map",
    "sample",
    "tune",
    "__version__",
]
