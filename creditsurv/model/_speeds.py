"""Prepayment and default speeds in the trade's units, and simple hazard sources.

Units
-----
- SMM: single monthly mortality, the share of the balance exposed to
  prepayment that prepays in a month.  CPR = 1 - (1 - SMM)^12.
- MDR: monthly default rate; CDR = 1 - (1 - MDR)^12 (same annualisation).
- Speeds are decimals (0.06 is a 6% CPR); multiples are in percent of the
  standard (100.0 is 100% PSA).

Benchmark curves (published standards, formulas written from memory)
----------------------------------------------------------------------
- PSA prepayment curve, 100% PSA: CPR = 0.2% x age for ages 1..30, 6% from
  age 30 on.  ``m``% PSA multiplies the CPR by m/100.
- SDA default curve, 100% SDA: CDR = 0.02% x age for ages 1..30 (0.60% at 30),
  flat 0.60% for ages 30..60, falling by 0.0095% a month from age 61 to reach
  0.03% at age 120, flat 0.03% after.  ``m``% SDA multiplies the CDR by m/100.
  (Recalled from memory; the standard's further rules on the months before
  maturity and on liquidation lags are not modelled here.)

Combining a default and a prepayment speed into hazards
-------------------------------------------------------
The standard cash-flow convention applies defaults to the beginning-of-month
performing balance and prepayments to what survives defaults and scheduled
principal.  In the count-hazard form used by projection this is::

    h_default = MDR
    h_prepay  = SMM * (1 - MDR)

so that 1 - h_default - h_prepay = (1 - MDR)(1 - SMM): a loan prepays only if it
did not default first.  With level-payment balances the expected defaulted
balance sum S(u-1) h_default(u) B(u-1) then equals the standard's pool
cash-flow defaults exactly (see tests/test_speeds.py).

Hazard sources
--------------
:class:`BenchmarkCurves` and :class:`HazardTable` implement the hazard source
protocol used by :func:`creditsurv.forecast.project_loans`: a
``required_inputs`` list and ``hazards(raw) -> (h_default, h_prepay)``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import ProjectionError

__all__ = [
    "psa_cpr",
    "sda_cdr",
    "smm_to_cpr",
    "cpr_to_smm",
    "mdr_to_cdr",
    "cdr_to_mdr",
    "equivalent_psa",
    "equivalent_sda",
    "speeds_to_hazards",
    "BenchmarkCurves",
    "HazardTable",
]


def smm_to_cpr(smm):
    """CPR = 1 - (1 - SMM)^12 (array in, array out)."""
    return 1.0 - (1.0 - np.asarray(smm, dtype=float)) ** 12


def cpr_to_smm(cpr):
    """SMM = 1 - (1 - CPR)^(1/12)."""
    return 1.0 - (1.0 - np.asarray(cpr, dtype=float)) ** (1.0 / 12.0)


def mdr_to_cdr(mdr):
    """CDR = 1 - (1 - MDR)^12."""
    return smm_to_cpr(mdr)


def cdr_to_mdr(cdr):
    """MDR = 1 - (1 - CDR)^(1/12)."""
    return cpr_to_smm(cdr)


def psa_cpr(age, psa: float = 100.0):
    """CPR (decimal) of ``psa`` % PSA at loan age ``age`` (months, 1 = first month).

    100% PSA: 0.2% x age up to age 30, 6% after; ages <= 0 give 0.  The result
    is capped at 1 for very high multiples.
    """
    age = np.asarray(age, dtype=float)
    base = 0.002 * np.clip(age, 0.0, 30.0)
    return np.minimum(base * (psa / 100.0), 1.0)


def sda_cdr(age, sda: float = 100.0):
    """CDR (decimal) of ``sda`` % SDA at loan age ``age`` (months).

    100% SDA (from memory): 0.02% x age to 0.60% at age 30; 0.60% to age 60;
    0.60% - 0.0095% x (age - 60) to 0.03% at age 120; 0.03% after.
    """
    age = np.asarray(age, dtype=float)
    rising = 0.0002 * np.clip(age, 0.0, 30.0)
    falling = 0.006 - 0.000095 * np.clip(age - 60.0, 0.0, 60.0)
    base = np.where(age <= 60.0, rising, falling)
    return np.minimum(base * (sda / 100.0), 1.0)


def _equivalent_multiple(base, ages, speed, weights) -> float:
    ages = np.asarray(ages, dtype=float)
    speed = np.asarray(speed, dtype=float)
    w = np.ones_like(speed) if weights is None else np.asarray(weights, dtype=float)
    if not (ages.shape == speed.shape == w.shape):
        raise ValueError(f"ages, speeds and weights must have one shape, got {ages.shape}, {speed.shape}, {w.shape}")
    b = base(ages, 100.0)
    ok = np.isfinite(speed) & np.isfinite(w) & (w > 0)
    denom = float(np.sum(w[ok] * b[ok] ** 2))
    if denom == 0.0:
        return float("nan")
    return 100.0 * float(np.sum(w[ok] * b[ok] * speed[ok])) / denom


def equivalent_psa(ages, cpr, weights=None) -> float:
    """The % PSA whose CPR curve best fits ``cpr`` by age.

    Weighted least squares in CPR units: minimise sum_i w_i (cpr_i - m b_i)^2
    over the multiple m, with b_i the 100% PSA CPR at ``ages[i]``; closed form
    m = sum w b cpr / sum w b^2.  Returns 100 m (percent PSA), NaN when no age
    carries weight on a non-zero benchmark.  The cap of the CPR at 1 is ignored.
    """
    return _equivalent_multiple(psa_cpr, ages, cpr, weights)


def equivalent_sda(ages, cdr, weights=None) -> float:
    """The % SDA whose CDR curve best fits ``cdr`` (weighted least squares in CDR units)."""
    return _equivalent_multiple(sda_cdr, ages, cdr, weights)


def speeds_to_hazards(mdr, smm):
    """Count hazards from monthly speeds: ``(MDR, SMM * (1 - MDR))`` (see module docstring)."""
    mdr = np.asarray(mdr, dtype=float)
    return mdr, np.asarray(smm, dtype=float) * (1.0 - mdr)


class BenchmarkCurves:
    """Hazard source from the PSA and SDA standard curves, by loan age alone.

    Parameters
    ----------
    psa : float, default 100.0
        Prepayment speed in percent of the PSA curve.
    sda : float, default 100.0
        Default speed in percent of the SDA curve.
    """

    required_inputs = ["age"]

    def __init__(self, psa: float = 100.0, sda: float = 100.0):
        if psa < 0 or sda < 0:
            raise ValueError(f"speeds must be non-negative, got psa={psa}, sda={sda}")
        self.psa = float(psa)
        self.sda = float(sda)

    def __repr__(self) -> str:
        return f"BenchmarkCurves(psa={self.psa:g}, sda={self.sda:g})"

    def describe(self) -> str:
        return f"benchmark curves, {self.psa:g}% PSA and {self.sda:g}% SDA"

    def record(self) -> dict:
        return {"source": type(self).__name__, "psa": self.psa, "sda": self.sda}

    def hazards(self, raw: dict) -> tuple[np.ndarray, np.ndarray]:
        age = np.asarray(raw["age"], dtype=float)
        mdr = cdr_to_mdr(sda_cdr(age, self.sda))
        smm = cpr_to_smm(psa_cpr(age, self.psa))
        return speeds_to_hazards(mdr, smm)


class HazardTable:
    """Hazard source from a table of monthly hazards by loan age.

    Parameters
    ----------
    table : DataFrame
        Columns ``age`` (integers, each once, without gaps), ``default`` and
        ``prepay`` (monthly probabilities, their sum at most 1).  Ages above
        the last row take the last row's hazards; ages below the first row take
        the first row's.
    """

    required_inputs = ["age"]

    def __init__(self, table: pd.DataFrame):
        missing = [c for c in ("age", "default", "prepay") if c not in table.columns]
        if missing:
            raise ProjectionError(f"hazard table: missing column(s) {missing}; have {list(table.columns)}")
        t = table.sort_values("age")
        age = t["age"].to_numpy()
        if len(age) == 0:
            raise ProjectionError("hazard table: no rows")
        if np.any(age != np.round(age)) or np.any(np.diff(age) != 1):
            raise ProjectionError("hazard table: ages must be consecutive integers, each once")
        hd = t["default"].to_numpy(dtype=float)
        hp = t["prepay"].to_numpy(dtype=float)
        bad = ~((hd >= 0) & (hp >= 0) & (hd + hp <= 1.0))
        if bad.any():
            raise ProjectionError(
                f"hazard table: hazards must be probabilities with default + prepay <= 1; "
                f"bad at ages {age[bad][:5].astype(int).tolist()}"
            )
        self._first = int(age[0])
        self._default = hd
        self._prepay = hp

    def describe(self) -> str:
        return "a table of monthly hazards by loan age"

    def record(self) -> dict:
        return {"source": type(self).__name__}

    def hazards(self, raw: dict) -> tuple[np.ndarray, np.ndarray]:
        age = np.asarray(raw["age"])
        i = np.clip(age.astype(np.int64) - self._first, 0, len(self._default) - 1)
        return self._default[i], self._prepay[i]
