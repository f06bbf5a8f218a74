"""Lifetime PD term structures of groups of loans, pooled from each loan's monthly curves.

A loan's curves run from the month after the reporting month to its maturity. Past its maturity a
loan keeps its final values: cumulative PD and survival (no default, no prepayment) stay where they
ended, and its marginal PD is 0. So a group's curve at any horizon averages over every loan of the
group, matured or not, and its cumulative PD never falls.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..errors import DataError
from ..forecast import band_order

__all__ = ["MEASURES", "PERIODS", "WEIGHTINGS", "GroupedCurves", "table_name"]

MEASURES = {
    "cumulative": "cumulative_pd",
    "marginal": "marginal_pd",
    "conditional": "conditional_pd",
    "survival": "survival",
}
"""Measure name -> column: cumulative PD F(t); the period's marginal PD F(t) - F(t - 1) (the PD of the
period, unconditional); the conditional PD (the period's marginal PD over survival to its start); the
survival S(t) (neither defaulted nor prepaid)."""

PERIODS = ("year", "month")
WEIGHTINGS = ("count", "balance")
INTERVAL_COLUMNS = ("band", "age_band")
"""Loan attributes whose values are intervals (``[640, 700)``): sorted by their lower edge, not as text."""


def table_name(by) -> str:
    """The name of the table grouped by ``by``: ``pd_by_segment_band``, or ``pd_whole_book``."""
    return "pd_by_" + "_".join(by) if by else "pd_whole_book"


def _group_sums(codes: np.ndarray, values: np.ndarray, G: int) -> np.ndarray:
    """Sums of the rows of ``values`` by ``codes`` (0 .. G - 1), in a fixed order: (G, columns)."""
    order = np.argsort(codes, kind="stable")
    sorted_codes = codes[order]
    present, starts = np.unique(sorted_codes, return_index=True)
    out = np.zeros((G, values.shape[1]))
    if len(order):
        out[present] = np.add.reduceat(values[order], starts, axis=0)
    return out


class _Grouping:
    """One table's groups: each loan's group code and the groups' attribute values."""

    def __init__(self, attributes: pd.DataFrame, by: tuple[str, ...]):
        self.by = by
        if by:
            index = pd.MultiIndex.from_frame(attributes[list(by)])
            codes, levels = index.factorize()
            self.levels = levels.to_frame(index=False, name=list(by))
        else:
            codes = np.zeros(len(attributes), dtype=np.int64)
            self.levels = pd.DataFrame(index=range(1))
        self.codes = np.asarray(codes, dtype=np.int64)
        self.G = len(self.levels)


class GroupedCurves:
    """Pooled monthly curves of projected loans by groups of their attributes; a projection chunk consumer.

    Parameters
    ----------
    attributes : DataFrame
        One row per loan that will be projected: ``loan_id``, ``balance`` (the weight of a
        balance-weighted curve: the balance at the reporting month) and the attributes to group by.
    groupings : sequence of tuple of str
        One table per tuple of attribute names; ``()`` is the whole book.
    scenarios : sequence of str
        The scenarios (or ``weighted``) to keep.
    horizon : int
        The longest remaining term of the loans, in months.

    Call the object with each :class:`~creditsurv.forecast.ChunkProjection`, then :meth:`tables`.
    """

    def __init__(self, attributes: pd.DataFrame, groupings, scenarios, horizon: int):
        missing = sorted({c for by in groupings for c in by} - set(attributes.columns))
        if missing:
            raise DataError(f"no loan attribute {missing}; have {sorted(attributes.columns)}")
        self.index = pd.Index(attributes["loan_id"].to_numpy())
        self.balance = attributes["balance"].to_numpy(dtype=float)
        self.groupings = [_Grouping(attributes, tuple(by)) for by in groupings]
        self.scenarios = tuple(scenarios)
        self.horizon = int(horizon)
        self.seen = np.zeros(len(attributes), dtype=bool)
        self.sums = []
        for g in self.groupings:
            arrays = {
                (s, w, k): np.zeros((g.G, self.horizon))
                for s in self.scenarios for w in WEIGHTINGS for k in ("F", "S", "Sp", "M")
            }  # fmt: skip
            self.sums.append(
                {"arrays": arrays, "n": np.zeros(g.G), "balance": np.zeros(g.G), "months": np.zeros(g.G, dtype=np.int64)}
            )

    def __call__(self, ch) -> None:
        pos = self.index.get_indexer(ch.loan_id)
        if (pos < 0).any():
            raise DataError("a projected loan has no attributes (the loan table and the book disagree)")
        self.seen[pos] = True
        n, H = ch.mask.shape
        months = ch.mask.sum(axis=1).astype(np.int64)
        weights = {"count": np.ones(n), "balance": self.balance[pos]}
        curves = {
            s: {"F": ch.cum_default[s], "S": ch.survival[s], "Sp": ch.survival_prev[s], "M": ch.marginal_pd[s]}
            for s in self.scenarios
        }
        for grouping, sums in zip(self.groupings, self.sums):
            codes = grouping.codes[pos]
            G = grouping.G
            sums["n"] += np.bincount(codes, minlength=G)
            sums["balance"] += np.bincount(codes, weights=weights["balance"], minlength=G)
            np.maximum.at(sums["months"], codes, months)
            for s, arrays in curves.items():
                for w, wv in weights.items():
                    parts = {k: _group_sums(codes, x * wv[:, None], G) for k, x in arrays.items()}
                    for k, part in parts.items():
                        target = sums["arrays"][(s, w, k)]
                        target[:, :H] += part
                        # past the chunk's last month every loan has matured: it keeps its final cumulative PD and
                        # survival, its marginal PD is 0, and the survival to the start of a month is the final S(H)
                        if k != "M":
                            target[:, H:] += parts["S" if k == "Sp" else k][:, -1:]

    def tables(self, *, period: str = "year", weightings=WEIGHTINGS, measures=tuple(MEASURES)) -> dict[str, pd.DataFrame]:
        """One table per grouping, named by :func:`table_name`.

        Rows: each group's attribute values, ``scenario``, ``weighting``, ``year_ahead`` (or
        ``month_ahead``) from 1 to the group's longest remaining term; columns ``n_loans``,
        ``balance`` and the ``measures`` (:data:`MEASURES`). Groups in the order of their values
        (interval labels by their lower edge), scenarios in the given order.
        """
        if not self.seen.all():
            raise DataError(f"{int((~self.seen).sum())} loans of the table were never projected")
        out = {}
        for grouping, sums in zip(self.groupings, self.sums):
            out[table_name(grouping.by)] = self._table(grouping, sums, period, tuple(weightings), tuple(measures))
        return out

    def _table(self, grouping: _Grouping, sums: dict, period: str, weightings, measures) -> pd.DataFrame:
        T = self.horizon
        if period == "year":
            P = max(math.ceil(T / 12), 1)
            ends = np.minimum(12 * np.arange(1, P + 1), T) - 1
            starts = 12 * np.arange(P)
            periods_of = -(-sums["months"] // 12)
        else:
            P = max(T, 1)
            ends = starts = np.arange(P)
            periods_of = sums["months"]
        keep = np.arange(1, P + 1)[None, :] <= periods_of[:, None]  # (G, P): up to the group's last maturity
        g_idx, p_idx = np.nonzero(keep)
        frames = []
        for s in self.scenarios:
            for w in weightings:
                a = {k: sums["arrays"][(s, w, k)] for k in ("F", "S", "Sp", "M")}
                total = sums["n"] if w == "count" else sums["balance"]
                if period == "year":
                    M = np.add.reduceat(a["M"], starts, axis=1) if T else np.zeros((grouping.G, P))
                else:
                    M = a["M"]
                F, S, Sp = a["F"][:, ends], a["S"][:, ends], a["Sp"][:, starts]
                with np.errstate(invalid="ignore", divide="ignore"):
                    values = {
                        "cumulative": F / total[:, None],
                        "marginal": M / total[:, None],
                        "conditional": np.where(Sp > 0, M / np.where(Sp > 0, Sp, 1.0), 0.0),
                        "survival": S / total[:, None],
                    }
                frame = grouping.levels.iloc[g_idx].reset_index(drop=True)
                frame["scenario"] = s
                frame["weighting"] = w
                frame[f"{period}_ahead"] = p_idx + 1
                frame["n_loans"] = sums["n"][g_idx].astype(np.int64)
                frame["balance"] = sums["balance"][g_idx]
                for m in measures:
                    frame[MEASURES[m]] = values[m][g_idx, p_idx]
                frames.append(frame)
        table = pd.concat(frames, ignore_index=True)
        rank = {s: i for i, s in enumerate(self.scenarios)}
        rank_w = {w: i for i, w in enumerate(WEIGHTINGS)}

        def key(col):
            if col.name in INTERVAL_COLUMNS:
                return pd.Series(band_order(col), index=col.index)
            if col.name == "scenario":
                return col.map(rank)
            if col.name == "weighting":
                return col.map(rank_w)
            return col

        return table.sort_values([*grouping.by, "scenario", "weighting", f"{period}_ahead"], key=key, kind="stable", ignore_index=True)
