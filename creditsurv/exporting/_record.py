"""What a run keeps so that its loan-by-period tables can be recomputed later: the book and the scenario paths.

A run writes them under ``projection_inputs/`` (hashed in its manifest like every output): the book as it
was projected (one row per loan on the book, with the panel history and staging history the run added),
and each scenario's macro path (history, scenario and extension, by month index). With the run's config,
model and default routes (all in the run folder) they give every loan's curves and ECL schedule again.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..errors import RunError

__all__ = ["PROJECTION_INPUTS", "ProjectionInputs", "read_projection_inputs", "save_projection_inputs"]

PROJECTION_INPUTS = "projection_inputs"
BOOK = f"{PROJECTION_INPUTS}/book.parquet"
HAZARD_TABLE = f"{PROJECTION_INPUTS}/hazard_table.csv"
MONTH_INDEX = "month_idx"


def _path_file(k: int) -> str:
    return f"{PROJECTION_INPUTS}/scenario_path_{k + 1}.parquet"


def save_projection_inputs(run, book: pd.DataFrame, paths: dict, hazard_table=None) -> None:
    """Write the projected ``book`` and the scenario ``paths`` (in scenario order) into the run folder ``run``.

    ``hazard_table``: the CSV file of a table hazard source, copied as it is.
    """
    run.add_table(book.reset_index(drop=True), BOOK)
    for k, frame in enumerate(paths.values()):
        run.add_table(frame.rename_axis(MONTH_INDEX).reset_index(), _path_file(k))
    if hazard_table is not None:
        shutil.copyfile(hazard_table, run.add_file(HAZARD_TABLE))


@dataclass
class ProjectionInputs:
    """A run's projected book, its scenario paths by name (in order), and its hazard table file if any."""

    book: pd.DataFrame
    paths: dict[str, pd.DataFrame]
    hazard_table: Path | None


def read_projection_inputs(run_dir, scenarios) -> ProjectionInputs:
    """The projection inputs a run kept (:func:`save_projection_inputs`); ``scenarios`` in the run's order.

    Raises
    ------
    RunError
        The run folder holds no projection inputs (a run of an earlier creditsurv).
    """
    run_dir = Path(run_dir)
    if not (run_dir / BOOK).exists():
        raise RunError(
            f"{run_dir}: no {BOOK}; the run was made by a creditsurv that did not keep its projection inputs. "
            "Run the month again with this version to export from it"
        )
    book = pd.read_parquet(run_dir / BOOK)
    paths = {}
    for k, name in enumerate(scenarios):
        frame = pd.read_parquet(run_dir / _path_file(k))
        paths[name] = frame.set_index(MONTH_INDEX).rename_axis(None)
    table = run_dir / HAZARD_TABLE
    return ProjectionInputs(book=book, paths=paths, hazard_table=table if table.exists() else None)
