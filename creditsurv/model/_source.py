"""The hazard source of a run, chosen by ``model.source``: a fit, a saved model, benchmark curves or a table."""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np
import pandas as pd

from ..errors import DataError
from ._features import feature_spec
from ._hazard import (
    MULTI_STATE_FORMAT,
    TRUST_LIMITS,
    HazardResults,
    check_saved_model,
    fit_model,
    read_model_file,
    results_from_dict,
)
from ._multistate import MultiStateResults, fit_multi_state
from ._speeds import BenchmarkCurves, HazardTable

__all__ = ["HazardSource", "development_window", "hazard_source", "load_model", "with_age_tail"]


@runtime_checkable
class HazardSource(Protocol):
    """What projection asks of any source of monthly hazards (a fitted model, PSA/SDA curves, a table).

    ``required_inputs`` lists the raw inputs needed per loan-month (``age``,
    ``log_age``, ``current_ltv``, ``rate_incentive``, a loan column, or
    ``macro:<series>:<lag>``); ``hazards(raw)`` returns the monthly default and
    prepayment probabilities for them, flat arrays as long as the inputs.
    ``describe()`` and ``record()`` say what the source is, for the screen and
    for a run's manifest.
    """

    required_inputs: list

    def hazards(self, raw: dict) -> tuple[np.ndarray, np.ndarray]: ...

    def describe(self) -> str: ...

    def record(self) -> dict: ...


def load_model(path) -> HazardResults | MultiStateResults:
    """Read a model written by :meth:`HazardResults.save` or :meth:`MultiStateResults.save`."""
    data = read_model_file(path)
    if isinstance(data, dict) and data.get("format") == MULTI_STATE_FORMAT:
        return MultiStateResults.from_dict(data, path)
    return results_from_dict(data, path)


def with_age_tail(model, rule: str):
    """The fitted ``model`` with its age-tail rule set to ``rule`` (``hold`` or ``extrapolate``); other sources
    (benchmark curves, tables) are returned as they are."""
    import dataclasses

    if not isinstance(model, (HazardResults, MultiStateResults)):
        return model
    return dataclasses.replace(model, spec=model.spec.with_tail(rule))


def development_window(cfg) -> tuple[str, tuple[int, int]]:
    """The row filter of the months the model is fitted on over the raw inputs, and its bounds.

    The development window, or with ``windows.fit_on: development_and_out_of_time`` the development window
    through the end of the out-of-time window (a model refitted on both once validated).
    """
    dev, oot = cfg.windows.development, cfg.windows.out_of_time
    end = oot.end if cfg.windows.fit_on == "development_and_out_of_time" and oot is not None else dev.end
    return "month_idx BETWEEN ? AND ?", (int(dev.start), int(end))


def hazard_source(cfg, engine, temp_dir=None) -> HazardResults | MultiStateResults | BenchmarkCurves | HazardTable:
    """The hazard source of a run.

    ``model.source`` fitted: the saved model when ``model.path`` is set, else a
    fit on the development window on ``engine`` (with ``model.kind: multi_state``
    one multinomial logit per arrears state); benchmark: % PSA and % SDA
    curves; table: monthly hazards by loan age from a CSV file. Only a fit
    reads the panel.
    """
    if cfg.model.source == "benchmark":
        return BenchmarkCurves(psa=cfg.model.psa, sda=cfg.model.sda)
    if cfg.model.source == "table":
        try:
            table = pd.read_csv(cfg.model.table)
        except (OSError, ValueError) as exc:
            raise DataError(f"model.table: cannot read {cfg.model.table}: {exc}") from None
        return HazardTable(table)
    if cfg.model.path is not None:
        model = load_model(cfg.model.path)
        check_saved_model(model, {name: getattr(cfg.model.fit, name) for name in TRUST_LIMITS}, cfg.model.path)
        return model
    where, params = development_window(cfg)
    if cfg.model.kind == "multi_state":
        model = cfg.model
        spec = feature_spec(model, cfg.collateral).learn(engine.con, where, params)
        return fit_multi_state(
            engine, spec, cfg.arrears.labels(cfg.default_definition.days_past_due), where_sql=where, params=params,
            ridge=model.ridge, batch_size=model.fit.batch_size, max_iter=model.fit.max_iter, tol=model.fit.tol,
            temp_dir=temp_dir, limits={name: getattr(model.fit, name) for name in TRUST_LIMITS},
            min_transition_events=model.fit.min_transition_events,
        )
    return fit_model(engine, cfg.model, cfg.collateral, where_sql=where, params=params, temp_dir=temp_dir)
