"""Stage 3, the model: features, the exact hazard fit and its results, and the other hazard sources.

Every hazard source (a fitted model, PSA/SDA benchmark curves, a table of
hazards by age) answers the same two questions: which inputs it needs per
loan-month (``required_inputs``) and the monthly default and prepayment
probabilities for them (``hazards(raw)``).
"""

from ._cells import (
    FIT_BLOCK_ROWS,
    FIT_GROUP_BLOCKS,
    N_CODES,
    CellBlock,
    CellDesign,
    FirstPass,
    FirstSums,
    PassSums,
    block_first_sums,
    block_sums,
    cell_design,
    fit_fingerprint,
)
from ._features import (
    FeatureSpec,
    InputGrid,
    RawInput,
    feature_spec,
    natural_spline_basis,
)
from ._hazard import (
    CAUSES,
    MULTI_STATE_FORMAT,
    TRUST_LIMITS,
    HazardResults,
    check_fit_arguments,
    fit_from_sums,
    fit_hazard,
    fit_model,
    fit_outcomes,
    loosened_limits,
    raw_design_sql,
    read_model_file,
    resolve_collapse,
    results_from_dict,
)
from ._multistate import DESIGNS, MultiStateResults, fit_multi_state, state_codes
from ._names import (
    hpi_series_name,
    macro_key,
    panel_key,
    parse_macro_key,
    parse_panel_key,
)
from ._schedule import scheduled_balance, scheduled_balance_sql
from ._source import (
    HazardSource,
    development_window,
    hazard_source,
    load_model,
    with_age_tail,
)
from ._speeds import (
    BenchmarkCurves,
    HazardTable,
    cdr_to_mdr,
    cpr_to_smm,
    equivalent_psa,
    equivalent_sda,
    mdr_to_cdr,
    psa_cpr,
    sda_cdr,
    smm_to_cpr,
    speeds_to_hazards,
)
from ._workers import ProcessPool, can_fork, chunk_map, ordered_map, worth_forking

__all__ = [
    "DESIGNS", "MULTI_STATE_FORMAT", "MultiStateResults", "N_CODES", "fit_multi_state", "fit_outcomes", "read_model_file", "results_from_dict",
    "state_codes", "BenchmarkCurves", "CAUSES", "TRUST_LIMITS", "FeatureSpec", "InputGrid", "HazardSource", "FirstPass", "block_first_sums", "block_sums", "check_fit_arguments",
    "development_window", "fit_fingerprint", "fit_from_sums", "hazard_source", "hpi_series_name", "with_age_tail", "macro_key", "panel_key", "parse_macro_key", "parse_panel_key", "scheduled_balance", "scheduled_balance_sql", "raw_design_sql", "resolve_collapse", "HazardResults", "HazardTable", "RawInput",
    "cdr_to_mdr", "cpr_to_smm", "equivalent_psa", "equivalent_sda", "feature_spec", "fit_hazard", "fit_model",
    "CellBlock", "CellDesign", "FIT_BLOCK_ROWS", "FirstSums", "PassSums", "cell_design", "ordered_map", "can_fork", "chunk_map", "ProcessPool", "FIT_GROUP_BLOCKS", "worth_forking",
    "load_model", "loosened_limits", "mdr_to_cdr", "natural_spline_basis", "psa_cpr", "sda_cdr", "smm_to_cpr", "speeds_to_hazards",
]  # fmt: skip
