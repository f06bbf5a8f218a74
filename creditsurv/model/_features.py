"""The feature spec: one definition of the design, evaluated on history and on the future.

A :class:`FeatureSpec` is built from the config's ``model`` and ``collateral``
sections. It is used in three steps:

1. :meth:`FeatureSpec.raw_query` writes the SQL that yields, per risk-set row
   (``loan_months``), the *raw inputs*: ``loan_id``, ``month_idx``, ``age``,
   ``outcome`` and one column per input key (see :meth:`FeatureSpec.inputs`).
2. :meth:`FeatureSpec.learn` computes the learned constants (standardisation
   mean and sd, categorical levels, bin labels, the age range) from the
   development rows with SQL aggregates and returns a learned copy of the spec.
   The constants are plain JSON-safe data (:meth:`FeatureSpec.to_dict`).
3. :meth:`FeatureSpec.design` evaluates the design matrix in numpy from a dict
   of raw arrays. The same function serves the fit (raw rows read from DuckDB)
   and the projection (raw arrays of future months), with no training data.

Input keys
----------
A covariate on a column reads the key named like the column (``credit_score``,
``current_ltv``); a macro covariate reads ``macro:<series>:<lag>`` (the
series value ``lag`` months before the row's month). These are the input
names of the projection stage's hazard-source protocol. ``age`` is always present; ``log_age`` is computed from ``age``
when not given.

Design parameterisation
-----------------------
Every design starts with an ``intercept`` column. The loan-age baseline adds:

* ``age_bands`` -- one indicator per band except the first (the reference);
  band ``j`` holds ages in ``[edges[j-1], edges[j])``, the first band ages
  below ``edges[0]``, the last band ages at or above ``edges[-1]``.
  Columns ``age_band[3-5]``, ..., ``age_band[120+]``.
* ``spline`` -- a natural cubic spline in age with the given knots (first and
  last are the boundary knots): ``age_lin`` and ``age_ns[1]`` ...
  ``age_ns[K-2]`` (truncated power form, linear beyond the boundary knots;
  Hastie, Tibshirani & Friedman, *Elements of Statistical Learning*, eq. 5.4-5.5).
* ``age_indicators`` -- one indicator per age month above the youngest age
  seen in training (the reference), up to ``max_age``; older ages share the
  ``max_age`` indicator. Columns ``age[2]``, ..., ``age[max_age]``.
* ``none`` -- the intercept only.

Numeric covariates are raised to ``floor``, lowered to ``cap``, then
transformed (``log`` or ``standardise`` with the learned mean and sd).
Categorical covariates and bins give one indicator per level except the
reference (``name[level]``). An interaction multiplies every column of one
term with every column of the other (``a:b``).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from ..config import bin_labels
from ..data import same_month_panel_problem
from ..errors import FeatureError, did_you_mean, problem_list
from ..sql import quote_ident, quote_literal
from ._names import macro_key, panel_key
from ._schedule import scheduled_balance_sql

__all__ = [
    "FeatureSpec",
    "InputGrid",
    "RawInput",
    "SpecInputs",
    "feature_spec",
    "natural_spline_basis",
]

RISK_SET_COLUMNS = ("loan_id", "month_idx", "age", "outcome")
DERIVED_COLUMNS = ("current_ltv", "rate_incentive", "log_age")
_LOAN_TERMS = ("origination_idx", "original_balance", "note_rate", "term", "property_value")


# --------------------------------------------------------------------------- SQL text helpers






def _fmt(x: float) -> str:
    return f"{x:g}"


# --------------------------------------------------------------------------- natural cubic spline


def natural_spline_basis(x: np.ndarray, knots) -> np.ndarray:
    """Natural cubic spline basis without the constant, shape ``(n, K-1)``.

    Column 0 is ``x`` itself; columns ``1..K-2`` are the truncated-power terms
    ``N_{k+2}(x) = d_k(x) - d_{K-1}(x)`` with
    ``d_k(x) = ((x - t_k)_+^3 - (x - t_K)_+^3) / (t_K - t_k)`` (ESL eq. 5.4-5.5),
    divided by ``(t_K - t_1)^2`` to keep them on the scale of ``x``. Together
    with a constant they span the cubic splines with knots ``t`` that are
    linear below ``t_1`` and above ``t_K``.
    """
    x = np.asarray(x, dtype=np.float64)
    t = np.asarray(knots, dtype=np.float64)
    k = len(t)
    out = np.empty((x.shape[0], k - 1))
    out[:, 0] = x
    if k < 3:
        return out
    scale = (t[-1] - t[0]) ** 2

    def d(j):
        return (np.maximum(x - t[j], 0.0) ** 3 - np.maximum(x - t[-1], 0.0) ** 3) / (t[-1] - t[j])

    last = d(k - 2)
    for j in range(k - 2):
        out[:, j + 1] = (d(j) - last) / scale
    return out


# --------------------------------------------------------------------------- raw inputs


@dataclass(frozen=True)
class RawInput:
    """One raw input column: where it comes from and the key it is read under."""

    key: str
    source: str  # "risk_set", "panel_lag", "loans", "derived", "macro"
    column: str | None = None
    series: str | None = None
    lag: int = 0


def input_key(covariate: Mapping) -> str:
    """The raw input a covariate reads: ``macro:<series>:<lag>``, ``panel:<column>:<lag>`` (lag >= 1) or the column."""
    lag = int(covariate.get("lag", 0))
    if covariate.get("macro"):
        return macro_key(covariate["macro"], lag)
    return panel_key(covariate["column"], lag) if lag else covariate["column"]


def _columns_of(con, table: str) -> list[str] | None:
    try:
        cur = con.execute(f"SELECT * FROM {quote_ident(table)} LIMIT 0")
        names = [d[0] for d in cur.description]
        cur.fetchall()
        return names
    except Exception:  # noqa: BLE001 - a missing table shows up as "no columns"
        return None


@contextlib.contextmanager
def _one_thread(con):
    """Run DuckDB on one thread inside the block.

    A parallel sum of doubles depends on how rows fall to threads, and the
    stored constants must be the same bits every run. Other engines (the Spark
    connection adapter) are left as they are: their sums are reproducible for
    a fixed partitioning and agree with DuckDB's to rounding.
    """
    import duckdb

    if not isinstance(con, duckdb.DuckDBPyConnection):
        yield
        return
    threads = con.execute("SELECT current_setting('threads')").fetchall()[0][0]
    con.execute("SET threads = 1")
    try:
        yield
    finally:
        con.execute(f"SET threads = {int(threads)}")


# --------------------------------------------------------------------------- the spec


@dataclass(frozen=True)
class FeatureSpec:
    """A declarative feature spec, optionally with learned constants.

    Build it with :func:`feature_spec` (from the config) or
    :meth:`from_dict` (from a saved model). ``learned`` is ``None`` until
    :meth:`learn` has run.
    """

    baseline: dict
    covariates: tuple[dict, ...]
    interactions: tuple[tuple[str, str], ...] = ()
    collateral: dict = field(default_factory=dict)
    learned: dict | None = None

    # ----------------------------------------------------------------- serialisation

    def to_dict(self) -> dict:
        """JSON-safe plain data: the spec and its learned constants."""
        return {
            "baseline": dict(self.baseline),
            "covariates": [dict(c) for c in self.covariates],
            "interactions": [list(p) for p in self.interactions],
            "collateral": dict(self.collateral),
            "learned": json.loads(json.dumps(self.learned)) if self.learned is not None else None,
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> "FeatureSpec":
        """Rebuild a spec written by :meth:`to_dict`."""
        try:
            base = dict(data["baseline"])
            base["edges"] = [int(e) for e in base.get("edges", [])]
            base["knots"] = [float(k) for k in base.get("knots", [])]
            covs = tuple(dict(c, bins=[float(b) for b in c.get("bins", [])]) for c in data["covariates"])
            return cls(
                baseline=base,
                covariates=covs,
                interactions=tuple(tuple(p) for p in data.get("interactions", [])),
                collateral=dict(data.get("collateral", {})),
                learned=data.get("learned"),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise FeatureError(f"saved feature spec is malformed: {exc!r}") from None

    # ----------------------------------------------------------------- inputs and SQL

    def inputs(self) -> list[RawInput]:
        """The raw input keys the design reads (besides ``age``), in spec order.

        Sources are resolved against the DuckDB tables only in :meth:`raw_query`;
        here ``source`` is ``"column"`` or ``"macro"``.
        """
        seen, out = set(), []
        for c in self.covariates:
            lag = int(c.get("lag", 0))
            if c.get("macro"):
                item = RawInput(input_key(c), "macro", series=c["macro"], lag=lag)
            elif lag:
                item = RawInput(input_key(c), "panel_lag", column=c["column"], lag=lag)
            else:
                item = RawInput(c["column"], "column", column=c["column"])
            if item.key not in seen and item.key != "age":
                seen.add(item.key)
                out.append(item)
        return out

    def _resolve(self, con) -> dict:
        """Find each input's table; raise FeatureError listing every problem."""
        tables = {t: _columns_of(con, t) for t in ("loan_months", "panel", "loans", "macro")}
        if tables["loan_months"] is None:
            raise FeatureError("the risk-set view 'loan_months' does not exist on this connection")
        lm = set(tables["loan_months"])
        missing = [c for c in RISK_SET_COLUMNS if c not in lm]
        if missing:
            raise FeatureError(f"view 'loan_months' lacks column(s) {missing}; it has {sorted(lm)}")
        panel = [c for c in (tables["panel"] or []) if c not in ("loan_id", "month_idx", "age")]
        loans = [c for c in (tables["loans"] or []) if c != "loan_id"]
        macro = [c for c in (tables["macro"] or []) if c != "month_idx"]
        coll = self.collateral
        derived = ["log_age"]
        hpi = coll.get("hpi_series")
        region_col = coll.get("region_column")
        if hpi and region_col and region_col in loans and "property_value" in loans:
            derived.append("current_ltv")
        if coll.get("market_rate_series") and "note_rate" in loans:
            derived.append("rate_incentive")
        available = sorted(set(lm) | set(panel) | set(loans) | set(DERIVED_COLUMNS))
        problems, resolved = [], []
        by_key = {}
        for c in self.covariates:
            if c.get("macro"):
                s = c["macro"]
                if s not in macro:
                    where = "no 'macro' view exists" if tables["macro"] is None else f"available: {', '.join(macro)}"
                    problems.append(f"covariate {c['name']!r}: unknown macro series {s!r} ({where}){did_you_mean(s, macro)}")
                continue
            col, lag, head = c["column"], int(c.get("lag", 0)), f"covariate {c['name']!r}: "
            if lag:
                first_col = c.get("before_first_column")
                if first_col is not None and first_col not in loans:
                    problems.append(head + f"before_first_column: unknown loan-table column {first_col!r}{did_you_mean(first_col, loans)}")
                if col in panel:
                    by_key[input_key(c)] = "panel_lag"
                elif col in loans or col in lm or col in DERIVED_COLUMNS:
                    problems.append(head + f"lag applies to macro series and panel columns; {col!r} is not a panel column")
                else:
                    problems.append(head + f"unknown panel column {col!r}{did_you_mean(col, panel)}")
                continue
            if col in lm:
                src = "risk_set"
            elif col in loans:
                src = "loans"
            elif col in DERIVED_COLUMNS:
                if col not in derived:
                    problems.append(head + f"derived column {col!r} cannot be built: " + _derived_needs(col, coll, loans))
                    continue
                src = "derived"
            elif col in panel:
                problems.append(head + same_month_panel_problem(col))
                continue
            else:
                problems.append(head + f"unknown column {col!r}{did_you_mean(col, available)}")
                continue
            by_key[col] = src
        if problems:
            raise FeatureError(problem_list(problems, "the feature spec against the data"))
        for item in self.inputs():
            if item.source == "macro":
                resolved.append(item)
            else:
                resolved.append(dataclasses.replace(item, source=by_key[item.key]))
        return {"inputs": resolved, "macro": macro, "loans": loans, "panel": panel}

    def raw_query(
        self, con, where_sql: str = "TRUE", *, order: bool = True, origin_state: int | None = None, reference: int = 0,
        carry=(),
    ) -> str:
        """SQL yielding one row per risk-set row with the raw inputs.

        Columns: ``loan_id``, ``month_idx``, ``age``, ``outcome`` and each input
        key. ``where_sql`` is a boolean SQL expression over those columns (use
        ``?`` placeholders for values and pass them as params); rows are
        ordered by ``loan_id, month_idx`` so that reads are deterministic.
        With ``origin_state`` only the months starting in that arrears state are
        read, and ``outcome`` is their ``destination`` (the multi-state model's
        outcome; see :mod:`creditsurv.data`), with the codes ``reference`` and 0
        swapped when the reference outcome is not "stay". ``carry`` names further
        ``loan_months`` columns to carry (``origin_state``), after the inputs.
        """
        info = self._resolve(con)
        q = quote_ident
        inputs = info["inputs"]
        needs_ltv = any(i.key == "current_ltv" for i in inputs)
        needs_inc = any(i.key == "rate_incentive" for i in inputs)
        ctes = []
        if origin_state is None:
            rows = "lm.\"outcome\"\n  FROM \"loan_months\" AS lm"
        else:
            r = int(reference)
            outcome = f"CASE lm.\"destination\" WHEN {r} THEN 0 WHEN 0 THEN {r} ELSE lm.\"destination\" END" if r else "lm.\"destination\""
            rows = f"{outcome} AS \"outcome\"\n  FROM \"loan_months\" AS lm\n  WHERE lm.\"origin_state\" = {int(origin_state)}"
        # risk-set columns the model reads besides age (previously_defaulted), then those to carry
        own = [i.key for i in inputs if i.source == "risk_set" and i.key not in RISK_SET_COLUMNS]
        carried = "".join(f"lm.{q(c)}, " for c in dict.fromkeys([*own, *carry]))
        ctes.append(f"risk_set AS (\n  SELECT {carried}lm.\"loan_id\", lm.\"month_idx\", lm.\"age\", {rows}\n)")
        prev = "risk_set"
        panel_cols = [i for i in inputs if i.source == "panel_lag"]
        if panel_cols:
            # a panel column enters at the end of the month `lag` months before: the start of the row's month
            rules = {r["key"]: r for r in self.panel_rules}
            sel = []
            for i in panel_cols:
                value = f"p{i.lag}.{q(i.column)}"
                rule = rules.get(i.key, {})
                if rule.get("before_first") is not None:
                    value = f"coalesce({value}, CAST({float(rule['before_first'])!r} AS DOUBLE))"
                elif rule.get("before_first_column") is not None:
                    value = f"coalesce({value}, CAST(lf.{q(rule['before_first_column'])} AS DOUBLE))"
                sel.append(f"{value} AS {q(i.key)}")
            joins = "\n".join(
                f"  LEFT JOIN \"panel\" AS p{lag} ON p{lag}.\"loan_id\" = r.\"loan_id\" AND p{lag}.\"month_idx\" = r.\"month_idx\" - {int(lag)}"
                for lag in sorted({i.lag for i in panel_cols})
            )
            if any(r.get("before_first_column") for r in rules.values()):
                joins += "\n  LEFT JOIN \"loans\" AS lf ON lf.\"loan_id\" = r.\"loan_id\""
            ctes.append(f"with_panel AS (\n  SELECT r.*, {', '.join(sel)}\n  FROM {prev} AS r\n{joins}\n)")
            prev = "with_panel"
        loan_sel = [f"l.{q(i.column)} AS {q(i.key)}" for i in inputs if i.source == "loans"]
        if needs_ltv or needs_inc:
            extra = ["note_rate"] if needs_inc else []
            if needs_ltv:
                extra = ["origination_idx", "original_balance", "note_rate", "term", "property_value", self.collateral["region_column"]]
            for name in dict.fromkeys(extra):
                loan_sel.append(f"l.{q(name)} AS {q('_cs_' + name)}")
        if loan_sel:
            ctes.append(
                f"with_loans AS (\n  SELECT r.*, {', '.join(loan_sel)}\n  FROM {prev} AS r\n"
                "  LEFT JOIN \"loans\" AS l ON l.\"loan_id\" = r.\"loan_id\"\n)"
            )
            prev = "with_loans"
        macro_items = [i for i in inputs if i.source == "macro"]
        lag = self.derived_lags
        lags = sorted({i.lag for i in macro_items} | ({lag["market_rate"]} if needs_inc else set()))
        if lags or needs_ltv:
            sel, joins = [], []
            for m in lags:
                alias = f"m_lag{m}"
                joins.append(f"  LEFT JOIN \"macro\" AS {alias} ON {alias}.\"month_idx\" = r.\"month_idx\" - {int(m)}")
            for i in macro_items:
                sel.append(f"m_lag{i.lag}.{q(i.series)} AS {q(i.key)}")
            if needs_inc:
                sel.append(f"m_lag{lag['market_rate']}.{q(self.collateral['market_rate_series'])} AS \"_cs_market_rate\"")
            if needs_ltv:
                regions = self._hpi_regions(info["macro"])
                region = q("_cs_" + self.collateral["region_column"])
                for tag, alias in (("now", "m_hpi"), ("orig", "m_orig")):
                    whens = " ".join(f"WHEN {quote_literal(r)} THEN {alias}.{q(s)}" for r, s in regions)
                    sel.append(f"CASE lower(CAST(r.{region} AS VARCHAR)) {whens} END AS \"_cs_hpi_{tag}\"")
                # the index as of the start of the month, and no move before the valuation at origination
                joins.append(
                    f"  LEFT JOIN \"macro\" AS m_hpi ON m_hpi.\"month_idx\" = "
                    f"GREATEST(r.\"month_idx\" - {int(lag['hpi'])}, r.\"_cs_origination_idx\")"
                )
                joins.append("  LEFT JOIN \"macro\" AS m_orig ON m_orig.\"month_idx\" = r.\"_cs_origination_idx\"")
            ctes.append(f"with_macro AS (\n  SELECT r.*, {', '.join(sel)}\n  FROM {prev} AS r\n" + "\n".join(joins) + "\n)")
            prev = "with_macro"
        if needs_ltv or needs_inc:
            sel = []
            if needs_ltv:
                # Scheduled level-payment balance after (age - 1) payments.
                k = "LEAST(GREATEST(r.\"age\" - 1, 0), r.\"_cs_term\")"
                bal = scheduled_balance_sql('r."_cs_original_balance"', 'r."_cs_note_rate"', 'r."_cs_term"', k)
                value = "(r.\"_cs_property_value\" * r.\"_cs_hpi_now\" / r.\"_cs_hpi_orig\")"
                sel.append(f"{bal} / {value} AS \"current_ltv\"")
            if needs_inc:
                sel.append("100.0 * r.\"_cs_note_rate\" - r.\"_cs_market_rate\" AS \"rate_incentive\"")
            ctes.append(f"derived AS (\n  SELECT r.*, {', '.join(sel)}\n  FROM {prev} AS r\n)")
            prev = "derived"
        keys = [i.key for i in inputs if i.key != "log_age" or i.source != "derived"]
        cols = ", ".join(q(c) for c in (*RISK_SET_COLUMNS, *keys, *carry))
        ctes.append(f"raw AS (\n  SELECT {cols}\n  FROM {prev}\n)")
        sql = "WITH " + ",\n".join(ctes) + f"\nSELECT * FROM raw\nWHERE ({where_sql})"
        return sql + "\nORDER BY \"loan_id\", \"month_idx\"" if order else sql

    def _hpi_regions(self, macro_cols) -> list[tuple[str, str]]:
        template = self.collateral["hpi_series"]
        if "{region}" not in template:
            return []
        pre, post = template.split("{region}", 1)
        out = []
        for c in macro_cols:
            if c.startswith(pre) and c.endswith(post) and len(c) > len(pre) + len(post):
                region = c[len(pre): len(c) - len(post)]
                if region == region.lower():
                    out.append((region, c))
        return out

    # ----------------------------------------------------------------- learning

    def learn(self, con, where_sql: str = "TRUE", params=()) -> "FeatureSpec":
        """Return a copy of the spec with constants learned from the development rows.

        Every problem found (missing values, log of non-positive values,
        unknown reference levels, knots outside the ages seen, macro lags that
        run past the macro history) is reported in one :class:`FeatureError`.
        """
        body = self.raw_query(con, where_sql, order=False)
        info = self._resolve(con)
        keys = [i.key for i in info["inputs"] if i.key != "log_age"]
        numeric = self._numeric_to_learn()
        row = self._summarise_development_rows(con, body, params, keys, numeric)
        n, age_min, age_max, month_min = row[:4]
        if not n:
            shown = where_sql
            for value in params:  # the filter as the user would read it, not with "?" placeholders
                shown = shown.replace("?", repr(value), 1)
            raise FeatureError(
                f"no loan-months at risk in the development window (the filter {shown} selects none of the "
                f"{con.execute('SELECT count(*) FROM loan_months').fetchall()[0][0]:,} loan-months at risk); check the panel file (inputs.panel.path) "
                "and windows.development"
            )
        nulls = dict(zip(keys, row[4: 4 + len(keys)]))
        numeric_constants, problems = _learn_numeric(numeric, row[4 + len(keys):])
        learned: dict[str, Any] = {
            "n_rows": int(n), "age_min": int(age_min), "age_max": int(age_max), "covariates": numeric_constants,
        }
        problems += self._macro_history_problems(con, info["inputs"], month_min)
        problems += self._missing_value_problems(nulls, problems)
        problems = [self._name_loans(con, body, params, p, info["inputs"]) for p in problems]
        baseline_constants, found = self._learn_baseline(age_min, age_max)
        learned.update(baseline_constants)
        learned["supported_age"] = self._supported_age(con, body, params)
        problems += found
        levels, found = self._learn_levels(con, body, params)
        learned["covariates"].update(levels)
        problems += found
        if problems:
            raise FeatureError(problem_list(problems, "learning the feature spec from the development data"))
        spec = dataclasses.replace(self, learned=learned)
        learned["columns"] = spec._column_names()
        dup = _duplicates(learned["columns"])
        if dup:
            raise FeatureError(f"design column names repeat: {dup}; rename the covariates")
        return spec

    def _numeric_to_learn(self) -> list[tuple[dict, str]]:
        """The numeric covariates with a learned check or constant: ``(covariate, "std" or "log")``."""
        numeric = []
        for c in self.covariates:
            if c.get("kind", "numeric") != "numeric":
                continue
            if c.get("transform") == "standardise":
                numeric.append((c, "std"))
            elif c.get("transform") == "log":
                numeric.append((c, "log"))
        return numeric

    def _summarise_development_rows(self, con, body: str, params, keys, numeric) -> tuple:
        """One pass of SQL aggregates over the development rows.

        The row holds the row count, the youngest and oldest age, the first
        month, the missing values of each input key, then per numeric
        covariate its mean and sd (standardised) or its non-positive count (log).
        """
        aggs = ["count(*)", "min(\"age\")", "max(\"age\")", "min(\"month_idx\")"]
        for k in keys:
            aggs.append(f"count(*) - count({quote_ident(k)})")
        for c, what in numeric:
            x = self._clip_sql(c)
            if what == "std":
                aggs += [f"avg({x})", f"stddev_samp({x})"]
            else:
                aggs.append(f"count(*) FILTER (WHERE {x} <= 0)")
        with _one_thread(con):
            return con.execute(f"WITH data AS (\n{body}\n)\nSELECT {', '.join(aggs)} FROM data", list(params)).fetchall()[0]

    def _macro_history_problems(self, con, inputs, month_min) -> list[str]:
        """Macro covariates whose lag reaches before the first month of their series."""
        q = quote_ident
        macro_first = {}
        for item in inputs:
            if item.source != "macro" or item.series in macro_first:
                continue
            macro_first[item.series] = con.execute(
                f"SELECT min(\"month_idx\") FROM \"macro\" WHERE {q(item.series)} IS NOT NULL"
            ).fetchall()[0][0]
        problems = []
        for c in self.covariates:
            if not c.get("macro"):
                continue
            lag = int(c.get("lag", 0))
            first = macro_first.get(c["macro"])
            need = month_min - lag
            if first is None or need < first:
                from ..months import format_month

                have = "no values" if first is None else f"first available {format_month(first)}"
                problems.append(
                    f"covariate {c['name']!r}: macro series {c['macro']!r} at lag {lag} runs past the start of the "
                    f"macro history: first month needed {format_month(need)}, {have}"
                )
        return problems

    def _missing_value_problems(self, nulls: dict, reported: list[str]) -> list[str]:
        """Covariates with rows that have no value, unless a macro problem already explains it."""
        problems = []
        for c in self.covariates:
            key = input_key(c)
            bad = nulls.get(key, 0)
            if bad and not any(p.startswith(f"covariate {c['name']!r}: macro") for p in reported):
                extra = ""
                if int(c.get("lag", 0)) and c.get("column"):
                    extra = (f" (the panel has no row {int(c['lag'])} month(s) before these loan-months, e.g. in a loan's "
                             "first months on book: set before_first to the value a loan starts with)")
                if key == "current_ltv":
                    extra = (f" (check property_value, term and that every {self.collateral.get('region_column')!r} "
                             f"value has an HPI series {self.collateral.get('hpi_series')!r} covering origination)")
                problems.append(f"covariate {c['name']!r}: {bad} rows have no value for {key!r}{extra}")
        return problems

    def _name_loans(self, con, body: str, params, problem: str, inputs) -> str:
        """A covariate problem with the input table, column and the first loans behind it."""
        tables = {"loans": "the loan table (inputs.loans)", "panel_lag": "the panel (inputs.panel)", "risk_set": "the panel (inputs.panel)",
                  "derived": "values derived from the loan table and macro history", "macro": "the macro history (inputs.macro)"}
        for c in self.covariates:
            key = input_key(c)
            head = f"covariate {c['name']!r}: "
            if not problem.startswith(head):
                continue
            if "rows have no value" in problem:
                condition = f"{quote_ident(key)} IS NULL"
            elif "log of non-positive values" in problem:
                condition = f"{self._clip_sql(c)} <= 0"
            else:
                return problem
            source = next((i.source for i in inputs if i.key == key), None)
            where = f"column {key!r} of {tables.get(source, 'the inputs')}"
            loans = _example_loans(con, body, params, condition)
            return f"{problem}; {where}, {loans}" if loans else f"{problem}; {where}"
        return problem

    def _learn_baseline(self, age_min, age_max) -> tuple[dict, list[str]]:
        """The baseline's learned constants (``max_age`` or ``band_labels``) and its problems."""
        base = self.baseline
        kind = base.get("kind", "age_bands")
        learned, problems = {}, []
        if kind == "spline":
            knots = list(base["knots"])
            outside = [k for k in knots if k < age_min or k > age_max]
            if len(knots) < 2:
                problems.append("baseline: a spline needs at least two knots")
            if outside:
                problems.append(
                    f"baseline: spline knots {[_fmt(k) for k in outside]} lie outside the ages in the data "
                    f"({age_min} to {age_max}); move them inside that range"
                )
        elif kind == "age_indicators":
            max_age = base.get("max_age") or int(age_max)
            learned["max_age"] = int(min(max_age, age_max))
            if learned["max_age"] <= age_min:
                problems.append(f"baseline: max_age {max_age} leaves no age indicator above the youngest age {age_min}")
        elif kind == "age_bands":
            learned["band_labels"] = _band_labels(base["edges"])
        return learned, problems

    def _learn_levels(self, con, body: str, params) -> tuple[dict, list[str]]:
        """Levels and reference of each categorical and bins covariate, and their problems."""
        q = quote_ident
        learned, problems = {}, []
        for c in self.covariates:
            kind_c = c.get("kind", "numeric")
            if kind_c == "categorical":
                key = input_key(c)
                rows = con.execute(
                    f"WITH data AS (\n{body}\n)\nSELECT DISTINCT CAST({q(key)} AS VARCHAR) FROM data WHERE {q(key)} IS NOT NULL",
                    list(params),
                ).fetchall()
                levels = sorted(r[0] for r in rows)
            elif kind_c == "bins":
                levels = bin_labels(c["bins"])
            else:
                continue
            ref = c.get("reference")
            if ref is None:
                ref = levels[0] if levels else None
            elif str(ref) not in levels:
                problems.append(
                    f"covariate {c['name']!r}: reference level {ref!r} is not a level (levels: {', '.join(levels)})"
                    + did_you_mean(ref, levels)
                )
                continue
            if len(levels) < 2:
                problems.append(f"covariate {c['name']!r}: needs at least two levels, the data have {levels}")
                continue
            learned[c["name"]] = {"levels": levels, "reference": str(ref)}
        return learned, problems

    @staticmethod
    def _clip_sql(c) -> str:
        key = input_key(c)
        if key == "log_age":
            x = "ln(CAST(\"age\" AS DOUBLE))"
        else:
            x = f"CAST({quote_ident(key)} AS DOUBLE)"
        if c.get("floor") is not None:
            x = f"GREATEST({x}, {float(c['floor'])!r})"
        if c.get("cap") is not None:
            x = f"LEAST({x}, {float(c['cap'])!r})"
        return x

    # ----------------------------------------------------------------- design

    def _supported_age(self, con, body: str, params) -> int:
        """The last loan age with at least ``tail_min_loan_months`` development loan-months (the youngest age
        when none has that many: then only that age is supported)."""
        need = int(self.baseline.get("tail_min_loan_months", 1))
        rows = con.execute(
            f"WITH data AS (\n{body}\n)\nSELECT age, count(*) AS n FROM data GROUP BY age ORDER BY age", list(params)
        ).fetchall()
        supported = [int(a) for a, n in rows if n >= need]
        return max(supported) if supported else int(rows[0][0])

    @property
    def age_cap(self) -> int | None:
        """The age the projection reads for every older month under ``tail: hold``: the last supported age
        (:meth:`learn`); ``None`` under ``extrapolate`` and for a model saved before the rule existed."""
        if self.baseline.get("tail") != "hold" or not self.learned or "supported_age" not in self.learned:
            return None
        return int(self.learned["supported_age"])

    def with_tail(self, rule: str) -> "FeatureSpec":
        """The same learned spec with the age-tail rule ``rule`` (``hold`` or ``extrapolate``)."""
        return dataclasses.replace(self, baseline={**self.baseline, "tail": rule})

    @property
    def derived_lags(self) -> dict[str, int]:
        """Months before the row's month of the house-price index (``hpi``) and market rate (``market_rate``)
        that current LTV and the rate incentive read; 0 for a model saved before the lags existed (it was
        fitted on the month's own values)."""
        return {
            "hpi": int(self.collateral.get("hpi_lag", 0)),
            "market_rate": int(self.collateral.get("market_rate_lag", 0)),
        }

    @property
    def panel_rules(self) -> list[dict]:
        """How each panel input (``panel:<column>:<lag>``) is filled and projected, one dict per input key.

        ``key``, ``column``, ``lag``; ``before_first`` (the value where a loan has no panel row ``lag``
        months earlier, or None) or ``before_first_column`` (the loan-table column giving it loan by
        loan, or None); ``projection`` (``hold``: months ahead keep the value at the reporting
        month; ``revert``: it moves in a straight line to ``revert_to`` over ``revert_months``, then stays).
        """
        out, seen = [], set()
        for c in self.covariates:
            if c.get("macro") or not int(c.get("lag", 0)) or input_key(c) in seen:
                continue
            seen.add(input_key(c))
            out.append({
                "key": input_key(c), "column": c["column"], "lag": int(c["lag"]), "before_first": c.get("before_first"),
                "before_first_column": c.get("before_first_column"),
                "projection": c.get("projection", "hold"), "revert_to": c.get("revert_to"),
                "revert_months": int(c.get("revert_months", 12)),
            })  # fmt: skip
        return out

    @property
    def required_inputs(self) -> list[str]:
        """Raw input names :meth:`design` reads: ``age`` and every input key."""
        return ["age", *(i.key for i in self.inputs())]

    def _require_learned(self) -> dict:
        if self.learned is None:
            raise FeatureError("the feature spec has not been learned; call learn(con, ...) first")
        return self.learned

    @property
    def columns(self) -> list[str]:
        """Design column names (after :meth:`learn`)."""
        return list(self._require_learned()["columns"])

    @property
    def baseline_columns(self) -> list[str]:
        """Design column names of the loan-age baseline (after :meth:`learn`), the intercept not included."""
        return self._baseline_names()

    def _baseline_names(self) -> list[str]:
        base, lrn = self.baseline, self._require_learned()
        kind = base.get("kind", "age_bands")
        if kind == "age_bands":
            return [f"age_band[{lab}]" for lab in lrn["band_labels"][1:]]
        if kind == "spline":
            return ["age_lin"] + [f"age_ns[{j}]" for j in range(1, len(base["knots"]) - 1)]
        if kind == "age_indicators":
            return [f"age[{a}]" for a in range(lrn["age_min"] + 1, lrn["max_age"] + 1)]
        return []

    def _term_names(self) -> dict[str, list[str]]:
        lrn = self._require_learned()
        out = {}
        for c in self.covariates:
            kind = c.get("kind", "numeric")
            if kind == "numeric":
                out[c["name"]] = [c["name"]]
            else:
                lv = lrn["covariates"][c["name"]]
                out[c["name"]] = [f"{c['name']}[{v}]" for v in lv["levels"] if v != lv["reference"]]
        return out

    def _column_names(self) -> list[str]:
        terms = self._term_names()
        names = ["intercept", *self._baseline_names()]
        for c in self.covariates:
            names += terms[c["name"]]
        for a, b in self.interactions:
            names += [f"{x}:{y}" for x in terms[a] for y in terms[b]]
        return names

    def indicator_groups(self) -> list[tuple[str, str, list[int]]]:
        """Sets of mutually exclusive indicator columns: ``(term, reference, column indices)``.

        The rows with every indicator of a set at zero are the term's reference
        level. Used by the fit to check each level has events of each cause.
        """
        names = self.columns
        idx = {n: i for i, n in enumerate(names)}
        groups = []
        base = self._baseline_names()
        kind = self.baseline.get("kind", "age_bands")
        if kind == "age_bands":
            groups.append(("age_band", f"age_band[{self.learned['band_labels'][0]}]", [idx[n] for n in base]))
        elif kind == "age_indicators":
            groups.append(("age", f"age[{self.learned['age_min']}]", [idx[n] for n in base]))
        terms = self._term_names()
        for c in self.covariates:
            if c.get("kind", "numeric") != "numeric":
                ref = self.learned["covariates"][c["name"]]["reference"]
                groups.append((c["name"], f"{c['name']}[{ref}]", [idx[n] for n in terms[c["name"]]]))
        return groups

    def design(self, raw) -> tuple[np.ndarray, list[str]]:
        """Evaluate the design matrix.

        Parameters
        ----------
        raw : dict of str to ndarray, or DataFrame
            ``age`` and every input key (see :meth:`inputs`), one value per row.

        Returns
        -------
        X : ndarray of float64, shape (n, p)
        names : list of str, length p

        Raises
        ------
        FeatureError
            A key is missing, a value is missing, a log argument is not
            positive, or a categorical level was not seen in training.
        """
        lrn = self._require_learned()
        if isinstance(raw, pd.DataFrame):
            raw = {c: raw[c].to_numpy() for c in raw.columns}
        if "age" not in raw:
            raise FeatureError("raw inputs lack 'age'")
        age = np.asarray(raw["age"], dtype=np.float64)
        n = age.shape[0]
        names = self.columns
        X = np.zeros((n, len(names)))
        base = self.baseline_design(age)
        X[:, : base.shape[1]] = base
        col = base.shape[1]
        term_cols: dict[str, np.ndarray] = {}
        for c in self.covariates:
            vals = self._term_values(c, raw, n, lrn)
            k = vals.shape[1]
            X[:, col: col + k] = vals
            term_cols[c["name"]] = X[:, col: col + k]
            col += k
        for a, b in self.interactions:
            A, B = term_cols[a], term_cols[b]
            for i in range(A.shape[1]):
                X[:, col: col + B.shape[1]] = A[:, i: i + 1] * B
                col += B.shape[1]
        return X, names

    def baseline_design(self, age) -> np.ndarray:
        """The intercept and loan-age baseline columns of the design for loan ages ``age``, shape (n, 1 + baseline)."""
        lrn = self._require_learned()
        age = np.asarray(age, dtype=np.float64)
        if np.isnan(age).any():
            raise FeatureError(f"age: {int(np.isnan(age).sum())} rows have no value")
        base = self.baseline
        kind = base.get("kind", "age_bands")
        X = np.zeros((age.shape[0], 1 + len(self.baseline_columns)))
        X[:, 0] = 1.0
        if kind == "age_bands":
            band = np.searchsorted(np.asarray(base["edges"], dtype=np.float64), age, side="right")
            rows = np.nonzero(band > 0)[0]
            X[rows, band[rows]] = 1.0
        elif kind == "spline":
            X[:, 1:] = natural_spline_basis(age, base["knots"])
        elif kind == "age_indicators":
            lo, hi = lrn["age_min"], lrn["max_age"]
            a = np.minimum(age, hi).astype(np.int64)
            rows = np.nonzero(a > lo)[0]
            X[rows, a[rows] - lo] = 1.0
        return X

    def _term_values(self, c, raw, n, lrn) -> np.ndarray:
        name = c["name"]
        key = input_key(c)
        if key not in raw:
            if key == "log_age":
                values = np.log(np.asarray(raw["age"], dtype=np.float64))
            else:
                raise FeatureError(f"covariate {name!r}: raw inputs lack {key!r} (have: {', '.join(sorted(raw))})")
        else:
            values = np.asarray(raw[key])
        if values.shape[0] != n:
            raise FeatureError(f"covariate {name!r}: {values.shape[0]} values for {n} rows")
        kind = c.get("kind", "numeric")
        if kind == "categorical":
            lv = lrn["covariates"][name]
            # The distinct values are matched to the levels, not every row: rows repeat few values.
            seen, distinct = pd.factorize(values)  # -1 where a row has no value
            missing = seen < 0
            if missing.any():
                raise FeatureError(f"covariate {name!r}: {int(missing.sum())} rows have no value for {key!r}")
            text = distinct.astype(object) if distinct.dtype.kind in "OUS" else distinct.astype(str).astype(object)
            level = pd.Index(lv["levels"], dtype=object).get_indexer(text)
            codes = level[seen]
            bad = level < 0
            if bad.any():
                unknown = sorted({str(v) for v in text[bad]})
                raise FeatureError(
                    f"covariate {name!r}: level(s) {unknown[:10]} were not seen in training "
                    f"(levels: {', '.join(lv['levels'])})"
                )
            return _indicators(codes, lv["levels"], lv["reference"])
        x = np.asarray(values, dtype=np.float64)
        nan = np.isnan(x)
        if nan.any():
            raise FeatureError(f"covariate {name!r}: {int(nan.sum())} rows have no value for {key!r}")
        if c.get("floor") is not None:
            x = np.maximum(x, float(c["floor"]))
        if c.get("cap") is not None:
            x = np.minimum(x, float(c["cap"]))
        if kind == "bins":
            lv = lrn["covariates"][name]
            codes = np.searchsorted(np.asarray(c["bins"], dtype=np.float64), x, side="right")
            return _indicators(codes, lv["levels"], lv["reference"])
        transform = c.get("transform", "none")
        if transform == "log":
            bad = int((x <= 0).sum())
            if bad:
                raise FeatureError(f"covariate {name!r}: log of non-positive values in {bad} rows; set floor: to a positive value")
            x = np.log(x)
        elif transform == "standardise":
            st = lrn["covariates"][name]
            x = (x - st["mean"]) / st["sd"]
        return x[:, None]


    # ----------------------------------------------------------------- projection grids

    def grid_predictors(self, beta, grid: "InputGrid") -> np.ndarray:
        """Linear predictors of a block of loans x months ahead, shape (K, n, H): the design times ``beta`` (p, K).

        Each term is evaluated at the grain its input varies at (:class:`InputGrid`): the intercept, the age
        baseline and age terms once per distinct age, loan inputs once per loan, month inputs once per month,
        and only the rest per cell; an interaction of two grains is evaluated per cell. The parts are then
        added cell by cell. Equal to ``design(raw) @ beta`` on the cells up to rounding (the order of the
        sum differs), with the same errors for missing or bad values.
        """
        lrn = self._require_learned()
        beta = np.asarray(beta, dtype=np.float64)
        ages = np.asarray(grid.ages, dtype=np.int64)
        n, H = ages.shape
        if beta.shape[0] != len(self.columns):
            raise FeatureError(f"coefficients have {beta.shape[0]} rows for {len(self.columns)} design columns")
        lo = int(ages.min()) if ages.size else 0
        table = np.arange(lo, (int(ages.max()) if ages.size else 0) + 1, dtype=np.float64)
        raw = {
            "age": {"age": table},
            "loan": dict(grid.loan),
            "month": dict(grid.month),
            "cell": {k: np.asarray(v).reshape(-1) for k, v in grid.cell.items()},
        }
        size = {"age": table.shape[0], "loan": n, "month": H, "cell": n * H}
        index = ages - lo
        in_interactions = {name for pair in self.interactions for name in pair}
        for c in self.covariates:  # an input given as loan part + month part, its term not affine in it: per cell
            key = input_key(c)
            if key in grid.loan_plus_month and (c["name"] in in_interactions or _affine(c) is None):
                loan_part, month_part = grid.loan_plus_month[key]
                raw["cell"][key] = (np.asarray(loan_part, dtype=np.float64)[:, None] + month_part[None, :]).reshape(-1)

        def grain(key: str) -> str:
            if key in ("age", "log_age"):
                return "age"
            for g in ("loan", "month", "cell"):
                if key in raw[g]:
                    return g
            if key in grid.loan_plus_month:
                return "loan_plus_month"
            have = sorted({k for g in raw.values() for k in g} | set(grid.loan_plus_month))
            raise FeatureError(f"grid inputs lack {key!r} (have: {', '.join(have)})")

        def per_cell(g: str, values: np.ndarray) -> np.ndarray:
            if g == "age":
                return values[index.reshape(-1)]
            if g == "loan":
                return np.repeat(values, H, axis=0)
            if g == "month":
                return np.tile(values, (n, 1))
            return values

        blocks = {g: ([], []) for g in size}  # grain -> (design column indices, value blocks)
        base = self.baseline_design(table)
        blocks["age"][0].extend(range(base.shape[1]))
        blocks["age"][1].append(base)
        col = base.shape[1]
        terms = {}
        for c in self.covariates:
            key = input_key(c)
            g = grain(key)
            if g == "loan_plus_month":
                # a term a x + b of an input x = loan part + month part: a x_loan + b per loan, a x_month per month
                loan_part, month_part = grid.loan_plus_month[key]
                scale = _affine(c)(lrn)
                values = self._term_values(c, {key: loan_part}, n, lrn)
                month_values = self._term_values({**c, "transform": "none"}, {key: month_part}, H, lrn) * scale
                for part, vals in (("loan", values), ("month", month_values)):
                    blocks[part][0].append(col)
                    blocks[part][1].append(vals)
                col += 1
                continue
            values = self._term_values(c, raw[g], size[g], lrn)
            terms[c["name"]] = (g, values)
            blocks[g][0].extend(range(col, col + values.shape[1]))
            blocks[g][1].append(values)
            col += values.shape[1]
        for a, b in self.interactions:
            (ga, A), (gb, B) = terms[a], terms[b]
            g = ga
            if ga != gb:
                A, B, g = per_cell(ga, A), per_cell(gb, B), "cell"
            for i in range(A.shape[1]):
                blocks[g][0].extend(range(col, col + B.shape[1]))
                blocks[g][1].append(A[:, i : i + 1] * B)
                col += B.shape[1]
        parts = {
            g: np.concatenate(vals, axis=1) @ beta[cols] for g, (cols, vals) in blocks.items() if cols and g != "cell"
        }  # (size of the grain, K)
        K = beta.shape[1]
        out = np.empty((K, n, H))
        for k in range(K):
            np.take(parts["age"][:, k], index, out=out[k])
            if "loan" in parts:
                out[k] += parts["loan"][:, k, None]
            if "month" in parts:
                out[k] += parts["month"][None, :, k]
        # the per-cell columns one by one (a product with an inner dimension of a few columns is slow in BLAS)
        flat = out.reshape(K, n * H)
        cell_columns = iter(blocks["cell"][0])
        for values in blocks["cell"][1]:
            for v in values.T:
                b = beta[next(cell_columns)]
                for k in range(K):
                    flat[k] += b[k] * v
        return out


@dataclass(frozen=True)
class InputGrid:
    """The raw inputs of a block of ``n`` loans x ``H`` months ahead, each held at the grain it varies at.

    ``ages`` (n, H) int is the loan age of each cell (the inputs ``age`` and ``log_age`` are read from it);
    ``loan`` holds the inputs constant over a loan's months, arrays (n,); ``month`` the inputs common to
    every loan of the block, arrays (H,) by month ahead; ``cell`` the inputs that vary by loan and month,
    arrays (n, H); ``loan_plus_month`` the inputs that are the sum of a loan part (n,) and a month part
    (H,), as pairs (the rate incentive: the note rate less the month's market rate). A term affine in
    such an input (numeric, standardised or not, no floor, cap or interaction) is evaluated per loan
    and per month; any other, per cell. Every cell must hold a valid value, also cells past a loan's
    maturity (they are evaluated, then left out by the caller).
    """

    ages: np.ndarray
    loan: Mapping[str, np.ndarray] = field(default_factory=dict)
    month: Mapping[str, np.ndarray] = field(default_factory=dict)
    cell: Mapping[str, np.ndarray] = field(default_factory=dict)
    loan_plus_month: Mapping[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)


def _affine(c: dict):
    """For a covariate whose term is a x + b in its input x (numeric, no floor or cap, no log): a function of the
    learned constants giving ``a``; else None."""
    if c.get("kind", "numeric") != "numeric" or c.get("floor") is not None or c.get("cap") is not None:
        return None
    transform = c.get("transform", "none")
    if transform == "none":
        return lambda lrn: 1.0
    if transform == "standardise":
        return lambda lrn: 1.0 / lrn["covariates"][c["name"]]["sd"]
    return None


def _example_loans(con, body: str, params, condition: str, limit: int = 5) -> str:
    """``"loans 12, 15, 99 and 4 more"``: the first loans (by id) of the rows where ``condition`` holds."""
    rows = con.execute(
        f"WITH data AS (\n{body}\n)\nSELECT loan_id, count(*) OVER () FROM data WHERE {condition} "
        f"GROUP BY loan_id ORDER BY loan_id LIMIT {limit}",
        list(params),
    ).fetchall()
    if not rows:
        return ""
    more = rows[0][1] - len(rows)
    return f"loans {', '.join(str(r[0]) for r in rows)}" + (f" and {more:,} more" if more > 0 else "")


def _indicators(codes: np.ndarray, levels: list[str], reference: str) -> np.ndarray:
    keep = [j for j, v in enumerate(levels) if v != reference]
    out = np.zeros((codes.shape[0], len(keep)))
    pos = np.full(len(levels), -1)
    pos[keep] = np.arange(len(keep))
    col = pos[codes]
    rows = np.nonzero(col >= 0)[0]
    out[rows, col[rows]] = 1.0
    return out


def _learn_numeric(numeric, values) -> tuple[dict, list[str]]:
    """Standardisation constants and log checks from the summary values of the numeric covariates.

    ``values`` holds, in the order of ``numeric``, a mean and an sd for each
    standardised covariate and a count of non-positive values for each logged one.
    """
    learned, problems = {}, []
    pos = 0
    for c, what in numeric:
        if what == "std":
            mean, sd = values[pos], values[pos + 1]
            pos += 2
            if sd is None or not sd > 0:
                problems.append(f"covariate {c['name']!r}: cannot standardise, the values do not vary (sd = {sd})")
            else:
                learned[c["name"]] = {"mean": float(mean), "sd": float(sd)}
        else:
            bad = values[pos]
            pos += 1
            if bad:
                problems.append(
                    f"covariate {c['name']!r}: log of non-positive values in {bad} rows; set floor: to a positive value"
                )
    return learned, problems


def _band_labels(edges) -> list[str]:
    e = [int(x) for x in edges]
    labels = [f"1-{e[0] - 1}" if e[0] > 2 else "1"]
    for lo, hi in zip(e, e[1:]):
        labels.append(f"{lo}-{hi - 1}" if hi - 1 > lo else f"{lo}")
    labels.append(f"{e[-1]}+")
    return labels




def _duplicates(names) -> list[str]:
    seen, dup = set(), []
    for n in names:
        if n in seen:
            dup.append(n)
        seen.add(n)
    return dup


def _derived_needs(col: str, coll: dict, loans: list[str]) -> str:
    if col == "current_ltv":
        need = []
        if not coll.get("hpi_series"):
            need.append("collateral.hpi_series")
        if not coll.get("region_column"):
            need.append("collateral.region_column")
        elif coll["region_column"] not in loans:
            need.append(f"loan-table column {coll['region_column']!r}")
        if "property_value" not in loans:
            need.append("loan-table column 'property_value'")
        return "needs " + ", ".join(need)
    if col == "rate_incentive":
        return "needs collateral.market_rate_series and the loan-table column 'note_rate'"
    return "unavailable"


def feature_spec(model, collateral=None) -> FeatureSpec:
    """Build a :class:`FeatureSpec` from the config's ``model`` (a ``ModelSpec``) and ``collateral``.

    The config was checked when it was read (bin references, interaction
    names); problems that need the data are raised by :meth:`FeatureSpec.learn`.
    """
    covs = []
    for c in model.covariates:
        d = {
            "name": c.name,
            "column": c.column,
            "macro": c.macro,
            "lag": int(c.lag),
            "kind": c.kind,
            "transform": c.transform,
            "floor": c.floor,
            "cap": c.cap,
            "bins": [float(b) for b in c.bins],
            "reference": c.reference,
        }
        if c.column is not None and c.lag:  # a panel column at a lag: how it is filled and projected
            d.update(before_first=c.before_first, projection=c.projection, revert_to=c.revert_to, revert_months=int(c.revert_months))
            if c.before_first_column is not None:
                d["before_first_column"] = c.before_first_column
        covs.append(d)
    b = model.baseline
    baseline = {
        "kind": b.kind, "edges": [int(e) for e in b.edges], "knots": [float(k) for k in b.knots], "max_age": b.max_age,
        "tail": b.tail, "tail_min_loan_months": int(b.tail_min_loan_months),
    }  # fmt: skip
    coll = {}
    if collateral is not None:
        coll = {
            "region_column": collateral.region_column,
            "hpi_series": collateral.hpi_series,
            "market_rate_series": collateral.market_rate_series,
            "hpi_lag": int(collateral.hpi_lag),
            "market_rate_lag": int(collateral.market_rate_lag),
        }
    return FeatureSpec(
        baseline=baseline,
        covariates=tuple(covs),
        interactions=tuple(tuple(p) for p in model.interactions),
        collateral=coll,
    )


class SpecInputs:
    """What a fitted model tells the projection about its inputs, read from its ``spec`` (a :class:`FeatureSpec`):
    the hazard-source protocol's ``required_inputs``, ``panel_rules``, ``derived_lags`` and ``age_cap``."""

    spec: FeatureSpec

    @property
    def required_inputs(self) -> list[str]:
        """Raw input names the model reads (the projection's hazard-source protocol)."""
        return self.spec.required_inputs

    @property
    def panel_rules(self) -> list[dict]:
        """How each panel input is filled and projected (see :attr:`FeatureSpec.panel_rules`)."""
        return self.spec.panel_rules

    @property
    def derived_lags(self) -> dict[str, int]:
        """The lags of the index and rate behind current LTV and the rate incentive (see :attr:`FeatureSpec.derived_lags`)."""
        return self.spec.derived_lags

    @property
    def age_cap(self) -> int | None:
        """The oldest age the projection reads (see :attr:`FeatureSpec.age_cap`); ``None`` to extrapolate."""
        return self.spec.age_cap
