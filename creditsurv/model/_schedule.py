"""The scheduled balance of a level-payment loan: the one rule, as NumPy and as SQL text.

Current LTV divides the scheduled balance by the indexed property value, on
history (SQL, :func:`scheduled_balance_sql`, in the feature spec's raw query)
and in projection (NumPy, :func:`scheduled_balance`); both write the standard
annuity closed form B(k) = B0 ((1+r)^n - (1+r)^k) / ((1+r)^n - 1) with
r = note rate / 12, and B0 (n - k) / n when r = 0. (The demo book's simulator
keeps its own copy of the formula: it is the data-generating process the
model is tested against, and the shipped book must not change.)
"""

from __future__ import annotations

import numpy as np

__all__ = ["scheduled_balance", "scheduled_balance_sql"]


def scheduled_balance(balance, note_rate, n_remaining, k):
    """Level-payment balance after ``k`` of ``n_remaining`` monthly payments.

    B(k) = B0 ((1+r)^n - (1+r)^k) / ((1+r)^n - 1) with r = note_rate / 12, and
    B0 (n - k) / n when r = 0; 0 for k >= n.  Arguments broadcast.
    (Standard annuity closed form; checked against numpy_financial in tests.)
    """
    b0 = np.asarray(balance, dtype=float)
    r = np.asarray(note_rate, dtype=float) / 12.0
    n = np.asarray(n_remaining, dtype=float)
    k = np.minimum(np.asarray(k, dtype=float), n)
    lr = np.log1p(r)
    gn = np.expm1(n * lr)  # (1+r)^n - 1, accurate for small r
    gk = np.expm1(k * lr)
    with np.errstate(invalid="ignore", divide="ignore"):
        annuity = (b0 / gn) * (gn - gk)  # B0 / ((1+r)^n - 1) once per loan when the arguments are (loans, 1)
    if not (r == 0.0).any():
        return annuity
    linear = b0 * (n - k) / np.where(n > 0, n, 1.0)
    return np.where(r == 0.0, linear, annuity)


def scheduled_balance_sql(balance: str, note_rate: str, n: str, k: str) -> str:
    """SQL text of :func:`scheduled_balance` for the SQL expressions ``balance``, ``note_rate``, ``n`` and ``k``.

    ``k`` must already lie in ``0..n`` (the caller clamps it).
    """
    rate = f"({note_rate} / 12.0)"
    return (
        f"CASE WHEN {rate} = 0 THEN {balance} * (1.0 - {k} / {n}) "
        f"ELSE {balance} * (power(1 + {rate}, {n}) - power(1 + {rate}, {k})) "
        f"/ (power(1 + {rate}, {n}) - 1) END"
    )
