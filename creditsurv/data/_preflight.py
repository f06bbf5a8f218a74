"""The preflight: what the config names, checked against the opened inputs before any check or fit runs.

Problems visible in the YAML alone are raised when the config is read; these
need the data: every column the config names (in the table that is read for
it), every macro series the model needs (house-price series of every region,
the market rate), the status codes of the default definition against the
panel's codes, the reporting month against the panel, and the files a run
reads later. All are reported in one error, each naming the config key, the
file and the closest match.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..errors import DataError, did_you_mean, problem_list
from ..months import format_month
from ..sql import quote_ident

__all__ = ["preflight_problems", "raise_preflight", "same_month_panel_problem"]


def same_month_panel_problem(column: str) -> str:
    """Why a panel column cannot describe its own month, and the fix (the preflight and the feature spec say it alike)."""
    return (
        f"{column!r} is a panel column, a month-end value: in the month it describes it would reveal the month's "
        "outcome (a loan at 90 days past due at month end has defaulted in that month). Take the previous "
        "month-end's value with lag: 1"
    )


_DERIVED = ("current_ltv", "rate_incentive", "age", "log_age", "previously_defaulted")
"""Covariate columns the feature spec derives or the risk set carries (not read from a table)."""

_BOOK_COLUMNS = ("age", "balance", "days_past_due")
"""Panel columns the book at the reporting month carries beside the loan table's."""

_SHOWN = 20
"""Values listed at most in a message (status codes, regions)."""


def _listing(values) -> str:
    values = [str(v) for v in values]
    more = f", ... ({len(values) - _SHOWN} more)" if len(values) > _SHOWN else ""
    return ", ".join(values[:_SHOWN]) + more


def _uses(cfg, column: str) -> list[int]:
    """Indices of the covariates that read the derived ``column``."""
    return [i for i, c in enumerate(cfg.model.covariates) if c.column == column]


def _column_problems(cfg, engine, run: bool) -> list[str]:
    """Every column the config names, looked up in the table it is read from."""
    loans, panel = engine.columns("loans"), engine.columns("panel")
    loan_file, panel_file = engine.sources["loans"], engine.sources["panel"]
    in_loans = (f"is not in the loan table {loan_file}", loans, f"loan table: {_listing(loans)}")
    in_book = (f"is not in the loan table {loan_file} (nor one of {', '.join(_BOOK_COLUMNS)})",
               [*loans, *_BOOK_COLUMNS], in_loans[2])  # fmt: skip
    in_either = (
        f"is in neither the loan table {loan_file} nor the panel {panel_file}",
        [*loans, *panel, *_DERIVED],
        f"loan table: {_listing(loans)}; panel: {_listing(panel)}",
    )
    named = []
    if _uses(cfg, "current_ltv"):
        named.append(("collateral.region_column", cfg.collateral.region_column, in_loans))
    if run:
        named += [
            ("segments.column", cfg.segments.column, in_loans),
            ("segments.band_column", cfg.segments.band_column, in_book),
            ("staging.pd_at_origination_column", cfg.staging.pd_at_origination_column, in_loans),
            ("staging.watch_list_column", cfg.staging.watch_list_column, in_loans),
            ("staging.sicr_history_column", cfg.staging.sicr_history_column, in_loans),
        ]
    in_panel = (f"is not in the panel {panel_file}", panel, f"panel: {_listing(panel)}")
    covariates = list(enumerate(cfg.model.covariates))
    named += [(f"model.covariates[{i}].column", c.column, in_panel if c.lag else in_either) for i, c in covariates]
    named += [(f"model.covariates[{i}].before_first_column", c.before_first_column, in_loans) for i, c in covariates]
    problems = []
    for key, column, (where, allowed, listing) in named:
        if column is None or column in allowed:
            continue
        lag_hint = " (lag applies to macro series and panel columns)" if allowed is panel and column in [*loans, *_DERIVED] else ""
        problems.append(f"{key}: column {column!r} {where}{lag_hint}{did_you_mean(column, allowed)} ({listing})")
    for i, c in covariates:
        if c.column is not None and not c.lag and c.column in panel and c.column not in [*loans, *_DERIVED]:
            problems.append(f"model.covariates[{i}].column: " + same_month_panel_problem(c.column))
    return problems


def _series_problems(cfg, engine, hpi_series_name) -> list[str]:
    """Every macro series the model reads: macro covariates, house prices of every region, the market rate."""
    covariates = cfg.model.covariates
    macro_keys = [f"model.covariates[{i}].macro" for i, c in enumerate(covariates) if c.macro is not None]
    ltv = [f"model.covariates[{i}].column" for i in _uses(cfg, "current_ltv")]
    incentive = [f"model.covariates[{i}].column" for i in _uses(cfg, "rate_incentive")]
    if not engine.has_table("macro"):
        needs = [f"{k} (a macro series)" for k in macro_keys]
        needs += [f"{k} (current_ltv reads house prices)" for k in ltv]
        needs += [f"{k} (rate_incentive reads the market rate)" for k in incentive]
        return [f"{k}: needs the macro history, but inputs.macro is not set" for k in needs]
    macro_file = engine.sources["macro"]
    series = [c for c in engine.columns("macro") if c not in ("month", "month_idx")]
    problems = []
    template, region = cfg.collateral.hpi_series, cfg.collateral.region_column
    if ltv and not template:
        problems.append(f"collateral.hpi_series: not set, but {ltv[0]} (current_ltv) reads a house-price series")
    elif ltv and "{region}" not in template:
        problems.append(
            f"collateral.hpi_series: {template!r} has no '{{region}}'; {ltv[0]} (current_ltv) reads "
            "one house-price series per region, e.g. 'hpi_{region}'"
        )
    elif ltv and region in engine.columns("loans"):
        regions = engine.frame(f"SELECT DISTINCT {quote_ident(region)} AS r FROM loans WHERE {quote_ident(region)} IS NOT NULL")
        wanted = {str(r): hpi_series_name(template, r) for r in sorted(regions["r"].tolist(), key=str)}
        missing = {r: s for r, s in wanted.items() if s not in series}
        if missing:
            first = next(iter(missing.values()))
            problems.append(
                f"collateral.hpi_series: {template!r} names series that are not in the macro history {macro_file}: "
                f"{_listing(repr(s) for s in missing.values())} (for the values of loan-table column {region!r}: "
                f"{_listing(missing)}){did_you_mean(first, series)} (series: {_listing(series)})"
            )
    rate = cfg.collateral.market_rate_series
    if incentive and not rate:
        problems.append(f"collateral.market_rate_series: not set, but {incentive[0]} (rate_incentive) reads the market rate")
    elif incentive and rate not in series:
        problems.append(
            f"collateral.market_rate_series: series {rate!r} is not in the macro history {macro_file}"
            f"{did_you_mean(rate, series)} (series: {_listing(series)})"
        )
    return problems


def _status_problems(cfg, engine) -> list[str]:
    """Status codes of the default definition: the panel must have a status column, and a code is not a typo."""
    codes = list(cfg.default_definition.status_codes)
    if not codes:
        return []
    panel_file = engine.sources["panel"]
    if cfg.inputs.panel.columns.status is None:
        return [(
            f"default_definition.status_codes: {_listing(codes)} are given, but inputs.panel.columns.status is not set: "
            f"no row of the panel {panel_file} can carry a status"
        )]
    seen = engine.frame("SELECT DISTINCT status FROM panel_all WHERE status IS NOT NULL")["status"]
    seen = sorted(str(s) for s in seen)
    problems = []
    for code in codes:
        # A code the panel never shows may be one that simply has not happened yet; a code close
        # to one the panel does show is taken for a misspelling, which would silently drop defaults.
        hint = did_you_mean(code, seen)
        if code not in seen and hint:
            problems.append(
                f"default_definition.status_codes: {code!r} never occurs in the status column "
                f"({cfg.inputs.panel.columns.status!r}) of the panel {panel_file}{hint} (codes: {_listing(seen)})"
            )
    return problems


def _month_problems(cfg, engine) -> list[str]:
    """The reporting month against the panel's months."""
    (last,) = engine.frame("SELECT max(month_idx) AS last FROM panel_all")["last"].tolist()
    panel_file = engine.sources["panel"]
    as_of = int(cfg.as_of)
    if last is None or bool(pd.isna(last)):  # no rows, or NULL months only
        return [f"inputs.panel.path: {panel_file} has no rows with a readable month"]
    if int(last) < as_of:
        return [(
            f"as_of: {format_month(as_of)} is after the panel's last month {format_month(int(last))} "
            f"({panel_file}); the book at the reporting month would be empty"
        )]
    return []


def _file_problems(cfg, run: bool) -> list[str]:
    """Files and folders the config names that are read only later: the model, and a run's prior model and run."""
    named = []
    if cfg.model.source == "fitted" and cfg.model.path is not None:
        named.append(("model.path", cfg.model.path, "file"))
    if cfg.model.source == "table" and cfg.model.table is not None:
        named.append(("model.table", cfg.model.table, "file"))
    if run:
        named += [("validation.prior_model", cfg.validation.prior_model, "file"),
                  ("outputs.prior_run", cfg.outputs.prior_run, "run folder")]  # fmt: skip
    problems = []
    for key, path, what in named:
        if path is None:
            continue
        found = Path(path).is_dir() if what == "run folder" else Path(path).is_file()
        if not found:
            problems.append(f"{key}: no {what} {path}")
        elif what == "run folder":
            # The movement reads the prior run's record and loan table (runs.RUN_FILES_READ).
            lacking = [name for name in ("manifest.json", "loan_ecl.parquet") if not (Path(path) / name).is_file()]
            if lacking:
                problems.append(f"{key}: {path} is not a complete run folder (no {' or '.join(lacking)})")
    return problems


def preflight_problems(cfg, engine, *, hpi_series_name, run: bool = False) -> list[str]:
    """Every problem of the config against the opened inputs (empty when there is none).

    Parameters
    ----------
    cfg : Config
    engine : creditsurv.engines.Engine
        Opened, views built; no checks or events needed. Column names and the
        few values looked at (regions, status codes, the last month) are read
        through it, so either engine serves.
    hpi_series_name : callable(template, region) -> str
        The rule naming a region's house-price series (``creditsurv.model.hpi_series_name``).
    run : bool
        Also what only a run reads: segment and grade columns, the PD at
        origination column, the prior model and the prior run.

    Returns
    -------
    list of str
        Each problem starts with the config key at fault and names the file.
    """
    return [
        *_column_problems(cfg, engine, run),
        *_series_problems(cfg, engine, hpi_series_name),
        *_status_problems(cfg, engine),
        *_month_problems(cfg, engine),
        *_file_problems(cfg, run),
    ]


def raise_preflight(cfg, engine, *, hpi_series_name, run: bool = False) -> None:
    """Raise one ``DataError`` listing every :func:`preflight_problems`, if any."""
    problems = preflight_problems(cfg, engine, hpi_series_name=hpi_series_name, run=run)
    if problems:
        raise DataError(problem_list(problems, "the config against the input data"))
