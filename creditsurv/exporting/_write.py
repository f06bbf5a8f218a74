"""Exported tables as CSV, Parquet or one Excel workbook (one sheet per table)."""

from __future__ import annotations

import pandas as pd

from ..errors import DataError

__all__ = ["EXCEL_MAX_ROWS", "FORMATS", "WORKBOOK", "check_fits_a_sheet", "write_tables"]

FORMATS = ("csv", "parquet", "xlsx")
EXCEL_MAX_ROWS = 1_048_576
"""Rows of an Excel worksheet (the Office Open XML limit), the header row included."""
WORKBOOK = "pd_tables.xlsx"
SHEET_NAME_CHARS = 31


def check_fits_a_sheet(tables: dict[str, pd.DataFrame]) -> None:
    """Refuse, before anything is written, a table that an Excel worksheet cannot hold.

    Raises
    ------
    DataError
        Naming the table, its rows and the limit.
    """
    for name, table in tables.items():
        if len(table) + 1 > EXCEL_MAX_ROWS:
            raise DataError(
                f"{name}: {len(table):,} rows do not fit an Excel sheet ({EXCEL_MAX_ROWS - 1:,} rows and a header); "
                "export it as --format csv or parquet, by year rather than month, or for fewer loans"
            )


def _sheet_names(names) -> dict[str, str]:
    out, used = {}, set()
    for name in names:
        sheet = name[:SHEET_NAME_CHARS]
        i = 2
        while sheet in used:
            suffix = f"~{i}"
            sheet = name[: SHEET_NAME_CHARS - len(suffix)] + suffix
            i += 1
        used.add(sheet)
        out[name] = sheet
    return out


def write_tables(folder, tables: dict[str, pd.DataFrame], fmt: str) -> None:
    """Write ``tables`` (name -> frame) into ``folder`` (a :class:`~creditsurv.runs.RunFolder` being built).

    CSV and Parquet: one file per table. Excel: every table in one workbook, :data:`WORKBOOK`, one
    sheet each (refused first when a table does not fit a sheet).
    """
    if fmt in ("csv", "parquet"):
        for name, table in tables.items():
            folder.add_table(table, f"{name}.{fmt}")
    elif fmt == "xlsx":
        check_fits_a_sheet(tables)
        sheets = _sheet_names(tables)
        with pd.ExcelWriter(folder.add_file(WORKBOOK, sum(len(t) for t in tables.values())), engine="openpyxl") as book:
            for name, table in tables.items():
                table.to_excel(book, sheet_name=sheets[name], index=False)
    else:  # pragma: no cover - checked by the caller
        raise ValueError(fmt)
