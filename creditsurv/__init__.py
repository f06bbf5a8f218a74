"""creditsurv: lifetime PD and ECL from loan-month panels with competing risks."""

from .config import Config, config_from_dict, load_config
from .errors import (
    ConfigError,
    CreditsurvError,
    CreditsurvWarning,
    DataCheckError,
    DataError,
)
from .version import __version__

__all__ = [
    "Config",
    "ConfigError",
    "CreditsurvError",
    "CreditsurvWarning",
    "DataCheckError",
    "DataError",
    "config_from_dict",
    "load_config",
    "__version__",
]
