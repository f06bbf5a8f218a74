"""Month-on-month movement between two runs: ECL walk, stage migration, PD change.

Run A is the earlier (opening) run and run B the later (closing) one. Loans are
matched on ``loan_id``. Every amount is in the runs' currency; PDs are
probabilities.

ECL walk
--------
The walk goes from A's total reported ECL to B's in a fixed order of steps,
each a row of :attr:`MovementResult.walk`:

1. ``closed_or_repaid`` - loans in A and not in B: ``-ECL_A``.
2. ``new_loans`` - loans in B and not in A: ``+ECL_B``.
3. ``stage_transfer_<i>_to_<j>`` - loans in both whose stage moved from i to
   j, one row per direction (1->2, 1->3, 2->1, 2->3, 3->1, 3->2):
   ``ECL_B - ECL_A``, so the change of horizon and every other change of
   those loans sit here.
4. Loans in both with the same stage, by sequential substitution at the
   horizon of that stage (12 months for stage 1, lifetime for stages 2 and 3).
   With ``r = EAD_B / EAD_A`` and ``E_s`` the loan's ECL in scenario ``s``:

   a. ``exposure`` = ``ECL_A x (r - 1)``. This assumes ECL scales in
      proportion to EAD at fixed PD, LGD and shape of the exposure schedule;
      it is an approximation (a different amortisation profile or an LGD
      that depends on the balance is left to ``risk_parameters``). Loans
      with ``EAD_A = 0`` have no ratio; their whole change is put here.
   b. ``scenario_weights`` = ``sum_s (w_B,s - w_A,s) x E_A,s x r`` over the
      scenarios of both runs; a scenario in only one run moves its whole
      weighted contribution here: ``-w_A,s x E_A,s x r`` when it was dropped,
      ``+w_B,s x E_B,s`` when it was added.
   c. ``risk_parameters`` - the remainder ``ECL_B - ECL_A - a - b``: PD from
      the model and the covariates, LGD, and the scenarios' macro paths.

The steps sum to ``ECL_B_total - ECL_A_total``; the walk checks this to a
relative 1e-6 of the larger total and raises :class:`RunError` otherwise.

Between two run folders (:func:`compare_run_folders`)
------------------------------------------------------
Each folder's ``manifest.json`` tells more than its loan table, and
:class:`RunDifferences` holds it:

* the order of the months: A is normally the earlier; when A is later the walk
  runs backwards (from a later month to an earlier one), and when both are of
  one month it shows how two runs of that month differ;
* a change of model (the model record: kind or source, the coefficients by the
  fingerprint of ``hazard_model.json``, the loan-months it was fitted on, a
  saved model file or rate table), of method (a key of the resolved config's
  sections in :data:`METHOD_SECTIONS`) or of package versions.

Such a change cannot be a step of its own: separating it exactly needs run B's
book projected under run A's model and method, which two finished folders do
not hold. It stays inside ``risk_parameters`` for loans in the same stage and
inside the stage transfers for loans whose stage moved (some may have moved
because of it); a change of the EAD settings (:data:`EAD_KEYS`) also moves the
``exposure`` step. The walk's ``note`` column says so on those rows, so the
steps and their reconciliation are the same as without it.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import WEIGHTED, canonical_sha256, weight_problems
from ..errors import RunError, problem_list
from ..months import parse_month
from ._folder import MANIFEST, read_manifest

__all__ = [
    "EAD_KEYS", "METHOD_SECTIONS", "MovementResult", "RunDifferences", "check_walk_reconciles", "compare_run_folders",
    "movement", "movement_against_run", "sicr_history_of_run",
]  # fmt: skip

LOAN_TABLE = "loan_ecl.parquet"
STAGES = (1, 2, 3)
TRANSFERS = tuple((i, j) for i in STAGES for j in STAGES if i != j)
SAME_STAGE_STEPS = ("exposure", "scenario_weights", "risk_parameters")
WALK_STEPS = (
    ("closed_or_repaid", "new_loans")
    + tuple(f"stage_transfer_{i}_to_{j}" for i, j in TRANSFERS)
    + SAME_STAGE_STEPS
)
"""Step names of the walk, in order (without the opening and closing rows)."""

METHOD_SECTIONS = (
    "windows", "default_definition", "events", "arrears", "model", "collateral", "scenario_extension", "loss",
    "staging", "cecl",
)  # fmt: skip
"""Sections of the resolved config that set how ECL is computed from the same data: a change is a change of method."""

EAD_KEYS = ("loss.exposure", "loss.accrued_interest")
"""Method keys (and the keys under them) that set the EAD at the reporting month: a change moves ``exposure`` too."""

MODEL_FILE = "hazard_model.json"
_MAX_LISTED = 8  # changes of method named in the text; the manifest of the movement holds them all
# Record entries that follow from the fit (a new fit changes them with its coefficients): not named one by one.
_FIT_STATISTICS = frozenset(
    {"aic", "bic", "loglik", "iterations", "converged", "events", "terms", "causes", "states", "references",
     "transitions", "limits_loosened", "n_rows", "data_fingerprint", "kind", "source"}
)  # fmt: skip

RECONCILE_RTOL = 1e-6
_REPORTED_RTOL = 1e-6  # ecl_reported against sum_s w_s ECL_s
_REPORTED_ATOL = 1e-6  # currency units; absorbs rounding on tiny ECLs
_ALL = "all"  # label of the whole-book row of the PD-change table


@dataclass(frozen=True)
class MovementResult:
    """What moved between run A and run B.

    Attributes
    ----------
    walk : DataFrame
        Columns ``step``, ``loans``, ``ecl_change``, ``ecl_balance``, ``note``.
        First row ``opening`` (loans of A, ``ecl_change`` NaN, A's total
        reported ECL), then the steps of :data:`WALK_STEPS` in order (every
        step present, zero when no loan falls in it; ``loans`` for the three
        same-stage steps is the number of same-stage loans), then ``closing``
        (loans of B, NaN, B's total). ``ecl_balance`` is the running total
        after each step. ``note`` is empty unless :attr:`differences` has
        something to say on the row: months compared backwards or of one
        month (``opening``), a change of model, method or versions inside the
        step (see the module docstring).
    migration : DataFrame
        Tidy stage migration: ``stage_from`` ("1", "2", "3", "new"),
        ``stage_to`` ("1", "2", "3", "closed"), ``loans``, ``ead``. ``ead`` is
        EAD_B for loans in B (matched or new) and EAD_A for closed loans.
        The impossible cell new -> closed is not a row.
    pd_change : DataFrame
        Lifetime PD by segment, one row per segment (sorted) and a last row
        ``all``. Over loans in both runs (segment as in B): ``loans``,
        ``ead_a``, ``ead_b``, ``pd_lifetime_a`` (EAD_A-weighted mean),
        ``pd_lifetime_b`` (EAD_B-weighted mean), ``pd_lifetime_change``
        (B - A). Over every loan of each run (segment as in that run):
        ``loans_a_book``, ``loans_b_book``, ``pd_lifetime_a_book``,
        ``pd_lifetime_b_book``, ``pd_lifetime_change_book``. A mean over zero
        exposure is NaN.
    by_loan : DataFrame
        One row per loan of A or B (A's order, then new loans in B's order):
        ``loan_id``, ``segment``, ``stage_a``, ``stage_b`` (nullable Int64),
        ``ead_a``, ``ead_b``, ``ecl_a``, ``ecl_b`` (NaN when absent),
        ``step`` (``closed_or_repaid``, ``new_loans``,
        ``stage_transfer_<i>_to_<j>`` or ``same_stage``), ``exposure``,
        ``scenario_weights``, ``risk_parameters`` (zero outside same-stage
        loans) and ``ecl_change``, the loan's whole contribution to the walk.
    differences : RunDifferences or None
        What the runs' records say differs besides the loans (the order of
        the months, model, method, versions); set by
        :func:`compare_run_folders`, None from loan tables alone.
    """

    walk: pd.DataFrame
    migration: pd.DataFrame
    pd_change: pd.DataFrame
    by_loan: pd.DataFrame
    differences: RunDifferences | None = None

    def migration_matrix(self, value: str = "loans") -> pd.DataFrame:
        """Wide stage migration matrix.

        Parameters
        ----------
        value : {"loans", "ead"}, default "loans"
            Count of loans or exposure (see :attr:`migration`).

        Returns
        -------
        DataFrame
            Index ``stage_from`` ("1", "2", "3", "new"), columns ``stage_to``
            ("1", "2", "3", "closed"); the new -> closed cell is 0.
        """
        if value not in ("loans", "ead"):
            raise ValueError(f"value must be 'loans' or 'ead', got {value!r}")
        wide = self.migration.pivot(index="stage_from", columns="stage_to", values=value)
        wide = wide.reindex(index=["1", "2", "3", "new"], columns=["1", "2", "3", "closed"], fill_value=0)
        wide = wide.fillna(0)
        wide.index.name, wide.columns.name = "stage_from", "stage_to"
        return wide.astype(self.migration[value].dtype)

    def to_tables(self) -> dict[str, pd.DataFrame]:
        """The tables to write, keyed by file name."""
        tables = {
            "movement_walk.csv": self.walk,
            "stage_migration.csv": self.migration,
            "pd_change_by_segment.csv": self.pd_change,
        }
        if len(self.by_loan) and not self.migration["loans"].any():  # loans with no stage (CECL): no migration
            del tables["stage_migration.csv"]
        return tables


@dataclass(frozen=True)
class RunDifferences:
    """What the records of run A and run B say differs between them besides their loans.

    Attributes
    ----------
    as_of_a, as_of_b : str or None
        The reporting months ``YYYY-MM``; None when a record has none.
    model : tuple of str
        Each change of the hazard model, in words: its kind or source, its coefficients (the fingerprint
        of ``hazard_model.json``), the loan-months it was fitted on, a saved model file or rate table.
    method : tuple of str
        Each key of :data:`METHOD_SECTIONS` whose resolved value changed, ``"key a -> b"`` (JSON values,
        ``absent`` where a config lacks the key).
    versions : tuple of str
        Each package whose version changed, ``"name a -> b"``.
    not_recorded : tuple of str
        What a record lacks, so that its change cannot be told: ``"model"``, ``"method"``, ``"versions"``.
    fingerprints : tuple of (str or None, str or None)
        The model fingerprints of A and B (12 hex digits of the SHA-256 of ``hazard_model.json`` without the
        writing version); None for a run without a fitted model.
    ead_changed : bool
        Whether a key of :data:`EAD_KEYS` changed (the change then moves the ``exposure`` step too).
    """

    as_of_a: str | None
    as_of_b: str | None
    model: tuple[str, ...] = ()
    method: tuple[str, ...] = ()
    versions: tuple[str, ...] = ()
    not_recorded: tuple[str, ...] = ()
    fingerprints: tuple[str | None, str | None] = (None, None)
    ead_changed: bool = False

    @property
    def direction(self) -> str:
        """``forward`` (A is the earlier month), ``backwards`` (A is the later), ``same_month`` or ``unknown``."""
        a, b = _month_index(self.as_of_a), _month_index(self.as_of_b)
        if a is None or b is None:
            return "unknown"
        return "forward" if a < b else "backwards" if a > b else "same_month"

    @property
    def changed(self) -> bool:
        """Whether the model, the method or a package version changed."""
        return bool(self.model or self.method or self.versions)

    @property
    def steps(self) -> tuple[str, ...]:
        """The walk steps that hold the change of model, method or versions (empty when none changed)."""
        if not self.changed:
            return ()
        transfers = tuple(f"stage_transfer_{i}_to_{j}" for i, j in TRANSFERS)
        return (*(("exposure",) if self.ead_changed else ()), "risk_parameters", *transfers)

    def headline(self) -> str:
        """The first line of the movement's text: the months, and which way the walk runs."""
        a, b = self.as_of_a or "?", self.as_of_b or "?"
        return {
            "forward": f"ECL movement {a} -> {b}",
            "backwards": f"ECL movement {a} -> {b}: comparing backwards, from a later month to an earlier one "
            f"(run A is {a}, run B {b}); normally run A is the earlier",
            "same_month": f"ECL movement {a} -> {b}: both runs are of the same month, so the walk shows how the two "
            "runs differ, not a month's movement",
            "unknown": f"ECL movement {a} -> {b}: a run records no reporting month, so which is the earlier is not known",
        }[self.direction]  # fmt: skip

    def what_changed(self) -> str:
        """The changes in one line: ``model: ...; method: ...; package versions: ...`` (empty when none)."""
        method = list(self.method[:_MAX_LISTED])
        if len(self.method) > _MAX_LISTED:
            method.append(f"and {len(self.method) - _MAX_LISTED} more keys of the config")
        groups = (("model", self.model), ("method", method), ("package versions", self.versions))
        return "; ".join(f"{name}: {', '.join(items)}" for name, items in groups if items)

    def summary(self) -> list[str]:
        """Lines for the screen: what changed and where the walk holds it, or that nothing did."""
        names = {"model": "model", "method": "method", "versions": "package versions"}
        lines = []
        if self.changed:
            lines.append(f"model and method changed between the runs: {self.what_changed()}")
            lines.append(f"  not a step of its own: {_not_separable(self.steps)}")
        elif told := [shown for part, shown in names.items() if part not in self.not_recorded]:
            fingerprint = f" (model fingerprint {self.fingerprints[0]})" if self.fingerprints[0] else ""
            lines.append(f"{_and(told)}: unchanged between the runs{fingerprint}")
        if self.not_recorded:
            lines.append(f"{_and(names[p] for p in self.not_recorded)}: not recorded in both runs, so not compared")
        return lines

    def notes(self) -> dict[str, str]:
        """The walk's ``note`` of each step that has one."""
        out = {}
        if self.direction in ("backwards", "same_month"):
            out["opening"] = self.headline().split(": ", 1)[1]
        if self.changed:
            what = self.what_changed()
            out["risk_parameters"] = (
                "includes the change of model and method for loans in the same stage, which a compare of two "
                f"finished runs cannot separate: {what}"
            )
            for step in self.steps:
                if step.startswith("stage_transfer_"):
                    out[step] = "includes the change of model and method for these loans (see risk_parameters)"
            if self.ead_changed:
                ead = "; ".join(m for m in self.method if _is_ead_key(m.split(" ", 1)[0]))
                out["exposure"] = f"includes the change of the EAD settings ({ead})"
        return out

    def to_dict(self) -> dict:
        """The record of the movement folder: direction and what changed, where the walk holds it."""
        return {
            "direction": self.direction,
            "model_and_method": {
                "changed": self.changed, "model": list(self.model), "method": list(self.method),
                "versions": list(self.versions), "not_recorded": list(self.not_recorded),
                "model_fingerprints": {"run_a": self.fingerprints[0], "run_b": self.fingerprints[1]},
                "inside_steps": list(self.steps),
            },
        }  # fmt: skip


def _not_separable(steps) -> str:
    """Where the walk holds a change it cannot separate, in words."""
    transfers = [s for s in steps if s.startswith("stage_transfer_")]
    inside = [s for s in steps if not s.startswith("stage_transfer_")]
    return (
        "a compare of two finished runs cannot separate the change (that needs run B's book projected under "
        f"run A's model and method); it is inside {_and(inside)} for loans in the same stage"
        + (", and inside the stage transfers for loans whose stage moved" if transfers else "")
    )


def _and(words) -> str:
    words = list(words)
    return ", ".join(words[:-1]) + (" and " if len(words) > 1 else "") + (words[-1] if words else "")


def _month_index(text) -> int | None:
    try:
        return parse_month(text) if isinstance(text, str) else None
    except (TypeError, ValueError):
        return None


def _short(value) -> str:
    text = json.dumps(value, sort_keys=True, default=str)
    return text if len(text) <= 40 else text[:37] + "..."


_ABSENT = object()  # a key one record has and the other lacks


def _shown(value) -> str:
    return "absent" if value is _ABSENT else _short(value)


def _flat(value, key: str) -> dict[str, object]:
    """A nested config section as ``{dotted key: value}``; lists of mappings by index (``model.covariates[2].lag``)."""
    if isinstance(value, dict):
        out = {}
        for k in sorted(value):
            out.update(_flat(value[k], f"{key}.{k}"))
        return out
    if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
        out = {f"{key}[]": len(value)}
        for i, v in enumerate(value):
            out.update(_flat(v, f"{key}[{i}]"))
        return out
    return {key: value}


def _method_changes(config_a: dict, config_b: dict) -> list[str]:
    """``key a -> b`` for every key of :data:`METHOD_SECTIONS` whose value differs (``absent`` where missing)."""
    changes = []
    for section in METHOD_SECTIONS:
        flat_a, flat_b = _flat(config_a.get(section), section), _flat(config_b.get(section), section)
        for key in [*flat_a, *(k for k in flat_b if k not in flat_a)]:
            a, b = flat_a.get(key, _ABSENT), flat_b.get(key, _ABSENT)
            if a != b:
                changes.append(f"{key} {_shown(a)} -> {_shown(b)}")
    return changes


def _is_ead_key(key: str) -> bool:
    return any(key == k or key.startswith(f"{k}.") for k in EAD_KEYS)


def _model_changes(record_a: dict, record_b: dict, fingerprints, inputs_a, inputs_b) -> list[str]:
    """The changes of the hazard model between two runs' records, in words."""
    changes = []
    kind_a = record_a.get("kind", record_a.get("source"))
    kind_b = record_b.get("kind", record_b.get("source"))
    if kind_a != kind_b:
        changes.append(f"kind {_short(kind_a)} -> {_short(kind_b)}")
    fa, fb = fingerprints
    if fa != fb:
        changes.append(f"coefficients changed (fingerprint {fa or 'none'} -> {fb or 'none'})")
    if record_a.get("data_fingerprint") != record_b.get("data_fingerprint"):
        rows = [record_a.get("n_rows"), record_b.get("n_rows")]
        shown = " -> ".join(f"{n:,}" if isinstance(n, int) else "?" for n in rows)
        changes.append(f"fitted on other loan-months ({shown})")
    for key in sorted((set(record_a) | set(record_b)) - _FIT_STATISTICS):
        if record_a.get(key, _ABSENT) != record_b.get(key, _ABSENT):
            changes.append(f"{key} {_shown(record_a.get(key, _ABSENT))} -> {_shown(record_b.get(key, _ABSENT))}")
    files_a, files_b = _model_inputs(inputs_a), _model_inputs(inputs_b)
    for key in sorted(set(files_a) | set(files_b)):
        if files_a.get(key) != files_b.get(key):
            a, b = files_a.get(key), files_b.get(key)
            changes.append(f"file {key} changed (SHA-256 {a[:12] if a else 'none'} -> {b[:12] if b else 'none'})")
    return changes


def _model_inputs(inputs) -> dict[str, str]:
    """The SHA-256 of each file a run's model was read from (``model.path``, ``model.table``), by config key."""
    out = {}
    for item in inputs if isinstance(inputs, list) else []:
        if isinstance(item, dict) and str(item.get("input", "")).startswith("model."):
            out[str(item["input"])] = str(item.get("sha256"))
    return out


def _model_fingerprint(run_dir: Path) -> str | None:
    """12 hex digits of the SHA-256 of the run's ``hazard_model.json`` with the writing version left out, or None."""
    path = Path(run_dir) / MODEL_FILE
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    return canonical_sha256(_without_version(data))[:12]


def _without_version(value):
    """The model JSON without the version that wrote it (a new version alone does not change the model)."""
    if isinstance(value, dict):
        return {k: _without_version(v) for k, v in value.items() if k != "creditsurv_version"}
    if isinstance(value, list):
        return [_without_version(v) for v in value]
    return value


def _differences(manifest_a: dict, manifest_b: dict, fingerprints) -> RunDifferences:
    """What the two runs' records say differs (see :class:`RunDifferences`)."""
    not_recorded, model, method, versions = [], [], [], []
    record_a, record_b = manifest_a.get("model"), manifest_b.get("model")
    if isinstance(record_a, dict) and isinstance(record_b, dict):
        model = _model_changes(record_a, record_b, fingerprints, manifest_a.get("inputs"), manifest_b.get("inputs"))
    else:
        not_recorded.append("model")
    config_a, config_b = manifest_a.get("config_resolved") or {}, manifest_b.get("config_resolved") or {}
    if all(any(s in c for s in METHOD_SECTIONS) for c in (config_a, config_b)):
        method = _method_changes(config_a, config_b)
    else:
        not_recorded.append("method")
    versions_a, versions_b = manifest_a.get("versions"), manifest_b.get("versions")
    if isinstance(versions_a, dict) and isinstance(versions_b, dict):
        for name in [*versions_a, *(n for n in versions_b if n not in versions_a)]:
            if versions_a.get(name) != versions_b.get(name):
                versions.append(f"{name} {versions_a.get(name, 'absent')} -> {versions_b.get(name, 'absent')}")
    else:
        not_recorded.append("versions")
    ead = any(_is_ead_key(m.split(" ", 1)[0]) for m in method)
    return RunDifferences(
        as_of_a=manifest_a.get("as_of"), as_of_b=manifest_b.get("as_of"), model=tuple(model), method=tuple(method),
        versions=tuple(versions), not_recorded=tuple(not_recorded), fingerprints=tuple(fingerprints), ead_changed=ead,
    )  # fmt: skip


# --------------------------------------------------------------------------- checks


def _check_loans(df: pd.DataFrame, weights: Mapping[str, float], label: str, segment_column: str) -> list[str]:
    """Every problem of one run's loan table, each prefixed with ``label``."""
    scen_cols = [f"ecl_{h}_{s}" for s in weights for h in ("12m", "lifetime")]
    required = ["loan_id", segment_column, "stage", "pd_lifetime", "ead", "ecl_reported", *scen_cols]
    missing = [c for c in required if c not in df.columns]
    problems = []
    if missing:
        problems.append(f"{label}: missing columns {missing}; the table has {list(df.columns)}")
    have = set(df.columns)

    def rows(mask) -> str:
        ids = df.loc[mask, "loan_id"].head(5).tolist() if "loan_id" in have else []
        return f"{int(mask.sum())} rows (loan_id {ids})" if ids else f"{int(mask.sum())} rows"

    if "loan_id" in have:
        if df["loan_id"].isna().any():
            problems.append(f"{label}: loan_id is missing in {int(df['loan_id'].isna().sum())} rows")
        dup = df["loan_id"].duplicated(keep=False) & df["loan_id"].notna()
        if dup.any():
            problems.append(f"{label}: loan_id is not unique: {rows(dup)}")
    if segment_column in have and df[segment_column].isna().any():
        problems.append(f"{label}: {segment_column!r} is missing in {rows(df[segment_column].isna())}")
    if "stage" in have and not df["stage"].isna().all():  # all empty: no stages (CECL), every loan at lifetime
        stage = pd.to_numeric(df["stage"], errors="coerce")
        bad = ~stage.isin(STAGES)
        if bad.any():
            seen = sorted({str(v) for v in df.loc[bad, "stage"].head(20)})
            problems.append(f"{label}: stage must be 1, 2 or 3; {rows(bad)} have {seen}")
    numeric = [c for c in ("ead", "ecl_reported", *scen_cols) if c in have]
    for col in [*numeric, *(["pd_lifetime"] if "pd_lifetime" in have else [])]:
        if not pd.api.types.is_numeric_dtype(df[col]) or pd.api.types.is_bool_dtype(df[col]):
            problems.append(f"{label}: column {col!r} must be numeric, got {df[col].dtype}")
            continue
        x = df[col].to_numpy(dtype=np.float64, na_value=np.nan)
        hi = 1.0 if col == "pd_lifetime" else np.inf
        bad = ~(np.isfinite(x) & (x >= 0) & (x <= hi))
        if bad.any():
            allowed = "in [0, 1]" if col == "pd_lifetime" else "finite and >= 0"
            problems.append(f"{label}: {col!r} must be {allowed}; {rows(bad)} are not")
    if not problems and scen_cols:
        reported = df["ecl_reported"].to_numpy(dtype=np.float64)
        weighted = sum(float(w) * _horizon_ecl(df, s) for s, w in weights.items())
        off = ~np.isclose(reported, weighted, rtol=_REPORTED_RTOL, atol=_REPORTED_ATOL)
        if off.any():
            problems.append(
                f"{label}: ecl_reported is not the probability-weighted ECL of the stage's horizon "
                f"(sum over scenarios of weight x ecl_12m_<s> for stage 1, ecl_lifetime_<s> otherwise) "
                f"in {rows(off)}; check the weights {dict(weights)} belong to this table"
            )
    return problems


def _raise(problems: list[str], what: str) -> None:
    if problems:
        raise RunError(problem_list(problems, what))


# --------------------------------------------------------------------------- computation


def _horizon_ecl(df: pd.DataFrame, scenario: str) -> np.ndarray:
    """ECL of ``scenario`` at the horizon of each loan's stage (12 months for stage 1)."""
    stage1 = pd.to_numeric(df["stage"]).eq(1).to_numpy(dtype=bool, na_value=False)
    return np.where(
        stage1,
        df[f"ecl_12m_{scenario}"].to_numpy(dtype=np.float64),
        df[f"ecl_lifetime_{scenario}"].to_numpy(dtype=np.float64),
    )


def _ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    out = np.full(num.shape, np.nan)
    np.divide(num, den, out=out, where=den > 0)
    return out


def _same_stage_steps(ea, eb, ecl_a, ecl_b, scen_a, scen_b, weights_a, weights_b):
    """Exposure, scenario-weight and risk-parameter parts for same-stage loans (arrays)."""
    zero = ~(ea > 0)
    r = np.where(zero, 1.0, _ratio(eb, np.where(zero, 1.0, ea)))
    exposure = np.where(zero, ecl_b - ecl_a, ecl_a * (r - 1.0))
    sw = np.zeros_like(ecl_a)
    # A fixed order of scenarios keeps the sums, and so the tables, byte-reproducible.
    for s in [*weights_a, *(s for s in weights_b if s not in weights_a)]:
        if s in weights_a and s in weights_b:
            sw += (float(weights_b[s]) - float(weights_a[s])) * scen_a[s] * r
        elif s in weights_a:
            sw -= float(weights_a[s]) * scen_a[s] * r
        else:
            sw += float(weights_b[s]) * scen_b[s]
    sw = np.where(zero, 0.0, sw)
    risk = ecl_b - ecl_a - exposure - sw
    return exposure, sw, risk


def _pd_change(seg_m, pd_a, ead_a, pd_b, ead_b, seg_a_book, a_book, seg_b_book, b_book) -> pd.DataFrame:
    matched = pd.DataFrame(
        {"segment": seg_m, "loans": 1, "ead_a": ead_a, "ead_b": ead_b, "_pa": pd_a * ead_a, "_pb": pd_b * ead_b}
    ).groupby("segment", sort=False).sum()
    book_a = pd.DataFrame(
        {"segment": seg_a_book, "loans_a_book": 1, "_ea": a_book[1], "_pab": a_book[0] * a_book[1]}
    ).groupby("segment", sort=False).sum()
    book_b = pd.DataFrame(
        {"segment": seg_b_book, "loans_b_book": 1, "_eb": b_book[1], "_pbb": b_book[0] * b_book[1]}
    ).groupby("segment", sort=False).sum()
    t = pd.concat([matched, book_a, book_b], axis=1)
    try:
        t = t.sort_index()
    except TypeError:  # mixed label types: keep first-seen order
        pass
    t = t.fillna(0)
    # Appended, not assigned by label: a segment may itself be called "all".
    t = pd.concat([t, t.sum(axis=0).to_frame(_ALL).T])
    t.index.name = "segment"
    out = pd.DataFrame(index=t.index)
    out["loans"] = t["loans"].astype("int64")
    out["ead_a"] = t["ead_a"]
    out["ead_b"] = t["ead_b"]
    out["pd_lifetime_a"] = _ratio(t["_pa"].to_numpy(), t["ead_a"].to_numpy())
    out["pd_lifetime_b"] = _ratio(t["_pb"].to_numpy(), t["ead_b"].to_numpy())
    out["pd_lifetime_change"] = out["pd_lifetime_b"] - out["pd_lifetime_a"]
    out["loans_a_book"] = t["loans_a_book"].astype("int64")
    out["loans_b_book"] = t["loans_b_book"].astype("int64")
    out["pd_lifetime_a_book"] = _ratio(t["_pab"].to_numpy(), t["_ea"].to_numpy())
    out["pd_lifetime_b_book"] = _ratio(t["_pbb"].to_numpy(), t["_eb"].to_numpy())
    out["pd_lifetime_change_book"] = out["pd_lifetime_b_book"] - out["pd_lifetime_a_book"]
    return out.reset_index()


def check_walk_reconciles(steps, total_a: float, total_b: float) -> None:
    """Raise ``RunError`` unless the walk's steps add up to the move from ``total_a`` to ``total_b``.

    The tolerance is :data:`RECONCILE_RTOL` of the larger total. A walk built by
    :func:`movement` always passes; failing here is a bug, not a data problem.
    """
    steps = np.asarray(steps, dtype=float)
    gap = float(steps.sum()) - (total_b - total_a)
    scale = max(abs(total_a), abs(total_b))
    if not abs(gap) <= RECONCILE_RTOL * scale:
        raise RunError(
            f"the ECL walk does not reconcile: its steps sum to {steps.sum():.10g} but the totals move by "
            f"{total_b - total_a:.10g} (gap {gap:.3g}); this is a bug in creditsurv, please report it"
        )


def movement(
    loans_a: pd.DataFrame,
    loans_b: pd.DataFrame,
    weights_a: Mapping[str, float],
    weights_b: Mapping[str, float],
    *,
    segment_column: str = "segment",
) -> MovementResult:
    """ECL walk, stage migration and lifetime PD change from run A to run B.

    Parameters
    ----------
    loans_a, loans_b : DataFrame
        Loan-level results of each run, one row per loan: ``loan_id``,
        ``segment_column``, ``stage`` (1, 2 or 3), ``pd_lifetime``, ``ead``,
        ``ecl_reported`` and, for every scenario s of that run's weights,
        ``ecl_12m_<s>`` and ``ecl_lifetime_<s>``. Other columns are ignored.
        Neither frame is modified.
    weights_a, weights_b : mapping of str to float
        Probability weight of each scenario in that run (summing to 1).
    segment_column : str, default "segment"
        Column naming the segment of the PD-change table.

    Returns
    -------
    MovementResult
        See the module docstring for the steps of the walk.

    Raises
    ------
    RunError
        Listing every problem of both tables at once: missing columns, loan_id
        missing or not unique, stage not 1/2/3, negative or non-finite EAD or
        ECL, lifetime PD outside [0, 1], weights not summing to 1, or
        ``ecl_reported`` that is not the weighted ECL of the stage's horizon.
        Also raised if the walk fails to reconcile (a bug, not a data problem).
    """
    return _movement(loans_a, loans_b, weights_a, weights_b, segment_column, ("run A", "run B"))


def _validate(loans_a, loans_b, weights_a, weights_b, segment_column, labels) -> None:
    """Check both runs' weights and tables; raise one RunError listing every problem."""
    problems = []
    for loans, weights, label in ((loans_a, weights_a, labels[0]), (loans_b, weights_b, labels[1])):
        bad_weights = weight_problems(weights, f"{label} weights")
        problems += bad_weights
        # Scenario columns are only checked against usable weights.
        problems += _check_loans(loans, {} if bad_weights else weights, f"{label} loans", segment_column)
    _raise(problems, "the runs to compare")


def _movement(loans_a, loans_b, weights_a, weights_b, segment_column, labels) -> MovementResult:
    _validate(loans_a, loans_b, weights_a, weights_b, segment_column, labels)
    m = _match_loans(_run_arrays(loans_a, weights_a, segment_column), _run_arrays(loans_b, weights_b, segment_column))
    a, b = m.a, m.b
    parts = _same_stage_parts(m, weights_a, weights_b)
    by_loan = _by_loan_table(m, *parts)
    walk = _walk_table(m, *parts)
    migration = _migration_table(m)
    pd_change = _pd_change(
        b["segment"][m.pb],
        a["pd"][m.in_b],
        m.ead_a,
        b["pd"][m.pb],
        m.ead_b,
        a["segment"],
        (a["pd"], a["ead"]),
        b["segment"],
        (b["pd"], b["ead"]),
    )
    return MovementResult(walk=walk, migration=migration, pd_change=pd_change, by_loan=by_loan)


def _run_arrays(df: pd.DataFrame, weights: Mapping[str, float], segment_column: str) -> dict:
    """One run's loan table as arrays, with each scenario's ECL at the horizon of the loan's stage."""
    return {
        "id": df["loan_id"].to_numpy(),
        "segment": df[segment_column].to_numpy(),
        "stage": pd.to_numeric(df["stage"]).fillna(0).to_numpy().astype(np.int64),  # 0: no stage (CECL)
        "pd": df["pd_lifetime"].to_numpy(dtype=np.float64),
        "ead": df["ead"].to_numpy(dtype=np.float64),
        "ecl": df["ecl_reported"].to_numpy(dtype=np.float64),
        "scen": {s: _horizon_ecl(df, s) for s in weights},
    }


@dataclass(frozen=True)
class _Matched:
    """The loans of runs A and B matched on ``loan_id``.

    ``a`` and ``b`` are the runs' arrays (:func:`_run_arrays`). A's matched
    values are at ``[in_b]`` and B's at ``[pb]``, aligned row by row; ``closed``
    marks A's loans not in B and ``new`` B's loans not in A. ``sa``, ``sb``,
    ``ecl_a``, ``ecl_b``, ``ead_a``, ``ead_b`` are the matched loans' values
    and ``same`` marks those whose stage did not move.
    """

    a: dict
    b: dict
    in_b: np.ndarray
    closed: np.ndarray
    new: np.ndarray
    pb: np.ndarray
    sa: np.ndarray
    sb: np.ndarray
    ecl_a: np.ndarray
    ecl_b: np.ndarray
    ead_a: np.ndarray
    ead_b: np.ndarray
    same: np.ndarray


def _match_loans(a: dict, b: dict) -> _Matched:
    """Match the loans of run A and run B on ``loan_id``."""
    index_b = pd.Index(b["id"])
    pos_b = index_b.get_indexer(a["id"])
    in_b = pos_b >= 0
    closed = ~in_b
    new = ~index_b.isin(a["id"])
    pb = pos_b[in_b]
    sa, sb = a["stage"][in_b], b["stage"][pb]
    ecl_a, ecl_b = a["ecl"][in_b], b["ecl"][pb]
    ead_a, ead_b = a["ead"][in_b], b["ead"][pb]
    same = sa == sb
    return _Matched(a, b, in_b, closed, new, pb, sa, sb, ecl_a, ecl_b, ead_a, ead_b, same)


def _same_stage_parts(m: _Matched, weights_a, weights_b) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exposure, scenario-weight and risk-parameter parts of each matched loan; zero where the stage moved."""
    a, b, same = m.a, m.b, m.same
    exposure = np.zeros(len(m.sa))
    sw = np.zeros(len(m.sa))
    risk = np.zeros(len(m.sa))
    exposure[same], sw[same], risk[same] = _same_stage_steps(
        m.ead_a[same],
        m.ead_b[same],
        m.ecl_a[same],
        m.ecl_b[same],
        {s: v[m.in_b][same] for s, v in a["scen"].items()},
        {s: v[m.pb][same] for s, v in b["scen"].items()},
        weights_a,
        weights_b,
    )
    return exposure, sw, risk


def _by_loan_table(m: _Matched, exposure, sw, risk) -> pd.DataFrame:
    """One row per loan of either run: matched loans, then closed, then new, with its step of the walk."""
    a, b, sa, sb, closed, new = m.a, m.b, m.sa, m.sb, m.closed, m.new
    transfer = np.array([f"stage_transfer_{i}_to_{j}" for i, j in zip(sa, sb)], dtype=object)
    step_m = np.where(m.same, "same_stage", transfer) if len(sa) else np.array([], dtype=object)

    n_m, n_c, n_n = int(m.in_b.sum()), int(closed.sum()), int(new.sum())
    nan_c, nan_n = np.full(n_c, np.nan), np.full(n_n, np.nan)
    stage_a = pd.array(np.concatenate([sa, a["stage"][closed], np.zeros(n_n, np.int64)]), dtype="Int64")
    stage_a[n_m + n_c :] = pd.NA
    stage_b = pd.array(np.concatenate([sb, np.zeros(n_c, np.int64), b["stage"][new]]), dtype="Int64")
    stage_b[n_m : n_m + n_c] = pd.NA
    return pd.DataFrame(
        {
            "loan_id": np.concatenate([a["id"][m.in_b], a["id"][closed], b["id"][new]]),
            "segment": np.concatenate([b["segment"][m.pb], a["segment"][closed], b["segment"][new]]),
            "stage_a": stage_a,
            "stage_b": stage_b,
            "ead_a": np.concatenate([m.ead_a, a["ead"][closed], nan_n]),
            "ead_b": np.concatenate([m.ead_b, nan_c, b["ead"][new]]),
            "ecl_a": np.concatenate([m.ecl_a, a["ecl"][closed], nan_n]),
            "ecl_b": np.concatenate([m.ecl_b, nan_c, b["ecl"][new]]),
            "step": np.concatenate([step_m, np.full(n_c, "closed_or_repaid"), np.full(n_n, "new_loans")]),
            "exposure": np.concatenate([exposure, np.zeros(n_c + n_n)]),
            "scenario_weights": np.concatenate([sw, np.zeros(n_c + n_n)]),
            "risk_parameters": np.concatenate([risk, np.zeros(n_c + n_n)]),
            "ecl_change": np.concatenate([m.ecl_b - m.ecl_a, -a["ecl"][closed], b["ecl"][new]]),
        }
    )


def _walk_table(m: _Matched, exposure, sw, risk) -> pd.DataFrame:
    """The ECL walk from A's total to B's, one row per step, checked to reconcile."""
    a, b, sa, sb, closed, new, same = m.a, m.b, m.sa, m.sb, m.closed, m.new, m.same
    n_c, n_n = int(closed.sum()), int(new.sum())
    total_a, total_b = float(a["ecl"].sum()), float(b["ecl"].sum())
    rows = [("opening", len(a["ecl"]), np.nan)]
    rows.append(("closed_or_repaid", n_c, 0.0 - float(a["ecl"][closed].sum())))  # 0.0 - : no "-0" in the CSV
    rows.append(("new_loans", n_n, float(b["ecl"][new].sum())))
    for i, j in TRANSFERS:
        mask = (sa == i) & (sb == j)
        rows.append((f"stage_transfer_{i}_to_{j}", int(mask.sum()), float((m.ecl_b[mask] - m.ecl_a[mask]).sum())))
    n_same = int(same.sum())
    for name, part in zip(SAME_STAGE_STEPS, (exposure, sw, risk)):
        rows.append((name, n_same, float(part[same].sum())))
    rows.append(("closing", len(b["ecl"]), np.nan))
    walk = pd.DataFrame(rows, columns=["step", "loans", "ecl_change"])
    steps = walk["ecl_change"].to_numpy()[1:-1]
    walk["ecl_balance"] = np.concatenate([[total_a], total_a + np.cumsum(steps), [total_b]])
    walk["note"] = ""

    check_walk_reconciles(steps, total_a, total_b)
    return walk


def _migration_table(m: _Matched) -> pd.DataFrame:
    """Loans and EAD by stage in A (or new) and stage in B (or closed); EAD of B, of A for closed loans."""
    a, b, sa, sb, closed, new = m.a, m.b, m.sa, m.sb, m.closed, m.new
    labels_from = [*(str(s) for s in STAGES), "new"]
    labels_to = [*(str(s) for s in STAGES), "closed"]
    mig = []
    for f in labels_from:
        for t in labels_to:
            if f == "new" and t == "closed":
                continue
            if f == "new":
                mask = b["stage"][new] == int(t)
                mig.append((f, t, int(mask.sum()), float(b["ead"][new][mask].sum())))
            elif t == "closed":
                mask = a["stage"][closed] == int(f)
                mig.append((f, t, int(mask.sum()), float(a["ead"][closed][mask].sum())))
            else:
                mask = (sa == int(f)) & (sb == int(t))
                mig.append((f, t, int(mask.sum()), float(m.ead_b[mask].sum())))
    return pd.DataFrame(mig, columns=["stage_from", "stage_to", "loans", "ead"])


# --------------------------------------------------------------------------- run folders


def _read_run(path: Path) -> tuple[pd.DataFrame | None, dict | None, dict | None, list[str]]:
    """A run's loan table, scenario weights and manifest, or the problems that stop reading them."""
    if not path.is_dir():
        return None, None, None, [f"{path}: no such run folder"]
    problems = []
    manifest_path, table_path = path / MANIFEST, path / LOAN_TABLE
    if not manifest_path.is_file():
        problems.append(
            f"{path}: not a complete run (no {MANIFEST}); a folder without {MANIFEST} is an unfinished or failed run"
        )
    if not table_path.is_file():
        problems.append(f"{path}: the run has no {LOAN_TABLE}")
    if problems:
        return None, None, None, problems
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        return None, None, None, [f"{manifest_path}: cannot be read as JSON ({exc})"]
    try:
        loans = pd.read_parquet(table_path)
    except Exception as exc:  # pyarrow raises several types for a damaged file
        return None, None, None, [f"{table_path}: cannot be read as Parquet ({type(exc).__name__}: {exc})"]

    scenarios = (manifest.get("config_resolved") or {}).get("scenarios") if isinstance(manifest, dict) else None
    if scenarios is None:
        return None, None, None, [f"{manifest_path}: no config_resolved.scenarios"]
    weights = {}
    for k, sc in enumerate(scenarios):
        if not isinstance(sc, dict) or "name" not in sc or "weight" not in sc:
            problems.append(f"{manifest_path}: config_resolved.scenarios[{k}] needs a name and a weight, got {sc!r}")
        else:
            weights[str(sc["name"])] = float(sc["weight"])
    if not scenarios:
        # A run without configured scenarios projects one; take it from the columns.
        found = sorted(c[len("ecl_12m_") :] for c in loans.columns if c.startswith("ecl_12m_") and c != f"ecl_12m_{WEIGHTED}")
        if len(found) == 1:
            weights = {found[0]: 1.0}
        else:
            problems.append(
                f"{manifest_path}: config_resolved.scenarios is empty and {LOAN_TABLE} has "
                f"{len(found)} scenarios {found}; cannot tell their weights"
            )
    return loans, weights, manifest, problems


def compare_run_folders(run_a: Path, run_b: Path, *, segment_column: str = "segment") -> MovementResult:
    """:func:`movement` between two run folders, A normally the earlier, with what their records say differs.

    Reads each run's ``loan_ecl.parquet``, its scenario weights from
    ``manifest.json`` (``config_resolved.scenarios``) and what else the
    record holds: the reporting month, the model record and
    ``hazard_model.json``, the resolved config and the package versions. The
    result's :attr:`~MovementResult.differences` tell whether A is the earlier
    month and what changed in model, method or versions; the walk's ``note``
    column says where such a change sits (the module docstring). A run A later
    than run B is compared all the same: the walk then runs backwards.

    Raises
    ------
    RunError
        Naming the folder when it does not exist, is not a complete run (no
        ``manifest.json``), lacks ``loan_ecl.parquet`` or has unreadable
        files; problems of both folders are reported together. Otherwise as
        :func:`movement`, with each problem naming its folder.
    """
    run_a, run_b = Path(run_a), Path(run_b)
    loans_a, weights_a, manifest_a, problems_a = _read_run(run_a)
    loans_b, weights_b, manifest_b, problems_b = _read_run(run_b)
    _raise(problems_a + problems_b, "the runs to compare")
    labels = (f"{run_a / LOAN_TABLE} (run A)", f"{run_b / LOAN_TABLE} (run B)")
    result = _movement(loans_a, loans_b, weights_a, weights_b, segment_column, labels)
    differences = _differences(manifest_a, manifest_b, (_model_fingerprint(run_a), _model_fingerprint(run_b)))
    return _with_differences(result, differences)


def _with_differences(result: MovementResult, differences: RunDifferences) -> MovementResult:
    """The result carrying ``differences``, with their notes on the walk's rows (a transfer row only with loans)."""
    walk = result.walk.copy()
    loans = dict(zip(walk["step"], walk["loans"]))
    for step, note in differences.notes().items():
        if step.startswith("stage_transfer_") and not loans[step]:
            continue
        walk.loc[walk["step"] == step, "note"] = note
    return dataclasses.replace(result, walk=walk, differences=differences)


def movement_against_run(prior_run, loans_b: pd.DataFrame, weights_b: Mapping[str, float]) -> MovementResult:
    """The movement from a finished prior run to this run's loan table (``outputs.prior_run``)."""
    prior = read_manifest(prior_run)
    loans_a = pd.read_parquet(Path(prior_run) / LOAN_TABLE)
    weights_a = prior.get("scenario_weights") or {s["name"]: s["weight"] for s in prior["config_resolved"]["scenarios"]}
    return movement(loans_a, loans_b, weights_a, weights_b)


def sicr_history_of_run(prior_run, as_of_idx: int) -> tuple[pd.Series | None, int]:
    """Months since each loan last met the SICR test or the watch list, at the month-end before ``as_of_idx``.

    Read from the prior run's loan table (``months_since_sicr``, at its reporting month) and moved on by the
    months between the two runs, in which no trigger is known. A loan table written before the column existed
    gives 0 for a stage-2 loan whose reason names SICR, and nothing (NaN) otherwise.

    Returns
    -------
    (Series indexed by loan_id, or None; int)
        The history (None when the prior run is not of an earlier month: a rerun of the same month compared
        for its movement), and the months between the prior run's reporting month and this one's.
    """
    from ..months import parse_month

    prior = read_manifest(prior_run)
    gap = int(as_of_idx) - parse_month(prior["as_of"])
    if gap < 1:
        return None, gap
    table = pd.read_parquet(Path(prior_run) / LOAN_TABLE)
    if "months_since_sicr" in table.columns:
        months = table["months_since_sicr"].to_numpy(dtype=float)
    else:
        reason = table["stage_reason"].astype(str)
        months = np.where((table["stage"] == 2) & reason.str.contains("sicr"), 0.0, np.nan)
    history = pd.Series(months + (gap - 1), index=pd.Index(table["loan_id"], name="loan_id"), name="months_since_sicr")
    return history, gap
