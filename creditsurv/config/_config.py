"""The run configuration: one YAML file, one declared schema, frozen values.

``load_config(path)`` reads the YAML with ``yaml.safe_load`` semantics (plus a
duplicate-key check), validates every key against the dataclasses below,
resolves file paths against the config file's folder and fills the documented
defaults. Every problem is reported in one ``ConfigError`` whose lines name the
key path (``model.covariates[2].transform``), what is wrong, and the closest
valid choice.

The dataclasses are the schema: each field's type says how its value is read
and its metadata says what it means (``doc``) and which bounds apply.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import yaml

from ..errors import ConfigError, did_you_mean, problem_list
from ..months import format_month
from ._schema import FilePath, Month, build, describe, is_key
from ._weights import weight_problems

__all__ = [
    "ACCOUNTING_BASES",
    "Cecl",
    "Config",
    "discount_method",
    "load_config",
    "config_from_dict",
    "config_to_dict",
    "config_sha256",
    "schema_reference",
]


def _doc(text: str, **more) -> dict:
    return {"doc": text, **more}


def _unique(values) -> str | None:
    seen, dupes = set(), []
    for v in values:
        if v in seen:
            dupes.append(v)
        seen.add(v)
    return f"repeated entries: {', '.join(map(str, dupes))}" if dupes else None


def _increasing(values) -> str | None:
    if any(b <= a for a, b in zip(values, values[1:])):
        return f"must be strictly increasing, got {list(values)}"
    return None


def _currency_code(value) -> str | None:
    if value is not None and not (len(value) == 3 and value.isascii() and value.isalpha() and value.isupper()):
        return f"must be a three-letter currency code in capitals (ISO 4217), e.g. GBP, USD or EUR; got {value!r}"
    return None


# --------------------------------------------------------------------------- inputs

InputFormat = Literal["auto", "parquet", "csv", "duckdb"]


@dataclass(frozen=True)
class PanelColumns:
    """Source column for each internal panel column (internal name: source name)."""

    loan_id: str = field(default="loan_id", metadata=_doc("loan identifier"))
    month: str = field(default="month", metadata=_doc("calendar month (date or YYYY-MM text)"))
    age: str = field(default="age", metadata=_doc("months since origination; 1 in the month after"))
    balance: str = field(default="balance", metadata=_doc("outstanding balance at month end"))
    days_past_due: str = field(default="days_past_due", metadata=_doc("days past due at month end"))
    status: str | None = field(default=None, metadata=_doc("optional status code column"))


@dataclass(frozen=True)
class LoanColumns:
    """Source column for each internal loan-table column."""

    loan_id: str = field(default="loan_id", metadata=_doc("loan identifier"))
    origination_month: str = field(default="origination_month", metadata=_doc("month of origination"))
    original_balance: str = field(default="original_balance", metadata=_doc("balance at origination"))
    note_rate: str = field(default="note_rate", metadata=_doc("annual note rate, the effective interest rate"))
    term: str = field(default="term", metadata=_doc("contractual term in months"))
    property_value: str | None = field(default=None, metadata=_doc("collateral value at origination"))


@dataclass(frozen=True)
class MacroColumns:
    """Source column of the macro history's month; every other column is a series."""

    month: str = field(default="month", metadata=_doc("calendar month (date or YYYY-MM text)"))


def _source_check(obj) -> list[str]:
    problems = []
    fmt = obj.format
    if fmt == "auto":
        suffix = obj.path.suffix.lower()
        fmt = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".duckdb": "duckdb", ".db": "duckdb"}.get(suffix)
        if fmt is None:
            problems.append(
                f"path: cannot tell the format of {obj.path.name!r} from its suffix; "
                "set format to parquet, csv or duckdb"
            )
    if fmt == "duckdb" and not obj.table:
        problems.append("table: required when the source is a DuckDB database file")
    if fmt not in (None, "duckdb") and obj.table:
        problems.append("table: only used with a DuckDB database file; remove it")
    return problems


@dataclass(frozen=True)
class PanelSource:
    """The loan-month performance panel."""

    path: FilePath = field(metadata=_doc("Parquet or CSV file (glob allowed), or a DuckDB database file"))
    format: InputFormat = field(default="auto", metadata=_doc("file format; auto reads the suffix"))
    table: str | None = field(default=None, metadata=_doc("table name inside a DuckDB database file"))
    columns: PanelColumns = field(default_factory=PanelColumns, metadata=_doc("column mapping"))

    _validate = _source_check


@dataclass(frozen=True)
class LoanSource:
    """The loan table: one row per loan with static facts."""

    path: FilePath = field(metadata=_doc("Parquet or CSV file, or a DuckDB database file"))
    format: InputFormat = field(default="auto", metadata=_doc("file format; auto reads the suffix"))
    table: str | None = field(default=None, metadata=_doc("table name inside a DuckDB database file"))
    columns: LoanColumns = field(default_factory=LoanColumns, metadata=_doc("column mapping"))
    rate_unit: Literal["percent", "decimal"] = field(
        default="percent", metadata=_doc("unit of the note rate: 4.25 (percent) or 0.0425 (decimal)")
    )

    _validate = _source_check


@dataclass(frozen=True)
class MacroSource:
    """Macro-economic history: one row per month, one column per series."""

    path: FilePath = field(metadata=_doc("Parquet or CSV file, or a DuckDB database file"))
    format: InputFormat = field(default="auto", metadata=_doc("file format; auto reads the suffix"))
    table: str | None = field(default=None, metadata=_doc("table name inside a DuckDB database file"))
    columns: MacroColumns = field(default_factory=MacroColumns, metadata=_doc("column mapping"))

    _validate = _source_check


@dataclass(frozen=True)
class Inputs:
    panel: PanelSource = field(metadata=_doc("loan-month panel"))
    loans: LoanSource = field(metadata=_doc("loan table"))
    macro: MacroSource | None = field(default=None, metadata=_doc("macro history"))


# --------------------------------------------------------------------------- events


@dataclass(frozen=True)
class DefaultDefinition:
    """When a loan is in default: days past due at or above a threshold, or a status code."""

    days_past_due: int | None = field(default=90, metadata=_doc("threshold in days past due", min=1))
    status_codes: tuple[str, ...] = field(default=(), metadata=_doc("status codes that mean default"))
    cure_months: int | None = field(
        default=None,
        metadata=_doc(
            "months in a row meeting no default condition before a defaulted loan is cured: it leaves stage 3 and "
            "is at risk again, flagged previously_defaulted (common practice 3); empty: default is absorbing",
            min=1,
        ),
    )

    def _validate(self) -> list[str]:
        if self.days_past_due is None and not self.status_codes:
            return ["give days_past_due, status_codes, or both"]
        return []


@dataclass(frozen=True)
class Events:
    """How closures are read from the panel."""

    paid_off_balance: float = field(
        default=0.005, metadata=_doc("balance at or below which a loan counts as paid off", min=0.0)
    )


@dataclass(frozen=True)
class Arrears:
    """The arrears states a loan moves between before default: current, then one state per start."""

    starts: tuple[int, ...] = field(
        default=(30, 60),
        metadata=_doc(
            "days past due at which each arrears state starts (current below the first; default at the "
            "default definition); [] for current only",
            min=1,
        ),
    )

    def _validate(self) -> list[str]:
        starts = list(self.starts)
        if any(b <= a for a, b in zip(starts, starts[1:])):
            return [f"starts: must increase strictly, got {starts}"]
        if len(starts) > MAX_ARREARS_STATES:
            return [f"starts: at most {MAX_ARREARS_STATES} arrears states, got {len(starts)}"]
        return []

    def labels(self, default_days_past_due: int | None) -> tuple[str, ...]:
        """Names of the states before default: ``current``, then ``30-59``, ``60-89`` (or ``60+`` with no threshold)."""
        bounds = [*self.starts[1:], default_days_past_due]
        out = ["current"]
        for start, end in zip(self.starts, bounds):
            out.append(f"{start}+" if end is None else f"{start}" if end - 1 == start else f"{start}-{end - 1}")
        return tuple(out)


MAX_ARREARS_STATES = 8
"""At most this many arrears states besides current."""


@dataclass(frozen=True)
class Window:
    start: Month = field(metadata=_doc("first calendar month, YYYY-MM"))
    end: Month = field(metadata=_doc("last calendar month, YYYY-MM"))

    def _validate(self) -> list[str]:
        if self.end < self.start:
            return [f"end {self.end} is before start {self.start}"]
        return []


@dataclass(frozen=True)
class Windows:
    development: Window = field(metadata=_doc("months whose loan-months the model is fitted on"))
    out_of_time: Window | None = field(default=None, metadata=_doc("months held out for the backtest"))
    fit_on: Literal["development", "development_and_out_of_time"] = field(
        default="development",
        metadata=_doc(
            "the months the model is fitted on; development_and_out_of_time once validated (the out-of-time "
            "results are then in-sample)"
        ),
    )


# --------------------------------------------------------------------------- model


@dataclass(frozen=True)
class Baseline:
    """The loan-age baseline of each cause's hazard."""

    kind: Literal["age_bands", "spline", "age_indicators", "none"] = field(
        default="age_bands", metadata=_doc("piecewise constant, natural cubic spline, one indicator per age, or none")
    )
    edges: tuple[int, ...] = field(
        default=(3, 6, 12, 24, 36, 48, 60, 84, 120),
        metadata=_doc("age_bands: ages where a new band starts", min=1, check=_increasing),
    )
    knots: tuple[float, ...] = field(
        default=(6.0, 18.0, 36.0, 60.0, 120.0),
        metadata=_doc("spline: knots in months of age (first and last are boundary knots)", gt=0, check=_increasing),
    )
    max_age: int | None = field(
        default=None, metadata=_doc("age_indicators: ages above this share the last indicator", min=1)
    )
    tail: Literal["hold", "extrapolate"] = field(
        default="hold",
        metadata=_doc(
            "ages the development data barely cover: hold (project them at the last supported age) or extrapolate "
            "(let the baseline run on, e.g. a spline linear beyond its last knot)"
        ),
    )
    tail_min_loan_months: int = field(
        default=1000,
        metadata=_doc("the supported ages: those up to the last with at least this many development loan-months (common practice)", min=1),
    )


def bin_labels(cuts) -> list[str]:
    """Labels of the bins that inner cut points make: ``<a``, ``[a,b)``, ..., ``>=z`` (the closed side stated)."""
    c = [float(x) for x in cuts]
    labels = [f"<{c[0]:g}"]
    labels += [f"[{lo:g},{hi:g})" for lo, hi in zip(c, c[1:])]
    labels.append(f">={c[-1]:g}")
    return labels


@dataclass(frozen=True)
class Covariate:
    """One term of the design: a column or macro series, transformed."""

    name: str = field(metadata=_doc("name of the term in the model"))
    column: str | None = field(default=None, metadata=_doc("panel, loan-table or derived column"))
    macro: str | None = field(default=None, metadata=_doc("macro series, joined by calendar month"))
    lag: int = field(
        default=0,
        metadata=_doc(
            "months before the row's month: a macro series (0 = that month), or a panel column (1 or more: the "
            "previous month-end's value; a month-end value would reveal the month's outcome)",
            min=0,
        ),
    )
    kind: Literal["numeric", "categorical", "bins"] = field(default="numeric", metadata=_doc("how the value enters"))
    transform: Literal["none", "log", "standardise"] = field(default="none", metadata=_doc("numeric transform"))
    floor: float | None = field(default=None, metadata=_doc("values below are raised to this (before transform)"))
    cap: float | None = field(default=None, metadata=_doc("values above are lowered to this (before transform)"))
    bins: tuple[float, ...] = field(default=(), metadata=_doc("bins: inner cut points", check=_increasing))
    reference: str | None = field(default=None, metadata=_doc("categorical or bins: reference level"))
    before_first: float | None = field(
        default=None,
        metadata=_doc(
            "panel column: the value where a loan has no panel row lag months earlier (its first months on book, "
            "and the origination view), e.g. 0 for days past due; unset, such months are an error"
        ),
    )
    before_first_column: str | None = field(
        default=None,
        metadata=_doc(
            "panel column: a loan-table column giving each loan's value where it has no panel row lag months "
            "earlier, e.g. the credit score at origination for a refreshed score (instead of before_first)"
        ),
    )
    projection: Literal["hold", "revert"] = field(
        default="hold",
        metadata=_doc("panel column: months ahead keep the last value (hold) or move to revert_to (revert)"),
    )
    revert_to: float | None = field(default=None, metadata=_doc("projection revert: the value reached"))
    revert_months: int = field(default=12, metadata=_doc("projection revert: months to reach it, in a straight line", min=1))

    def _validate(self) -> list[str]:
        problems = []
        if (self.column is None) == (self.macro is None):
            problems.append(f"covariate {self.name!r}: give exactly one of column or macro")
        panel_only = (self.before_first, self.before_first_column, self.revert_to)
        if self.macro is not None and (any(v is not None for v in panel_only) or self.projection != "hold"):
            problems.append(
                f"covariate {self.name!r}: before_first, before_first_column, projection and revert_to apply to panel "
                "columns, not macro series"
            )
        if self.before_first is not None and self.before_first_column is not None:
            problems.append(f"covariate {self.name!r}: give before_first or before_first_column, not both")
        if self.projection == "revert" and self.revert_to is None:
            problems.append(f"covariate {self.name!r}: projection revert needs revert_to: the value to move to")
        if self.projection != "revert" and self.revert_to is not None:
            problems.append(f"covariate {self.name!r}: revert_to given but projection is {self.projection}; set projection: revert")
        if self.kind == "bins" and not self.bins:
            problems.append(f"covariate {self.name!r}: kind bins needs bins: [cut points]")
        if self.kind != "bins" and self.bins:
            problems.append(f"covariate {self.name!r}: bins given but kind is {self.kind}; set kind: bins")
        if self.kind == "categorical" and self.transform != "none":
            problems.append(f"covariate {self.name!r}: a categorical covariate takes no transform")
        if self.kind == "numeric" and self.reference is not None:
            problems.append(f"covariate {self.name!r}: reference applies to categorical or bins")
        if self.floor is not None and self.cap is not None and self.cap < self.floor:
            problems.append(f"covariate {self.name!r}: cap {self.cap} is below floor {self.floor}")
        if self.kind == "bins" and self.bins and self.reference is not None and self.reference not in bin_labels(self.bins):
            labels = bin_labels(self.bins)
            problems.append(
                f"covariate {self.name!r}: reference {self.reference!r} is not a bin label (labels: {', '.join(labels)})"
                + did_you_mean(self.reference, labels)
            )
        return problems


@dataclass(frozen=True)
class FitSettings:
    batch_size: int = field(default=250_000, metadata=_doc("loan-months per batch read from DuckDB", min=1))
    max_iter: int = field(default=50, metadata=_doc("Newton iterations at most", min=1))
    tol: float = field(default=1e-8, metadata=_doc("convergence tolerance on the Newton step", gt=0))
    min_events_per_parameter: float = field(
        default=5.0,
        metadata=_doc("fewer events of a cause per parameter stop the fit (common practice; below 10 warns)", min=0.0),
    )
    max_scaled_coefficient: float = field(
        default=10.0, metadata=_doc("a |coefficient| x its column's sd above this stops the run (common practice)", gt=0.0)
    )
    max_scaled_std_error: float = field(
        default=5.0, metadata=_doc("a standard error x its column's sd above this stops the run (common practice)", gt=0.0)
    )
    min_transition_events: int = field(
        default=50,
        metadata=_doc(
            "multi_state: a move between states seen fewer times is fitted with intercept and age baseline only "
            "(common practice); one never seen is fixed at zero",
            min=0,
        ),
    )


@dataclass(frozen=True)
class ModelSpec:
    """Discrete-time competing-risk hazard model of default and prepayment."""

    kind: Literal["multinomial", "cause_specific", "multi_state"] = field(
        default="multinomial",
        metadata=_doc(
            "competing risks: joint multinomial logit, or one binary logit per cause; multi_state: one multinomial "
            "logit per arrears state (arrears.starts) over the states a loan moves to"
        ),
    )
    baseline: Baseline = field(default_factory=Baseline, metadata=_doc("loan-age baseline"))
    covariates: tuple[Covariate, ...] = field(default=(), metadata=_doc("terms of the design"))
    interactions: tuple[tuple[str, ...], ...] = field(default=(), metadata=_doc("pairs of term names to multiply"))
    ridge: float = field(default=0.0, metadata=_doc("ridge penalty on non-intercept coefficients", min=0.0))
    fit: FitSettings = field(default_factory=FitSettings, metadata=_doc("numerical settings"))
    path: FilePath | None = field(
        default=None, metadata=_doc("use this saved model JSON instead of fitting")
    )
    source: Literal["fitted", "benchmark", "table"] = field(
        default="fitted",
        metadata=_doc("hazards from the fitted model, from % PSA / % SDA curves, or from a table of monthly rates"),
    )
    psa: float = field(default=100.0, metadata=_doc("benchmark: prepayment speed in % PSA", min=0.0))
    sda: float = field(default=100.0, metadata=_doc("benchmark: default speed in % SDA", min=0.0))
    table: FilePath | None = field(
        default=None, metadata=_doc("table: CSV of monthly hazards by loan age (columns age, default, prepay)")
    )

    def _validate(self) -> list[str]:
        names = [c.name for c in self.covariates]
        problems = [f"covariates: {t}" for t in [_unique(names)] if t]
        if self.source == "table" and self.table is None:
            problems.append("table: required when source is table (a CSV with columns age, default, prepay)")
        if self.source != "table" and self.table is not None:
            problems.append(f"table: only used when source is table, but source is {self.source}")
        for i, pair in enumerate(self.interactions):
            if len(pair) != 2:
                problems.append(f"interactions[{i}]: give two term names, got {list(pair)}")
            for name in pair:
                if name not in names:
                    problems.append(f"interactions[{i}]: {name!r} is not a covariate name")
        return problems


@dataclass(frozen=True)
class Collateral:
    """How derived covariates are built: current LTV and the rate incentive.

    Like every covariate of month t they describe the start of month t, so by default they read the
    house-price index and the market rate of the previous month-end (lag 1).
    """

    region_column: str | None = field(default="region", metadata=_doc("loan-table column naming the region"))
    hpi_series: str | None = field(
        default="hpi_{region}", metadata=_doc("macro series of the house-price index; {region} is lower-cased")
    )
    market_rate_series: str | None = field(default="mortgage_rate", metadata=_doc("macro series of the market rate"))
    hpi_lag: int = field(
        default=1,
        metadata=_doc(
            "months before the row's month of the house-price index current LTV reads: 1 = the previous month-end "
            "(the start of the month), more for a publication delay; never before origination",
            min=0,
        ),
    )
    market_rate_lag: int = field(
        default=1,
        metadata=_doc(
            "months before the row's month of the market rate the rate incentive reads: 1 = the previous month-end",
            min=0,
        ),
    )


# --------------------------------------------------------------------------- scenarios and loss


@dataclass(frozen=True)
class Scenario:
    name: str = field(metadata=_doc("scenario name"))
    weight: float = field(metadata=_doc("probability weight", min=0.0, max=1.0))
    path: FilePath = field(metadata=_doc("CSV or Parquet of monthly macro paths"))


@dataclass(frozen=True)
class ScenarioExtension:
    """How a scenario path is extended beyond its last month.

    Under ``accounting: cecl`` the ``cecl`` section's periods replace ``rule`` and ``months``; ``long_run`` and
    ``hold_last_series`` apply on both bases.
    """

    rule: Literal["revert_to_mean", "hold_last"] = field(
        default="revert_to_mean", metadata=_doc("extension rule (accounting ifrs9; under cecl the cecl periods apply)")
    )
    months: int = field(
        default=24,
        metadata=_doc("revert_to_mean: months to reach the long-run value (accounting ifrs9; under cecl: cecl.reversion_months)", min=1),
    )
    long_run: dict[str, float] = field(
        default_factory=dict, metadata=_doc("long-run value per series; default the history's mean")
    )
    hold_last_series: tuple[str, ...] = field(
        default=("hpi_*",),
        metadata=_doc("series (shell patterns) that hold their last value whatever the rule, e.g. trending indices"),
    )


@dataclass(frozen=True)
class Lgd:
    kind: Literal["constant", "collateral"] = field(default="collateral", metadata=_doc("LGD method"))
    constant: float = field(default=0.25, metadata=_doc("constant LGD", min=0.0, max=1.0))
    by_segment: dict[str, float] = field(default_factory=dict, metadata=_doc("constant LGD per segment"))
    forced_sale_haircut: float = field(default=0.25, metadata=_doc("collateral: discount on a forced sale", min=0.0, max=1.0))
    sale_costs: float = field(default=0.06, metadata=_doc("collateral: costs as a share of the property value", min=0.0, max=1.0))
    months_to_recovery: int = field(default=18, metadata=_doc("collateral: months from default to sale", min=0))
    floor: float = field(default=0.05, metadata=_doc("minimum LGD", min=0.0, max=1.0))


@dataclass(frozen=True)
class Exposure:
    """Exposure at default: the balance at the onset of delinquency plus the missed months' interest and fees."""

    onset_months: int = field(
        default=3,
        metadata=_doc("instalments missed by a default on days past due (90 days: 3, common practice)", min=0),
    )
    onset_months_status: int = field(
        default=0, metadata=_doc("instalments missed by a default on a status code alone", min=0)
    )
    days_past_due_share: float | None = field(
        default=None,
        metadata=_doc("share of defaults on days past due; empty: from the development window's defaults", min=0.0, max=1.0),
    )
    arrears_fee: float = field(default=0.0, metadata=_doc("fee charged per missed instalment, added to EAD", min=0.0))


@dataclass(frozen=True)
class Loss:
    lgd: Lgd = field(default_factory=Lgd, metadata=_doc("loss given default"))
    exposure: Exposure = field(default_factory=Exposure, metadata=_doc("exposure at default"))
    accrued_interest: bool = field(
        default=False, metadata=_doc("add one more month's interest to EAD (the missed instalments carry theirs)")
    )
    discount: Literal["effective_interest_rate", "none"] | None = field(
        default=None,
        metadata=_doc(
            "discounting of expected losses: effective_interest_rate (each month's loss discounted at the loan's "
            "effective interest rate: IFRS 9 5.5.17 and B5.5.44; under cecl a discounted cash flow method, "
            "ASC 326-20-30-4) or none (discount factors 1: under cecl a method that does not discount); empty: "
            "effective_interest_rate under accounting ifrs9, none under cecl"
        ),
    )


ACCOUNTING_BASES = ("ifrs9", "cecl")
"""The accounting bases a run computes its allowance on: IFRS 9 (stages) or CECL (ASC 326, no stages)."""


def discount_method(discount: str | None, accounting: str) -> str:
    """The discounting a run applies: ``loss.discount`` when given, else the accounting basis's default.

    IFRS 9 measures expected credit losses at their present value at the effective interest rate (5.5.17(c) and
    B5.5.44, cited from memory): ``effective_interest_rate``. Under CECL discounting belongs to a discounted cash
    flow method only (ASC 326-20-30-4, cited from memory); a PD x LGD x EAD method such as ours is commonly
    applied without it, so the default is ``none``.

    Parameters
    ----------
    discount : {"effective_interest_rate", "none"} or None
    accounting : {"ifrs9", "cecl"}

    Returns
    -------
    str
        ``effective_interest_rate`` or ``none``.
    """
    if discount is not None:
        return discount
    return "none" if accounting == "cecl" else "effective_interest_rate"


@dataclass(frozen=True)
class Cecl:
    """The CECL basis (ASC 326): the reasonable and supportable forecast period and the reversion after it.

    The scenario paths are used for ``forecast_months`` months after the reporting month; over the next
    ``reversion_months`` months every macro input moves in a straight line from its value at the end of the
    forecast period to its long-run value, which it holds after (ASC 326-20-30-9, cited from memory: beyond the
    reasonable and supportable forecasts, revert to historical loss information; reverting the model's inputs to
    their long-run values is our reading of it).
    """

    forecast_months: int = field(
        metadata=_doc(
            "the reasonable and supportable forecast period: months after the reporting month over which the "
            "scenario paths are used (ASC 326-20-30-9); every scenario path must reach its end",
            min=1,
        )
    )
    reversion_months: int = field(
        metadata=_doc(
            "the reversion period: months over which every macro input then moves in a straight line to its long-run "
            "value (scenario_extension.long_run, else the history's mean; series of "
            "scenario_extension.hold_last_series hold their value at the forecast's end), held after; 0 reverts at once",
            min=0,
        )
    )


@dataclass(frozen=True)
class Staging:
    sicr_relative: float = field(default=2.0, metadata=_doc("stage 2 when lifetime PD now / at origination >= this", gt=0.0))
    sicr_absolute: float = field(default=0.01, metadata=_doc("... and lifetime PD now - at origination >= this", min=0.0))
    sicr_rule: Literal["both", "either"] = field(default="both", metadata=_doc("combine the two thresholds"))
    dpd_backstop: int = field(default=30, metadata=_doc("stage 2 at or above these days past due (IFRS 9 5.5.11)", min=1))
    pd_at_origination_column: str | None = field(
        default=None,
        metadata=_doc(
            "loan-table column of a stored lifetime PD at origination, compared with today's weighted PD; "
            "else both are projected on one path"
        ),
    )
    pd_at_origination_model: str | None = field(
        default=None, metadata=_doc("the model version that made the stored PD at origination (recorded, reported)")
    )
    low_credit_risk_pd: float | None = field(
        default=None,
        metadata=_doc(
            "IFRS 9 5.5.10: a loan with 12-month PD at or below this is low credit risk, exempt from the SICR test "
            "(the backstop and watch list still apply); empty: no exemption",
            min=0.0, max=1.0,
        ),
    )
    sicr_scenario: str | None = field(
        default=None,
        metadata=_doc("scenario of today's single-path PD in the SICR test; empty: the first scenario"),
    )
    probation_months: int = field(
        default=3,
        metadata=_doc(
            "months with no stage 2 trigger before a loan returns from stage 2 to stage 1; 0 returns it at once", min=0
        ),
    )
    watch_list_column: str | None = field(
        default=None, metadata=_doc("loan-table column, true for a loan on the watch list (stage 2)")
    )
    sicr_history_column: str | None = field(
        default=None,
        metadata=_doc(
            "loan-table column: months since the loan last met the SICR test or the watch list, at the previous "
            "month-end (empty: never); else outputs.prior_run's loan table gives it"
        ),
    )


@dataclass(frozen=True)
class Segments:
    column: str | None = field(default="region", metadata=_doc("loan-table column of the segment"))
    band_column: str | None = field(default=None, metadata=_doc("column to band into grades, e.g. a score"))
    band_edges: tuple[float, ...] = field(default=(), metadata=_doc("inner cut points of the bands", check=_increasing))


@dataclass(frozen=True)
class VerdictThresholds:
    """Where a validation statistic turns from pass to watch and from watch to fail.

    The defaults are common practice (PSI 0.10 and 0.25 of credit scoring; the 5% and 1% test levels; AUC 0.70,
    acceptable discrimination, and 0.60), except the vintage curves' share of ages outside, our own rule. The
    side of each threshold that is closed is stated in its text and in ``creditsurv.validation``'s verdict rules.
    """

    psi_watch: float = field(
        default=0.10, metadata=_doc("PSI at or above this is watch (common practice 0.10); below it passes", gt=0.0)
    )
    psi_fail: float = field(
        default=0.25, metadata=_doc("PSI at or above this is fail (common practice 0.25); at least psi_watch", gt=0.0)
    )
    p_value_watch: float = field(
        default=0.05,
        metadata=_doc(
            "a p-value at or below this is watch (common practice 0.05): the backtest of each cause and each move "
            "between arrears states (two-sided, of the one-factor z) and Hosmer-Lemeshow; above it passes",
            gt=0.0, max=1.0,
        ),
    )
    p_value_fail: float = field(
        default=0.01,
        metadata=_doc("a p-value at or below this is fail (common practice 0.01); at most p_value_watch", gt=0.0, max=1.0),
    )
    auc_watch: float = field(
        default=0.70,
        metadata=_doc(
            "an AUC of the 12-month PD below this is watch (common practice 0.70, Gini 0.40); at or above it passes",
            min=0.0, max=1.0,
        ),
    )
    auc_fail: float = field(
        default=0.60,
        metadata=_doc("an AUC below this is fail (common practice 0.60, Gini 0.20); at most auc_watch", min=0.0, max=1.0),
    )
    ages_outside_watch: float = field(
        default=0.15,
        metadata=_doc(
            "model against Aalen-Johansen by vintage: a share of ages with the model outside the 95% interval at or "
            "above this is watch (our own rule: about 0.05 for a model that fits); below it passes",
            min=0.0, max=1.0,
        ),
    )
    ages_outside_fail: float = field(
        default=0.30,
        metadata=_doc(
            "model against Aalen-Johansen by vintage: a share of ages outside at or above this is fail (our own "
            "rule); at least ages_outside_watch",
            min=0.0, max=1.0,
        ),
    )

    def _validate(self) -> list:
        # A larger PSI or share of ages outside is worse; a smaller p-value or AUC is worse.
        problems = []
        for name, label, worse in (
            ("psi", "PSI", "higher"), ("p_value", "p-value", "lower"), ("auc", "AUC", "lower"),
            ("ages_outside", "share of ages outside", "higher"),
        ):  # fmt: skip
            watch, fail = getattr(self, f"{name}_watch"), getattr(self, f"{name}_fail")
            if (worse == "higher" and fail < watch) or (worse == "lower" and fail > watch):
                side = "at or above" if worse == "higher" else "at or below"
                problems.append((
                    f"{name}_fail",
                    f"{fail:g} is {'below' if worse == 'higher' else 'above'} {name}_watch {watch:g}: a {worse} "
                    f"{label} is worse, so fail must be {side} watch (swap the two?)",
                ))  # fmt: skip
        return problems


@dataclass(frozen=True)
class ValidationSettings:
    bootstrap: int = field(default=200, metadata=_doc("bootstrap resamples for the AUC interval", min=0))
    pd_groups: int = field(default=10, metadata=_doc("groups for calibration", min=2))
    psi_bins: int = field(default=10, metadata=_doc("bins for stability indices", min=2))
    asset_correlation: float = field(
        default=0.15,
        metadata=_doc(
            "one-factor asset correlation of the backtest's adjusted z (0.15: Basel II residential mortgages)",
            min=0.0, max=0.99,
        ),
    )
    prior_model: FilePath | None = field(default=None, metadata=_doc("a prior model JSON to compare"))
    thresholds: VerdictThresholds = field(
        default_factory=VerdictThresholds,
        metadata=_doc("levels of the validation verdicts (pass, watch, fail) of every statistic of the pack"),
    )


@dataclass(frozen=True)
class Outputs:
    dir: FilePath | None = field(
        default=None, metadata=_doc("folder that holds run folders; default reports/ beside the config")
    )
    csv_copies: bool = field(default=False, metadata=_doc("also write CSV copies of Parquet tables"))
    loan_period_tables: bool = field(
        default=False,
        metadata=_doc(
            "also write the loan-by-period tables (pd_term_structure, pd_annual_by_loan, ecl_schedule: a row per loan "
            "and month or year, most of a run's size); off, creditsurv export recomputes them from the run"
        ),
    )
    prior_run: FilePath | None = field(default=None, metadata=_doc("previous run folder: the movement against it, and the staging's SICR history"))


@dataclass(frozen=True)
class DuckdbSettings:
    threads: int | None = field(default=None, metadata=_doc("DuckDB threads; default all cores", min=1))
    memory_limit: str = field(default="2GB", metadata=_doc("DuckDB memory limit, e.g. 2GB"))


@dataclass(frozen=True)
class SparkSettings:
    master: str = field(default="local[2]", metadata=_doc("Spark master URL, e.g. local[2] or spark://host:7077"))
    app_name: str = field(default="creditsurv", metadata=_doc("Spark application name"))
    partitions: int = field(default=8, metadata=_doc("partitions for the loan-month and loan tables", min=1))
    settings: dict[str, str] = field(
        default_factory=dict,
        metadata=_doc(
            "extra Spark settings (spark.* keys); spark.pyspark.python (or spark.executorEnv.PYSPARK_PYTHON) "
            "is the Python the executors start"
        ),
    )

    def _validate(self) -> list[str]:
        # The session is built inside this process: the driver's Python is the one running,
        # and the executors' Python is read from one place (see engines.spark_session).
        problems = []
        python = self.settings.get("spark.pyspark.python")
        env_python = self.settings.get("spark.executorEnv.PYSPARK_PYTHON")
        if python and env_python and python != env_python:
            problems.append(
                f"settings: spark.pyspark.python ({python!r}) and spark.executorEnv.PYSPARK_PYTHON ({env_python!r}) "
                "name different Pythons for the executors; keep one"
            )
        driver = self.settings.get("spark.pyspark.driver.python")
        if driver and os.path.abspath(driver) != os.path.abspath(sys.executable):
            problems.append(
                f"settings.spark.pyspark.driver.python: cannot apply: the driver is this creditsurv process, already "
                f"running {sys.executable}; remove the key (run creditsurv with {driver} to drive Spark from it)"
            )
        return problems


@dataclass(frozen=True)
class Checks:
    severity: dict[str, Literal["error", "warning", "off"]] = field(
        default_factory=dict, metadata=_doc("override a data check's severity by its name")
    )
    non_negative_series: tuple[str, ...] = field(
        default=("unemployment*", "hpi_*"),
        metadata=_doc("macro series (shell patterns) that cannot be negative, e.g. unemployment rates and house-price indices"),
    )


DATA_CHECK_NAMES = (
    "panel_keys_missing", "duplicate_loan_months", "month_gaps", "age_mismatch", "rows_after_closure",
    "balance_missing", "balance_negative", "days_past_due_invalid", "panel_values_not_finite",
    "balance_above_original", "panel_loans_not_in_loan_table", "loans_without_panel_rows", "loan_table_duplicates",
    "loan_fields_invalid", "loan_values_not_finite", "note_rate_implausible", "months_after_as_of",
    "macro_duplicate_months", "macro_months_missing", "macro_values_missing", "macro_values_not_finite",
    "macro_values_negative",
)  # fmt: skip
"""The data checks, by name, in the order they run: what ``checks.severity`` may name.

The checks themselves (their SQL and default severities) are ``creditsurv.data.CHECKS``;
the tests keep the two in step.
"""


# --------------------------------------------------------------------------- the whole run


@dataclass(frozen=True)
class Config:
    """A validated run configuration. Build it with :func:`load_config`."""

    as_of: Month = field(metadata=_doc("reporting month, YYYY-MM"))
    inputs: Inputs = field(metadata=_doc("where the data are and how columns map"))
    windows: Windows = field(metadata=_doc("development and out-of-time windows"))
    name: str = field(default="creditsurv", metadata=_doc("a label for the run"))
    currency: str | None = field(
        default=None,
        metadata=_doc("reporting currency of every amount (ISO 4217 code, e.g. GBP), shown beside each amount in the report", check=_currency_code),
    )
    default_definition: DefaultDefinition = field(default_factory=DefaultDefinition, metadata=_doc("default definition"))
    events: Events = field(default_factory=Events, metadata=_doc("closure rules"))
    arrears: Arrears = field(default_factory=Arrears, metadata=_doc("arrears states before default"))
    model: ModelSpec = field(default_factory=ModelSpec, metadata=_doc("hazard model"))
    collateral: Collateral = field(default_factory=Collateral, metadata=_doc("derived covariates"))
    scenarios: tuple[Scenario, ...] = field(default=(), metadata=_doc("forward macro scenarios"))
    scenario_extension: ScenarioExtension = field(default_factory=ScenarioExtension, metadata=_doc("beyond a path's end"))
    loss: Loss = field(default_factory=Loss, metadata=_doc("EAD, LGD and discounting"))
    accounting: Literal["ifrs9", "cecl"] = field(
        default="ifrs9",
        metadata=_doc(
            "accounting basis: ifrs9 (stages: 12-month ECL in stage 1, lifetime in stages 2 and 3) or cecl "
            "(ASC 326: the lifetime expected credit loss of every loan is its allowance, no stages)"
        ),
    )
    cecl: Cecl | None = field(
        default=None, metadata=_doc("accounting cecl: the forecast and reversion periods (required under cecl)")
    )
    staging: Staging = field(default_factory=Staging, metadata=_doc("stage allocation rules (accounting ifrs9)"))
    segments: Segments = field(default_factory=Segments, metadata=_doc("segment and grade definitions"))
    validation: ValidationSettings = field(default_factory=ValidationSettings, metadata=_doc("validation settings"))
    outputs: Outputs = field(default_factory=Outputs, metadata=_doc("where runs are written"))
    engine: Literal["duckdb", "spark"] = field(
        default="duckdb", metadata=_doc("where the panel, checks, events and fit run: DuckDB on one machine, or Spark")
    )
    duckdb: DuckdbSettings = field(default_factory=DuckdbSettings, metadata=_doc("DuckDB settings"))
    spark: SparkSettings = field(default_factory=SparkSettings, metadata=_doc("Spark settings (engine: spark)"))
    checks: Checks = field(default_factory=Checks, metadata=_doc("data-check settings"))
    seed: int = field(default=20240101, metadata=_doc("seed for every random step (bootstrap)", min=0))
    synthetic_data: bool = field(
        default=False, metadata=_doc("the inputs are synthetic (the report then says so among its cautions)")
    )
    source: FilePath | None = field(default=None, init=False, compare=False, repr=False)
    # The folder relative paths were resolved against (set by config_from_dict; the working folder for a
    # Config built directly). Not a key; an ordinary field so that dataclasses.replace keeps it.
    folder: Path = field(default_factory=Path.cwd, compare=False, repr=False, metadata={"loader_state": True})

    def __post_init__(self):
        # The documented default of loss.discount depends on the basis: filled here, so the resolved config a run
        # records states the discounting it applied.
        if self.loss is not None and self.loss.discount is None:
            method = discount_method(None, self.accounting)
            object.__setattr__(self, "loss", dataclasses.replace(self.loss, discount=method))

    def relative(self, path) -> str:
        """``path`` relative to the config's folder, with ``/`` separators: how outputs name files.

        A URL (``scheme://...``, for Spark) is returned as it is.
        """
        if "://" in str(path):
            return str(path)
        return Path(os.path.relpath(path, self.folder)).as_posix()

    def _validate(self) -> list[str]:
        problems = []
        dev, oot = self.windows.development, self.windows.out_of_time
        if dev.end > self.as_of:
            problems.append(f"windows.development.end: {dev.end} is after as_of {self.as_of}")
        if oot is None and self.windows.fit_on == "development_and_out_of_time":
            problems.append("windows.fit_on: development_and_out_of_time needs windows.out_of_time")
        if oot is not None:
            if oot.start <= dev.end:
                problems.append(f"windows.out_of_time.start: {oot.start} must be after development.end {dev.end}")
            if oot.end > self.as_of:
                problems.append(f"windows.out_of_time.end: {oot.end} is after as_of {self.as_of}")
        threshold = self.default_definition.days_past_due
        late = [s for s in self.arrears.starts if threshold is not None and s >= threshold]
        if late:
            problems.append(
                f"arrears.starts: {late} at or above default_definition.days_past_due {threshold}: an arrears state "
                f"must start below the default threshold (e.g. arrears: {{starts: {[s for s in self.arrears.starts if s < threshold]}}})"
            )
        for name in self.checks.severity:
            if name not in DATA_CHECK_NAMES:
                hint = did_you_mean(name, DATA_CHECK_NAMES) or f" (valid names: {', '.join(DATA_CHECK_NAMES)})"
                problems.append(f"checks.severity.{name}: unknown data check{hint}")
        if self.scenarios:
            text = _unique([s.name for s in self.scenarios])
            if text:
                problems.append(f"scenarios: {text}")
            problems += weight_problems({s.name: s.weight for s in self.scenarios})
        if self.accounting == "cecl" and self.cecl is None:
            problems.append(
                "cecl: accounting cecl needs the reasonable and supportable forecast period and the reversion period, "
                "e.g. cecl: {forecast_months: 24, reversion_months: 12}"
            )
        if self.accounting != "cecl" and self.cecl is not None:
            problems.append(f"cecl: given but accounting is {self.accounting}; set accounting: cecl or remove the cecl section")
        names = [s.name for s in self.scenarios]
        if self.staging.sicr_scenario is not None and self.staging.sicr_scenario not in names:
            hint = did_you_mean(self.staging.sicr_scenario, names) or f" (scenarios: {', '.join(names) or 'none'})"
            problems.append(f"staging.sicr_scenario: {self.staging.sicr_scenario!r} is not a configured scenario{hint}")
        return problems




# --------------------------------------------------------------------------- loading


class _UniqueKeyLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that rejects a key repeated in one mapping."""


def _construct_mapping(loader, node, deep=False):
    seen = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise yaml.constructor.ConstructorError(
                "while reading a mapping",
                node.start_mark,
                f"found the key {key!r} twice (first on line {seen[key] + 1})",
                key_node.start_mark,
            )
        seen[key] = key_node.start_mark.line
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


# A config is a page or two of YAML (the demo's is 5 KB). Files above this are refused before parsing:
# parsing YAML takes time and memory many times the file's size. The cap is our choice.
MAX_CONFIG_BYTES = 1 << 20


def read_yaml(path: Path) -> dict:
    try:
        size = path.stat().st_size
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc.strerror or exc})") from None
    if size > MAX_CONFIG_BYTES:
        raise ConfigError(
            f"{path}: the config file is {size:,} bytes, above the limit of {MAX_CONFIG_BYTES:,} bytes; "
            "a config names its data files rather than holding data (put long lists in a CSV file)"
        )
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc})") from None
    try:
        data = yaml.load(text, Loader=_UniqueKeyLoader)  # noqa: S506 - SafeLoader subclass
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else "unknown position"
        what = " ".join(t for t in (exc.context, exc.problem) if t)
        raise ConfigError(f"{path}: YAML syntax error at {where}: {what}") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: YAML syntax error: {exc}") from None
    if data is None:
        raise ConfigError(f"{path}: the config file is empty")
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: the config must be a mapping of keys, got {type(data).__name__}")
    return data


def config_from_dict(data: dict, base_dir: str | Path = ".", *, source: str | Path | None = None) -> Config:
    """Validate ``data`` (parsed YAML) and return a frozen :class:`Config`.

    Relative paths resolve against ``base_dir``. Raises ``ConfigError`` listing
    every problem found.
    """
    folder = Path(base_dir).resolve()
    cfg, problems = build(Config, data, folder)
    if problems:
        label = str(source) if source else "config"
        raise ConfigError(f"{label}: {problem_list(problems, 'the config')}", problems)
    object.__setattr__(cfg, "folder", folder)
    if source is not None:
        object.__setattr__(cfg, "source", FilePath(Path(source).resolve()))
    return cfg


def load_config(path: str | Path) -> Config:
    """Read, validate and resolve the YAML config at ``path``."""
    path = Path(path)
    data = read_yaml(path)
    return config_from_dict(data, path.resolve().parent, source=path)


def _plain(value, path_text):
    if dataclasses.is_dataclass(value):
        return {f.name: _plain(getattr(value, f.name), path_text) for f in dataclasses.fields(value) if is_key(f)}
    if isinstance(value, Month):
        return format_month(value)
    if isinstance(value, Path):
        return path_text(value)
    if isinstance(value, tuple):
        return [_plain(v, path_text) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v, path_text) for k, v in value.items()}
    return value


def config_to_dict(cfg: Config, *, paths: Literal["absolute", "relative", "omit"] = "absolute") -> dict:
    """The resolved config as plain data: defaults filled, months as YYYY-MM.

    ``paths``: absolute; relative to the config's folder (``/`` separators), the form a run records;
    or omitted (every path ``None``), the form a run's identity hashes beside its files' contents.
    """
    path_text = {"absolute": str, "relative": cfg.relative, "omit": lambda _p: None}[paths]
    return _plain(cfg, path_text)


def config_sha256(cfg: Config) -> str:
    """SHA-256 of the resolved config's canonical JSON, paths relative to the config's folder."""
    return canonical_sha256(config_to_dict(cfg, paths="relative"))


def canonical_sha256(data) -> str:
    """SHA-256 of ``data``'s canonical JSON (keys sorted, no spaces): the hash a run records of plain data."""
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def config_files(cfg: Config) -> list[tuple[str, Path]]:
    """Every file or folder the config names for reading, as ``(key path, path)`` in schema order.

    ``outputs.dir`` (where runs are written) is not read and is left out.
    """
    found = []

    def walk(value, key):
        if dataclasses.is_dataclass(value):
            for f in dataclasses.fields(value):
                if is_key(f):
                    walk(getattr(value, f.name), f"{key}.{f.name}" if key else f.name)
        elif isinstance(value, tuple):
            for i, item in enumerate(value):
                walk(item, f"{key}[{i}]")
        elif isinstance(value, Path) and key != "outputs.dir":
            found.append((key, value))

    walk(cfg, "")
    return found


def schema_reference(prefix: str | None = None) -> str:
    """A Markdown table of every config key, its type, default and meaning.

    Parameters
    ----------
    prefix : str, optional
        Only the keys that start with it (``loss`` for the loss section, ``model.fit.`` for the fit's
        settings); with none that do, the table has its header rows only.
    """
    rows = ["| key | type | default | meaning |", "| --- | --- | --- | --- |"]
    for path, tp, default, doc in describe(Config):
        if path == "source" or (prefix is not None and not path.startswith(prefix)):
            continue
        rows.append(f"| `{path}` | {tp} | {default} | {doc} |")
    return "\n".join(rows)
