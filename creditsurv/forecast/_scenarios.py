"""Scenario paths: read each scenario's monthly macro path, check it, extend it past its end.

A scenario file holds one row per calendar month and one column per macro
series. :func:`prepare_paths` reads every configured scenario, checks that it
covers the series the model needs from the month after the reporting month,
and extends it with the macro history before and the configured reversion rule
after (:func:`extend_path`).

On the CECL basis (ASC 326) a path is used only over the reasonable and
supportable forecast period, ``forecast_months`` after the reporting month, and
every series then reverts in a straight line to its long-run value over the
reversion period (ASC 326-20-30-9, cited from memory: beyond reasonable and
supportable forecasts an entity reverts to historical loss information; we
revert the model's macro inputs to their long-run values, from which the
model gives long-run loss rates).
"""

from __future__ import annotations

import fnmatch
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DataCheckWarning, ProjectionError, problem_list
from ..months import format_month, month_ranges, parse_month

__all__ = ["extend_path", "extend_paths", "load_scenario_paths", "origination_path", "prepare_paths"]


# --------------------------------------------------------------------------- months




def _month_index(values) -> tuple[np.ndarray, list]:
    """Month indices of a column of YYYY-MM text or dates; also the unparseable values."""
    s = pd.Series(values)
    if pd.api.types.is_datetime64_any_dtype(s):
        idx = (s.dt.year * 12 + s.dt.month - 1).to_numpy()
        return idx.astype(np.int64), []
    out, bad = np.zeros(len(s), dtype=np.int64), []
    for i, v in enumerate(s.tolist()):
        try:
            out[i] = parse_month(v if not hasattr(v, "date") else v.date())
        except (ValueError, TypeError):
            bad.append(v)
    return out, bad


# --------------------------------------------------------------------------- scenario paths


def _show(value) -> str:
    return "a blank" if pd.isna(value) else repr(str(value))


def _read_table(path: Path) -> pd.DataFrame:
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return pd.read_parquet(path)
    if suffix == ".csv":
        return pd.read_csv(path, dtype={"month": str})
    raise ProjectionError(f"{path}: cannot tell the format from the suffix {suffix!r}; use .csv or .parquet")


def load_scenario_paths(
    cfg_scenarios: Sequence,
    history: pd.DataFrame,
    *,
    required_series: Sequence[str] = (),
    month_column: str = "month",
    as_of_idx: int | None = None,
    non_negative: Sequence[str] = (),
    negative_severity: str = "error",
    forecast_months: int | None = None,
) -> dict[str, pd.DataFrame]:
    """Read and check each scenario's monthly macro path.

    Parameters
    ----------
    cfg_scenarios : sequence of config ``Scenario``
        Each with ``name`` and ``path`` (CSV or Parquet with a month column,
        ``YYYY-MM`` text or dates, and one column per series).
    history : DataFrame
        Macro history indexed by month index; every one of its series must be
        in every scenario.
    required_series : sequence of str
        Further series the model needs (e.g. from ``macro:<series>:<lag>``).
    month_column : str, default "month"
    as_of_idx : int, optional
        The reporting month: when given, each path must also carry the history
        on after it (reach past it, with the months before the path's start in
        the history), as :func:`extend_path` needs.
    non_negative : sequence of str
        Shell patterns of series that cannot be negative (``checks.non_negative_series``: unemployment
        rates, house-price indices); a negative value is a problem, a ``DataCheckWarning`` or nothing as
        ``negative_severity`` is ``"error"``, ``"warning"`` or ``"off"`` (the severity of the history's
        check ``macro_values_negative``).
    forecast_months : int, optional
        CECL: the reasonable and supportable forecast period (``cecl.forecast_months``); with ``as_of_idx``,
        each path must reach its last month.

    Returns
    -------
    dict of name -> DataFrame
        In config order, each indexed by month index (``month_idx``), float columns.

    Raises
    ------
    ProjectionError
        Listing every problem in one message, each naming the scenario and file:
        unreadable file, no month column, bad or duplicate months, missing
        months inside the path, missing series, non-numeric or missing values,
        a path that does not carry on from the reporting month, a path that ends
        before the forecast period does.
    """
    needed = list(dict.fromkeys([*history.columns, *required_series]))
    out, problems = {}, []
    for sc in cfg_scenarios:
        path = Path(sc.path)
        where = f"scenario {sc.name!r} ({path})"
        try:
            raw = _read_table(path)
        except ProjectionError as exc:
            problems.append(f"{where}: {exc}")
            continue
        except (OSError, ValueError) as exc:
            problems.append(f"{where}: cannot read the file ({exc})")
            continue
        if month_column not in raw.columns:
            problems.append(f"{where}: no {month_column!r} column; columns are {list(raw.columns)}")
            continue
        idx, bad = _month_index(raw[month_column])
        if bad:
            problems.append(f"{where}: column {month_column!r} has values that are not months: {bad[:5]}")
            continue
        dupes = pd.Index(idx)[pd.Index(idx).duplicated()].unique()
        if len(dupes):
            problems.append(f"{where}: duplicate months {month_ranges(dupes)}")
        if len(idx):
            gaps = sorted(set(range(int(idx.min()), int(idx.max()) + 1)) - set(idx.tolist()))
            if gaps:
                problems.append(f"{where}: missing months inside the path: {month_ranges(gaps)}")
        missing = [s for s in needed if s not in raw.columns]
        if missing:
            problems.append(f"{where}: missing series {missing} (needed by the model or present in the history)")
        frame = {}
        for col in raw.columns:
            if col == month_column:
                continue
            values = pd.to_numeric(raw[col], errors="coerce")
            bad_rows = np.flatnonzero(values.isna().to_numpy())
            if len(bad_rows):
                problems.append(
                    f"{where}: series {col!r} has missing or non-numeric values in months "
                    f"{month_ranges(idx[bad_rows])} (e.g. {_show(raw[col].iloc[bad_rows[0]])})"
                )
            infinite = np.flatnonzero(np.isinf(values.to_numpy(dtype=float)))
            if len(infinite):
                problems.append(
                    f"{where}: series {col!r} has infinite values in months {month_ranges(idx[infinite])} "
                    f"(e.g. {_show(raw[col].iloc[infinite[0]])})"
                )
            frame[col] = values.to_numpy(dtype=float)
            if negative_severity != "off" and any(fnmatch.fnmatchcase(str(col).lower(), p.lower()) for p in non_negative):
                negative = np.flatnonzero(frame[col] < 0)
                if len(negative):
                    text = (
                        f"{where}: series {col!r} is negative in months {month_ranges(idx[negative])} "
                        f"(e.g. {_show(raw[col].iloc[negative[0]])}); it matches checks.non_negative_series"
                    )
                    if negative_severity == "error":
                        problems.append(text)
                    else:
                        warnings.warn(DataCheckWarning(f"macro_values_negative: {text}"), stacklevel=2)
        if not dupes.size:
            out[sc.name] = pd.DataFrame(frame, index=pd.Index(idx, name="month_idx")).sort_index()
            reach = None if as_of_idx is None else _reach_problem(out[sc.name], history, int(as_of_idx))
            if reach:
                problems.append(f"{where}: {reach}")
            elif as_of_idx is not None and forecast_months is not None:
                short = _forecast_problem(out[sc.name], int(as_of_idx), int(forecast_months))
                if short:
                    problems.append(f"{where}: {short}")
    if problems:
        raise ProjectionError(problem_list(problems, "the scenario paths"))
    return out


def extend_path(
    history: pd.DataFrame,
    path: pd.DataFrame,
    until_idx: int,
    rule: str = "revert_to_mean",
    months: int = 24,
    long_run: Mapping[str, float] | None = None,
    *,
    as_of_idx: int | None = None,
    name: str = "scenario",
    hold_last_series: Sequence[str] = (),
    forecast_months: int | None = None,
) -> pd.DataFrame:
    """One continuous monthly series per column, from the history's start to ``until_idx``.

    The result is, month by month:

    1. the history up to and including the as-of month (``as_of_idx``, default
       the last month of the history);
    2. months after the as-of month and before the path's first month: the
       history, when it has them (else ProjectionError);
    3. the scenario path from the month after the as-of month to its last month T;
    4. after T, by ``rule``:

       - ``hold_last``: x(T + k) = x(T);
       - ``revert_to_mean``: x(T + k) = x(T) + (L - x(T)) * min(k, months) / months,
         a straight line reaching the long-run value L after ``months`` months,
         flat at L after.  L is ``long_run[series]`` when given, else the mean
         of the history up to the as-of month.  For a trending level series
         (a house-price index) the history's mean is far below the last
         value, so reverting to it is a price fall; give ``long_run`` for such
         series, list it in ``hold_last_series`` or use ``hold_last``.

       Series matching a shell pattern of ``hold_last_series`` (e.g. ``hpi_*``)
       hold their last value whatever ``rule`` says.

    With ``forecast_months`` F (the CECL basis) the path is used up to the end of
    the reasonable and supportable forecast period, T = as-of month + F, and
    ignored after it; after T the series revert as ``revert_to_mean`` says with
    ``months`` the reversion period R (``rule`` is not read), R = 0 reaching L in
    the first month after T. A path ending before T is an error.

    Parameters
    ----------
    history, path : DataFrame
        Indexed by month index, one column per series.
    until_idx : int
        Last month index wanted.
    rule : {"revert_to_mean", "hold_last"}
    months : int, default 24
        Months to reach the long-run value (with ``forecast_months``: the reversion period, 0 allowed).
    long_run : mapping of series -> float, optional
    as_of_idx : int, optional
    name : str
        Scenario name used in error messages.
    hold_last_series : sequence of str
    forecast_months : int, optional
        The reasonable and supportable forecast period in months (``cecl.forecast_months``).

    Returns
    -------
    DataFrame indexed by ``month_idx`` without gaps.
    """
    if forecast_months is not None:
        rule = "revert_to_mean"
        if months < 0:
            raise ProjectionError(f"scenario {name!r}: the reversion period needs months >= 0, got {months}")
    elif rule not in ("revert_to_mean", "hold_last"):
        raise ProjectionError(f"scenario {name!r}: unknown extension rule {rule!r}; use revert_to_mean or hold_last")
    elif months < 1:
        raise ProjectionError(f"scenario {name!r}: revert_to_mean needs months >= 1, got {months}")
    long_run = dict(long_run or {})
    hist, as_of, start = _checked_history(history, as_of_idx, name)
    problem = _reach_problem(path, hist, as_of)
    if problem is None and forecast_months is not None:
        problem = _forecast_problem(path, as_of, int(forecast_months))
    if problem:
        raise ProjectionError(f"scenario {name!r}: {problem}")
    if forecast_months is not None:
        # CECL: the scenario is read over the reasonable and supportable forecast period only (ASC 326-20-30-9)
        forecast_end = as_of + int(forecast_months)
        if int(path.index.min()) > forecast_end:  # the history's months before the path cover the whole period
            path = hist.reindex(range(as_of + 1, forecast_end + 1))[list(path.columns)]
        else:
            path = path.loc[:forecast_end]
    p0, p1 = int(path.index.min()), int(path.index.max())
    columns = list(dict.fromkeys([*hist.columns, *path.columns]))
    end = max(int(until_idx), as_of)
    index = np.arange(start, end + 1)
    out = pd.DataFrame(np.nan, index=pd.Index(index, name="month_idx"), columns=columns)
    hist_upto = hist.loc[hist.index <= as_of]
    out.loc[hist_upto.index, hist.columns] = hist_upto.to_numpy(dtype=float)
    if p0 > as_of + 1:
        _fill_bridge(out, hist, path, as_of, p0)
    body = path.loc[(path.index > as_of) & (path.index <= end)]
    out.loc[body.index, path.columns] = body.to_numpy(dtype=float)
    if end > p1:
        _fill_after_path(out, path, hist_upto, p1, end, rule, months, long_run, hold_last_series, name)
    return out.loc[: int(until_idx)] if until_idx >= start else out.iloc[:0]


def origination_path(history: pd.DataFrame, origination_idx: int, until_idx: int, extension=None) -> pd.DataFrame:
    """The single macro path a loan's lifetime PD at origination is projected on.

    Up to the origination month o, the history; after it, each series moves in a straight line from its
    value at o to the mean of the history up to o over ``extension.months`` months (then stays), as the
    scenario paths do after their last month (:func:`extend_path`), except that the long-run value is
    what was known at o, never ``extension.long_run``. Series of ``extension.hold_last_series`` (and
    every series with ``extension.rule`` ``hold_last``) hold their value at o. An origination month
    before the history's first month takes that first month's values, as do the months before it.

    Parameters
    ----------
    history : DataFrame
        Indexed by month index without gaps (only its months up to o are read).
    origination_idx, until_idx : int
    extension : config ``ScenarioExtension``, optional
        Default: revert to the mean over 24 months.

    Returns
    -------
    DataFrame indexed by ``month_idx`` from ``min(o, first month) - 1`` to ``max(until_idx, o + 1)``.
    """
    paths = OriginationPaths(history, extension)
    start, values = paths.values(origination_idx, until_idx)
    index = pd.Index(np.arange(start, start + len(values)), name="month_idx")
    return pd.DataFrame(values, index=index, columns=list(paths.columns))


class OriginationPaths:
    """The paths of :func:`origination_path` for many origination months, from one checked history.

    ``values(o, until_idx)`` gives the first month and the values (months x series) of month o's path.
    """

    def __init__(self, history: pd.DataFrame, extension=None):
        self.rule = getattr(extension, "rule", "revert_to_mean")
        self.months = getattr(extension, "months", 24)
        hold = getattr(extension, "hold_last_series", ())
        hist, _, self.first = _checked_history(history, None, "origination view")
        self.columns = tuple(hist.columns)
        self.history = hist.to_numpy(dtype=float)
        self.held = np.array(
            [self.rule == "hold_last" or any(fnmatch.fnmatchcase(c, pat) for pat in hold) for c in self.columns], dtype=bool
        )

    def values(self, origination_idx: int, until_idx: int) -> tuple[int, np.ndarray]:
        o, first = int(origination_idx), self.first
        known = self.history[: max(o, first) - first + 1]
        start = min(o, first) - 1
        end = max(int(until_idx), o + 1, first)
        out = np.full((end - start + 1, len(self.columns)), np.nan)
        out[first - start : first - start + len(known)] = known
        # months before the history (an origination month among them) take its first month
        out[: first - start] = known[0]
        last = known[-1]
        k = np.arange(1, end - o + 1, dtype=float)
        share = np.minimum(k, self.months) / self.months if self.months > 0 else np.ones(len(k))
        for j, col in enumerate(self.columns):
            if self.held[j]:
                out[o + 1 - start :, j] = last[j]
                continue
            present = ~np.isnan(known[:, j])
            if not present.any():
                raise ProjectionError(
                    f"scenario 'origination view': series {col!r} has no history to take a long-run mean from; "
                    "give scenario_extension.long_run"
                )
            target = float(np.where(present, known[:, j], 0.0).sum() / present.sum())  # the mean of the values there
            out[o + 1 - start :, j] = last[j] + (target - last[j]) * share
        return start, out[: max(int(until_idx), o + 1) - start + 1]


def _checked_history(history: pd.DataFrame, as_of_idx: int | None, name: str) -> tuple[pd.DataFrame, int, int]:
    """The history sorted by month, checked for gaps; with the as-of month and the history's first month."""
    hist = history.sort_index()
    h_idx = hist.index.to_numpy(dtype=np.int64)
    as_of = int(h_idx.max()) if as_of_idx is None else int(as_of_idx)
    start = int(h_idx.min())
    if as_of < start:
        raise ProjectionError(f"scenario {name!r}: as-of month {format_month(as_of)} is before the history starts")
    gaps = sorted(set(range(start, int(h_idx.max()) + 1)) - set(h_idx.tolist()))
    if gaps:
        raise ProjectionError(f"macro history: missing months {month_ranges(gaps)}")
    return hist, as_of, start


def _reach_problem(path: pd.DataFrame, hist: pd.DataFrame, as_of: int) -> str | None:
    """Why ``path`` cannot carry the history on after the as-of month (None when it can).

    The path must reach past the as-of month, and the months between the as-of
    month and its first month must be in the history for every series of the path.
    """
    if len(path) == 0:
        return "the path has no months"
    p_idx = path.index.to_numpy(dtype=np.int64)
    p0, p1 = int(p_idx.min()), int(p_idx.max())
    if p1 <= as_of:
        return f"the path ends at {format_month(p1)}, not after the as-of month {format_month(as_of)}"
    bridge = list(range(as_of + 1, p0))
    if not bridge:
        return None
    have = hist.reindex(bridge)
    missing = [c for c in path.columns if c not in hist.columns or have[c].isna().any()]
    if missing:
        return (
            f"the path starts at {format_month(p0)} but the as-of month is {format_month(as_of)}; "
            f"months {month_ranges(bridge)} of series {missing} are not in the history"
        )
    return None


def _forecast_problem(path: pd.DataFrame, as_of: int, forecast_months: int) -> str | None:
    """Why ``path`` does not cover the reasonable and supportable forecast period (None when it does)."""
    last, needed = int(path.index.max()), as_of + int(forecast_months)
    if last >= needed:
        return None
    return (
        f"the path ends at {format_month(last)}, before the end of the reasonable and supportable forecast period: "
        f"cecl.forecast_months {forecast_months} after the reporting month {format_month(as_of)} needs the path to "
        f"reach {format_month(needed)} (extend the path, or shorten the forecast period)"
    )


def _fill_bridge(out: pd.DataFrame, hist: pd.DataFrame, path: pd.DataFrame, as_of: int, p0: int) -> None:
    """Fill the months after the as-of month and before the path starts from the history, in place."""
    bridge = list(range(as_of + 1, p0))
    out.loc[bridge, path.columns] = hist.reindex(bridge)[path.columns].to_numpy(dtype=float)


def _fill_after_path(
    out: pd.DataFrame,
    path: pd.DataFrame,
    hist_upto: pd.DataFrame,
    p1: int,
    end: int,
    rule: str,
    months: int,
    long_run: dict[str, float],
    hold_last_series: Sequence[str],
    name: str,
) -> None:
    """Fill the months after the path's last month ``p1`` up to ``end`` by the extension rule, in place.

    A series holds its last value (``hold_last``, or a match in
    ``hold_last_series``) or moves in a straight line to its long-run value
    over ``months`` months (``revert_to_mean``; 0 months: the long-run value at
    once); see :func:`extend_path`.
    """
    k = np.arange(1, end - p1 + 1, dtype=float)
    after = np.arange(p1 + 1, end + 1)
    for col in path.columns:
        last = float(path[col].loc[p1])
        if rule == "hold_last" or any(fnmatch.fnmatchcase(col, pat) for pat in hold_last_series):
            values = np.full(len(k), last)
        else:
            target = long_run.get(col)
            if target is None:
                if col not in hist_upto.columns or hist_upto[col].isna().all():
                    raise ProjectionError(
                        f"scenario {name!r}: series {col!r} has no history to take a long-run mean from; "
                        "give scenario_extension.long_run"
                    )
                target = float(hist_upto[col].mean())
            share = np.minimum(k, months) / months if months > 0 else np.ones(len(k))
            values = last + (target - last) * share
        out.loc[after, col] = values


def _raise_for_infinite(history: pd.DataFrame, paths: Mapping[str, pd.DataFrame], as_of_idx: int, history_source: str):
    """``ProjectionError`` naming the series and months of every infinite value the projection would use."""
    problems = []
    used = [(history_source, history.loc[history.index <= as_of_idx])]
    used += [(f"scenario {name!r}", p.loc[p.index > as_of_idx]) for name, p in paths.items()]
    for where, frame in used:
        for col in frame.columns:
            values = pd.to_numeric(frame[col], errors="coerce").to_numpy(dtype=float)
            bad = np.flatnonzero(np.isinf(values))
            if len(bad):
                problems.append(f"{where}: series {col!r} is infinite in months {month_ranges(frame.index[bad])}")
    if problems:
        raise ProjectionError(problem_list(problems, "the macro values"))


def prepare_paths(
    cfg_scenarios: Sequence,
    history: pd.DataFrame,
    *,
    as_of_idx: int,
    until_idx: int,
    extension=None,
    required_series: Sequence[str] = (),
    cecl=None,
) -> dict[str, pd.DataFrame]:
    """Load every scenario path and extend it with the history (see :func:`extend_path`).

    ``extension`` is a config ``ScenarioExtension`` (rule, months, long_run);
    default revert to the history mean over 24 months. ``cecl`` (a config ``Cecl``,
    the CECL basis) uses each path over its forecast period, then reverts (see
    :func:`extend_paths`).
    """
    forecast = getattr(cecl, "forecast_months", None)
    paths = load_scenario_paths(
        cfg_scenarios, history, required_series=required_series, as_of_idx=as_of_idx if cecl is not None else None,
        forecast_months=forecast,
    )  # fmt: skip
    return extend_paths(paths, history, as_of_idx=as_of_idx, until_idx=until_idx, extension=extension, cecl=cecl)


def extend_paths(
    paths: Mapping[str, pd.DataFrame], history: pd.DataFrame, *, as_of_idx: int, until_idx: int, extension=None,
    required_series: Sequence[str] = (), history_source: str = "macro history", cecl=None,
) -> dict[str, pd.DataFrame]:
    """Extend paths already read by :func:`load_scenario_paths` with the history (see :func:`extend_path`).

    ``required_series`` not in every path is a ``ProjectionError`` naming them; so is an infinite value
    in the months the projection uses: the history up to ``as_of_idx`` (named ``history_source``, e.g.
    its file) and each path after it.

    With ``cecl`` (a config ``Cecl``: the CECL basis) each path is used for ``cecl.forecast_months`` months
    after ``as_of_idx``, the reasonable and supportable forecast period, and every series then moves in a
    straight line to its long-run value over ``cecl.reversion_months`` months and holds it (ASC 326-20-30-9,
    cited from memory); ``extension`` gives the long-run values (``long_run``, else the history's mean) and
    the series that hold their value instead (``hold_last_series``); its ``rule`` and ``months`` are not read.
    """
    missing = {name: [s for s in required_series if s not in p.columns] for name, p in paths.items()}
    missing = {name: m for name, m in missing.items() if m}
    if missing:
        raise ProjectionError(
            "the hazard source needs series the scenario paths lack: "
            + "; ".join(f"scenario {name!r}: {m}" for name, m in missing.items())
        )
    _raise_for_infinite(history, paths, as_of_idx, history_source)
    rule = getattr(extension, "rule", "revert_to_mean")
    months = getattr(extension, "months", 24)
    long_run = getattr(extension, "long_run", {})
    hold = getattr(extension, "hold_last_series", ())
    forecast = None
    if cecl is not None:
        rule, months, forecast = "revert_to_mean", int(cecl.reversion_months), int(cecl.forecast_months)
    return {
        name: extend_path(
            history, p, until_idx, rule, months, long_run, as_of_idx=as_of_idx, name=name, hold_last_series=hold,
            forecast_months=forecast,
        )
        for name, p in paths.items()
    }
