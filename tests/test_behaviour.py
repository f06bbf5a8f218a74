"""The simulator's arrears behaviour: a book drawn from a known multi-state model, and that model recovered.

References: the true model of :mod:`creditsurv.demo` (``ARREARS_COEFFICIENTS``, written to
``true_parameters.json``), and transition shares counted here with pandas from the panel.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from conftest import demo_config_data

from creditsurv.config import config_from_dict
from creditsurv.demo import (
    ARREARS_COEFFICIENTS,
    arrears_behaviour,
    write_demo_book,
)
from creditsurv.model import hazard_source
from creditsurv.pipeline import open_checked

# The true model's terms as the feature spec names them: each is its own covariate, no age baseline.
COVARIATES = [
    {"name": "log_age", "column": "log_age"},
    {"name": "refreshed_score", "column": "refreshed_score", "lag": 1, "before_first_column": "credit_score"},
    {"name": "current_ltv", "column": "current_ltv"},
    {"name": "dti", "column": "dti"},
    {"name": "rate_incentive", "column": "rate_incentive"},
    {"name": "unemployment_rate", "macro": "unemployment_rate", "lag": 0},
    {"name": "previously_defaulted", "column": "previously_defaulted"},
]


@pytest.fixture(scope="module")
def behaviour_book(tmp_path_factory):
    folder = tmp_path_factory.mktemp("behaviour")
    summary = write_demo_book(folder, 20_000, 5, hazard=arrears_behaviour())
    data = demo_config_data(folder, folder / "runs")
    data["default_definition"]["cure_months"] = 3
    data["windows"] = {"development": {"start": "2016-01", "end": data["as_of"]}}
    data["model"].update(kind="multi_state", baseline={"kind": "none"}, covariates=COVARIATES)
    return folder, config_from_dict(data, base_dir=folder), summary


def test_the_book_moves_through_the_states_the_model_names(behaviour_book):
    folder, _, summary = behaviour_book
    panel = pd.read_parquet(folder / "panel.parquet").sort_values(["loan_id", "age"])
    truth = json.loads((folder / "true_parameters.json").read_text())["hazard"]
    assert truth["kind"] == "arrears_states" and truth["coefficients"] == json.loads(json.dumps(ARREARS_COEFFICIENTS))
    dpd = panel["days_past_due"].to_numpy()
    prev = panel.groupby("loan_id")["days_past_due"].shift().to_numpy()
    # moves the model leaves out never happen: current straight to 60 or 90, 30-59 straight to default
    assert not ((prev == 0) & (dpd >= 60)).any()
    assert not ((prev == 30) & (dpd >= 90)).any()
    # cures from default and re-defaults both happen
    cured = panel["loan_id"][(prev >= 90) & (dpd == 0)].unique()
    assert len(cured) > 100
    entries = panel[(panel["status"] == "default") & (dpd == 90)].groupby("loan_id").size()
    assert (entries > 1).sum() > 5 and summary["events"]["default"] == int(entries.sum())
    # the refreshed score falls on entering arrears: lower after a 30-day month than before it
    score = panel["refreshed_score"].to_numpy()
    prev_score = panel.groupby("loan_id")["refreshed_score"].shift().to_numpy()
    into_arrears = (prev == 0) & (dpd == 30)
    assert np.mean(score[into_arrears] - prev_score[into_arrears]) < -20


def test_the_fit_recovers_the_true_arrears_model(behaviour_book):
    # Labelled with a cure period of 3 months, fitted with the true model's terms: every coefficient of a move
    # fitted with all its terms is within 4 standard errors of its true value (0 for a term the truth leaves
    # out); a move fitted with fewer terms is one with few events, and its intercept is not compared.
    folder, cfg, _ = behaviour_book
    engine, _ = open_checked(cfg)
    with engine:
        model = hazard_source(cfg, engine, folder)
    fits = model.transitions.set_index(["origin", "destination"])
    compared = 0
    for origin, moves in ARREARS_COEFFICIENTS.items():
        part = model.origins[origin]
        for end, terms in moves.items():
            if fits.loc[(origin, end), "design"] != "full":
                continue
            for name in part.params.index:
                true = terms.get(name, 0.0)
                est, se = part.params.loc[name, end], part.bse.loc[name, end]
                assert abs(est - true) < 4 * se, (origin, end, name, est, se, true)
                compared += 1
    # the moves with most events carry every term: current to 30-59 and prepaid, 30-59 back to current, default
    full = fits[fits["design"] == "full"].index.tolist()
    for move in [("current", "30-59"), ("current", "prepaid"), ("30-59", "current"), ("60-89", "default")]:
        assert move in full, move
    assert compared >= 8 * len(full) >= 32
