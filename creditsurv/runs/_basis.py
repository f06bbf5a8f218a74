"""The accounting basis of a run, read from its record, and the rule that runs of two bases are not compared.

A run's basis is its resolved config's ``accounting`` (``ifrs9`` or ``cecl``); a run recorded before the key
existed is IFRS 9, the only basis there was. An IFRS 9 allowance (12-month ECL in stage 1, lifetime in stages
2 and 3) and a CECL allowance (lifetime for every loan, after a reversion of the scenarios) measure different
things: a walk from one to the other would show the change of basis as a change of risk.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import RunError
from ._folder import MANIFEST

__all__ = ["BASIS_NAMES", "accounting_basis", "check_same_basis"]

BASIS_NAMES = {"ifrs9": "IFRS 9", "cecl": "CECL (ASC 326)"}
"""Each basis by the name the standard goes by."""


def accounting_basis(manifest: dict) -> str:
    """The accounting basis of a run: ``ifrs9`` or ``cecl``.

    Parameters
    ----------
    manifest : dict
        The run's ``manifest.json``, parsed.

    Returns
    -------
    str
        ``config_resolved.accounting``; ``ifrs9`` for a run recorded before the key existed.
    """
    resolved = manifest.get("config_resolved") if isinstance(manifest, dict) else None
    return (resolved or {}).get("accounting") or "ifrs9"


def _basis_of_folder(run) -> str | None:
    """The basis of a run folder, or None when its manifest cannot be read (the comparison reports that itself)."""
    try:
        manifest = json.loads((Path(run) / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    return accounting_basis(manifest) if isinstance(manifest, dict) else None


def check_same_basis(run_a, run_b) -> None:
    """Raise ``RunError`` when two run folders are on different accounting bases.

    A folder whose manifest cannot be read is passed over here: reading the runs for their comparison names
    that problem.

    Parameters
    ----------
    run_a, run_b : path
        Run folders (A the earlier).

    Raises
    ------
    RunError
        Naming both runs and their bases.
    """
    a, b = _basis_of_folder(run_a), _basis_of_folder(run_b)
    if a is None or b is None or a == b:
        return
    raise RunError(
        f"cannot compare runs on different accounting bases: run A {run_a} is {BASIS_NAMES.get(a, a)} "
        f"(accounting: {a}) and run B {run_b} is {BASIS_NAMES.get(b, b)} (accounting: {b}); their allowances "
        "measure different things (IFRS 9: 12-month ECL in stage 1, lifetime in stages 2 and 3; CECL: lifetime for "
        "every loan), so a walk between them would show the change of basis as a change of risk. Compare runs of "
        "one basis"
    )
