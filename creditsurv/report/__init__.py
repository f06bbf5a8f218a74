"""The report: one self-contained HTML page (plots embedded) from a run's tables."""

from ._html import (
    NOT_PRODUCED,
    REQUIRED_COLUMNS,
    SECTIONS,
    fmt_money,
    fmt_pct,
    render_report,
    write_report,
)

__all__ = ["NOT_PRODUCED", "REQUIRED_COLUMNS", "SECTIONS", "fmt_money", "fmt_pct", "render_report", "write_report"]
