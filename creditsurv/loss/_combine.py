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
    SegmentSums,
    band_labels,
    speeds_frames,
    term_structure_frame,
)
from ._ecl import EclResult, expected_credit_loss, segment_summary

__all__ = ["combine_partitions", "expected_credit_loss_by_partition"]


def _in_groups(array: np.ndarray, segments, seg_at: dict, nb: int, G: int, length: int, pad_last: bool) -> np.ndarray:
    """A partition's (K, groups, length_p) sums placed in the combined groups and padded to ``length``.

    ``pad_last`` repeats the last column (matured loans keep their final values); otherwise zeros.
    """
    K, _, n = array.shape
    out = np.zeros((K, G, length))
    rows = np.array([seg_at[s] * nb + b for s in segments for b in range(nb)], dtype=np.int64)
    out[:, rows, :n] = array
    if pad_last and 0 < n < length:
        out[:, rows, n:] = array[:, :, n - 1: n]
    return out


def _pooled(sums: list[SegmentSums], names, seg_names, labels, weights):
    """The partitions' term and speed sums added in the combined groups; survival at year start and
    the weighted speeds recomputed from the totals."""
    nb = len(labels)
    G = max(len(seg_names), 1) * nb
    seg_at = {s: i for i, s in enumerate(seg_names)}
    years = max((x.term["n"].shape[2] for x in sums), default=0)
    max_age = max((x.speed["dexp"].shape[2] for x in sums), default=1) - 1
    ts = {k: np.zeros((len(names), G, years)) for k in ("n", "bal", "F_n", "F_b", "S_n", "S_b")}
    sp = {k: np.zeros((len(names), G, max_age + 1)) for k in ("dexp", "dflt", "pexp", "ppay")}
    for x in sums:
        segments = x.segments if x.segments else (seg_names[0],)
        for k in ts:
            ts[k] += _in_groups(x.term[k], segments, seg_at, nb, G, years, pad_last=True)
        for k in sp:
            sp[k] += _in_groups(x.speed[k], segments, seg_at, nb, G, max_age + 1, pad_last=False)
    ts["Sp_n"] = np.concatenate([ts["n"][:, :, :1], ts["S_n"][:, :, :-1]], axis=2)
    ts["Sp_b"] = np.concatenate([ts["bal"][:, :, :1], ts["S_b"][:, :, :-1]], axis=2)
    K = len(names)
    for k in sp:
        sp[k][K - 1] = sum(weights[s] * sp[k][ki] for ki, s in enumerate(names[:-1]))
    return ts, years, sp, max_age


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
    labels = band_labels(tuple(band_edges))
    loans = pd.concat([r.loans for r in results], ignore_index=True)
    proj_loans = pd.concat([r.projection.loans for r in results], ignore_index=True)
    seg_names = sorted({str(s) for s in proj_loans["segment"]})
    sums = [r.projection.sums for r in results]
    ts, years, sp, max_age = _pooled(sums, names, seg_names, labels, weights)
    term_structure = term_structure_frame(ts, names, seg_names, labels, years)
    speeds, multiples = speeds_frames(sp, names, seg_names, labels, max_age)
    projection = ProjectionResult(
        loans=proj_loans, term_structure=term_structure, speeds=speeds, speed_multiples=multiples,
        scenarios=tuple(scenarios), weights=weights, as_of_idx=first.projection.as_of_idx,
        band_edges=tuple(band_edges), sums=SegmentSums(tuple(seg_names), tuple(labels), ts, sp),
    )
    by_scenario = pd.concat([r.by_scenario for r in results], ignore_index=True)
    return EclResult(loans=loans, by_scenario=by_scenario, segments=segment_summary(loans), projection=projection,
                     scenarios=tuple(scenarios), weights=weights, accounting=first.accounting)  # fmt: skip


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


def _partition_ecl(source, paths, options, part, writers, progress, workers):
    return expected_credit_loss(
        part, source, paths, **options, progress=progress, schedule_writer=writers.get("schedule"),
        curve_writer=writers.get("curve"), term_writer=writers.get("term"), workers=workers,
    )
