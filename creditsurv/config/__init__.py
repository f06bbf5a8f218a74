"""Stage 1, the config: read the YAML once, check every key against one schema, hand frozen values inward.

Every problem visible in the YAML is raised here (:class:`~creditsurv.errors.ConfigError`),
all of them in one error, each with its key path and the closest valid choice.
"""

from ._config import (
    ACCOUNTING_BASES,
    DATA_CHECK_NAMES,
    Arrears,
    Baseline,
    Cecl,
    Checks,
    Collateral,
    Config,
    Covariate,
    DefaultDefinition,
    DuckdbSettings,
    Events,
    Exposure,
    FitSettings,
    Inputs,
    Lgd,
    LoanColumns,
    LoanSource,
    Loss,
    MacroColumns,
    MacroSource,
    ModelSpec,
    Outputs,
    PanelColumns,
    PanelSource,
    Scenario,
    ScenarioExtension,
    Segments,
    SparkSettings,
    Staging,
    ValidationSettings,
    Window,
    Windows,
    bin_labels,
    canonical_sha256,
    config_files,
    config_from_dict,
    config_sha256,
    config_to_dict,
    discount_method,
    load_config,
    read_yaml,
    schema_reference,
)
from ._context import RunContext, run_context
from ._weights import WEIGHTED, ScenarioWeights, weight_problems

__all__ = [
    "ACCOUNTING_BASES", "Cecl", "discount_method", "Arrears", "DATA_CHECK_NAMES", "WEIGHTED", "RunContext", "ScenarioWeights", "run_context", "weight_problems", "Baseline", "Checks", "Collateral", "Config", "Covariate", "DefaultDefinition", "DuckdbSettings",
    "Events", "FitSettings", "Inputs", "LoanColumns", "LoanSource", "Loss", "Lgd", "Exposure", "MacroColumns",
    "MacroSource", "ModelSpec", "Outputs", "PanelColumns", "PanelSource", "Scenario", "ScenarioExtension",
    "Segments", "SparkSettings", "Staging", "ValidationSettings", "Window", "Windows",
    "bin_labels", "canonical_sha256", "config_files", "config_from_dict", "config_sha256", "config_to_dict", "load_config", "read_yaml", "schema_reference",
]  # fmt: skip
