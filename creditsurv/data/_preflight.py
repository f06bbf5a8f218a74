"""The preflight: what the config names, checked against the opened inputs before any check or fit runs.

Problems visible in the YAML alone are raised when the config is read; these
need the data: the columns the config names and the reporting month against
the panel. All are reported in one error.
"""

from __future__ import annotations

import pandas as pd

from ..errors import DataError, did_you_mean, problem_list
from ..months import format_month

__all__ = ["preflight_problems", "raise_preflight"]


def _named_columns(cfg, run: bool) -> list[tuple[str, str]]:
    """``(config key, column)`` of every loan-table or panel column the config names (a run's segments too)."""
    named = [("collateral.region_column", cfg.collateral.region_column if _uses_region(cfg) else None)]
    if run:
        named += [("segments.column", cfg.segments.column), ("segments.band_column", cfg.segments.band_column)]
    named += [(f"model.covariates[{i}].column", c.column) for i, c in enumerate(cfg.model.covariates)]
    return [(key, col) for key, col in named if col]


def _uses_region(cfg) -> bool:
    return any(c.column == "current_ltv" for c in cfg.model.covariates)


_DERIVED = ("current_ltv", "rate_incentive", "age", "log_age")


def preflight_problems(cfg, engine, *, run: bool = False) -> list[str]:
    """Every problem of the config against the opened inputs (empty when there is none).

    Parameters
    ----------
    cfg : Config
    engine : creditsurv.engines.Engine
        Opened, views built; no checks or events needed.
    run : bool
        Also the columns only a run reads (segments and score bands).
    """
    problems = []
    loans, panel = engine.columns("loans"), engine.columns("panel")
    available = sorted(set(loans) | set(panel))
    for key, column in _named_columns(cfg, run):
        if column in _DERIVED or column in loans or column in panel:
            continue
        problems.append(
            f"{key}: column {column!r} is in neither the loan table nor the panel"
            f"{did_you_mean(column, available)} (loan table: {', '.join(loans)})"
        )
    (last,) = engine.frame("SELECT max(month_idx) AS last FROM panel_all")["last"].tolist()
    as_of = int(cfg.as_of)
    if last is None or bool(pd.isna(last)):  # no rows, or NULL months only
        problems.append(f"inputs.panel.path: {cfg.inputs.panel.path} has no rows with a readable month")
    elif int(last) < as_of:
        problems.append(
            f"as_of: {format_month(as_of)} is after the panel's last month {format_month(int(last))}; "
            "the book at the reporting month would be empty"
        )
    return problems


def raise_preflight(cfg, engine, *, run: bool = False) -> None:
    """Raise one ``DataError`` listing every :func:`preflight_problems`, if any."""
    problems = preflight_problems(cfg, engine, run=run)
    if problems:
        raise DataError(problem_list(problems, "the config against the input data"))
