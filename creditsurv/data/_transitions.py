"""What the data show about arrears: observed transitions between states and the states at the reporting month.

Pure tables from small inputs: the transition counts an engine returns for
:data:`~creditsurv.data.TRANSITION_COUNTS_SQL` (loan-months by calendar month,
origin state and destination) and the book at the reporting month. The states
are named by :meth:`creditsurv.config.Arrears.labels` (``current``, ``30-59``,
``60-89``) followed by the absorbing ``default`` and ``prepaid``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..months import format_month
from ._events import ABSORBING_STATES, DESTINATION_MOVE

__all__ = ["end_states", "state_distribution", "state_names", "transition_matrix", "transition_table"]


def state_names(labels) -> list[str]:
    """Every state in report order: the transient ``labels``, then ``default`` and ``prepaid``."""
    return [*labels, *ABSORBING_STATES]


def end_states(origin, destination, n_transient: int) -> np.ndarray:
    """The state each month ends in, as its position in :func:`state_names` order.

    ``origin`` is the transient state code at the start of the month and ``destination`` the
    ``loan_months.destination`` code (0 stay, an absorbing state's code, or ``DESTINATION_MOVE + k``).
    """
    origin = np.asarray(origin, dtype=np.int64)
    destination = np.asarray(destination, dtype=np.int64)
    end = np.where(destination == 0, origin, destination - DESTINATION_MOVE)
    for position, code in enumerate(ABSORBING_STATES.values()):
        end = np.where(destination == code, n_transient + position, end)
    return end


def _destination_names(origin: np.ndarray, destination: np.ndarray, labels) -> np.ndarray:
    """The state each (origin code, destination code) pair ends in, by name."""
    return np.array(state_names(labels), dtype=object)[end_states(origin, destination, len(labels))]


def _named(counts: pd.DataFrame, labels) -> pd.DataFrame:
    origin = counts["origin_state"].to_numpy(dtype=np.int64)
    destination = counts["destination"].to_numpy(dtype=np.int64)
    order = state_names(labels)
    return pd.DataFrame(
        {
            "month_idx": counts["month_idx"].to_numpy(dtype=np.int64),
            "origin": pd.Categorical(np.array(labels, dtype=object)[origin], categories=list(labels), ordered=True),
            "destination": pd.Categorical(_destination_names(origin, destination, labels), categories=order, ordered=True),
            "loan_months": counts["loan_months"].to_numpy(dtype=np.int64),
        }
    )


def transition_table(counts: pd.DataFrame, labels) -> pd.DataFrame:
    """Observed transitions month by month, tidy.

    Parameters
    ----------
    counts : DataFrame
        ``month_idx``, ``origin_state``, ``destination``, ``loan_months`` (see
        :data:`~creditsurv.data.TRANSITION_COUNTS_SQL`).
    labels : sequence of str
        Names of the transient states, in code order.

    Returns
    -------
    DataFrame
        ``month`` (YYYY-MM), ``origin``, ``destination`` (state names), ``loan_months``
        and ``rate``: the share of the month's loan-months in ``origin`` that moved to
        ``destination`` (staying included). Sorted by month, origin, destination.
    """
    named = _named(counts, labels)
    named = named.groupby(["month_idx", "origin", "destination"], observed=True, sort=True)["loan_months"].sum().reset_index()
    at_risk = named.groupby(["month_idx", "origin"], observed=True)["loan_months"].transform("sum")
    named["rate"] = named["loan_months"] / at_risk
    named.insert(0, "month", [format_month(int(m)) for m in named.pop("month_idx")])
    return named.astype({"origin": str, "destination": str})


def transition_matrix(counts: pd.DataFrame, labels, start: int | None = None, end: int | None = None) -> pd.DataFrame:
    """The observed one-month transition matrix over calendar months ``start`` to ``end`` (month indices).

    Returns
    -------
    DataFrame
        One row per transient origin state: ``origin``, ``loan_months`` (at risk in that
        state), then one column per state (:func:`state_names`) with the share of those
        loan-months that ended the month there; each row sums to 1. An origin state with
        no loan-months in the window has zeros.
    """
    named = _named(counts, labels)
    keep = np.ones(len(named), dtype=bool)
    if start is not None:
        keep &= named["month_idx"].to_numpy() >= start
    if end is not None:
        keep &= named["month_idx"].to_numpy() <= end
    wide = named[keep].pivot_table(
        index="origin", columns="destination", values="loan_months", aggfunc="sum", observed=False, fill_value=0
    )
    wide = wide.reindex(index=list(labels), columns=state_names(labels), fill_value=0).astype(np.int64)
    at_risk = wide.sum(axis=1)
    shares = wide.div(at_risk.where(at_risk > 0, 1), axis=0).astype(np.float64)
    shares.insert(0, "loan_months", at_risk.astype(np.int64))
    shares.index.name = "origin"
    shares.columns.name = None
    return shares.reset_index().astype({"origin": str})


def state_distribution(book: pd.DataFrame, labels) -> pd.DataFrame:
    """Loans on the book at the reporting month by arrears state (default for loans in default).

    Parameters
    ----------
    book : DataFrame
        ``arrears_state`` (transient code), ``in_default`` and ``balance`` per loan.

    Returns
    -------
    DataFrame
        ``state``, ``loans``, ``balance``, ``loan_share``, ``balance_share``: one row per
        transient state and ``default``, zeros included.
    """
    names = [*labels, "default"]
    codes = book["arrears_state"].to_numpy(dtype=np.int64)
    codes = np.where(book["in_default"].to_numpy(dtype=bool), len(labels), codes)
    balance = book["balance"].to_numpy(dtype=np.float64)
    loans = np.bincount(codes, minlength=len(names))
    amount = np.bincount(codes, weights=balance, minlength=len(names))
    return pd.DataFrame(
        {
            "state": names,
            "loans": loans.astype(np.int64),
            "balance": amount,
            "loan_share": loans / max(int(loans.sum()), 1),
            "balance_share": amount / (amount.sum() if amount.sum() > 0 else 1.0),
        }
    )
