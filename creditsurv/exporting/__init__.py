"""The export: what an analyst takes from a finished run without writing pandas.

PD term structures of any cut of the book (by segment, score band, vintage, stage, age band, arrears
state, ...), recomputed from the inputs a run keeps (``projection_inputs/``), and the loan-level tables
of chosen loans, identical to the ones the run would have written.
"""

from ._grouped import MEASURES, PERIODS, WEIGHTINGS, GroupedCurves, table_name
from ._record import (
    PROJECTION_INPUTS,
    ProjectionInputs,
    read_projection_inputs,
    save_projection_inputs,
)
from ._write import EXCEL_MAX_ROWS, FORMATS, WORKBOOK, check_fits_a_sheet, write_tables

__all__ = [
    "EXCEL_MAX_ROWS", "FORMATS", "MEASURES", "PERIODS", "PROJECTION_INPUTS", "WEIGHTINGS", "WORKBOOK",
    "GroupedCurves", "ProjectionInputs", "check_fits_a_sheet", "read_projection_inputs", "save_projection_inputs",
    "table_name", "write_tables",
]  # fmt: skip
