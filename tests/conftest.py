"""Shared fixtures. Keep each fixture small and named for what it builds."""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pytest
import yaml

from creditsurv.config import config_from_dict

PANEL_AS_OF = "2021-01"


def _idx(text: str) -> int:
    return int(text[:4]) * 12 + int(text[5:7]) - 1


def _text(idx: int) -> str:
    return f"{idx // 12:04d}-{idx % 12 + 1:02d}"


@pytest.fixture
def panel_clean_book():
    """A small clean book as three frames ``(panel, loans, macro)``.

    Loans L1 and L2 originate 2020-01 and run to the reporting month 2021-01
    (ages 1..12); L3 originates 2020-06 and prepays at age 4. The macro
    history covers 2019-01..2021-01. Months are YYYY-MM text.
    """
    rows = []
    for loan_id, orig, last_age, paid_at in (("L1", "2020-01", 12, None), ("L2", "2020-01", 12, None), ("L3", "2020-06", 4, 4)):
        for age in range(1, last_age + 1):
            rows.append(
                {
                    "loan_id": loan_id,
                    "month": _text(_idx(orig) + age),
                    "age": age,
                    "balance": 0.0 if age == paid_at else 1000.0 - 10 * age,
                    "days_past_due": 0,
                    "status": "current",
                }
            )
    panel = pd.DataFrame(rows)
    loans = pd.DataFrame(
        {
            "loan_id": ["L1", "L2", "L3"],
            "origination_month": ["2020-01", "2020-01", "2020-06"],
            "original_balance": [1000.0, 1000.0, 1000.0],
            "note_rate": [4.5, 5.0, 3.25],
            "term": [360, 360, 240],
        }
    )
    months = [_text(i) for i in range(_idx("2019-01"), _idx(PANEL_AS_OF) + 1)]
    macro = pd.DataFrame(
        {
            "month": months,
            "unemployment_rate": [5.0 + 0.01 * i for i in range(len(months))],
            "mortgage_rate": [3.0] * len(months),
        }
    )
    return panel, loans, macro


@pytest.fixture
def panel_config_factory(tmp_path):
    """Write frames to ``tmp_path`` and return a :class:`Config` reading them.

    Call as ``factory(panel, loans, macro=None, fmt="parquet", **overrides)``;
    ``overrides`` are merged into the top level of the config dict, and
    ``panel_columns`` / ``loan_columns`` update the column mappings.
    """

    def write(frame: pd.DataFrame, stem: str, fmt: str) -> str:
        path = tmp_path / f"{stem}.{fmt}"
        if fmt == "parquet":
            frame.to_parquet(path, index=False)
        elif fmt == "csv":
            frame.to_csv(path, index=False)
        else:
            raise ValueError(fmt)
        return path.name

    def factory(panel, loans, macro=None, fmt="parquet", panel_columns=None, loan_columns=None, **overrides):
        inputs = {
            "panel": {"path": write(panel, "panel", fmt), "columns": {"status": "status", **(panel_columns or {})}},
            "loans": {"path": write(loans, "loans", fmt), "columns": dict(loan_columns or {})},
        }
        if macro is not None:
            inputs["macro"] = {"path": write(macro, "macro", fmt)}
        data = {
            "as_of": PANEL_AS_OF,
            "inputs": inputs,
            "windows": {"development": {"start": "2020-01", "end": "2020-12"}},
        }
        data.update(overrides)
        return config_from_dict(data, base_dir=tmp_path)

    factory.base_dir = Path(tmp_path)
    return factory


SIMULATED_LOANS, SIMULATED_SEED = 8000, 2718


@pytest.fixture(scope="session")
def simulated_book(tmp_path_factory):
    """The one simulated book of the integration tests: 8,000 loans of the demo simulator, seed 2718.

    Enough defaults for the demo model's 10 terms and for the backtest to have power; the tests that need other
    sizes (parameter recovery as the book grows) write their own.
    """
    from creditsurv.demo import write_demo_book

    folder = tmp_path_factory.mktemp("simulated_book")
    write_demo_book(folder, SIMULATED_LOANS, SIMULATED_SEED)
    return folder


# The competing-risk model of the books most tests draw (the simulator's competing-risk hazard: no arrears
# behaviour, no refreshed score): the demo config's model before the shipped book moved through arrears states.
COMPETING_MODEL_COVARIATES = [
    {"name": "credit_score", "column": "credit_score", "transform": "standardise"},
    {"name": "current_ltv", "column": "current_ltv", "floor": 0.1, "cap": 2.0},
    {"name": "dti", "column": "dti"},
    {"name": "rate_incentive", "column": "rate_incentive"},
    {"name": "unemployment", "macro": "unemployment_rate", "lag": 1},
]


def demo_config_data(book: Path, reports: Path, *, competing: bool = True) -> dict:
    """``configs/demo.yaml`` as a dict, its inputs and scenarios pointed at ``book``
    (a folder written by ``write_demo_book``) and its runs at ``reports``.

    With ``competing`` (for a book of the simulator's competing-risk hazard) the model is the multinomial
    competing-risk model of that hazard's terms, with no cure period; else the demo config's own."""
    import yaml

    root = Path(__file__).resolve().parents[1]
    data = yaml.safe_load((root / "configs" / "demo.yaml").read_text())
    if competing:
        data["model"]["kind"] = "multinomial"
        data["model"]["covariates"] = [dict(c) for c in COMPETING_MODEL_COVARIATES]
        data["default_definition"].pop("cure_months", None)
    for key in ("panel", "loans", "macro"):
        data["inputs"][key]["path"] = str(Path(book) / Path(data["inputs"][key]["path"]).name)
    for scenario in data["scenarios"]:
        scenario["path"] = str(Path(book) / "scenarios" / Path(scenario["path"]).name)
    data["outputs"]["dir"] = str(reports)
    return data


@pytest.fixture(scope="session")
def engine_frames(tmp_path_factory):
    """Simulate a book with the demo simulator and return it as the engine reads it, as DataFrames.

    Call as ``engine_frames(n_loans, seed, first_origination, hazard=None, default_min_age=3)``.
    The book is written by :func:`creditsurv.demo.write_demo_book` (last month 2024-12, so loan
    ages run up to the months since ``first_origination``), opened with ``configs/demo.yaml``'s
    input mapping, checked and labelled by the DuckDB engine, and returned as a dict of the engine's
    internal tables ``panel``, ``loans``, ``macro`` and ``loan_months``. Books are cached per
    argument set for the session; callers get copies they may change.
    """
    from creditsurv.config import config_from_dict
    from creditsurv.demo import DEFAULT_MIN_AGE, write_demo_book
    from creditsurv.pipeline import open_checked

    cache: dict = {}

    def build(n_loans, seed, first_origination, hazard=None, default_min_age=DEFAULT_MIN_AGE):
        key = (n_loans, seed, first_origination, id(hazard), default_min_age)
        if key not in cache:
            folder = tmp_path_factory.mktemp("engine_book")
            write_demo_book(folder, n_loans, seed, first_origination=first_origination, hazard=hazard,
                            default_min_age=default_min_age)  # fmt: skip
            data = demo_config_data(folder, folder / "runs")
            data["windows"] = {"development": {"start": first_origination, "end": data["as_of"]}}
            engine, _ = open_checked(config_from_dict(data, base_dir=folder))
            with engine:
                tables = ("panel", "loans", "macro", "loan_months")
                cache[key] = {t: engine.frame(f"SELECT * FROM {t} ORDER BY ALL") for t in tables}
        return {name: frame.copy() for name, frame in cache[key].items()}

    return build


# --------------------------------------------------------------------------- the corpus's small book and its workspaces

CORPUS_LOANS, CORPUS_SEED = 2000, 4242


def busy_hazard():
    """The demo's true hazard with defaults three times as frequent: 2,000 loans then give enough default
    events in the development window for the demo model's 10 terms per cause (the events-per-parameter rule)."""
    from creditsurv.demo import TRUE_COEFFICIENTS, LogitHazard

    coefficients = {cause: dict(terms) for cause, terms in TRUE_COEFFICIENTS.items()}
    coefficients["default"]["intercept"] += np.log(3.0)
    return LogitHazard(coefficients)


@pytest.fixture(scope="session")
def competing_demo_book(tmp_path_factory):
    """A book of the demo's size and seed drawn from the simulator's competing-risk hazard (the shipped demo
    book moves through arrears states instead): the folder, written once."""
    from creditsurv.demo import write_demo_book

    folder = tmp_path_factory.mktemp("competing_demo") / "book"
    write_demo_book(folder, 20_000, 20261202)
    return folder


@pytest.fixture(scope="session")
def corpus_book(tmp_path_factory):
    """The small book of the bad-input corpus and the record tests (written once) and one complete run of it.

    Returns the template :class:`Workspace`; tests take copies (:meth:`Workspace.copy_to`).
    """
    from creditsurv.cli import main
    from creditsurv.demo import write_demo_book

    root = tmp_path_factory.mktemp("corpus")
    book = root / "book"
    write_demo_book(book, CORPUS_LOANS, CORPUS_SEED, hazard=busy_hazard())
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
        """A workspace at ``root`` with a copy of ``book``; the config names every file relative to its folder."""
        root.mkdir(parents=True)
        shutil.copytree(book, root / "book")
        ws = cls(root)
        ws.data = demo_config_data(Path("book"), Path("reports"))
        ws.save()
        return ws

    def copy_to(self, root: Path) -> "Workspace":
        """A copy of the whole workspace at ``root``, its earlier run included."""
        shutil.copytree(self.root, root, symlinks=True)
        ws = Workspace(root, json.loads(json.dumps(self.data)))
        # The earlier run was made from the template's config folder and records that folder as where its
        # inputs were; in the copy it was made here (the same relative paths, the same bytes).
        manifest = ws.earlier_run / "manifest.json"
        data = json.loads(manifest.read_text())
        data["config_dir"] = str(root)
        manifest.write_text(json.dumps(data, indent=2, sort_keys=True) + "\n")
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


