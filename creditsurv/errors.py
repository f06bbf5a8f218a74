"""Errors and warnings raised by creditsurv.

One root class, one subclass per stage::

    CreditsurvError
    ├── ConfigError          (ValueError)  the YAML config is malformed or invalid
    ├── DataError            (ValueError)  an input file or column cannot be used
    │   └── DataCheckError                  data checks of severity "error" failed
    ├── SimulationError      (ValueError)  bad arguments to the synthetic book
    ├── UsageError           (ValueError)  the command line asks for what creditsurv will not do (write over a file)
    ├── FeatureError         (ValueError)  the feature spec cannot be evaluated on the data
    ├── ModelError                          the hazard fit failed
    │   ├── ConvergenceError                Newton did not converge
    │   ├── SeparationError                 a covariate or level has no events of a cause
    │   └── SingularDesignError             collinear design columns
    ├── ProjectionError      (ValueError)  scenarios or loans cannot be projected
    ├── EngineError                         the engine's workers failed a step (e.g. Spark tasks)
    └── RunError                            the run folder or its record is unusable
        ├── OutputError                     an output cannot be written (the OS refused: permissions, full disk, ...)
        └── ReproduceMismatch               a reproduced run differs from its record

    CreditsurvWarning (UserWarning)
    ├── ConvergenceWarning
    ├── FewEventsWarning
    ├── DataCheckWarning
    └── StaleRunWarning                     an interrupted run's folder was found (and removed when its process is gone)

The command line catches ``CreditsurvError`` and prints ``ClassName: message``; it exits with the
error's ``exit_code``, following the exit-code rules stated once in ``creditsurv.cli``.
"""

from __future__ import annotations

import difflib

__all__ = [
    "ConfigError", "ConvergenceError", "ConvergenceWarning", "CreditsurvError", "CreditsurvWarning",
    "DataCheckError", "DataCheckWarning", "DataError", "EngineError", "FeatureError", "FewEventsWarning", "ModelError",
    "OutputError", "ProjectionError", "ReproduceMismatch", "RunError", "SeparationError", "SimulationError",
    "SingularDesignError", "StaleRunWarning", "UsageError", "did_you_mean", "problem_list",
]  # fmt: skip


class CreditsurvError(Exception):
    """Root of every error raised on purpose by creditsurv."""

    exit_code = 2


class ConfigError(CreditsurvError, ValueError):
    """The YAML config is malformed or fails validation.

    ``problems`` holds every problem found in one pass, each already prefixed
    with its key path (``model.covariates[2].transform``).
    """

    exit_code = 2

    def __init__(self, message: str, problems: list[str] | None = None):
        super().__init__(message)
        self.problems = list(problems or [message])


class DataError(CreditsurvError, ValueError):
    """An input file, table or column cannot be used as configured."""

    exit_code = 1


class DataCheckError(DataError):
    """At least one data check of severity ``error`` failed."""

    exit_code = 1


class SimulationError(CreditsurvError, ValueError):
    """Bad arguments to the synthetic-book simulator."""


class UsageError(CreditsurvError, ValueError):
    """The command line asks for something creditsurv will not do: write over a user's file (``init`` where a
    config exists), or print config keys under a prefix no key has. Nothing is written (exit 2)."""

    exit_code = 2


class FeatureError(CreditsurvError, ValueError):
    """The feature spec cannot be evaluated on the given data (a data problem: exit 1).

    Problems visible in the config alone are ``ConfigError``, raised when the config is read.
    """

    exit_code = 1


class ModelError(CreditsurvError):
    """The hazard model cannot be fitted or loaded."""

    exit_code = 1


class ConvergenceError(ModelError):
    """Newton iterations did not converge."""


class SeparationError(ModelError):
    """Quasi-complete separation: a covariate or level has no events of a cause."""


class SingularDesignError(ModelError):
    """The design matrix is rank deficient (collinear columns)."""


class ProjectionError(CreditsurvError, ValueError):
    """Scenarios or loans cannot be projected."""

    exit_code = 1


class EngineError(CreditsurvError):
    """The engine's workers failed a step: Spark tasks that raised, or executors that could not start Python.

    The message names the step (``the fit's first pass``), the root cause's last
    line and, where it helps, how to fix it.
    """

    exit_code = 1


class RunError(CreditsurvError):
    """A run folder or its manifest is missing, incomplete or inconsistent."""

    exit_code = 1


class OutputError(RunError):
    """An output file or folder cannot be written: the operating system refused (no permission, a full
    disk, a file where a folder should be). Nothing partial is left behind."""

    exit_code = 1


class ReproduceMismatch(RunError):
    """A reproduced run does not match the outputs recorded in its manifest."""

    exit_code = 3


class CreditsurvWarning(UserWarning):
    """Root of creditsurv's warnings (non-fatal numerical or data trouble)."""


class ConvergenceWarning(CreditsurvWarning):
    """A fit stopped at its iteration limit or converged slowly."""


class FewEventsWarning(CreditsurvWarning):
    """Too few events of a cause for the number of parameters."""


class DataCheckWarning(CreditsurvWarning):
    """A data check of severity ``warning`` fired."""


class StaleRunWarning(CreditsurvWarning):
    """A ``.incomplete-*`` folder of an interrupted run was found; removed when its process is gone."""


# --------------------------------------------------------------------------- message parts every stage uses


def did_you_mean(word, choices) -> str:
    """``"; did you mean 'x'?"`` for the closest of ``choices``, or ``""`` when none is close.

    The one suggestion rule of every error message: ``difflib`` similarity of at
    least 0.5, tried as written and then without regard to case (SQL engines
    resolve column names without regard to case).
    """
    choices = [str(c) for c in choices]
    match = difflib.get_close_matches(str(word), choices, n=1, cutoff=0.5)
    if not match:
        lowered = {c.lower(): c for c in choices}
        match = [lowered[m] for m in difflib.get_close_matches(str(word).lower(), list(lowered), n=1, cutoff=0.5)]
    return f"; did you mean '{match[0]}'?" if match else ""


def problem_list(problems, what: str) -> str:
    """The one text of an error that lists problems: ``"2 problems with <what>:\n  - ...\n  - ..."``.

    A single problem stays on one line (``"1 problem with <what>: ..."``), so that the first line of
    every message names the file, key, column or rows at fault.
    """
    problems = list(problems)
    n = len(problems)
    if n == 1:
        return f"1 problem with {what}: {problems[0]}"
    lines = "\n".join(f"  - {p}" for p in problems)
    return f"{n} problem{'s' if n != 1 else ''} with {what}:\n{lines}"
