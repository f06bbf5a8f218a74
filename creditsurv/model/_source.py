"""The hazard source of a run, chosen by ``model.source``: a fit, a saved model, benchmark curves or a table."""

from __future__ import annotations

import pandas as pd

from ..errors import DataError
from ._hazard import HazardResults, fit_model, load_model
from ._speeds import BenchmarkCurves, HazardTable

__all__ = ["development_window", "hazard_source"]


def development_window(cfg) -> tuple[str, tuple[int, int]]:
    """The row filter of the development window over the raw inputs, and its bounds."""
    dev = cfg.windows.development
    return "month_idx BETWEEN ? AND ?", (int(dev.start), int(dev.end))


def hazard_source(cfg, engine, temp_dir=None) -> HazardResults | BenchmarkCurves | HazardTable:
    """The hazard source of a run.

    ``model.source`` fitted: the saved model when ``model.path`` is set, else a
    fit on the development window on ``engine``; benchmark: % PSA and % SDA
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
        return load_model(cfg.model.path)
    where, params = development_window(cfg)
    return fit_model(engine, cfg.model, cfg.collateral, where_sql=where, params=params, temp_dir=temp_dir)
