"""Project live loans forward: covariates, hazards, survival and cumulative incidence.

For a loan alive at age ``a`` at the reporting (as-of) month, projection walks
the future months ``u = 1 .. term - a`` (loan age ``a + u``, calendar month
``as_of + u``), evolves the covariates of each month and asks a *hazard source*
for the monthly default and prepayment probabilities.

Hazard source protocol
----------------------
Any object with

- ``required_inputs``: list of raw input names needed per loan-month:
  ``age``, ``log_age``, ``current_ltv``, ``rate_incentive``, a static loan
  column (``credit_score``, ``region`` ...), or a macro series at a lag,
  ``macro:<series>:<lag>`` (value of ``<series>`` in calendar month
  ``month - lag``);
- ``hazards(raw: dict[str, ndarray]) -> (h_default, h_prepay)``: monthly
  probabilities, flat arrays as long as the inputs.

Chunks of loans are projected in several threads or forked processes at once, so
``hazards`` must be a function of its inputs alone (safe to call from two threads). A fitted model
also offers a fast route, ``grid_hazards(grid)`` (or ``grid_transitions`` for a
multi-state model): the inputs as an :class:`~creditsurv.model.InputGrid`, each
held at the grain it varies at (per age, loan, month or loan-month), so that most
of the linear predictor is evaluated once per age, loan or month instead of once
per loan-month. A source without it gets the flat arrays above.

Covariates of future month u
----------------------------
- age ``a + u``; ``log_age = log(a + u)``;
- scheduled balance: the actual as-of balance amortised as a level payment
  over the remaining ``term - a`` months at the note rate;
- ``current_ltv`` = scheduled balance at the start of month u /
  (property value x HPI_region(month) / HPI_region(origination month));
- ``rate_incentive`` = 100 x note rate - market rate(month), percentage points;
- macro series from the scenario path at their lags; static columns held.

Curves (DESIGN.md, Aalen-Johansen form in discrete time), conditional on S(0) = 1:
S(u) = prod_{v<=u} (1 - hD(v) - hP(v)); F_D(u) = sum_{v<=u} S(v-1) hD(v);
F_P likewise; marginal PD(u) = S(v-1) hD(u).  The probability-weighted
scenario ``weighted`` is sum_s w_s x curve_s (linear in probabilities).

Memory is bounded by a chunk of loans: long tables (loan x scenario x month)
leave through writer callbacks chunk by chunk; only per-loan summaries and
segment aggregates stay in memory.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..config import WEIGHTED, Collateral, ScenarioWeights
from ..data import PREVIOUSLY_DEFAULTED
from ..errors import ConfigError, ModelError, ProjectionError, problem_list
from ..model import (
    InputGrid,
    chunk_map,
    equivalent_psa,
    equivalent_sda,
    hpi_series_name,
    mdr_to_cdr,
    parse_macro_key,
    parse_panel_key,
    scheduled_balance,
    smm_to_cpr,
    worth_forking,
)
from ..months import month_ranges
from ._chain import chain_of_moves, markov_chain
from ._scenarios import OriginationPaths

__all__ = [
    "CHUNK_SIZE",
    "remaining_term",
    "Curves",
    "MixedCurves",
    "project_loans",
    "origination_pd",
    "ProjectionResult",
    "SegmentSums",
    "ChunkProjection",
    "TableWriter",
    "MacroLookup",
    "WEIGHTED",
]


_DERIVED = ("age", "log_age", "current_ltv", "rate_incentive")

CHUNK_SIZE = 256
"""Loans per chunk of a projection by default: a chunk's (loans x months) arrays of about 0.7 MB stay in a core's
cache, which makes the chunk's many elementwise passes several times faster than larger chunks."""
SUM_BLOCK = 8
"""Chunks whose pooled sums are added together before they join the totals: a worker sends back a block's sums
once (a chunk's are nearly a megabyte), and every route adds them in these same blocks, so the sums keep their
bits for any number of workers."""


# --------------------------------------------------------------------------- macro lookups


class MacroLookup:
    """Dense month-indexed arrays of one scenario's macro series (values NaN when absent)."""

    def __init__(self, frame: pd.DataFrame):
        idx = frame.index.to_numpy(dtype=np.int64)
        self.start = int(idx.min()) if len(idx) else 0
        self.stop = int(idx.max()) + 1 if len(idx) else 0
        dense = frame.reindex(np.arange(self.start, self.stop))
        self._values = {c: dense[c].to_numpy(dtype=float) for c in frame.columns}
        self._tables = {}  # series names -> their values stacked (get_by_row)

    @classmethod
    def from_values(cls, start: int, values: np.ndarray, columns) -> MacroLookup:
        """The lookup of dense values (months x series) whose first row is month ``start``."""
        out = cls.__new__(cls)
        out.start, out.stop = int(start), int(start) + values.shape[0]
        out._values = {c: np.ascontiguousarray(values[:, j]) for j, c in enumerate(columns)}
        out._tables = {}
        return out

    def __contains__(self, series: str) -> bool:
        return series in self._values

    def missing(self, series: str, months) -> list[int]:
        """Months (indices) in ``months`` where ``series`` has no value."""
        months = np.unique(np.asarray(months, dtype=np.int64))
        if series not in self._values:
            return months.tolist()
        inside = (months >= self.start) & (months < self.stop)
        bad = months[~inside].tolist()
        vals = self._values[series][months[inside] - self.start]
        return sorted(bad + months[inside][np.isnan(vals)].tolist())

    def _positions(self, months) -> np.ndarray:
        """Rows of the dense arrays for month indices ``months``, a new array (held inside the table: the months
        were checked beforehand, and a position outside would only read a value the check refused)."""
        pos = np.asarray(months, dtype=np.int64) - self.start
        return np.clip(pos, 0, max(self.stop - self.start - 1, 0), out=pos)

    def get(self, series: str, months) -> np.ndarray:
        """Values of ``series`` at month indices ``months`` (any shape; checked beforehand)."""
        return self._values[series].take(self._positions(months))

    def get_by_row(self, series, codes: np.ndarray, months: np.ndarray) -> np.ndarray:
        """Values at ``months`` (n, ...) of the series ``series[codes[i]]`` for row i: one series per row (a region's
        index), read in one pass."""
        key = tuple(series)
        table = self._tables.get(key)
        if table is None:
            table = self._tables[key] = np.stack([self._values[name] for name in series])
        pos = self._positions(months)
        # one gather from the stacked table (a row per series, a column per month) at flat positions: twice as
        # fast as indexing it with two index arrays
        pos += (np.asarray(codes, dtype=np.int64) * table.shape[1]).reshape((-1,) + (1,) * (pos.ndim - 1))
        return table.ravel().take(pos)


# --------------------------------------------------------------------------- inputs

DERIVED_LAGS = {"hpi": Collateral().hpi_lag, "market_rate": Collateral().market_rate_lag}
"""The lags of current LTV's index and the rate incentive's market rate for a source that does not state
its own (``derived_lags``): the config's defaults, the previous month-end."""


@dataclass(frozen=True)
class _Spec:
    names: tuple[str, ...]
    macro: tuple[tuple[str, str, int], ...]  # (input name, series, lag)
    static: tuple[str, ...]
    ltv: bool
    incentive: bool
    panel: tuple[dict, ...] = ()  # panel inputs at a lag: the source's panel_rules
    hpi_lag: int = DERIVED_LAGS["hpi"]  # months before the row's month of the index current LTV reads
    rate_lag: int = DERIVED_LAGS["market_rate"]  # ... and of the market rate the rate incentive reads


def _parse_inputs(required, loan_columns, source=None) -> _Spec:
    macro, static, panel, problems = [], [], [], []
    rules = {r["key"]: r for r in getattr(source, "panel_rules", [])}
    for name in required:
        if name in _DERIVED:
            continue
        try:
            parsed = parse_macro_key(name)
            in_panel = parse_panel_key(name)
        except ValueError as exc:
            problems.append(str(exc))
            continue
        if parsed is not None:
            macro.append((name, *parsed))
        elif in_panel is not None:
            column, lag = in_panel
            panel.append(rules.get(name, {"key": name, "column": column, "lag": lag, "before_first": None, "projection": "hold"}))
        elif name in loan_columns:
            static.append(name)
        else:
            problems.append(f"{name!r}: not a derived input {list(_DERIVED)}, a macro:<series>:<lag> or a loan column")
    if problems:
        raise ProjectionError(problem_list(problems, "the inputs the hazard source needs"))
    lags = {**DERIVED_LAGS, **getattr(source, "derived_lags", {})}
    return _Spec(
        tuple(required), tuple(macro), tuple(static), "current_ltv" in required, "rate_incentive" in required,
        tuple(panel), int(lags["hpi"]), int(lags["market_rate"]),
    )


def panel_history_name(column: str, months_before: int) -> str:
    """The loans-frame column holding a panel column's value ``months_before`` months before the start month."""
    return f"{column}@-{int(months_before)}"


def panel_history_columns(source) -> list[tuple[str, int]]:
    """``(column, months_before)`` of every panel value a projection of ``source`` reads from history.

    A panel input at lag L reads, in month u ahead, the value at the end of month u - L: for u <= L
    that month is history (0 ... L - 1 months before the start month), after it the projection rule.
    """
    out = []
    for rule in getattr(source, "panel_rules", []):
        out += [(rule["column"], j) for j in range(rule["lag"])]
    return sorted(set(out))


def with_panel_history(loans: pd.DataFrame, history: pd.DataFrame, source, start_idx: int) -> pd.DataFrame:
    """``loans`` with the panel values a projection of ``source`` reads from history, as named columns.

    Parameters
    ----------
    history : DataFrame
        ``loan_id``, ``month_idx`` and the panel columns, for the months up to ``start_idx``.
    start_idx : int
        The month the projection starts from (the reporting month).

    A loan without a panel row in a month takes the input's ``before_first`` value; without one it stays
    missing, and the projection names the loan.
    """
    needed = panel_history_columns(source)
    if not needed:
        return loans
    rules = {r["column"]: r for r in source.panel_rules}
    out = loans.copy()
    for column, j in needed:
        rows = history[history["month_idx"] == start_idx - j]
        values = rows.set_index("loan_id")[column].reindex(out["loan_id"]).to_numpy(dtype=float)
        values = np.where(np.isnan(values), _before_first(rules.get(column, {}), out), values)
        out[panel_history_name(column, j)] = values
    return out


def _before_first(rule: dict, loans: pd.DataFrame) -> np.ndarray:
    """Per loan, the value of a panel input where the loan has no panel row: ``before_first``, the loan-table
    column ``before_first_column``, or NaN (then the projection names the loans)."""
    if rule.get("before_first") is not None:
        return np.full(len(loans), float(rule["before_first"]))
    column = rule.get("before_first_column")
    if column is not None:
        if column not in loans.columns:
            raise ProjectionError(f"loans: no column {column!r} (before_first_column of panel column {rule['column']!r})")
        return loans[column].to_numpy(dtype=float, na_value=np.nan)
    return np.full(len(loans), np.nan)


def remaining_term(age, term) -> np.ndarray:
    """Months left to project: ``term - age``, and 1 for a loan at or past its term with a balance left.

    Such a loan (a balloon, an extension, arrears at maturity) still owes its balance: the rule is that
    the whole balance falls due at the end of the next month, so it is projected over one month, its
    default risk that month's hazard and its exposure the whole balance.
    """
    return np.maximum(np.asarray(term, dtype=np.int64) - np.asarray(age, dtype=np.int64), 1)


def loan_list_text(values) -> str:
    values = list(values)
    head = ", ".join(map(str, values[:5]))
    return f"{len(values)} loan{'s' if len(values) != 1 else ''} ({head}{', ...' if len(values) > 5 else ''})"


def _has_repeats(ids: pd.Series) -> bool:
    """Whether a loan id appears twice. Books come sorted by loan id (the ECL's is): then neighbours are compared,
    which is many times faster than hashing Arrow-backed strings (``duplicated``, ``is_unique``)."""
    if ids.is_monotonic_increasing:
        values = ids.to_numpy()
        return bool((values[1:] == values[:-1]).any())
    return not ids.is_unique


def _check_loans(loans: pd.DataFrame, needed: Sequence[str], *, balance_col: str, age_col: str | None) -> None:
    missing = [c for c in needed if c not in loans.columns]
    if missing:
        raise ProjectionError(f"loans: missing column(s) {missing}; have {list(loans.columns)}")
    ids = loans["loan_id"]
    if _has_repeats(ids):
        raise ProjectionError(f"loans: loan_id repeated for {loan_list_text(ids[ids.duplicated()].unique())}")
    problems = []
    for col in needed:
        if col in ("loan_id", "segment") or not pd.api.types.is_numeric_dtype(loans[col]):
            continue
        bad = loans[col].isna().to_numpy()
        if bad.any():
            problems.append(f"column {col!r} is missing for {loan_list_text(ids[bad])}")
    if problems:
        raise ProjectionError("loans: " + "; ".join(problems))
    rate = loans["note_rate"].to_numpy(dtype=float)
    if (rate < 0).any():
        raise ProjectionError(f"loans: negative note rate for {loan_list_text(ids[rate < 0])}")
    term = loans["term"].to_numpy()
    if age_col is not None:
        age = loans[age_col].to_numpy()
        if (age < 0).any():
            raise ProjectionError(f"loans: negative age for {loan_list_text(ids[age < 0])}")
    elif (term < 1).any():
        raise ProjectionError(f"loans: term below 1 month for {loan_list_text(ids[term < 1])}")
    bal = loans[balance_col].to_numpy(dtype=float)
    if (bal < 0).any():
        raise ProjectionError(f"loans: negative {balance_col} for {loan_list_text(ids[bal < 0])}")


def _hpi_names(regions, hpi_series: str) -> list[str]:
    return [hpi_series_name(hpi_series, r) for r in regions]


def check_coverage(lookups: Mapping[str, MacroLookup], needs: Mapping[str, np.ndarray]) -> None:
    problems = []
    for scen, lk in lookups.items():
        for series, months in needs.items():
            if series not in lk:
                problems.append(f"scenario {scen!r}: series {series!r} is not in the path or history")
                continue
            bad = lk.missing(series, months)
            if bad:
                problems.append(f"scenario {scen!r}: series {series!r} has no value in months {month_ranges(bad)}")
    if problems:
        raise ProjectionError(problem_list(problems, "the macro paths of the projection"))


# --------------------------------------------------------------------------- the chunk kernel


@dataclass
class _Book:
    """Loans as numpy arrays, sorted by loan_id."""

    frame: pd.DataFrame
    loan_id: np.ndarray
    age: np.ndarray
    remaining: np.ndarray
    rate: np.ndarray
    balance: np.ndarray
    start_idx: np.ndarray  # calendar month of month_ahead 0
    orig_idx: np.ndarray | None
    value: np.ndarray | None
    region_code: np.ndarray | None
    static: dict[str, np.ndarray]
    state: np.ndarray  # arrears state at month_ahead 0 (0 current), for a multi-state source
    panel: dict  # panel input key -> (n, lag) values at months 0 ... lag - 1 before month_ahead 0
    from_rows: np.ndarray | None = None  # the row of the given loans (sorted by loan id) each row is, when known


def _on_grid(source) -> bool:
    """Whether ``source`` takes the fast route: its inputs as an :class:`~creditsurv.model.InputGrid`."""
    return hasattr(source, "grid_transitions") if hasattr(source, "transition_probabilities") else hasattr(source, "grid_hazards")


def _hazards_chunk(book: _Book, sl: slice, spec: _Spec, source, lookups, hpi_names, market_rate, hold: bool):
    """Hazards (n, H) per scenario for the loans in ``sl``; also the chunk's geometry."""
    if _on_grid(source) and not hold:
        return _grid_chunk(book, sl, spec, source, lookups, hpi_names, market_rate)
    rem = book.remaining[sl]
    n = len(rem)
    H = int(rem.max())
    u = np.arange(1, H + 1)
    mask = u[None, :] <= rem[:, None]
    age0 = book.age[sl]
    rate = book.rate[sl]
    k = np.arange(0, H + 1)
    bal = scheduled_balance(book.balance[sl][:, None], rate[:, None], rem[:, None], k[None, :])
    bal_start, bal_end = bal[:, :-1], bal[:, 1:]
    cal = book.start_idx[sl][:, None] + u[None, :]
    counts = rem
    raw_common = {}
    if "age" in spec.names or "log_age" in spec.names:
        ages = (age0[:, None] + u[None, :])[mask].astype(float)
        cap = getattr(source, "age_cap", None)
        if cap is not None:  # the age-tail rule hold: older months read the last supported age
            ages = np.minimum(ages, float(cap))
        if "age" in spec.names:
            raw_common["age"] = ages
        if "log_age" in spec.names:
            raw_common["log_age"] = np.log(ages)
    for col in spec.static:
        raw_common[col] = np.repeat(book.static[col][sl], counts)
    for rule in spec.panel:
        raw_common[rule["key"]] = _panel_path(rule, book.panel[rule["key"]][sl], H)[mask]
    lookup_months = np.broadcast_to(book.start_idx[sl][:, None], (n, H)) if hold else cal
    lookup_flat = lookup_months[mask]
    out, states = {}, {}
    for scen, lk in lookups.items():
        raw = dict(raw_common)
        for name, series, lag in spec.macro:
            raw[name] = lk.get(series, lookup_flat - lag)
        if spec.ltv:
            codes = book.region_code[sl]
            hpi_now = np.empty((n, H))
            hpi_orig = np.empty(n)
            orig = book.orig_idx[sl]
            # the index as of the start of the month (spec.hpi_lag earlier), never before the valuation at origination
            hpi_months = np.maximum(lookup_months - spec.hpi_lag, orig[:, None])
            for c in np.unique(codes):
                rows = codes == c
                hpi_now[rows] = lk.get(hpi_names[c], hpi_months[rows])
                hpi_orig[rows] = lk.get(hpi_names[c], orig[rows])
            value_now = book.value[sl][:, None] * hpi_now / hpi_orig[:, None]
            raw["current_ltv"] = (bal_start / value_now)[mask]
        if spec.incentive:
            raw["rate_incentive"] = (100.0 * rate[:, None] - lk.get(market_rate, lookup_months - spec.rate_lag))[mask]
        raw = {name: raw[name] for name in spec.names}
        if hasattr(source, "transition_probabilities"):
            hd_chain, hp_chain, states[scen] = _chain_hazards(source, raw, mask, book.state[sl])
            hd_flat, hp_flat = hd_chain[mask], hp_chain[mask]
        else:
            hd_flat, hp_flat = source.hazards(raw)
        hd_flat = np.asarray(hd_flat, dtype=float)
        hp_flat = np.asarray(hp_flat, dtype=float)
        size = int(mask.sum())
        if hd_flat.shape != (size,) or hp_flat.shape != (size,):
            raise ProjectionError(
                f"hazard source returned shapes {hd_flat.shape}, {hp_flat.shape}; expected ({size},) each"
            )
        ok = (hd_flat >= 0) & (hp_flat >= 0) & (hd_flat + hp_flat <= 1.0 + 1e-12)  # False for NaN
        if not ok.all():
            bad = np.zeros((n, H), dtype=bool)
            bad[mask] = ~ok
            raise _bad_hazards(scen, book.loan_id[sl], bad, cal)
        hd = np.zeros((n, H))
        hp = np.zeros((n, H))
        hd[mask] = hd_flat
        hp[mask] = hp_flat
        out[scen] = (hd, hp)
    return out, mask, bal_start, bal_end, cal, states or None


def _grid_chunk(book: _Book, sl: slice, spec: _Spec, source, lookups, hpi_names, market_rate):
    """:func:`_hazards_chunk` for a source that reads an :class:`~creditsurv.model.InputGrid`.

    Each input is held at the grain it varies at: static loan columns (and a panel input that is held
    from the first month) once per loan; macro series once per month when the chunk's loans share
    their start month (always, here: the reporting month, or one origination month); the rate incentive
    then as the note rate (per loan) less the market rate (per month); current LTV and panel paths per
    loan and month. Cells past a loan's maturity get valid values
    (its first month's) and zero hazards, as on the general route.
    """
    rem = book.remaining[sl]
    H = int(rem.max())
    u = np.arange(1, H + 1)
    mask = u[None, :] <= rem[:, None]
    rate = book.rate[sl]
    bal = scheduled_balance(book.balance[sl][:, None], rate[:, None], rem[:, None], np.arange(0, H + 1)[None, :])
    bal_start, bal_end = bal[:, :-1], bal[:, 1:]
    start = book.start_idx[sl]
    cal = start[:, None] + u[None, :]
    shared_start = bool((start == start[0]).all())
    ages = book.age[sl][:, None] + u[None, :]
    cap = getattr(source, "age_cap", None)
    if cap is not None:  # the age-tail rule hold: older months read the last supported age
        np.minimum(ages, int(cap), out=ages)
    loan = {col: book.static[col][sl] for col in spec.static}
    cell = {}
    for rule in spec.panel:
        if rule.get("projection", "hold") == "hold" and rule["lag"] <= 1:  # every month reads the last value
            loan[rule["key"]] = book.panel[rule["key"]][sl][:, 0]
        else:
            cell[rule["key"]] = _panel_path(rule, book.panel[rule["key"]][sl], H)
    beyond = ~mask

    def macro(lk, series, lag):
        if shared_start:
            return "month", lk.get(series, int(start[0]) + u - lag)
        values = lk.get(series, cal - lag)
        np.copyto(values, values[:, :1], where=beyond)
        return "cell", values

    out, states = {}, {}
    for scen, lk in lookups.items():
        grains = {"loan": loan, "month": {}, "cell": dict(cell), "loan_plus_month": {}}
        for name, series, lag in spec.macro:
            g, values = macro(lk, series, lag)
            grains[g][name] = values
        if spec.ltv:
            codes = book.region_code[sl]
            orig = book.orig_idx[sl]
            # balance / (value x index now / index at origination), the index as of the start of the month
            # (spec.hpi_lag earlier) and never before the valuation at origination
            per_point = lk.get_by_row(hpi_names, codes, orig) / book.value[sl]
            if shared_start and (orig <= start[0] + 1 - spec.hpi_lag).all():
                # no month reads before a valuation: each region's months once, a row of them per loan
                regions = np.arange(len(hpi_names))
                months = np.broadcast_to(int(start[0]) + u - spec.hpi_lag, (len(hpi_names), H))
                hpi_now = lk.get_by_row(hpi_names, regions, months).take(codes, axis=0)
            else:
                hpi_now = lk.get_by_row(hpi_names, codes, np.maximum(cal - spec.hpi_lag, orig[:, None]))
            ltv = bal_start * per_point[:, None]
            ltv /= hpi_now
            np.copyto(ltv, ltv[:, :1], where=beyond)
            grains["cell"]["current_ltv"] = ltv
        if spec.incentive:
            g, market = macro(lk, market_rate, spec.rate_lag)
            if g == "month":  # the note rate less the month's market rate: a loan part plus a month part
                grains["loan_plus_month"]["rate_incentive"] = (100.0 * rate, -market)
            else:
                grains["cell"]["rate_incentive"] = 100.0 * rate[:, None] - market
        grid = InputGrid(ages=ages, **grains)
        if hasattr(source, "grid_transitions"):
            hd, hp, states[scen] = _grid_chain_hazards(source, grid, mask, book.state[sl])
        else:
            hd, hp = source.grid_hazards(grid)
        # every cell within [0, 1] and summing to at most 1 (min and max are NaN when a cell is): cheap when all are
        fine = hd.min() >= 0 and hp.min() >= 0 and np.add(hd, hp).max() <= 1.0 + 1e-12
        if not fine and not ((hd >= 0) & (hp >= 0) & (hd + hp <= 1.0 + 1e-12) | beyond).all():
            raise _bad_hazards(scen, book.loan_id[sl], mask & ~((hd >= 0) & (hp >= 0) & (hd + hp <= 1.0 + 1e-12)), cal)
        np.copyto(hd, 0.0, where=beyond)
        np.copyto(hp, 0.0, where=beyond)
        out[scen] = (hd, hp)
    return out, mask, bal_start, bal_end, cal, states or None


def _bad_hazards(scenario: str, loan_id: np.ndarray, bad: np.ndarray, cal: np.ndarray) -> ModelError:
    """The error for the cells ``bad`` (loans x months) whose hazards are not probabilities, naming loans and months."""
    return ModelError(
        f"scenario {scenario!r}: the model gave hazards that are not finite, outside [0, 1] or summing above 1 "
        f"for {loan_list_text(loan_id[bad.any(axis=1)])} in months {month_ranges(np.unique(cal[bad]))}; "
        "the model cannot be trusted for these loans (check its coefficients and the inputs of those months)"
    )


def _grid_chain_hazards(source, grid, mask, start) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_chain_hazards` on the fast route: each origin state's moves from the source's grid, then the chain."""
    states = list(source.states)
    T, S = len(source.labels), len(states)
    if start.size and int(start.max()) >= T:
        raise ProjectionError(f"a loan starts in arrears state {int(start.max())} but the model has {T} states ({', '.join(source.labels)})")
    beyond = ~mask
    moves = {}
    for j, origin in enumerate(source.labels):
        rows = source.grid_transitions(grid, origin)
        moves |= {(j, s): p for s, p in rows.items()}
        if j not in rows:
            moves[(j, j)] = np.zeros(mask.shape)
    # every probability finite and not negative (a NaN fails both): cheap when all are; else cell by cell
    finite = np.ones(mask.shape, dtype=bool)
    if not all(p.min() >= 0 and p.max() < np.inf for p in moves.values()):
        for p in moves.values():
            finite &= np.isfinite(p) & (p >= 0)
            np.copyto(p, 0.0, where=~np.isfinite(p))
        finite |= beyond
    for (j, s), p in moves.items():
        np.copyto(p, 1.0 if s == j else 0.0, where=beyond)  # after a loan's term nothing moves
    chain = chain_of_moves(moves, start, S)
    hazards = chain.hazards()
    hd, hp = hazards[:, :, states.index("default") - T], hazards[:, :, states.index("prepaid") - T]
    # a month whose transition probabilities are not finite probabilities must not pass as a hazard
    return np.where(finite, hd, np.nan), np.where(finite, hp, np.nan), chain.transient


@dataclass(frozen=True)
class Curves:
    """Survival and cumulative incidence of a chunk of loans, each an array (loans, months ahead).

    Conditional on survival to the reporting month (S(0) = 1), month ``u`` ahead:
    ``survival`` S(u) = prod_{v<=u} (1 - hD(v) - hP(v)); ``survival_prev`` S(u-1);
    ``marginal_default`` S(u-1) hD(u) (the marginal PD) and ``marginal_prepay``
    S(u-1) hP(u); ``cum_default`` F_D(u) and ``cum_prepay`` F_P(u), their running sums
    (the Aalen-Johansen form in discrete time).
    """

    survival_prev: np.ndarray
    survival: np.ndarray
    cum_default: np.ndarray
    cum_prepay: np.ndarray
    marginal_default: np.ndarray
    marginal_prepay: np.ndarray

    @classmethod
    def from_hazards(cls, hd: np.ndarray, hp: np.ndarray) -> Curves:
        """The curves of monthly default and prepayment hazards ``hd``, ``hp`` (loans, months ahead)."""
        s = np.cumprod(1.0 - hd - hp, axis=1)
        s_prev = np.empty_like(s)
        s_prev[:, 0] = 1.0
        s_prev[:, 1:] = s[:, :-1]
        marg_d = s_prev * hd
        marg_p = s_prev * hp
        return cls(s_prev, s, np.cumsum(marg_d, axis=1), np.cumsum(marg_p, axis=1), marg_d, marg_p)

    @classmethod
    def weighted(cls, curves: Mapping[str, Curves], weights: Mapping[str, float]) -> Curves:
        """The probability-weighted curves sum_s w_s curve_s (linear in probabilities, IFRS 9 5.5.17)."""
        mixed = MixedCurves(curves, weights)
        return cls(**{f.name: getattr(mixed, f.name) for f in dataclasses.fields(cls)})

    def hazards(self) -> tuple[np.ndarray, np.ndarray]:
        """The hazards these curves imply: marginal / S(u-1), 0 where S(u-1) is 0."""
        with np.errstate(invalid="ignore", divide="ignore"):
            hd = np.where(self.survival_prev > 0, self.marginal_default / self.survival_prev, 0.0)
            hp = np.where(self.survival_prev > 0, self.marginal_prepay / self.survival_prev, 0.0)
        return hd, hp

    def columns(self, field: str, cols) -> np.ndarray:
        """Columns ``cols`` of one curve (``field``: ``survival``, ``cum_default``, ...)."""
        return getattr(self, field)[:, cols]


class MixedCurves:
    """The probability-weighted curves of a chunk (:meth:`Curves.weighted`), each mixed when first read.

    The pooled sums read a few columns of them (:meth:`columns`: the same bits as those columns of the whole
    curve), so a chunk that goes to no writer or consumer needing every month never mixes whole curves.
    """

    _FIELDS = tuple(f.name for f in dataclasses.fields(Curves))

    def __init__(self, curves: Mapping[str, Curves], weights: Mapping[str, float]):
        self._curves, self._weights, self._mixed = curves, dict(weights), {}

    def _mix(self, field: str, cols=None) -> np.ndarray:
        out = None
        for s, w in self._weights.items():
            values = getattr(self._curves[s], field)
            if cols is not None:
                values = values[:, cols]
            if out is None:
                out = w * values
            else:
                out += w * values
        return out

    def __getattr__(self, field: str) -> np.ndarray:
        if field not in MixedCurves._FIELDS:
            raise AttributeError(field)
        if field not in self._mixed:
            self._mixed[field] = self._mix(field)
        return self._mixed[field]

    def columns(self, field: str, cols) -> np.ndarray:
        """Columns ``cols`` of one weighted curve: mixed from the scenarios' columns unless it is mixed already."""
        if field in self._mixed:
            return self._mixed[field][:, cols]
        return self._mix(field, cols)

    hazards = Curves.hazards


class CurveField(Mapping):
    """One curve (``field``) of a chunk by scenario name, read from its curves when asked for (the weighted one
    mixed then): the mappings of a :class:`ChunkProjection`."""

    def __init__(self, curves: Mapping[str, Curves | MixedCurves], field: str):
        self._curves, self._field = curves, field

    def __getitem__(self, name: str) -> np.ndarray:
        return getattr(self._curves[name], self._field)

    def __iter__(self):
        return iter(self._curves)

    def __len__(self) -> int:
        return len(self._curves)


# --------------------------------------------------------------------------- results


@dataclass
class ChunkProjection:
    """What one chunk of loans projects to; handed to ``on_chunk`` consumers.

    Arrays are (n, H): n loans of the chunk (rows ``rows`` of ``ProjectionResult.loans``: a slice, or an
    index array when chunks group loans by remaining term),
    H the longest remaining term in the chunk; column j is month ahead j + 1.
    Cells past a loan's maturity have zero hazards and zero balance. For a multi-state
    source, ``arrears_states`` holds per scenario the probability of each transient arrears
    state at the end of month u ahead, (n, H + 1, T) with u = 0 the start; past a loan's
    maturity the probabilities stay where they were. ``None`` for a competing-risk source.
    ``h_default`` and ``h_prepay`` hold the weighted scenario's implied hazards only when the chunk goes to
    ``on_chunk`` or the curve writer (a ``prepare`` of a chunk that goes to neither sees the scenarios').
    The curve mappings (``survival_prev`` ... ``marginal_pd``, :class:`CurveField`) read a scenario's curve
    when asked for it; the weighted one is mixed then (:class:`MixedCurves`).
    """

    rows: slice | np.ndarray
    frame: pd.DataFrame  # the whole projected book; the chunk's rows are ``loans``
    loan_id: np.ndarray
    mask: np.ndarray
    calendar_month: np.ndarray
    balance_start: np.ndarray
    balance_end: np.ndarray
    note_rate: np.ndarray
    scenarios: tuple[str, ...]
    weights: ScenarioWeights
    h_default: dict[str, np.ndarray]
    h_prepay: dict[str, np.ndarray]
    survival_prev: dict[str, np.ndarray]
    survival: dict[str, np.ndarray]
    cum_default: dict[str, np.ndarray]
    cum_prepay: dict[str, np.ndarray]
    marginal_pd: dict[str, np.ndarray]
    arrears_states: dict[str, np.ndarray] | None = None
    prepared: object = None  # what the projection's ``prepare`` computed from this chunk

    @functools.cached_property
    def loans(self) -> pd.DataFrame:
        """The chunk's rows of the book (``frame.iloc[rows]``), taken when first read: most consumers need a few
        columns (``loan_id`` is at hand), and taking every column of a chunk costs more than its arithmetic."""
        return self.frame.iloc[self.rows]


@dataclass
class SegmentSums:
    """The pooled sums behind a projection's segment tables, before they become ratios.

    Partitions of a book add these (padded to the longest horizon) and the
    tables are built once from the totals, so no ratio is multiplied back out.

    Attributes
    ----------
    segments, labels : tuple of str
        Segment names and score band labels; group g = segment * len(labels) + band.
    term : dict of str to ndarray (scenarios + weighted, groups, years ahead)
        ``n``, ``bal`` (loans and balance), ``F_n``, ``F_b`` (cumulative PD), ``S_n``,
        ``S_b`` (survival) and ``Sp_n``, ``Sp_b`` (survival at the start of the year),
        count- and balance-weighted. Past a loan's maturity its values stay at
        their final ones.
    speed : dict of str to ndarray (scenarios + weighted, groups, loan age)
        Expected balances ``dexp``, ``dflt``, ``pexp``, ``ppay`` (default exposure,
        defaulted, prepayment exposure, prepaid).
    """

    segments: tuple[str, ...]
    labels: tuple[str, ...]
    term: dict
    speed: dict


@dataclass
class ProjectionResult:
    """Per-loan summaries and segment aggregates of a projection.

    Attributes
    ----------
    loans : DataFrame
        One row per loan, sorted by loan_id: ``loan_id``, ``segment``, ``band``,
        ``age``, ``remaining_term``, ``balance`` and, for each scenario s (config
        order, then ``weighted``): ``pd_12m_<s>``, ``pd_lifetime_<s>``,
        ``prepay_lifetime_<s>``.
    term_structure : DataFrame
        Segment curves by ``segment``, ``band``, ``scenario``, ``year_ahead``:
        ``n_loans``, ``balance``, ``cumulative_pd_count``, ``cumulative_pd_balance``,
        ``survival_count``, ``survival_balance``, ``conditional_pd_count``,
        ``conditional_pd_balance`` (conditional PD of the year = (F(12y) - F(12(y-1))) /
        S(12(y-1)) on the pooled sums, 0 when the survival is 0).  Past a loan's
        maturity its cumulative PD and survival stay at their maturity values.
    speeds : DataFrame
        By ``segment``, ``band``, ``scenario``, ``loan_age``: expected balances
        ``default_exposure`` (S(u-1) B(u-1)), ``defaulted`` (S(u-1) hD B(u-1)),
        ``prepay_exposure`` (S(u-1)(1 - hD) B(u)), ``prepaid`` (S(u-1) hP B(u)),
        and ``mdr``, ``cdr``, ``smm``, ``cpr``.
    speed_multiples : DataFrame
        By ``segment``, ``band``, ``scenario``: ``psa`` and ``sda``, the equivalent
        multiples (weighted least squares in CPR / CDR units, exposure weights).
    band_edges : tuple of float
        The score band edges the ``band`` labels come from.
    sums : SegmentSums or None
        The pooled sums behind ``term_structure`` and ``speeds``.
    """

    loans: pd.DataFrame
    term_structure: pd.DataFrame
    speeds: pd.DataFrame
    speed_multiples: pd.DataFrame
    scenarios: tuple[str, ...]
    weights: ScenarioWeights
    as_of_idx: int
    band_edges: tuple = ()
    sums: SegmentSums | None = None


class TableWriter:
    """Append pyarrow tables to one Parquet file; usable as a writer callback.

    >>> with TableWriter("curves.parquet") as w:  # doctest: +SKIP
    ...     project_loans(..., curve_writer=w)
    """

    def __init__(self, path, **parquet_options):
        self.path = Path(path)
        self._options = {"compression": "snappy", **parquet_options}
        self._writer = None
        self.rows = 0

    def __call__(self, table: pa.Table) -> None:
        if self._writer is None:
            self._writer = pq.ParquetWriter(self.path, table.schema, **self._options)
        self._writer.write_table(table)
        self.rows += table.num_rows

    def close(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def band_labels(edges) -> list[str]:
    """Labels of the bands that inner ``edges`` cut a score into, each closed on the left.

    ``(640, 700)`` as edges give ``(-inf, 640)``, ``[640, 700)``, ``[700, inf)``: a score
    exactly on an edge belongs to the band that starts there (:func:`band_codes`). No edges:
    one band, ``all``. Every table and the report use these labels, in this (numeric) order.
    """
    if not edges:
        return ["all"]
    e = [f"{x:g}" for x in edges]
    return [f"(-inf, {e[0]})"] + [f"[{a}, {b})" for a, b in zip(e, e[1:])] + [f"[{e[-1]}, inf)"]


def band_codes(values, edges) -> np.ndarray:
    """The band (0, 1, ...; positions in :func:`band_labels`) of each value: a value on an edge goes up."""
    return np.searchsorted(np.asarray(edges, dtype=float), np.asarray(values, dtype=float), side="right")


def band_order(labels) -> np.ndarray:
    """A sort key of band labels (:func:`band_labels`): each band's lower edge, ``all`` as 0."""
    def lower(label) -> float:
        text = str(label)
        return float(text[1:].split(",")[0]) if text[:1] in "[(" and "," in text else 0.0

    return np.array([lower(x) for x in labels], dtype=float)


def sort_with_bands(frame: pd.DataFrame, keys) -> pd.DataFrame:
    """``frame`` sorted by ``keys`` (stable), a ``band`` key in numeric order rather than as text."""
    def key(col):
        return pd.Series(band_order(col), index=col.index) if col.name == "band" else col

    return frame.sort_values(list(keys), kind="stable", key=key, ignore_index=True)


def scenario_weights(scenarios, weights) -> ScenarioWeights:
    """The weights of ``scenarios``, in their order.

    Weights already of type :class:`ScenarioWeights` (a run's context) are
    trusted; a plain mapping from a library caller is checked here, once.
    With one scenario the weights may be left out.

    Raises
    ------
    ConfigError
        Bad weights, or weights that do not match the scenarios.
    """
    if weights is None:
        if len(scenarios) == 1:
            return ScenarioWeights({scenarios[0]: 1.0})
        raise ConfigError(f"give the probability weights of the scenarios {list(scenarios)}")
    if not isinstance(weights, ScenarioWeights):
        weights = ScenarioWeights(weights)
    return weights.in_order(scenarios)


def _prepare_book(loans, spec, *, as_of_idx, collateral: Collateral, origination: bool, order=("loan_id",)):
    region_column = collateral.region_column
    if spec.ltv and (collateral.hpi_series is None or region_column is None):
        raise ProjectionError(
            "the hazard source needs current_ltv: set collateral.hpi_series and collateral.region_column"
        )
    if spec.incentive and collateral.market_rate_series is None:
        raise ProjectionError("the hazard source needs rate_incentive: set collateral.market_rate_series")
    needed = ["loan_id", "term", "note_rate", *spec.static]
    needed += ["original_balance", "origination_idx"] if origination else ["balance", "age"]
    if spec.ltv:
        needed += ["property_value", "origination_idx", region_column]
    _check_loans(
        loans,
        list(dict.fromkeys(needed)),
        balance_col="original_balance" if origination else "balance",
        age_col=None if origination else "age",
    )
    if origination:  # the origination view reads these columns alone: the others are not carried into its order
        read = [*needed, "age", *(r["before_first_column"] for r in spec.panel if r.get("before_first_column"))]
        loans = loans[[c for c in dict.fromkeys(read) if c in loans.columns]]
    frame, from_rows = _sorted_by(loans, list(order))
    n = len(frame)
    term = frame["term"].to_numpy(dtype=np.int64)
    if origination:
        age = np.zeros(n, dtype=np.int64)
        balance = frame["original_balance"].to_numpy(dtype=float)
        start = frame["origination_idx"].to_numpy(dtype=np.int64)
    else:
        age = frame["age"].to_numpy(dtype=np.int64)
        balance = frame["balance"].to_numpy(dtype=float)
        start = np.full(n, int(as_of_idx), dtype=np.int64)
    region_code = hpi_names = None
    if spec.ltv:
        region_code, regions = pd.factorize(frame[region_column], sort=True)
        hpi_names = _hpi_names(regions, collateral.hpi_series)
    book = _Book(
        frame=frame,
        loan_id=frame["loan_id"].to_numpy(),
        age=age,
        remaining=remaining_term(age, term),
        rate=frame["note_rate"].to_numpy(dtype=float),
        balance=balance,
        start_idx=start,
        orig_idx=frame["origination_idx"].to_numpy(dtype=np.int64) if "origination_idx" in frame else None,
        value=frame["property_value"].to_numpy(dtype=float) if spec.ltv else None,
        region_code=region_code,
        static={c: _static_values(frame, c, origination) for c in spec.static},
        state=_start_states(frame, origination),
        panel=_panel_history(frame, spec, origination),
        from_rows=from_rows,
    )
    return book, hpi_names


def _sorted_by(loans: pd.DataFrame, keys: list[str]) -> tuple[pd.DataFrame, np.ndarray | None]:
    """``loans`` sorted by ``keys`` (stable), the last of which is ``loan_id``; and, for a book that was in loan id
    order, the row of ``loans`` each row came from (else None). Such a book (the ECL's is) is sorted by its
    other keys, whole numbers, with :func:`numpy.lexsort`: the same order, without comparing strings (a
    tenth of the time)."""
    ids = loans["loan_id"]
    others = [loans[k] for k in keys[:-1]]
    if keys[-1] == "loan_id" and all(pd.api.types.is_integer_dtype(c) and not c.hasnans for c in others) and ids.is_monotonic_increasing:
        order = np.lexsort([np.arange(len(loans))] + [c.to_numpy(dtype=np.int64) for c in reversed(others)])
        if (order == np.arange(len(loans))).all():
            return loans.reset_index(drop=True), order
        return loans.take(order).reset_index(drop=True), order
    return loans.sort_values(keys, kind="stable").reset_index(drop=True), None


def _panel_history(frame: pd.DataFrame, spec: _Spec, origination: bool) -> dict:
    """Per panel input, its values at 0 ... lag - 1 months before the start: from the loans frame, or at
    origination the value a new loan starts with (``before_first`` or ``before_first_column``)."""
    out = {}
    for rule in spec.panel:
        lag, column = rule["lag"], rule["column"]
        if origination:
            if rule.get("before_first") is None and rule.get("before_first_column") is None:
                raise ProjectionError(
                    f"covariate on panel column {column!r}: the origination view needs the value a new loan starts "
                    "with; set before_first or before_first_column"
                )
            values = np.repeat(_before_first(rule, frame)[:, None], lag, axis=1)
            bad = np.isnan(values[:, 0])
            if bad.any():
                raise ProjectionError(
                    f"loans: {rule.get('before_first_column')!r} (before_first_column of panel column {column!r}) "
                    f"is empty for {loan_list_text(frame['loan_id'][bad])}"
                )
        else:
            names = [panel_history_name(column, j) for j in range(lag)]
            lacking = [c for c in names if c not in frame.columns]
            if lacking:
                raise ProjectionError(f"loans: no column {lacking[0]!r}: the last panel values of {column!r} are needed")
            values = frame[names].to_numpy(dtype=float)
            bad = np.isnan(values).any(axis=1)
            if bad.any():
                raise ProjectionError(
                    f"panel column {column!r}: no value in the last {lag} month(s) for {loan_list_text(frame['loan_id'][bad])}; "
                    "set before_first for the covariate, or check the panel"
                )
        out[rule["key"]] = values
    return out


def _panel_path(rule: dict, history: np.ndarray, H: int) -> np.ndarray:
    """Values (n, H) of a panel input in months 1 ... H ahead: history while it reaches back, then its projection rule.

    Month u reads the value at the end of month u - lag: history column lag - u for u <= lag (column j is
    j months before the start), afterwards the last value, held or moving in a straight line to
    ``revert_to`` over ``revert_months``.
    """
    lag = rule["lag"]
    n = history.shape[0]
    last = history[:, 0]
    u = np.arange(1, H + 1)
    ahead = np.maximum(u - lag, 0)
    if rule.get("projection", "hold") == "revert":
        share = np.minimum(ahead / float(rule["revert_months"]), 1.0)
        out = last[:, None] + (float(rule["revert_to"]) - last[:, None]) * share[None, :]
    else:
        out = np.repeat(last[:, None], H, axis=1)
    for k in range(min(lag, H)):  # month k + 1 ahead reads lag - k - 1 months before the start
        out[:, k] = history[:, lag - k - 1]
    return out.reshape(n, H)


def _static_values(frame: pd.DataFrame, column: str, origination: bool) -> np.ndarray:
    """A loan input held over the projection; at origination a loan has no cured default behind it."""
    if origination and column == PREVIOUSLY_DEFAULTED:
        return np.zeros(len(frame), dtype=np.int8)
    return frame[column].to_numpy()


def _start_states(frame: pd.DataFrame, origination: bool) -> np.ndarray:
    """Each loan's arrears state where its projection starts: current at origination, else ``arrears_state``."""
    if origination or "arrears_state" not in frame.columns:
        return np.zeros(len(frame), dtype=np.int64)
    state = frame["arrears_state"]
    if state.isna().any():
        raise ProjectionError(f"loans: no arrears_state for {loan_list_text(frame['loan_id'][state.isna()])}")
    return state.to_numpy(dtype=np.int64)


def _chain_hazards(source, raw, mask, start) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Default and prepayment hazards (n, H) of a multi-state source, from the Markov chain of each loan.

    Row j of every month's transition matrix comes from the source's multinomial logit of origin
    state j on that month's inputs; after a loan's term nothing moves. The hazards are the mass
    entering default and prepaid over the mass still on book (see :mod:`._chain`); the third
    array is the chain's transient state probabilities (n, H + 1, T).
    """
    states = list(source.states)
    T, S = len(source.labels), len(states)
    n, H = mask.shape
    if start.size and int(start.max()) >= T:
        raise ProjectionError(f"a loan starts in arrears state {int(start.max())} but the model has {T} states ({', '.join(source.labels)})")
    P = np.zeros((T, n, H, S))
    finite = np.ones((n, H), dtype=bool)
    for j, origin in enumerate(source.labels):
        rows = np.asarray(source.transition_probabilities(raw, origin), dtype=float)
        P[j][mask] = rows
        P[j][~mask, j] = 1.0
        finite[mask] &= np.isfinite(rows).all(axis=1) & (rows >= 0).all(axis=1)
    chain = markov_chain(np.where(np.isfinite(P), P, 0.0), start)
    del P
    hazards = chain.hazards()
    hd, hp = hazards[:, :, states.index("default") - T], hazards[:, :, states.index("prepaid") - T]
    # a month whose transition probabilities are not finite probabilities must not pass as a hazard
    return np.where(finite, hd, np.nan), np.where(finite, hp, np.nan), chain.transient



def _coverage_needs(book: _Book, spec: _Spec, hpi_names, market_rate, hold: bool) -> dict[str, np.ndarray]:
    """Month indices each series must cover."""
    needs: dict[str, list] = {}
    if hold:
        for _, series, lag in spec.macro:
            needs.setdefault(series, []).append(np.unique(book.start_idx - lag))
        if spec.incentive:
            needs.setdefault(market_rate, []).append(np.unique(book.start_idx - spec.rate_lag))
        if spec.ltv:
            for c, name in enumerate(hpi_names):
                rows = book.region_code == c
                needs.setdefault(name, []).append(np.unique(np.maximum(book.start_idx[rows] - spec.hpi_lag, book.orig_idx[rows])))
                needs[name].append(np.unique(book.orig_idx[rows]))
    else:
        lo, hi = int(book.start_idx.min()) + 1, int((book.start_idx + book.remaining).max())
        span = np.arange(lo, hi + 1)
        for _, series, lag in spec.macro:
            needs.setdefault(series, []).append(span - lag)
        if spec.incentive:
            needs.setdefault(market_rate, []).append(span - spec.rate_lag)
        if spec.ltv:
            for c, name in enumerate(hpi_names):
                rows = book.region_code == c
                if not rows.any():
                    continue
                orig = book.orig_idx[rows]
                # months max(start + u - lag, origination) for u = 1 ... remaining
                first = int(np.maximum(book.start_idx[rows] + 1 - spec.hpi_lag, orig).min())
                last = int(np.maximum(book.start_idx[rows] + book.remaining[rows] - spec.hpi_lag, orig).max())
                needs.setdefault(name, []).append(np.arange(first, last + 1))
                needs[name].append(np.unique(orig))
    return {s: np.unique(np.concatenate(v)) for s, v in needs.items()}


def _year_index(H: int, years: int) -> np.ndarray:
    return np.minimum(12 * np.arange(1, years + 1), H) - 1


class _SegmentPool:
    """Per-loan PD summaries and the pooled segment sums of a projection, added chunk by chunk.

    Groups are segment x score band: ``group = segment code * bands + band code``.
    ``add`` takes one chunk's curves; ``finish`` weights the speeds and returns
    the :class:`SegmentSums` the segment tables are built from.
    """

    def __init__(self, book, frame, names, segment_column, band_column, band_edges):
        n_all = len(frame)
        seg_code, seg_levels = pd.factorize(frame[segment_column].astype(str), sort=True)
        self.labels = band_labels(tuple(band_edges))
        if band_column is not None and band_edges:
            self.band_code = band_codes(frame[band_column].to_numpy(float), band_edges)
        else:
            self.band_code = np.zeros(n_all, dtype=np.int64)
        n_band = len(self.labels)
        self.group = seg_code * n_band + self.band_code
        self.segments = tuple(str(x) for x in seg_levels)
        self.G = G = max(len(seg_levels), 1) * n_band
        self.names = names
        K = len(names)
        self.years = years = int(math.ceil(book.remaining.max() / 12)) if n_all else 0
        self.max_age = max_age = int((book.age + book.remaining).max()) if n_all else 0
        self.ts = {key: np.zeros((K, G, years)) for key in ("n", "bal", "F_n", "F_b", "S_n", "S_b", "Sp_n", "Sp_b")}
        self.sp = {key: np.zeros((K, G, max_age + 1)) for key in ("dexp", "dflt", "pexp", "ppay")}
        self.summary = {f"{m}_{s}": np.zeros(n_all) for s in names for m in ("pd_12m", "pd_lifetime", "prepay_lifetime")}
        self.balance = book.balance
        self._open = None  # the pooled sums of the chunks added since the last block closed

    def chunk_sums(self, sl: slice, curves, haz, mask, bal_start, bal_end, ages) -> dict:
        """One chunk's contributions (loans ``sl``): their 12-month and lifetime PDs, term and speed sums.

        A pure function of the chunk (it may run in any thread); :meth:`add` adds them up in the chunks' order.
        """
        G, max_age = self.G, self.max_age
        n, H = mask.shape
        i12 = min(12, H) - 1
        yidx = _year_index(H, self.years)
        grp = self.group[sl]
        onehot = np.zeros((G, n))
        onehot[grp, np.arange(n)] = 1.0
        bal0 = self.balance[sl]
        onehot_b = onehot * bal0[None, :]
        # every speed sum is zero past a loan's maturity (no hazard, no balance): those cells add 0 to the bin of the
        # oldest age, so the cells need no selecting
        key = grp[:, None] * (max_age + 1) + np.minimum(ages, max_age)
        K = len(self.names)
        ts = {name: np.empty((K, G, self.years)) for name in self.ts}
        sp = {name: np.empty((K - 1, G, max_age + 1)) for name in self.sp}  # the scenarios' (weighted: see finish)
        out = {"summary": {}, "ts": ts, "sp": sp}
        for ki, s in enumerate(self.names):
            c = curves[s]  # the columns the sums read (the weighted curves are mixed for those alone)
            F_ends = c.columns("cum_default", [i12, H - 1])
            out["summary"][f"pd_12m_{s}"] = F_ends[:, 0]
            out["summary"][f"pd_lifetime_{s}"] = F_ends[:, 1]
            out["summary"][f"prepay_lifetime_{s}"] = c.columns("cum_prepay", [H - 1])[:, 0]
            Fy, Sy = c.columns("cum_default", yidx), c.columns("survival", yidx)
            Sy_prev = np.concatenate([np.ones((n, 1)), Sy[:, :-1]], axis=1)
            for tag, oh in (("n", onehot), ("b", onehot_b)):
                np.matmul(oh, Fy, out=ts["F_" + tag][ki])
                np.matmul(oh, Sy, out=ts["S_" + tag][ki])
                np.matmul(oh, Sy_prev, out=ts["Sp_" + tag][ki])
            ts["n"][ki] = onehot.sum(axis=1)[:, None]
            ts["bal"][ki] = onehot_b.sum(axis=1)[:, None]
            if s != WEIGHTED:
                hd, hp = haz[s]
                s_prev, marg_d, marg_p = c.survival_prev, c.marginal_default, c.marginal_prepay
                size = G * (max_age + 1)
                for name, vals in (
                    ("dexp", s_prev * bal_start),
                    ("dflt", marg_d * bal_start),
                    ("pexp", s_prev * (1.0 - hd) * bal_end),
                    ("ppay", marg_p * bal_end),
                ):
                    sp[name][ki] = np.bincount(key.ravel(), weights=vals.ravel(), minlength=size).reshape(G, max_age + 1)
        return out

    def add(self, sl: slice, sums: dict) -> None:
        """Add one chunk's :meth:`chunk_sums` (loans ``sl``), in the chunks' order: its per-loan values to their
        rows, its pooled sums to the open block's (:func:`add_sums`). :meth:`close_block` after every
        :data:`SUM_BLOCK` chunks adds the block to the totals; a whole block's sums computed elsewhere (in a
        worker, by the same :func:`add_sums`) go in with :meth:`add_block`. So the totals are the same bits
        whatever computed the chunks."""
        for name, values in sums["summary"].items():
            self.summary[name][sl] = values
        if "ts" in sums:
            self._open = add_sums(self._open, sums)

    def close_block(self) -> None:
        """Add the open block's sums to the totals."""
        if self._open is not None:
            self.add_block(self._open)
            self._open = None

    def add_block(self, sums: dict) -> None:
        """Add a block's pooled sums (chunk sums added in order by :func:`add_sums`) to the totals."""
        for name, values in sums["ts"].items():
            self.ts[name] += values
        for name, values in sums["sp"].items():
            self.sp[name][: len(values)] += values

    def finish(self, weights, scenarios) -> SegmentSums:
        """The pooled sums, the weighted speeds computed from the scenarios' (linear in the expected balances)."""
        self.close_block()
        K = len(self.names)
        for name in self.sp:
            self.sp[name][K - 1] = sum(weights[s] * self.sp[name][ki] for ki, s in enumerate(scenarios))
        return SegmentSums(self.segments, tuple(self.labels), self.ts, self.sp)


def add_sums(block: dict | None, sums: dict) -> dict:
    """The pooled sums (``ts``, ``sp``) of a block so far (None before its first chunk) plus one chunk's, added in
    place: the one way chunk sums are added, in a worker and in the calling process alike."""
    if block is None:
        return {"ts": dict(sums["ts"]), "sp": dict(sums["sp"])}
    for part in ("ts", "sp"):
        for name, values in sums[part].items():
            block[part][name] += values
    return block


def project_loans(
    loans: pd.DataFrame,
    source,
    paths: Mapping[str, pd.DataFrame],
    *,
    as_of_idx: int,
    weights: ScenarioWeights | Mapping[str, float] | None = None,
    chunk_size: int = CHUNK_SIZE,
    collateral: Collateral = Collateral(),
    segment_column: str = "segment",
    band_column: str | None = None,
    band_edges: Sequence[float] = (),
    curve_writer: Callable[[pa.Table], None] | None = None,
    term_writer: Callable[[pa.Table], None] | None = None,
    on_chunk: Callable[[ChunkProjection], None] | None = None,
    prepare: Callable[[ChunkProjection], object] | None = None,
    on_prepared: Callable[[slice | np.ndarray, object], None] | None = None,
    keep_order: bool = False,
    workers: int | None = None,
    processes: bool = True,
) -> ProjectionResult:
    """Project every live loan under every scenario, chunk by chunk.

    Parameters
    ----------
    loans : DataFrame
        One row per live loan at the as-of month: ``loan_id``, ``segment``
        (``segment_column``), ``age`` (months at as-of), ``term`` (months),
        ``note_rate`` (decimal a year), ``balance`` (actual at as-of); for
        ``current_ltv`` also ``property_value`` (at origination),
        ``origination_idx`` and the region column; plus the static columns the
        source needs.  Not modified.
    source : hazard source
        See the module docstring.
    paths : mapping of scenario name -> DataFrame
        Macro series indexed by month index, covering history and future
        (see :func:`prepare_paths`).  Order is the scenario order.
    as_of_idx : int
        Reporting month index; month ahead u is calendar month ``as_of_idx + u``.
    weights : ScenarioWeights or mapping of scenario -> float, optional
        Probability weights summing to 1 (a plain mapping is checked here);
        optional with one scenario.
    chunk_size : int, default 256 (:data:`CHUNK_SIZE`)
        Loans per chunk; memory grows with chunk_size x longest remaining term x workers.
    collateral : config ``Collateral``
        How current LTV and the rate incentive are built: the region column,
        the house-price series and the market-rate series.
    segment_column, band_column, band_edges
        Groups of the segment tables; a band is ``band_column`` cut at the
        inner ``band_edges``.
    curve_writer : callable(pyarrow.Table), optional
        Receives, chunk by chunk, the monthly curves: ``loan_id``, ``scenario``,
        ``month_ahead``, ``loan_age``, ``h_default``, ``h_prepay``, ``survival``,
        ``marginal_pd``, ``cumulative_pd``, ``cumulative_prepay``; rows up to each loan's
        maturity, sorted by loan_id, scenario (given order, then ``weighted``),
        month_ahead.  For ``weighted`` the hazards are the implied ones,
        marginal_pd / S(u-1) (0 when S(u-1) = 0).
    term_writer : callable(pyarrow.Table), optional
        Per-loan annual term structure: ``loan_id``, ``scenario``,
        ``year_ahead``, ``cumulative_pd``, ``survival``, ``conditional_pd``, for years 1 ..
        ceil(remaining / 12). ``conditional_pd`` is the PD of the year given survival to its
        start: the year's marginal PDs added up, divided by S(12(y-1)).
    on_chunk : callable(ChunkProjection), optional
        Further consumer of each chunk (used by loss), called in the chunks' order.
    prepare : callable(ChunkProjection), optional
        A pure function of a chunk, run by the worker that projected it; what it returns is the chunk's
        ``prepared`` (and goes to ``on_prepared``). The heavy part of a consumer goes here, so that it
        runs in parallel; the consumer then only stores or writes.
    on_prepared : callable(rows, prepared), optional
        Receives, in the chunks' order, each chunk's rows (as ``ChunkProjection.rows``) and what ``prepare``
        returned for it.
    keep_order : bool, default False
        Chunks of loans in loan_id order, as the writers need (always so with ``curve_writer`` or
        ``term_writer``); otherwise each chunk holds loans of similar remaining term (``ChunkProjection.rows``
        is then an index array), which spares the months past the shorter loans' maturity.
    workers : int, optional
        Chunks projected at the same time (default: one per available core). The writers, the consumers and
        the sums receive the chunks in order, so every result is the same for any number.
    processes : bool, default True
        Run the chunks in worker processes forked from this one when nothing needs a chunk's whole projection
        (no writer, no ``on_chunk``) and the platform can fork (:func:`creditsurv.model.chunk_map`): only the
        pooled sums and ``prepared`` come back. Otherwise, or with False, in threads.

    Returns
    -------
    ProjectionResult

    Raises
    ------
    ConfigError
        Bad weights (see :func:`creditsurv.config.weight_problems`), or weights
        that do not match the scenarios of ``paths``.
    ProjectionError
        Loans past maturity or with a negative note rate (naming the first five
        loan ids and the count), missing columns, macro paths that do not cover
        the months needed, bad hazards from the source.
    """
    scenarios = tuple(paths)
    w = _checked_arguments(loans, scenarios, weights, chunk_size, segment_column, band_column)
    spec, book, hpi_names, lookups = _live_book(
        loans, source, paths, as_of_idx, collateral
    )
    pooled = _SegmentPool(book, book.frame, (*scenarios, WEIGHTED), segment_column, band_column, band_edges)

    tables = (curve_writer is not None, term_writer is not None)

    def work(sl):
        chunk = _hazards_chunk(book, sl, spec, source, lookups, hpi_names, collateral.market_rate_series, hold=False)
        whole = on_chunk is not None
        curves = _chunk_curves(chunk, scenarios, w, weighted_hazards=whole or tables[0])
        return _chunk_results(book, sl, chunk, curves, scenarios, w, pooled, tables, prepare, whole)

    chunks = chunk_rows(book.remaining, chunk_size, keep_order or any(tables))
    blocks = [chunks[i : i + SUM_BLOCK] for i in range(0, len(chunks), SUM_BLOCK)]
    n_workers = worker_count(workers)
    if processes and not any(tables) and on_chunk is None and worth_forking(len(blocks), n_workers):
        for block, (parts, total) in zip(blocks, chunk_map(_block_of(work), blocks, n_workers, processes=True)):
            for rows, results in zip(block, parts):
                _take_chunk(rows, results, pooled, None, None, None, on_prepared)
            pooled.add_block(total)
    else:
        for i, (rows, results) in enumerate(zip(chunks, chunk_map(work, chunks, n_workers, processes=False))):
            _take_chunk(rows, results, pooled, curve_writer, term_writer, on_chunk, on_prepared)
            if (i + 1) % SUM_BLOCK == 0:
                pooled.close_block()
    sums = pooled.finish(w, scenarios)
    return _projection_result(book, pooled, sums, segment_column, scenarios, w, as_of_idx, band_edges)


def _block_of(work):
    """``work`` over a block of chunks, for a worker: each chunk's results with only its per-loan sums, and the
    block's pooled sums added in the chunks' order (:func:`add_sums`), sent back once."""

    def block_work(block):
        parts, total = [], None
        for sl in block:
            results = work(sl)
            sums = results["sums"]
            total = add_sums(total, sums)
            results["sums"] = {"summary": sums["summary"]}
            parts.append(results)
        return parts, total

    return block_work


def _checked_arguments(loans, scenarios, weights, chunk_size, segment_column, band_column) -> ScenarioWeights:
    """Check the arguments of :func:`project_loans`; return the scenario weights."""
    if not scenarios:
        raise ProjectionError("no scenarios to project")
    w = scenario_weights(scenarios, weights)
    if chunk_size < 1:
        raise ProjectionError(f"chunk_size must be at least 1, got {chunk_size}")
    if segment_column not in loans.columns:
        raise ProjectionError(f"loans: no segment column {segment_column!r}; have {list(loans.columns)}")
    if band_column is not None and band_column not in loans.columns:
        raise ProjectionError(f"loans: no band column {band_column!r}; have {list(loans.columns)}")
    return w


def _live_book(loans, source, paths, as_of_idx, collateral: Collateral):
    """The live loans as arrays, the source's inputs and each scenario's macro lookup.

    The scenario paths are checked to cover every month and lag the book needs.
    Returns ``(spec, book, hpi_names, lookups)``.
    """
    spec = _parse_inputs(list(source.required_inputs), loans.columns, source)
    book, hpi_names = _prepare_book(
        loans, spec, as_of_idx=as_of_idx, collateral=collateral, origination=False,
    )
    lookups = {s: MacroLookup(p) for s, p in paths.items()}
    if len(book.loan_id):
        check_coverage(lookups, _coverage_needs(book, spec, hpi_names, collateral.market_rate_series, hold=False))
    return spec, book, hpi_names, lookups


def worker_count(workers: int | None) -> int:
    """Threads or processes a projection runs its chunks in: ``workers``, or one per core this process may use."""
    if workers is None:
        try:
            return max(len(os.sched_getaffinity(0)), 1)
        except AttributeError:  # not on Linux
            return max(os.cpu_count() or 1, 1)
    if int(workers) < 1:
        raise ProjectionError(f"workers must be at least 1, got {workers}")
    return int(workers)


def chunk_rows(remaining: np.ndarray, chunk_size: int, keep_order: bool) -> list:
    """The loans of each chunk: slices of ``chunk_size`` loans in their order with ``keep_order``; else index arrays
    of loans of similar remaining term (sorted by it, stable), so that a chunk's (loans x months) arrays hold few
    months past its loans' maturity. Either way the chunks and their order depend on the book alone."""
    n = len(remaining)
    if keep_order:
        return [slice(start, min(start + chunk_size, n)) for start in range(0, n, chunk_size)]
    order = np.argsort(remaining, kind="stable")
    return [order[start : start + chunk_size] for start in range(0, n, chunk_size)]


def _chunk_curves(chunk, scenarios, w, weighted_hazards: bool) -> dict:
    """Curves of one chunk under each scenario and weighted; adds the state probabilities and, when
    ``weighted_hazards``, the weighted hazards (the ones its curves imply) to ``chunk``."""
    haz, states = chunk[0], chunk[-1]
    curves = {s: Curves.from_hazards(*haz[s]) for s in scenarios}
    # each weighted curve mixed when first read (from a dict of their own: no cycle keeps the chunk's arrays alive)
    curves[WEIGHTED] = MixedCurves(dict(curves), {s: w[s] for s in scenarios})
    if weighted_hazards:
        haz[WEIGHTED] = curves[WEIGHTED].hazards()
    if states is not None:  # state probabilities mix linearly over scenarios
        states[WEIGHTED] = sum(w[s] * states[s] for s in scenarios)
    return curves


def _chunk_results(book, sl, chunk, curves, scenarios, w, pooled, tables: tuple[bool, bool], prepare, whole: bool) -> dict:
    """What one chunk's curves (:func:`_chunk_curves`) give: its pool sums, its tables, what ``prepare`` computes
    from it and, when ``whole``, its :class:`ChunkProjection`. A pure function of the chunk."""
    haz, mask, bal_start, bal_end, cal, states = chunk
    H = mask.shape[1]
    names = (*scenarios, WEIGHTED)
    ages = book.age[sl][:, None] + np.arange(1, H + 1)[None, :]
    out = {"sums": pooled.chunk_sums(sl, curves, haz, mask, bal_start, bal_end, ages)}
    if tables[0]:
        out["curves"] = _curve_table(book.loan_id[sl], names, curves, haz, mask, ages)
    if tables[1]:
        out["terms"] = _term_table(book.loan_id[sl], names, curves, book.remaining[sl])
    ch = ChunkProjection(
        rows=sl, frame=book.frame, loan_id=book.loan_id[sl], mask=mask, calendar_month=cal,
        balance_start=bal_start, balance_end=bal_end, note_rate=book.rate[sl],
        scenarios=scenarios, weights=w,
        h_default={s: h[0] for s, h in haz.items()}, h_prepay={s: h[1] for s, h in haz.items()},
        survival_prev=CurveField(curves, "survival_prev"), survival=CurveField(curves, "survival"),
        cum_default=CurveField(curves, "cum_default"), cum_prepay=CurveField(curves, "cum_prepay"),
        marginal_pd=CurveField(curves, "marginal_default"),
        arrears_states=states,
    )  # fmt: skip
    if prepare is not None:
        ch.prepared = out["prepared"] = prepare(ch)
    if whole:
        out["chunk"] = ch
    return out


def _take_chunk(rows, results, pooled, curve_writer, term_writer, on_chunk, on_prepared) -> None:
    """One chunk's results added to the pool and handed to the writers and consumers, in the chunks' order."""
    pooled.add(rows, results["sums"])
    if curve_writer is not None:
        curve_writer(results["curves"])
    if term_writer is not None:
        term_writer(results["terms"])
    if on_chunk is not None:
        on_chunk(results["chunk"])
    if on_prepared is not None:
        on_prepared(rows, results.get("prepared"))


def _as_given(column: pd.Series):
    """A column's values for a new frame: its own array when it holds strings (Arrow-backed, taken as they are),
    else as NumPy values (a categorical becomes its labels)."""
    return column.array if isinstance(column.dtype, pd.StringDtype) else column.to_numpy()


def _projection_result(book, pooled, sums, segment_column, scenarios, w, as_of_idx, band_edges) -> ProjectionResult:
    """The per-loan summaries and the segment tables built from the pooled sums."""
    names = (*scenarios, WEIGHTED)
    loans_out = pd.DataFrame(
        {
            # the book's own string columns and the labels taken by code: no million strings rebuilt one by one
            "loan_id": _as_given(book.frame["loan_id"]),
            "segment": _as_given(book.frame[segment_column]),
            "band": pd.array(list(sums.labels), dtype="str").take(pooled.band_code),
            "age": book.age,
            "remaining_term": book.remaining,
            "balance": book.balance,
            **pooled.summary,
        }
    )
    term_structure = term_structure_frame(sums.term, names, list(sums.segments), list(sums.labels), pooled.years)
    speeds, multiples = speeds_frames(sums.speed, names, list(sums.segments), list(sums.labels), pooled.max_age)
    return ProjectionResult(
        loans=loans_out, term_structure=term_structure, speeds=speeds, speed_multiples=multiples,
        scenarios=scenarios, weights=w, as_of_idx=int(as_of_idx), band_edges=tuple(band_edges),
        sums=sums,
    )


def repeat_ids(loan_id, counts) -> pa.Array:
    """``loan_id[i]`` repeated ``counts[i]`` times, built by Arrow (no Python strings per row)."""
    return pa.array(loan_id).take(pa.array(np.repeat(np.arange(len(loan_id), dtype=np.int32), counts)))


def scenario_column(names, codes) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(codes, type=pa.int32()), pa.array(list(names), type=pa.string()))


def _curve_table(loan_id, names, curves, haz, mask, ages) -> pa.Table:
    n, H = mask.shape
    K = len(names)
    m3 = np.broadcast_to(mask[:, None, :], (n, K, H))

    def stack(fn):
        return np.stack([fn(s) for s in names], axis=1)[m3]

    counts = mask.sum(axis=1)
    return pa.table(
        {
            "loan_id": repeat_ids(loan_id, counts * K),
            "scenario": scenario_column(names, np.broadcast_to(np.arange(K, dtype=np.int32)[None, :, None], (n, K, H))[m3]),
            "month_ahead": np.broadcast_to(np.arange(1, H + 1, dtype=np.int32)[None, None, :], (n, K, H))[m3],
            "loan_age": np.broadcast_to(ages.astype(np.int32)[:, None, :], (n, K, H))[m3],
            "h_default": stack(lambda s: haz[s][0]),
            "h_prepay": stack(lambda s: haz[s][1]),
            "survival": stack(lambda s: curves[s].survival),
            "marginal_pd": stack(lambda s: curves[s].marginal_default),
            "cumulative_pd": stack(lambda s: curves[s].cum_default),
            "cumulative_prepay": stack(lambda s: curves[s].cum_prepay),
        }
    )


def _term_table(loan_id, names, curves, remaining) -> pa.Table:
    n = len(loan_id)
    H = curves[names[0]].survival_prev.shape[1]
    years = int(math.ceil(H / 12))
    yidx = _year_index(H, years)
    ny = np.ceil(remaining / 12).astype(np.int64)
    ymask = np.arange(1, years + 1)[None, :] <= ny[:, None]
    starts = 12 * np.arange(years)
    cols = {"cumulative_pd": [], "survival": [], "conditional_pd": []}
    for s in names:
        F = curves[s].cum_default[:, yidx]
        S = curves[s].survival[:, yidx]
        # The year's marginal PDs added up, not F(12y) - F(12(y-1)): late in a loan's life
        # that difference of two close running sums keeps few correct digits.
        year_pd = np.add.reduceat(curves[s].marginal_default, starts, axis=1)
        S_prev = curves[s].survival_prev[:, starts]
        with np.errstate(invalid="ignore", divide="ignore"):
            cond = np.where(S_prev > 0, year_pd / S_prev, 0.0)
        cols["cumulative_pd"].append(F)
        cols["survival"].append(S)
        cols["conditional_pd"].append(cond)
    K = len(names)
    m3 = np.broadcast_to(ymask[:, None, :], (n, K, years))
    counts = ymask.sum(axis=1)
    return pa.table(
        {
            "loan_id": repeat_ids(loan_id, counts * K),
            "scenario": scenario_column(names, np.broadcast_to(np.arange(K, dtype=np.int32)[None, :, None], (n, K, years))[m3]),
            "year_ahead": np.broadcast_to(np.arange(1, years + 1, dtype=np.int32)[None, None, :], (n, K, years))[m3],
            **{c: np.stack(v, axis=1)[m3] for c, v in cols.items()},
        }
    )


def term_structure_frame(ts, names, seg_names, labels, years) -> pd.DataFrame:
    G = len(seg_names) * len(labels)
    rows = []
    nb = len(labels)
    for ki, s in enumerate(names):
        for g in range(G):
            if not years or ts["n"][ki, g, 0] == 0:
                continue
            for y in range(years):
                rows.append((seg_names[g // nb], labels[g % nb], s, y + 1, ki, g, y))
    if not rows:
        return pd.DataFrame(columns=["segment", "band", "scenario", "year_ahead"])
    ki = np.array([r[4] for r in rows])
    g = np.array([r[5] for r in rows])
    y = np.array([r[6] for r in rows])
    get = {k: v[ki, g, y] for k, v in ts.items()}
    F_prev_n = np.where(y > 0, ts["F_n"][ki, g, np.maximum(y - 1, 0)], 0.0)
    F_prev_b = np.where(y > 0, ts["F_b"][ki, g, np.maximum(y - 1, 0)], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = pd.DataFrame(
            {
                "segment": [r[0] for r in rows],
                "band": [r[1] for r in rows],
                "scenario": [r[2] for r in rows],
                "year_ahead": [r[3] for r in rows],
                "n_loans": get["n"].astype(np.int64),
                "balance": get["bal"],
                "cumulative_pd_count": get["F_n"] / get["n"],
                "cumulative_pd_balance": np.where(get["bal"] > 0, get["F_b"] / get["bal"], np.nan),
                "survival_count": get["S_n"] / get["n"],
                "survival_balance": np.where(get["bal"] > 0, get["S_b"] / get["bal"], np.nan),
                "conditional_pd_count": np.where(get["Sp_n"] > 0, (get["F_n"] - F_prev_n) / get["Sp_n"], 0.0),
                "conditional_pd_balance": np.where(get["Sp_b"] > 0, (get["F_b"] - F_prev_b) / get["Sp_b"], 0.0),
            }
        )
    return out


def speeds_frames(sp, names, seg_names, labels, max_age):
    nb = len(labels)
    frames, multiples = [], []
    ages = np.arange(max_age + 1)
    for ki, s in enumerate(names):
        for g in range(len(seg_names) * nb):
            dexp, dflt, pexp, ppay = (sp[k][ki, g] for k in ("dexp", "dflt", "pexp", "ppay"))
            keep = (dexp > 0) | (pexp > 0)
            if not keep.any():
                continue
            with np.errstate(invalid="ignore", divide="ignore"):
                mdr = np.where(dexp > 0, dflt / dexp, np.nan)
                smm = np.where(pexp > 0, ppay / pexp, np.nan)
            cdr, cpr = mdr_to_cdr(mdr), smm_to_cpr(smm)
            seg, band = seg_names[g // nb], labels[g % nb]
            frames.append(
                pd.DataFrame(
                    {
                        "segment": seg, "band": band, "scenario": s, "loan_age": ages[keep],
                        "default_exposure": dexp[keep], "defaulted": dflt[keep],
                        "prepay_exposure": pexp[keep], "prepaid": ppay[keep],
                        "mdr": mdr[keep], "cdr": cdr[keep], "smm": smm[keep], "cpr": cpr[keep],
                    }
                )
            )
            ok_p, ok_d = keep & (pexp > 0), keep & (dexp > 0)
            multiples.append(
                {
                    "segment": seg, "band": band, "scenario": s,
                    "psa": equivalent_psa(ages[ok_p], cpr[ok_p], pexp[ok_p]),
                    "sda": equivalent_sda(ages[ok_d], cdr[ok_d], dexp[ok_d]),
                }
            )
    speeds = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
    return speeds, pd.DataFrame(multiples)


# --------------------------------------------------------------------------- origination


def origination_pd(
    loans: pd.DataFrame,
    source,
    macro: pd.DataFrame,
    *,
    extension=None,
    chunk_size: int = CHUNK_SIZE,
    collateral: Collateral = Collateral(),
    workers: int | None = None,
) -> pd.Series:
    """Lifetime PD of each loan as it could be projected at its origination month.

    The same machinery as :func:`project_loans`, from age 0 with the original
    balance amortised over the full term, on one macro path per origination
    month (:func:`~creditsurv.forecast.origination_path`): the history up to
    the origination month, then each series moving in a straight line from its
    value then to the history's mean up to then over ``extension.months`` (the
    shape of today's scenarios after their last month), trending series of
    ``extension.hold_last_series`` held. So the origination view is one
    reverting path from what was known then, comparable with today's view on
    one scenario path; holding every series at its origination value for the
    whole life would compare a static view with a reverting one. A loan
    originated before the history starts reads the history's first month.

    When ``loans`` has an ``age`` column (the age at the reporting month ``a``),
    the PD returned covers the same remaining life as today's lifetime PD:
    the origination view of default after age ``a`` given survival to it,
    ``(F_D(T) - F_D(a)) / S(a)``. Comparing it with today's lifetime PD
    compares like with like (IFRS 9 B5.5.11 asks for the change in the risk of
    default over the expected life); comparing today's remaining-life PD with
    a full-life PD at origination would understate every increase.

    That PD needs no month before ``a``: where the hazards from ``a`` on do not
    depend on earlier months (a competing-risk model whose panel inputs are
    held), each loan's origination view starts at ``a``, with the balance
    scheduled for then, and the PD is its cumulative PD. It equals the
    difference form above, which a multi-state model still takes (its arrears
    states at ``a`` come from the months before), and keeps its digits where
    the difference of two cumulative PDs loses them.

    Parameters
    ----------
    loans : DataFrame
        ``loan_id``, ``origination_idx``, ``term``, ``note_rate``,
        ``original_balance`` and what the source needs.
    macro : DataFrame
        Macro history indexed by month index, covering the origination months
        (months after a loan's origination are not read).
    extension : config ``ScenarioExtension``, optional
        The reversion's months and held series (default: 24 months, none held).
    workers : int, optional
        As for :func:`project_loans`; the chunks run in worker processes where the platform can fork.

    Returns
    -------
    Series of lifetime PD indexed by loan_id (sorted).
    """
    spec = _parse_inputs(list(source.required_inputs), loans.columns, source)
    later = "age" in loans.columns and _starts_anywhere(source, spec)
    book, hpi_names = _prepare_book(
        loans, spec, as_of_idx=0, collateral=collateral, origination=True,
        order=("origination_idx", "age", "term", "loan_id") if later else ("origination_idx", "term", "loan_id"),
    )  # fmt: skip
    n_all = len(book.loan_id)
    out = np.zeros(n_all)
    # the age to compare from; a loan at or past its term over its last contractual month (see remaining_term)
    ages = book.frame["age"].to_numpy(dtype=np.int64) if "age" in loans.columns else np.zeros(n_all, dtype=np.int64)
    ages = np.clip(ages, 0, book.remaining - 1)
    if later:
        book = _from_age(book, ages)
    # loans sorted by origination month, then start month: each run of rows shares both (a chunk of the run shares
    # its months' macro values), each origination month's runs share its path, long enough for the loans' terms
    origination = book.start_idx - book.age
    firsts = np.r_[0, np.flatnonzero(np.diff(origination) | np.diff(book.start_idx)) + 1] if n_all else []
    ends = np.r_[firsts[1:], n_all] if n_all else []
    lookups, chunks = {}, []
    paths = OriginationPaths(macro, extension)
    for o in np.unique(origination):
        rows = slice(*np.searchsorted(origination, [o, o + 1]))
        last = int((book.age[rows] + book.remaining[rows]).max())
        lookups[int(o)] = {"origination": MacroLookup.from_values(*paths.values(int(o), int(o) + last + 1), paths.columns)}
    for first, stop in zip(firsts, ends):
        group = slice(int(first), int(stop))
        o = int(origination[first])
        sub = _Book(**{f.name: _rows(getattr(book, f.name), group) for f in dataclasses.fields(_Book)})
        check_coverage(lookups[o], _coverage_needs(sub, spec, hpi_names, collateral.market_rate_series, hold=False))
        chunks += [(slice(start, min(start + chunk_size, group.stop)), o) for start in range(group.start, group.stop, chunk_size)]

    def work(items):
        return [_origination_chunk(book, sl, spec, source, lookups[o], hpi_names, collateral, ages) for sl, o in items]

    blocks = [chunks[i : i + SUM_BLOCK] for i in range(0, len(chunks), SUM_BLOCK)]
    for block, values in zip(blocks, chunk_map(work, blocks, worker_count(workers), processes=True)):
        for (sl, _), v in zip(block, values):
            out[sl] = v
    if book.from_rows is not None:  # the loans came sorted by loan id: put each value back in its row
        in_order = np.empty(n_all)
        in_order[book.from_rows] = out
        return pd.Series(in_order, index=pd.Index(loans["loan_id"], name="loan_id"), name="pd_lifetime_origination")
    return pd.Series(out, index=pd.Index(book.loan_id, name="loan_id"), name="pd_lifetime_origination").sort_index()


def _starts_anywhere(source, spec: _Spec) -> bool:
    """Whether the origination view of a loan from age ``a`` on can start at ``a``: when its hazards from ``a`` on
    do not depend on the months before. Not so for a multi-state model (the arrears states at ``a`` come from
    the chain before), nor for a panel input that reverts month by month from its starting value."""
    if hasattr(source, "transition_probabilities"):
        return False
    return all(rule.get("projection", "hold") == "hold" for rule in spec.panel)


def _from_age(book: _Book, ages: np.ndarray) -> _Book:
    """The origination view of ``book`` (projected from age 0) starting at ``ages`` instead: the scheduled balance
    then, the months left, the calendar month. Each month from ``ages`` on reads the inputs it read before (the
    same age, calendar month, balance up to rounding, house-price ratio to origination)."""
    balance = scheduled_balance(book.balance, book.rate, book.remaining, ages)
    return dataclasses.replace(
        book, age=book.age + ages, remaining=book.remaining - ages, balance=balance, start_idx=book.start_idx + ages
    )


def _origination_chunk(book: _Book, sl: slice, spec: _Spec, source, lookups, hpi_names, collateral, ages) -> np.ndarray:
    """The origination view's lifetime PD of the loans in ``sl`` after ``ages``, given survival to them."""
    haz, *_ = _hazards_chunk(book, sl, spec, source, lookups, hpi_names, collateral.market_rate_series, hold=False)
    hd, hp = haz["origination"]
    # survival and cumulative PD as Curves.from_hazards gives them (the prepayment incidence is not needed)
    s = np.cumprod(1.0 - hd - hp, axis=1)
    marginal = hd.copy()
    marginal[:, 1:] *= s[:, :-1]
    f_d = np.cumsum(marginal, axis=1)
    # months ahead of the projection's start to compare from: 0 when it started at the age itself
    a = ages[sl] - book.age[sl]
    rows = np.arange(len(a))
    f_a = np.where(a > 0, f_d[rows, np.maximum(a - 1, 0)], 0.0)
    s_a = np.where(a > 0, s[rows, np.maximum(a - 1, 0)], 1.0)
    return np.where(s_a > 0, (f_d[:, -1] - f_a) / np.where(s_a > 0, s_a, 1.0), 0.0)


def _rows(value, rows: slice):
    """``value`` restricted to ``rows`` when it holds one entry per loan (arrays, dicts of arrays, frames)."""
    if isinstance(value, np.ndarray):
        return value[rows]
    if isinstance(value, dict):
        return {k: _rows(v, rows) for k, v in value.items()}
    if isinstance(value, pd.DataFrame):
        return value.iloc[rows]
    return value


def segment_pd_tables(term_structure: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The lifetime PD table by segment (and band), scenario and year ahead.

    Parameters
    ----------
    term_structure : DataFrame
        :attr:`ProjectionResult.term_structure`.

    Returns
    -------
    tidy : DataFrame
        One row per segment, band, scenario, weighting (``count`` or
        ``balance``) and year ahead: ``cumulative_pd``, ``conditional_pd``
        (PD of the year given survival to its start), ``survival``, ``n_loans``,
        ``balance``.
    wide : DataFrame
        The cumulative PD with one column per year ahead (``year_1``, ...).
    """
    keys = ["segment", "band", "scenario"]
    parts = []
    for weighting in ("count", "balance"):
        part = term_structure[keys + ["year_ahead", "n_loans", "balance"]].copy()
        part.insert(3, "weighting", weighting)
        part["cumulative_pd"] = term_structure[f"cumulative_pd_{weighting}"].to_numpy()
        part["conditional_pd"] = term_structure[f"conditional_pd_{weighting}"].to_numpy()
        part["survival"] = term_structure[f"survival_{weighting}"].to_numpy()
        parts.append(part)
    tidy = pd.concat(parts, ignore_index=True).rename(columns={"year_ahead": "year"})
    tidy = sort_with_bands(tidy, keys + ["weighting", "year"])
    wide = tidy.pivot_table(
        index=keys + ["weighting"], columns="year", values="cumulative_pd", sort=False, observed=True
    )
    wide.columns = [f"year_{int(y)}" for y in wide.columns]
    return tidy, wide.reset_index()


def segment_level(tidy: pd.DataFrame) -> pd.DataFrame:
    """The tidy PD table of :func:`segment_pd_tables` pooled over bands, by segment.

    Cumulative PD and survival are pooled with each band's weight (loans for
    ``count``, balance for ``balance``); the conditional PD of a year is then
    recomputed from the pooled curves, (F(y) - F(y-1)) / S(y-1).
    """
    keys = ["segment", "scenario", "weighting", "year"]
    w = np.where(tidy["weighting"] == "count", tidy["n_loans"], tidy["balance"]).astype(float)
    frame = tidy.assign(_w=w, _f=w * tidy["cumulative_pd"], _s=w * tidy["survival"])
    g = frame.groupby(keys, sort=True, observed=True)[["_w", "_f", "_s", "n_loans", "balance"]].sum().reset_index()
    g["cumulative_pd"] = np.where(g["_w"] > 0, g["_f"] / g["_w"].where(g["_w"] > 0, 1.0), 0.0)
    g["survival"] = np.where(g["_w"] > 0, g["_s"] / g["_w"].where(g["_w"] > 0, 1.0), 0.0)
    prev = g.groupby(keys[:3], sort=False)[["cumulative_pd", "survival"]].shift(1)
    f_prev = prev["cumulative_pd"].fillna(0.0)
    s_prev = prev["survival"].fillna(1.0)
    g["conditional_pd"] = np.where(s_prev > 0, (g["cumulative_pd"] - f_prev) / s_prev.where(s_prev > 0, 1.0), 0.0)
    return g[keys + ["n_loans", "balance", "cumulative_pd", "conditional_pd", "survival"]]


def segment_speeds(speeds: pd.DataFrame, scenario: str = WEIGHTED) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Model-implied speeds of each segment (bands pooled) for one scenario.

    Returns the speeds by segment and loan age (``smm``, ``cpr``, ``mdr``,
    ``cdr`` from the pooled expected balances) and the equivalent % PSA and %
    SDA of each segment (exposure-weighted least squares in CPR / CDR units).
    """
    from ..model import (
        equivalent_psa,
        equivalent_sda,
        mdr_to_cdr,
        smm_to_cpr,
    )

    sub = speeds[speeds["scenario"] == scenario]
    cols = ["default_exposure", "defaulted", "prepay_exposure", "prepaid"]
    g = sub.groupby(["segment", "loan_age"], sort=True, observed=True)[cols].sum().reset_index()
    # an age with no loans exposed has no rate (NaN, not 0): a curve ends at the last age with loans
    g = g[(g["default_exposure"] > 0) | (g["prepay_exposure"] > 0)].reset_index(drop=True)
    g["mdr"] = np.where(g["default_exposure"] > 0, g["defaulted"] / g["default_exposure"].where(g["default_exposure"] > 0, 1.0), np.nan)
    g["smm"] = np.where(g["prepay_exposure"] > 0, g["prepaid"] / g["prepay_exposure"].where(g["prepay_exposure"] > 0, 1.0), np.nan)
    g["cdr"] = mdr_to_cdr(g["mdr"].to_numpy())
    g["cpr"] = smm_to_cpr(g["smm"].to_numpy())
    rows = []
    for seg, d in g.groupby("segment", sort=True, observed=True):
        p, q = d[d["prepay_exposure"] > 0], d[d["default_exposure"] > 0]
        rows.append(
            {
                "segment": seg,
                "psa": equivalent_psa(p["loan_age"].to_numpy(), p["cpr"].to_numpy(), p["prepay_exposure"].to_numpy()),
                "sda": equivalent_sda(q["loan_age"].to_numpy(), q["cdr"].to_numpy(), q["default_exposure"].to_numpy()),
            }
        )
    return g.rename(columns={"loan_age": "age"}), pd.DataFrame(rows, columns=["segment", "psa", "sda"])
