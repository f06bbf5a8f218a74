"""One ECL result from the results of several partitions of the book.

Loan-level tables are concatenated (each partition is a contiguous range of
loan ids); the segment summary is recomputed from them; the segment term
structure and speeds are rebuilt from the pooled sums of every partition and
finished with the forecast stage's own table builders. One partition's result
is returned as it is.
"""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd

from ..forecast import (
    WEIGHTED,
    ProjectionResult,
    score_band_labels,
    speeds_frames,
    term_structure_frame,
)
from ._ecl import EclResult, expected_credit_loss, segment_summary

__all__ = ["combine_partitions", "expected_credit_loss_by_partition"]


def _term_sums(parts, names, seg_names, labels):
    """Pooled sums of the segment term structure, rebuilt from each partition's table and added.

    A partition's table holds ratios of its sums (``cumulative_pd_count`` = F_n / n
    and so on), so multiplying back by ``n_loans`` or ``balance`` gives its sums.
    Past a partition's last year its loans have matured: their sums stay at the
    last year's values. ``Sp`` (survival at the start of the year) is S one year
    earlier, and n or balance in the first year.
    """
    K, nb = len(names), len(labels)
    G = max(len(seg_names), 1) * nb
    years = max((int(t["year_ahead"].max()) for t in parts if len(t)), default=0)
    ts = {key: np.zeros((K, G, years)) for key in ("n", "bal", "F_n", "F_b", "S_n", "S_b")}
    seg_at = {s: i for i, s in enumerate(seg_names)}
    band_at = {b: i for i, b in enumerate(labels)}
    name_at = {s: i for i, s in enumerate(names)}
    for t in parts:
        if not len(t):
            continue
        ki = t["scenario"].map(name_at).to_numpy()
        g = t["segment"].astype(str).map(seg_at).to_numpy() * nb + t["band"].map(band_at).to_numpy()
        y = t["year_ahead"].to_numpy() - 1
        n = t["n_loans"].to_numpy(dtype=float)
        bal = t["balance"].to_numpy(dtype=float)
        values = {
            "n": n,
            "bal": bal,
            "F_n": t["cumulative_pd_count"].to_numpy() * n,
            "F_b": np.where(bal > 0, t["cumulative_pd_balance"].to_numpy() * bal, 0.0),
            "S_n": t["survival_count"].to_numpy() * n,
            "S_b": np.where(bal > 0, t["survival_balance"].to_numpy() * bal, 0.0),
        }
        last = int(y.max())
        part = {k: np.zeros((K, G, years)) for k in ts}
        for k, v in values.items():
            part[k][ki, g, y] = v
            part[k][:, :, last + 1:] = part[k][:, :, last: last + 1]
            ts[k] += part[k]
    ts["Sp_n"] = np.concatenate([ts["n"][:, :, :1], ts["S_n"][:, :, :-1]], axis=2)
    ts["Sp_b"] = np.concatenate([ts["bal"][:, :, :1], ts["S_b"][:, :, :-1]], axis=2)
    return ts, years


def _speed_sums(parts, names, seg_names, labels, weights):
    """Pooled expected balances of the segment speeds, added over partitions; ``weighted`` recomputed."""
    K, nb = len(names), len(labels)
    G = max(len(seg_names), 1) * nb
    max_age = max((int(t["loan_age"].max()) for t in parts if len(t)), default=0)
    sp = {key: np.zeros((K, G, max_age + 1)) for key in ("dexp", "dflt", "pexp", "ppay")}
    columns = {"dexp": "default_exposure", "dflt": "defaulted", "pexp": "prepay_exposure", "ppay": "prepaid"}
    seg_at = {s: i for i, s in enumerate(seg_names)}
    band_at = {b: i for i, b in enumerate(labels)}
    for t in parts:
        if not len(t):
            continue
        t = t[t["scenario"] != names[-1]]
        ki = t["scenario"].map({s: i for i, s in enumerate(names)}).to_numpy()
        g = t["segment"].astype(str).map(seg_at).to_numpy() * nb + t["band"].map(band_at).to_numpy()
        age = t["loan_age"].to_numpy()
        for key, col in columns.items():
            np.add.at(sp[key], (ki, g, age), t[col].to_numpy(dtype=float))
    for key in sp:
        sp[key][K - 1] = sum(weights[s] * sp[key][ki] for ki, s in enumerate(names[:-1]))
    return sp, max_age


def combine_partitions(results: list[EclResult]) -> EclResult:
    """One :class:`~creditsurv.loss.EclResult` from the partitions' results, in loan order.

    Loan-level tables are concatenated (each partition is a contiguous range of
    loan ids); the segment summary is recomputed from them with
    :func:`creditsurv.loss.segment_summary`; the segment term structure and
    speeds are rebuilt from the pooled sums of every partition and finished
    with the forecast stage's own table builders. One result is returned as it is.
    """
    if len(results) == 1:
        return results[0]
    first = results[0]
    scenarios, weights = first.scenarios, first.weights
    band_edges = first.projection.band_edges
    names = (*scenarios, WEIGHTED)
    labels = score_band_labels(tuple(band_edges))
    loans = pd.concat([r.loans for r in results], ignore_index=True)
    proj_loans = pd.concat([r.projection.loans for r in results], ignore_index=True)
    seg_names = sorted({str(s) for s in proj_loans["segment"]})
    ts, years = _term_sums([r.projection.term_structure for r in results], names, seg_names, labels)
    sp, max_age = _speed_sums([r.projection.speeds for r in results], names, seg_names, labels, weights)
    term_structure = term_structure_frame(ts, names, seg_names, labels, years)
    speeds, multiples = speeds_frames(sp, names, seg_names, labels, max_age)
    projection = ProjectionResult(
        loans=proj_loans, term_structure=term_structure, speeds=speeds, speed_multiples=multiples,
        scenarios=tuple(scenarios), weights=dict(weights), as_of_idx=first.projection.as_of_idx,
        band_edges=tuple(band_edges),
    )
    return EclResult(loans=loans, segments=segment_summary(loans), projection=projection,
                     scenarios=tuple(scenarios), weights=dict(weights))


def expected_credit_loss_by_partition(engine, loans, source, paths, *, writers=None, progress=None, **options) -> EclResult:
    """:func:`~creditsurv.loss.expected_credit_loss` of the book, run by ``engine`` over partitions of loans.

    Parameters
    ----------
    engine : creditsurv.engines.Engine
        Splits the book (:meth:`~creditsurv.engines.Engine.map_book`); the DuckDB
        engine runs it whole, in this process.
    loans, source, paths, **options
        As for :func:`~creditsurv.loss.expected_credit_loss`.
    writers : dict, optional
        ``schedule``, ``curve`` and ``term``: callables taking the long tables
        (loan x scenario x month or year), in loan order.
    progress : callable(done, total), optional

    Returns
    -------
    EclResult
        Per-loan values do not depend on the partitioning; segment tables are
        combined from pooled sums (:func:`combine_partitions`).
    """
    task = functools.partial(_partition_ecl, source, dict(paths), options)
    return combine_partitions(engine.map_book(task, loans, dict(writers or {}), progress))


def _partition_ecl(source, paths, options, part, writers, progress):
    return expected_credit_loss(
        part, source, paths, **options, progress=progress, schedule_writer=writers.get("schedule"),
        curve_writer=writers.get("curve"), term_writer=writers.get("term"),
    )
