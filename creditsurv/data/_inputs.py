"""What the inputs must hold: the internal column names, the configured sources and their column mapping.

Both engines register the input files their own way; finding every mapped
column and every macro series the model uses, and reporting all problems in
one error, is written once here.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from ..config import Config
from ..errors import DataError, did_you_mean, problem_list
from ..sql import quote_ident

__all__ = [
    "LOAN_COLUMNS", "MACRO_COLUMNS", "PANEL_COLUMNS", "Source", "file_format", "input_sources",
    "macro_series_used", "passthrough_columns", "problem_text", "resolve_inputs",
]  # fmt: skip


PANEL_COLUMNS = ("loan_id", "month", "month_idx", "age", "balance", "days_past_due", "status")


LOAN_COLUMNS = (
    "loan_id", "origination_month", "origination_idx", "original_balance",
    "note_rate", "term", "property_value",
)


MACRO_COLUMNS = ("month", "month_idx")


@dataclasses.dataclass
class Source:
    """One registered input: where it is and how its columns map."""

    name: str  # internal table name: panel, loans, macro
    key: str  # config key of the source: inputs.panel
    path: Path
    raw_view: str  # view over the file, source column names
    types: dict[str, str]  # source column -> DuckDB type
    mapping: dict[str, str | None]  # internal column -> source column (None: unmapped)

    def label(self, internal: str) -> str:
        src = self.mapping.get(internal)
        return internal if src is None or src == internal else f"{internal} ({src})"


def file_format(source) -> str:
    if source.format != "auto":
        return source.format
    return {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".duckdb": "duckdb", ".db": "duckdb"}[
        source.path.suffix.lower()
    ]




def _resolve_columns(src: Source, wanted: dict[str, str | None], problems: list[str]) -> None:
    """Fill ``src.mapping``; record a problem for each mapped column not in the source."""
    available = list(src.types)
    lowered = {c.lower(): c for c in available}
    for internal, column in wanted.items():
        if column is None:
            src.mapping[internal] = None
            continue
        if column in src.types:
            src.mapping[internal] = column
        elif column.lower() in lowered:  # DuckDB resolves names without regard to case
            src.mapping[internal] = lowered[column.lower()]
        else:
            problems.append(
                f"{src.path}: {src.key}.columns.{internal}: column {column!r} not found"
                f"{did_you_mean(column, available)} (available: {', '.join(available)})"
            )


def passthrough_columns(src: Source, internal_names, problems: list[str]) -> list[str]:
    """Quoted source columns that are not mapped; a clash with an internal name is a problem."""
    mapped = {c for c in src.mapping.values() if c is not None}
    reserved = {n.lower() for n in internal_names}
    out = []
    for column in src.types:
        if column in mapped:
            continue
        if column.lower() in reserved:
            problems.append(
                f"{src.path}: unmapped column {column!r} has the name of an internal {src.name} column; "
                f"map it in {src.key}.columns.{column.lower()} or rename it in the source"
            )
            continue
        out.append(quote_ident(column))
    return out


def macro_series_used(cfg: Config) -> list[tuple[str, str, int]]:
    """``(config key, series, lag)`` for every macro covariate of the model."""
    return [
        (f"model.covariates[{i}].macro", c.macro, c.lag)
        for i, c in enumerate(cfg.model.covariates)
        if c.macro is not None
    ]


def input_sources(cfg) -> list[tuple[str, str, object]]:
    """``(view name, config key, source config)`` of every configured input."""
    inputs = [("panel", "inputs.panel", cfg.inputs.panel), ("loans", "inputs.loans", cfg.inputs.loans)]
    if cfg.inputs.macro is not None:
        inputs.append(("macro", "inputs.macro", cfg.inputs.macro))
    return inputs


def resolve_inputs(cfg, inputs, sources) -> None:
    """Find every mapped column and every macro series the model uses; raise all problems at once.

    Shared by both engines: only the registration of the files differs.
    """
    problems: list[str] = []
    for name, _key, source in inputs:
        wanted = {f.name: getattr(source.columns, f.name) for f in dataclasses.fields(source.columns)}
        _resolve_columns(sources[name], wanted, problems)
    if "macro" in sources:
        series = set(sources["macro"].types) - {sources["macro"].mapping.get("month")}
        for key, name, _lag in macro_series_used(cfg):
            if name not in series:
                problems.append(
                    f"{sources['macro'].path}: {key}: macro series {name!r} not found"
                    f"{did_you_mean(name, sorted(series))} (series: {', '.join(sorted(series))})"
                )
    if problems:
        raise DataError(problem_text(problems))


def problem_text(problems: list[str]) -> str:
    """The error text listing every problem found in the input data."""
    return problem_list(problems, "the input data")
