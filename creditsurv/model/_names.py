"""The names of model inputs, written once: macro inputs at a lag and a region's house-price series.

A hazard source lists the inputs it needs per loan-month (``required_inputs``);
a macro series enters as ``macro:<series>:<lag>``, the value of ``<series>`` in
calendar month ``month - lag``; a panel column as ``panel:<column>:<lag>``, the
loan's value at the end of month ``month - lag`` (lag 1 or more: a month-end value
describes the end of its month, not its start). The house-price series of a region is the
``collateral.hpi_series`` template with ``{region}`` replaced by the region's
name in lower case.
"""

from __future__ import annotations

__all__ = ["hpi_series_name", "macro_key", "panel_key", "parse_macro_key", "parse_panel_key"]

_MACRO = "macro"
_PANEL = "panel"


def panel_key(column: str, lag: int) -> str:
    """The input name of panel column ``column`` at ``lag`` months: ``panel:<column>:<lag>``."""
    return f"{_PANEL}:{column}:{int(lag)}"


def parse_panel_key(name) -> tuple[str, int] | None:
    """``(column, lag)`` of a panel input name; None when ``name`` is not a panel input."""
    if not (isinstance(name, str) and name.startswith(f"{_PANEL}:")):
        return None
    column, _, lag = name[len(_PANEL) + 1:].rpartition(":")
    if not column or not lag.isdigit() or int(lag) < 1:
        raise ValueError(f"{name!r}: write a panel input as panel:<column>:<lag> with lag >= 1")
    return column, int(lag)


def macro_key(series: str, lag: int) -> str:
    """The input name of macro series ``series`` at ``lag`` months: ``macro:<series>:<lag>``."""
    return f"{_MACRO}:{series}:{int(lag)}"


def parse_macro_key(name) -> tuple[str, int] | None:
    """``(series, lag)`` of a macro input name; None when ``name`` is not a macro input.

    Raises
    ------
    ValueError
        ``name`` starts with ``macro:`` but is not ``macro:<series>:<lag>`` with
        a non-empty series and an integer lag >= 0.
    """
    if not (isinstance(name, str) and name.startswith(f"{_MACRO}:")):
        return None
    parts = name.split(":")
    if len(parts) != 3 or not parts[1] or not parts[2].lstrip("-").isdigit() or int(parts[2]) < 0:
        raise ValueError(f"{name!r}: write a macro input as macro:<series>:<lag> with lag >= 0")
    return parts[1], int(parts[2])


def hpi_series_name(template: str, region) -> str:
    """The house-price series of ``region``: ``template`` with ``{region}`` as the region in lower case."""
    return template.format(region=str(region).lower())
