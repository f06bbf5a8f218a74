"""Stage 4, the forecast: scenario paths, projection of every live loan, curves, speeds, segment tables."""

from ._chain import ChainResult, chain_of_moves, markov_chain
from ._projection import (
    CHUNK_SIZE,
    WEIGHTED,
    ChunkProjection,
    Curves,
    MacroLookup,
    MixedCurves,
    ProjectionResult,
    SegmentSums,
    TableWriter,
    band_codes,
    band_labels,
    band_order,
    check_coverage,
    loan_list_text,
    origination_pd,
    panel_history_columns,
    panel_history_name,
    project_loans,
    remaining_term,
    repeat_ids,
    scenario_column,
    scenario_weights,
    segment_level,
    segment_pd_tables,
    segment_speeds,
    sort_with_bands,
    speeds_frames,
    term_structure_frame,
    with_panel_history,
    worker_count,
)
from ._scenarios import (
    extend_path,
    extend_paths,
    load_scenario_paths,
    origination_path,
    prepare_paths,
)

__all__ = [
    "CHUNK_SIZE", "ChainResult", "chain_of_moves", "markov_chain", "origination_path", "WEIGHTED", "ChunkProjection", "Curves", "MacroLookup", "MixedCurves", "ProjectionResult", "SegmentSums", "TableWriter", "check_coverage",
    "extend_path", "extend_paths", "load_scenario_paths", "loan_list_text", "origination_pd", "panel_history_columns", "panel_history_name", "prepare_paths", "with_panel_history", "project_loans", "remaining_term",
    "repeat_ids", "scenario_column", "scenario_weights", "band_codes", "band_labels", "band_order", "sort_with_bands",
    "segment_level", "segment_pd_tables", "segment_speeds", "speeds_frames", "term_structure_frame",
    "worker_count",
]  # fmt: skip
