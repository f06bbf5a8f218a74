"""creditsurv: lifetime PD and ECL from loan-month panels, with prepayment as a competing risk.

The public API, what the command line calls::

    import creditsurv

    cfg = creditsurv.load_config("configs/demo.yaml")
    print(creditsurv.check(cfg).text)            # the data checks
    result = creditsurv.run(cfg, as_of="2024-11") # the monthly job, one new run folder
    creditsurv.reproduce(result.path)            # re-run it from its record and compare
    creditsurv.export(result.path, by=[("segment", "band")])  # lifetime PD tables by segment and band

Each command takes a config path or a :class:`Config` and returns an
:class:`Outcome` (text, failed, path). The stages are packages with public
names of their own (``creditsurv.engines``, ``creditsurv.model``,
``creditsurv.forecast``, ``creditsurv.loss``, ``creditsurv.validation``,
``creditsurv.runs``); their results types are re-exported here.
"""

from .config import Config, config_from_dict, load_config
from .errors import (
    ConfigError,
    ConvergenceError,
    ConvergenceWarning,
    CreditsurvError,
    CreditsurvWarning,
    DataCheckError,
    DataCheckWarning,
    DataError,
    EngineError,
    FeatureError,
    FewEventsWarning,
    ModelError,
    OutputError,
    ProjectionError,
    ReproduceMismatch,
    RunError,
    SeparationError,
    SimulationError,
    SingularDesignError,
    StaleRunWarning,
    UsageError,
)
from .loss import EclResult
from .model import HazardResults
from .pipeline import Outcome, check, compare, export, fit, reproduce, run
from .runs import MovementResult
from .validation import ValidationPack
from .version import __version__

__all__ = [
    "Config",
    "ConfigError",
    "ConvergenceError",
    "ConvergenceWarning",
    "CreditsurvError",
    "CreditsurvWarning",
    "DataCheckError",
    "DataCheckWarning",
    "DataError",
    "EclResult",
    "EngineError",
    "FeatureError",
    "FewEventsWarning",
    "HazardResults",
    "ModelError",
    "MovementResult",
    "Outcome",
    "OutputError",
    "ProjectionError",
    "ReproduceMismatch",
    "RunError",
    "SeparationError",
    "SimulationError",
    "SingularDesignError",
    "StaleRunWarning",
    "UsageError",
    "ValidationPack",
    "check",
    "compare",
    "export",
    "config_from_dict",
    "fit",
    "load_config",
    "reproduce",
    "run",
    "__version__",
]
