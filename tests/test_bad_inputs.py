"""The corpus of bad inputs and faults: each case is a user's mistake or a machine's fault, and its promise.

Every case runs the command line in this process on its own copy of one small book (2,000 loans of the
demo simulator, built once) and asserts

* the exit code (the rules in ``creditsurv.cli``: 1 data, model or run problems; 2 usage or config;
  3 a reproduction that does not match its record),
* the first line of the message (``ErrorName: ...`` naming the file, config key, column or rows),
* that no run folder, ``.incomplete-*`` folder or temporary folder is left behind (a mismatching
  reproduction, exit 3, is kept: it is the validator's evidence), and
* that the earlier run in the workspace is untouched, byte for byte.

A case is a :class:`Case`: a name, the issue item it keeps fixed, a ``prepare`` function that breaks the
workspace and returns the command line, the exit code and a regular expression for the first line of
stderr. Add a case by appending to ``CASES`` in the section of its item.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from conftest import demo_config_data

import creditsurv
import creditsurv.report
from creditsurv import StaleRunWarning
from creditsurv.cli import main
from creditsurv.demo import TRUE_COEFFICIENTS, LogitHazard, write_demo_book
from creditsurv.runs import remove_stale_incomplete

CORPUS_LOANS, CORPUS_SEED = 2000, 4242

# Defaults three times as frequent as the demo's: 2,000 loans then give enough default events in the
# development window for the demo model's 10 terms per cause (the events-per-parameter rule).
_BUSY = {cause: dict(terms) for cause, terms in TRUE_COEFFICIENTS.items()}
_BUSY["default"]["intercept"] += np.log(3.0)
BUSY = LogitHazard(_BUSY)


@pytest.fixture(scope="module")
def corpus_book(tmp_path_factory):
    """The corpus's book (written once) and one complete run of it, to copy into every workspace."""
    root = tmp_path_factory.mktemp("corpus")
    book = root / "book"
    write_demo_book(book, CORPUS_LOANS, CORPUS_SEED, hazard=BUSY)
    ws = Workspace.create(root / "template", book)
    code = main(["run", str(ws.config)])
    assert code == 0, "the corpus's clean run must succeed"
    return ws


@dataclass
class Workspace:
    """A folder holding a copy of the book, a config reading it and a ``reports`` folder with one earlier run."""

    root: Path
    data: dict = field(default_factory=dict)
    env: dict = field(default_factory=dict)  # environment of a case run in its own process (test hooks)

    @classmethod
    def create(cls, root: Path, book: Path) -> "Workspace":
        root.mkdir(parents=True)
        shutil.copytree(book, root / "book")
        ws = cls(root)
        ws.data = demo_config_data(root / "book", root / "reports")
        ws.data["outputs"]["monthly_tables"] = False
        ws.save()
        return ws

    def copy_to(self, root: Path) -> "Workspace":
        shutil.copytree(self.root, root, symlinks=True)
        ws = Workspace(root)
        ws.data = demo_config_data(root / "book", root / "reports")
        ws.data["outputs"]["monthly_tables"] = False
        ws.save()
        return ws

    # ------------------------------------------------------------------ paths and edits

    @property
    def config(self) -> Path:
        return self.root / "config.yaml"

    @property
    def book(self) -> Path:
        return self.root / "book"

    @property
    def reports(self) -> Path:
        return self.root / "reports"

    @property
    def earlier_run(self) -> Path:
        (run,) = [p for p in self.reports.iterdir() if p.is_dir() and not p.name.startswith(".")]
        return run

    def save(self) -> None:
        self.config.write_text(yaml.safe_dump(self.data, sort_keys=False), encoding="utf-8")

    def edit_config(self, change: Callable[[dict], None]) -> Path:
        """Apply ``change`` to the config dict, write it, return its path."""
        change(self.data)
        self.save()
        return self.config

    def edit_table(self, name: str, change: Callable[[pd.DataFrame], pd.DataFrame | None]) -> Path:
        """Read ``book/<name>`` (Parquet or CSV), apply ``change`` and write it back in the same format."""
        path = self.book / name
        frame = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path)
        changed = change(frame)
        frame = frame if changed is None else changed
        if path.suffix == ".parquet":
            frame.to_parquet(path, index=False)
        else:
            frame.to_csv(path, index=False)
        return path

    def snapshot(self) -> dict[str, str]:
        """SHA-256 of every file under ``reports``, by relative path."""
        out = {}
        for p in sorted(self.reports.rglob("*")):
            if p.is_file():
                out[str(p.relative_to(self.reports))] = hashlib.sha256(p.read_bytes()).hexdigest()
        return out


@dataclass(frozen=True)
class Case:
    """One bad input or fault and what the command line must do about it."""

    name: str
    item: str
    prepare: Callable[[Workspace], list[str]]
    exit_code: int
    first_line: str
    keeps: str | None = None  # a folder name pattern under reports that the case may leave (exit 3's evidence)
    own_process: bool = False  # run ``python -m creditsurv`` in a subprocess (signals), with ``ws.env`` and TMPDIR


CASES: list[Case] = []


def case(item: str, exit_code: int, first_line: str, keeps: str | None = None, own_process: bool = False):
    """Register the decorated ``prepare`` function as a case."""

    def register(prepare):
        CASES.append(Case(prepare.__name__, item, prepare, exit_code, first_line, keeps, own_process))
        return prepare

    return register


# ====================================================================== the record (items 1-4)


# ====================================================================== no silent wrong numbers (items 5-8)


# ====================================================================== faults leave nothing behind (items 9-12)


@case("9", 143, r"^stopped by SIGTERM", own_process=True)
def sigterm_during_fit(ws):
    ws.env["CREDITSURV_TEST_KILL_AT"] = "fit"
    return ["run", str(ws.config)]


@case("9", 143, r"^stopped by SIGTERM", own_process=True)
def sigterm_while_writing_report(ws):
    ws.env["CREDITSURV_TEST_KILL_AT"] = "report"
    return ["run", str(ws.config)]


@case("9", 129, r"^stopped by SIGHUP", own_process=True)
def sighup_during_projection(ws):
    ws.env.update(CREDITSURV_TEST_KILL_AT="projection", CREDITSURV_TEST_KILL_SIGNAL="SIGHUP")
    return ["run", str(ws.config)]


@case("9", 130, r"^interrupted", own_process=True)
def ctrl_c_during_validation(ws):
    ws.env.update(CREDITSURV_TEST_KILL_AT="validation", CREDITSURV_TEST_KILL_SIGNAL="SIGINT")
    return ["run", str(ws.config)]


@case("10", 1, r"^OutputError: .*notes\.txt: is a file, not a folder")
def outputs_dir_names_a_file(ws):
    (ws.root / "notes.txt").write_text("not a folder\n")
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(dir=str(ws.root / "notes.txt"))))]


@case("10", 1, r"^OutputError: .*missing/checks\.csv: cannot write the check table: the folder .*missing does not exist")
def check_out_into_a_missing_folder(ws):
    return ["check", str(ws.config), "--out", str(ws.root / "missing" / "checks.csv")]


@case("10", 1, r"^OutputError: .*report\.html: the run was not written \(No space left on device\)")
def disk_full_while_writing_the_report(ws):
    def full(path, tables, meta):
        Path(path).write_bytes(b"<html>")  # a partial page, then the disk fills
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    ws.monkeypatch.setattr(creditsurv.report, "write_report", full)
    return ["run", str(ws.config)]


@case("10", 1, r"^OutputError: .*locked.*cannot create the run folder \(Permission denied\)")
def read_only_outputs_folder(ws):
    if os.geteuid() == 0:
        pytest.skip("runs as root, whom a read-only folder does not stop (outputs_dir_names_a_file covers the path)")
    locked = ws.root / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    return ["run", str(ws.edit_config(lambda d: d["outputs"].update(dir=str(locked))))]


def test_a_killed_run_is_swept_at_the_next_start(workspace):
    # SIGKILL cannot be caught: the killed run leaves its .incomplete folder (with its owner file) ...
    workspace.env.update(CREDITSURV_TEST_KILL_AT="projection", CREDITSURV_TEST_KILL_SIGNAL="SIGKILL")
    code, _ = run_own_process(["run", str(workspace.config)], workspace)
    assert code == -9  # subprocess's convention for a child ended by signal 9
    (left,) = workspace.reports.glob(".incomplete-*")
    assert list(workspace.scratch.glob("creditsurv-duckdb-*")), "the killed run's spill folder stays until the next start"
    owner = json.loads((left / ".owner.json").read_text())
    assert owner["host"] == socket.gethostname() and owner["pid"] > 0
    # ... which the next run of this host removes, saying so, before it builds its own.
    with pytest.warns(StaleRunWarning, match=rf"{left.name}: removed an interrupted run's folder \(process {owner['pid']} "):
        assert main(["fit", str(workspace.config)]) == 0
    assert not list(workspace.reports.glob(".incomplete-*"))
    assert not list(workspace.scratch.iterdir()), "the next start removes the killed run's spill folder too"


def test_unfinished_folders_of_other_hosts_and_running_processes_are_left_alone(tmp_path):
    other = tmp_path / ".incomplete-2024-12_abc-00000001"
    other.mkdir()
    (other / ".owner.json").write_text(json.dumps({"host": "another-host", "pid": 1, "started": "2026-01-01T00:00:00"}))
    alive = tmp_path / ".incomplete-2024-12_abc-00000002"
    alive.mkdir()
    (alive / ".owner.json").write_text(json.dumps({"host": socket.gethostname(), "pid": os.getppid(), "started": "x"}))
    with pytest.warns(StaleRunWarning, match=r"left alone 1 unfinished run folder.*another-host") as record:
        assert remove_stale_incomplete(tmp_path) == []
    assert len(record) == 1 and other.exists() and alive.exists()


@case("11", 2, r"^ConfigError: .*config\.yaml.*\bmodle\b.*did you mean 'model'")
def misspelt_top_level_key(ws):
    ws.data["modle"] = ws.data.pop("model")
    return ["run", str(ws.edit_config(lambda d: None))]


@case("11", 1, r"^DataError: .*inputs\.panel\.path: .*panel\.parquet has no rows with a readable month")
def empty_panel(ws):
    panel = pq.read_table(ws.book / "panel.parquet")
    pq.write_table(panel.slice(0, 0), ws.book / "panel.parquet")  # the columns and types kept, no rows
    return ["run", str(ws.config)]


def _first_loans(column, value, n=5):
    def change(loans):
        loans.loc[loans.sort_values("loan_id").index[:n], column] = value

    return change


@case("11", 1, r"^FeatureError: .*'dti': \d+ rows have no value .*column 'dti' of the loan table \(inputs\.loans\), loans QL0000001, ")
def missing_covariate_values(ws):
    ws.edit_table("loans.parquet", _first_loans("dti", np.nan))
    return ["run", str(ws.config)]


@case("11", 1, r"^FeatureError: .*'dti': log of non-positive values in \d+ rows.*column 'dti' of the loan table.*loans QL0000001, ")
def log_of_zeros(ws):
    ws.edit_table("loans.parquet", _first_loans("dti", 0.0))
    return ["run", str(ws.edit_config(lambda d: d["model"]["covariates"][2].update(transform="log")))]


@case("11", 1, r"^DataCheckError: 1 data check failed on .*loans\.parquet")
def note_rate_of_a_million_percent(ws):
    # The first line names the file; the next names the check, the column and the loans (loan_fields_invalid).
    ws.edit_table("loans.parquet", _first_loans("note_rate", 1e6, n=3))
    return ["run", str(ws.config)]


@case("12", 1, r"^DataError: inputs\.loans\.path: .*loans\.csv.*This file is not utf-8 encoded")
def latin1_loan_table(ws):
    loans = pd.read_parquet(ws.book / "loans.parquet")
    loans["region"] = loans["region"].astype(str)
    loans.loc[loans.index[:3], "region"] = "Zürich"
    loans.to_csv(ws.book / "loans.csv", index=False, encoding="latin-1")
    return ["run", str(ws.edit_config(lambda d: d["inputs"]["loans"].update(path=str(ws.book / "loans.csv"))))]


@case("12", 0, r"^$", keeps=r"2024-12_[0-9a-f]{10}")
def segment_names_that_look_like_maths_or_hidden_labels(ws):
    # matplotlib reads "$...$" as maths (and "$x^$" fails to parse) and leaves labels starting with "_" out of legends.
    def rename(loans):
        levels = sorted(loans["channel"].astype(str).unique())
        names = dict(zip(levels, ["$x^$", "$100k-$250k", "_north"]))
        loans["channel"] = loans["channel"].astype(str).map(lambda v: names.get(v, v))

    ws.edit_table("loans.parquet", rename)
    return ["run", str(ws.edit_config(lambda d: d["segments"].update(column="channel")))]


@case("12", 2, r"^ConfigError: .*config\.yaml: the config file is [\d,]+ bytes, above the limit of 1,048,576 bytes")
def config_of_many_megabytes(ws):
    # A list pasted into the config: 20,000 lines of 100 characters, about 2 MB.
    return ["run", str(ws.edit_config(lambda d: d.update(notes=["x" * 100] * 20_000)))]


# ====================================================================== the data checks, one case per class


# ====================================================================== the runner


@pytest.fixture
def workspace(corpus_book, tmp_path, monkeypatch):
    """A fresh copy of the corpus workspace; temporary files of the case go to a folder of its own.

    ``ws.monkeypatch`` lets a case replace a public function (a full disk, say); it is undone after the case.
    """
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(scratch))
    ws = corpus_book.copy_to(tmp_path / "ws")
    ws.scratch = scratch
    ws.monkeypatch = monkeypatch
    return ws


def run_own_process(argv: list[str], ws: Workspace) -> tuple[int, str]:
    """``python -m creditsurv argv`` in a subprocess, with the case's environment and TMPDIR in its scratch folder."""
    package_root = str(Path(creditsurv.__file__).resolve().parent.parent)
    env = {**os.environ, **ws.env, "TMPDIR": str(ws.scratch)}
    env["PYTHONPATH"] = os.pathsep.join(p for p in (package_root, env.get("PYTHONPATH")) if p)
    done = subprocess.run([sys.executable, "-m", "creditsurv", *argv], check=False, env=env, capture_output=True, text=True, timeout=600)
    return done.returncode, done.stderr


@pytest.mark.parametrize("bad", CASES, ids=[c.name for c in CASES])
def test_bad_input_or_fault(bad: Case, workspace, capsys):
    before = workspace.snapshot()
    argv = bad.prepare(workspace)
    capsys.readouterr()
    if bad.own_process:
        code, err = run_own_process(argv, workspace)
    else:
        code = main(argv)
        err = capsys.readouterr().err
    first = err.strip().splitlines()[0] if err.strip() else ""
    assert code == bad.exit_code, f"exit {code}, expected {bad.exit_code}; stderr:\n{err}"
    assert re.search(bad.first_line, first), f"first line {first!r} does not match {bad.first_line!r}"
    assert "Traceback" not in err
    after = workspace.snapshot()
    assert {k: v for k, v in after.items() if k in before} == before, "an earlier run changed"
    new = {Path(k).parts[0] for k in after if k not in before}
    if bad.keeps is not None:
        new = {n for n in new if not re.fullmatch(bad.keeps, n)}
    assert not new, f"left behind under reports: {sorted(new)}"
    leftovers = [p.name for p in workspace.reports.iterdir() if p.name.startswith(".")]
    assert not leftovers, f"left behind: {leftovers}"
    assert not list(workspace.scratch.iterdir()), f"temporary files left: {list(workspace.scratch.iterdir())}"

