"""Movement between two runs: the ECL walk, stage migration and lifetime PD change.

Expected walks in the hand-built cases are worked out in the comments beside
each check, from the definitions in the module docstring of
``creditsurv._movement``.
"""

import json
import re

import numpy as np
import pandas as pd
import pytest

from creditsurv.errors import RunError
from creditsurv.runs import (
    MANIFEST,
    WALK_STEPS,
    RunFolder,
    check_walk_reconciles,
    compare_run_folders,
    movement,
)

EVEN = {"base": 0.5, "down": 0.5}


def _book(rows, weights):
    """Loan table from ``(loan_id, stage, ead, ecl_12m {s: x}, ecl_lifetime {s: x}[, segment, pd])`` rows.

    ``ecl_reported`` is the weighted ECL of the stage's horizon, as a run writes it.
    """
    out = []
    for row in rows:
        loan_id, stage, ead, e12, elt = row[:5]
        segment = row[5] if len(row) > 5 else "retail"
        pd_lifetime = row[6] if len(row) > 6 else 0.1
        rec = {"loan_id": loan_id, "segment": segment, "stage": stage, "pd_lifetime": pd_lifetime, "ead": ead}
        for s in weights:
            rec[f"ecl_12m_{s}"] = e12[s]
            rec[f"ecl_lifetime_{s}"] = elt[s]
        horizon = e12 if stage == 1 else elt
        rec["ecl_reported"] = sum(w * horizon[s] for s, w in weights.items())
        out.append(rec)
    return pd.DataFrame(out)


def _steps(result):
    """Walk steps as {step: (loans, ecl_change)}, without opening and closing."""
    w = result.walk.set_index("step")
    return {s: (int(w.loc[s, "loans"]), float(w.loc[s, "ecl_change"])) for s in WALK_STEPS}


def _only(result, expected, *, abs_tol=1e-12):
    """Every step is zero except those in ``expected`` ({step: ecl_change})."""
    got = _steps(result)
    for step in WALK_STEPS:
        assert got[step][1] == pytest.approx(expected.get(step, 0.0), abs=abs_tol), step


# Loan L1: stage 1, EAD 100, 12-month ECL 2 (base) and 4 (down) -> reported 0.5*2 + 0.5*4 = 3.
L1 = ("L1", 1, 100.0, {"base": 2.0, "down": 4.0}, {"base": 9.0, "down": 11.0})


def test_new_loan_only():
    a = _book([L1], EVEN)
    # L2 new in stage 2: lifetime ECL 10 and 20 -> reported 15.
    b = _book([L1, ("L2", 2, 300.0, {"base": 1.0, "down": 1.0}, {"base": 10.0, "down": 20.0})], EVEN)
    r = movement(a, b, EVEN, EVEN)
    _only(r, {"new_loans": 15.0})
    assert _steps(r)["new_loans"][0] == 1
    walk = r.walk.set_index("step")
    assert walk.loc["opening", "ecl_balance"] == pytest.approx(3.0)
    assert walk.loc["closing", "ecl_balance"] == pytest.approx(18.0)
    assert (walk.loc["opening", "loans"], walk.loc["closing", "loans"]) == (1, 2)


def test_closed_loan_only():
    # L2 in stage 3 (lifetime ECL 40 in both scenarios -> 40) is repaid before run B.
    a = _book([L1, ("L2", 3, 50.0, {"base": 5.0, "down": 5.0}, {"base": 40.0, "down": 40.0})], EVEN)
    b = _book([L1], EVEN)
    r = movement(a, b, EVEN, EVEN)
    _only(r, {"closed_or_repaid": -40.0})
    assert _steps(r)["closed_or_repaid"][0] == 1
    assert r.walk["ecl_balance"].iloc[-1] == pytest.approx(3.0)


def test_stage_transfer_only():
    # L1 moves to stage 2: lifetime ECL 12 and 18 -> 15; the transfer is 15 - 3 = 12.
    b = _book([("L1", 2, 100.0, {"base": 2.0, "down": 4.0}, {"base": 12.0, "down": 18.0})], EVEN)
    r = movement(_book([L1], EVEN), b, EVEN, EVEN)
    _only(r, {"stage_transfer_1_to_2": 12.0})
    steps = _steps(r)
    assert steps["stage_transfer_1_to_2"][0] == 1
    assert steps["exposure"][0] == 0 and steps["stage_transfer_2_to_1"][0] == 0


def test_exposure_change_only():
    # EAD 100 -> 125 with PD, LGD and schedule unchanged: each scenario's ECL scales by 1.25,
    # 2 -> 2.5 and 4 -> 5, reported 3 -> 3.75. Exposure = 3 x (125/100 - 1) = 0.75.
    b = _book([("L1", 1, 125.0, {"base": 2.5, "down": 5.0}, {"base": 9.0, "down": 11.0})], EVEN)
    r = movement(_book([L1], EVEN), b, EVEN, EVEN)
    steps = _steps(r)
    assert steps["exposure"][1] == pytest.approx(0.75, rel=1e-12)
    assert abs(steps["risk_parameters"][1]) < 1e-12
    assert steps["scenario_weights"][1] == 0.0
    assert steps["exposure"][0] == 1


def test_risk_parameter_change_only():
    # Same EAD and weights; base 12-month ECL 2 -> 3 (higher PD): reported 3 -> 3.5.
    b = _book([("L1", 1, 100.0, {"base": 3.0, "down": 4.0}, {"base": 9.0, "down": 11.0})], EVEN)
    r = movement(_book([L1], EVEN), b, EVEN, EVEN)
    _only(r, {"risk_parameters": 0.5})


def test_weights_change_only_uses_the_horizon_of_the_stage():
    # L1 stage 1 (12-month 2, 4); L2 stage 3 (lifetime 10, 30; its 12-month values must not be used).
    rows = [L1, ("L2", 3, 80.0, {"base": 1.0, "down": 1.0}, {"base": 10.0, "down": 30.0})]
    wb = {"base": 0.7, "down": 0.3}
    r = movement(_book(rows, EVEN), _book(rows, wb), EVEN, wb)
    # L1: 0.2 x 2 - 0.2 x 4 = -0.4; L2: 0.2 x 10 - 0.2 x 30 = -4. Total 23 -> 18.6.
    _only(r, {"scenario_weights": -4.4})
    assert r.walk["ecl_balance"].iloc[0] == pytest.approx(23.0)
    assert r.walk["ecl_balance"].iloc[-1] == pytest.approx(18.6)


def test_scenario_in_one_run_only_moves_its_whole_weighted_contribution():
    # A: base 0.5, down 0.5 on L1 (2, 4) -> 3. B drops "down" and adds "up"; EAD doubles 100 -> 200,
    # base scales 2 -> 4, up = 1, reported 0.5 x 4 + 0.5 x 1 = 2.5.
    wb = {"base": 0.5, "up": 0.5}
    b = _book([("L1", 1, 200.0, {"base": 4.0, "up": 1.0}, {"base": 9.0, "up": 9.0})], wb)
    r = movement(_book([L1], EVEN), b, EVEN, wb)
    # exposure = 3 x (2 - 1) = 3; weights: base unchanged, down dropped -0.5 x 4 x 2 = -4,
    # up added +0.5 x 1 = 0.5 -> -3.5; risk = 2.5 - 3 - 3 + 3.5 = 0.
    _only(r, {"exposure": 3.0, "scenario_weights": -3.5})


def test_zero_exposure_in_run_a_puts_the_whole_change_in_exposure():
    a = _book([("L1", 1, 0.0, {"base": 0.0, "down": 0.0}, {"base": 0.0, "down": 0.0})], EVEN)
    r = movement(a, _book([L1], EVEN), EVEN, EVEN)
    _only(r, {"exposure": 3.0})


def test_a_walk_that_does_not_reconcile_is_refused():
    # The walk movement() builds passes its own reconciliation check; the same
    # steps with one unit added to a step are refused.
    walk = movement(_book([L1], EVEN), _book([L1], EVEN), EVEN, EVEN).walk
    steps = walk["ecl_change"].to_numpy()[1:-1]
    opening, closing = float(walk["ecl_balance"].iloc[0]), float(walk["ecl_balance"].iloc[-1])
    check_walk_reconciles(steps, opening, closing)
    off_by_one = steps.copy()
    off_by_one[-1] += 1.0
    with pytest.raises(RunError, match="does not reconcile"):
        check_walk_reconciles(off_by_one, opening, closing)


def _random_book(rng, ids, weights):
    n = len(ids)
    rows = []
    for k in range(n):
        e12 = {s: float(rng.uniform(0, 5)) for s in weights}
        elt = {s: e12[s] * float(rng.uniform(1, 6)) for s in weights}
        rows.append(
            (ids[k], int(rng.integers(1, 4)), float(rng.uniform(0, 1e6)), e12, elt, str(rng.choice(["a", "b", "c"])), float(rng.uniform(0, 1)))
        )
    return _book(rows, weights)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_general_case_reconciles_exactly_and_leaves_inputs_alone(seed):
    rng = np.random.default_rng(seed)
    wa = {"base": 0.5, "down": 0.3, "up": 0.2}
    wb = {"base": 0.6, "down": 0.25, "severe": 0.15}
    a = _random_book(rng, [f"L{i}" for i in range(400)], wa)
    b = _random_book(rng, [f"L{i}" for i in range(100, 550)], wb)
    a_before, b_before = a.copy(), b.copy()
    r = movement(a, b, wa, wb)
    pd.testing.assert_frame_equal(a, a_before)
    pd.testing.assert_frame_equal(b, b_before)

    total_a, total_b = a["ecl_reported"].sum(), b["ecl_reported"].sum()
    steps = r.walk["ecl_change"].iloc[1:-1].sum()
    assert steps == pytest.approx(total_b - total_a, rel=1e-9)
    assert r.walk["ecl_balance"].iloc[-2] == pytest.approx(total_b, rel=1e-9)
    assert list(r.walk["step"]) == ["opening", *WALK_STEPS, "closing"]
    # Per loan: the three same-stage parts add up to the loan's change.
    parts = r.by_loan[["exposure", "scenario_weights", "risk_parameters"]].sum(axis=1)
    same = r.by_loan["step"] == "same_stage"
    np.testing.assert_allclose(parts[same], r.by_loan.loc[same, "ecl_change"], rtol=1e-9, atol=1e-9)
    assert len(r.by_loan) == 550
    # Loan counts: 300 in both, 100 closed, 150 new.
    n = dict(zip(r.walk["step"], r.walk["loans"]))
    assert (n["closed_or_repaid"], n["new_loans"]) == (100, 150)
    assert sum(n[f"stage_transfer_{i}_to_{j}"] for i in (1, 2, 3) for j in (1, 2, 3) if i != j) + n["exposure"] == 300


def test_a_run_compared_with_itself_has_no_movement():
    rng = np.random.default_rng(7)
    a = _random_book(rng, list(range(50)), EVEN)
    r = movement(a, a, EVEN, EVEN)
    assert (r.walk["ecl_change"].iloc[1:-1] == 0).all()
    assert r.migration_matrix().loc[["1", "2", "3"], ["1", "2", "3"]].to_numpy().trace() == 50
    assert (r.pd_change["pd_lifetime_change"].fillna(0) == 0).all()


def test_migration_matrix_counts_and_exposure():
    z = {"base": 0.0, "down": 0.0}

    def loan(i, stage, ead):
        return (i, stage, ead, z, z)

    a = _book([loan("L1", 1, 10), loan("L2", 1, 20), loan("L3", 2, 30), loan("L4", 3, 40), loan("L5", 1, 50)], EVEN)
    b = _book([loan("L1", 1, 11), loan("L2", 2, 21), loan("L3", 1, 31), loan("L6", 1, 60), loan("L7", 2, 70)], EVEN)
    r = movement(a, b, EVEN, EVEN)
    counts = r.migration_matrix("loans")
    expected = pd.DataFrame(
        [[1, 1, 0, 1], [1, 0, 0, 0], [0, 0, 0, 1], [1, 1, 0, 0]],
        index=pd.Index(["1", "2", "3", "new"], name="stage_from"),
        columns=pd.Index(["1", "2", "3", "closed"], name="stage_to"),
    )
    np.testing.assert_array_equal(counts.to_numpy(), expected.to_numpy())
    assert list(counts.index) == list(expected.index) and list(counts.columns) == list(expected.columns)
    ead = r.migration_matrix("ead")
    # EAD_B for loans in B, EAD_A for closed ones.
    assert ead.loc["1", "1"] == 11 and ead.loc["1", "2"] == 21 and ead.loc["2", "1"] == 31
    assert ead.loc["new", "1"] == 60 and ead.loc["new", "2"] == 70
    assert ead.loc["1", "closed"] == 50 and ead.loc["3", "closed"] == 40
    assert r.migration["loans"].sum() == 7  # 3 matched + 2 closed + 2 new
    assert len(r.migration) == 15  # 4 x 4 cells less new -> closed


def test_pd_change_by_segment_is_exposure_weighted():
    z = {"base": 0.0, "down": 0.0}
    a = _book([("L1", 1, 100, z, z, "x", 0.10), ("L2", 1, 300, z, z, "x", 0.20), ("L3", 1, 100, z, z, "y", 0.50)], EVEN)
    b = _book([("L1", 1, 100, z, z, "x", 0.20), ("L2", 1, 100, z, z, "x", 0.40), ("L4", 1, 100, z, z, "y", 0.30)], EVEN)
    t = movement(a, b, EVEN, EVEN).pd_change.set_index("segment")
    # Segment x, loans in both: A (100 x .1 + 300 x .2) / 400 = .175; B (100 x .2 + 100 x .4) / 200 = .3.
    assert t.loc["x", "pd_lifetime_a"] == pytest.approx(0.175)
    assert t.loc["x", "pd_lifetime_b"] == pytest.approx(0.3)
    assert t.loc["x", "pd_lifetime_change"] == pytest.approx(0.125)
    # Segment y has no loan in both runs; its book means are each run's own loan.
    assert t.loc["y", "loans"] == 0 and np.isnan(t.loc["y", "pd_lifetime_a"])
    assert t.loc["y", "pd_lifetime_a_book"] == pytest.approx(0.5)
    assert t.loc["y", "pd_lifetime_b_book"] == pytest.approx(0.3)
    # Whole book of A: (10 + 60 + 50) / 500 = .24; of B: (20 + 40 + 30) / 300 = .3.
    assert t.loc["all", "pd_lifetime_a_book"] == pytest.approx(0.24)
    assert t.loc["all", "pd_lifetime_b_book"] == pytest.approx(0.3)
    assert t.loc["all", "loans"] == 2
    assert list(t.index) == ["x", "y", "all"]


def test_to_tables_names():
    r = movement(_book([L1], EVEN), _book([L1], EVEN), EVEN, EVEN)
    tables = r.to_tables()
    assert list(tables) == ["movement_walk.csv", "stage_migration.csv", "pd_change_by_segment.csv"]
    assert tables["movement_walk.csv"] is r.walk


def test_bad_tables_report_every_problem_at_once():
    a = _book([L1, L1], EVEN).drop(columns=["pd_lifetime"])  # duplicate id, missing column
    b = _book([L1], EVEN).assign(stage=4, ead=-1.0)
    with pytest.raises(RunError) as info:
        movement(a, b, EVEN, {"base": 0.5, "down": 0.6})
    text = str(info.value)
    assert "run A loans: missing columns ['pd_lifetime']" in text
    assert "run A loans: loan_id is not unique: 2 rows (loan_id ['L1', 'L1'])" in text
    assert "run B weights: scenario weights must sum to 1, got 1.1" in text
    assert "run B loans: stage must be 1, 2 or 3" in text
    assert "run B loans: 'ead' must be finite and >= 0" in text
    assert text.startswith("5 problems")


def test_reported_ecl_that_does_not_match_the_weights_is_refused():
    b = _book([L1], EVEN)
    with pytest.raises(RunError, match="ecl_reported is not the probability-weighted ECL"):
        movement(_book([L1], EVEN), b, EVEN, {"base": 0.9, "down": 0.1})


def _write_run(parent, name, loans, weights):
    scenarios = [{"name": s, "weight": w, "path": f"scenarios/{s}.csv"} for s, w in weights.items()]
    with RunFolder(parent, name) as run:
        run.add_table(loans, "loan_ecl.parquet")
        return run.commit({"run_id": name, "config_resolved": {"scenarios": scenarios}})


def test_compare_run_folders_matches_movement_on_the_frames(tmp_path):
    rng = np.random.default_rng(11)
    wb = {"base": 0.6, "down": 0.4}
    a = _random_book(rng, [f"L{i}" for i in range(40)], EVEN)
    b = _random_book(rng, [f"L{i}" for i in range(20, 70)], wb)
    run_a = _write_run(tmp_path, "2024-11_a", a, EVEN)
    run_b = _write_run(tmp_path, "2024-12_b", b, wb)
    got = compare_run_folders(run_a, run_b)
    want = movement(a, b, EVEN, wb)
    for name, table in want.to_tables().items():
        pd.testing.assert_frame_equal(got.to_tables()[name], table, check_dtype=False)


def test_compare_run_folders_names_an_incomplete_folder(tmp_path):
    run_a = _write_run(tmp_path, "done", _book([L1], EVEN), EVEN)
    unfinished = tmp_path / "unfinished"
    unfinished.mkdir()
    _book([L1], EVEN).to_parquet(unfinished / "loan_ecl.parquet")
    with pytest.raises(RunError, match=re.escape(f"{unfinished}: not a complete run (no manifest.json)")):
        compare_run_folders(run_a, unfinished)


def test_compare_run_folders_names_a_run_without_the_loan_table(tmp_path):
    run_a = _write_run(tmp_path, "done", _book([L1], EVEN), EVEN)
    empty = tmp_path / "no_table"
    empty.mkdir()
    (empty / MANIFEST).write_text(json.dumps({"config_resolved": {"scenarios": []}}))
    with pytest.raises(RunError) as info:
        compare_run_folders(tmp_path / "missing", empty)
    text = str(info.value)
    assert f"{tmp_path / 'missing'}: no such run folder" in text
    assert f"{empty}: the run has no loan_ecl.parquet" in text
    assert run_a.exists()


def test_compare_run_folders_names_the_file_of_a_bad_table(tmp_path):
    run_a = _write_run(tmp_path, "a", _book([L1], EVEN), EVEN)
    run_b = _write_run(tmp_path, "b", _book([L1], EVEN).drop(columns=["ead"]), EVEN)
    with pytest.raises(RunError, match=re.escape(f"{run_b / 'loan_ecl.parquet'} (run B) loans: missing columns ['ead']")):
        compare_run_folders(run_a, run_b)


def test_a_run_without_configured_scenarios_uses_its_single_scenario(tmp_path):
    one = {"central": 1.0}
    loan = ("L1", 1, 100.0, {"central": 2.0}, {"central": 7.0})
    run_a = _write_run(tmp_path, "a", _book([loan], one), {})
    run_b = _write_run(tmp_path, "b", _book([loan[:2] + (150.0, {"central": 3.0}, {"central": 7.0})], one), {})
    # 2 -> 3 with EAD 100 -> 150: all exposure, 2 x 0.5 = 1.
    _only(compare_run_folders(run_a, run_b), {"exposure": 1.0})


# --------------------------------------------------------------------------- what the records say differs

# A run record as far as compare reads it: the month, the model record, the resolved config's method sections and
# the package versions (the keys of creditsurv.runs.RunManifest).
RECORD = {
    "as_of": "2024-11",
    "model": {"kind": "multinomial", "terms": 10, "n_rows": 54_385, "data_fingerprint": "d1", "loglik": -3487.9},
    "config_resolved": {
        "windows": {"development": {"start": "2016-01", "end": "2022-12"}},
        "model": {"kind": "multinomial", "ridge": 0.0, "covariates": [{"name": "dti", "lag": 0}]},
        "staging": {"sicr_relative": 2.0},
        "loss": {"exposure": {"onset_months": 3}, "lgd": {"kind": "collateral"}},
        "outputs": {"loan_period_tables": False},
    },
    "versions": {"creditsurv": "0.2.0", "numpy": "2.4.6"},
}
MODEL_JSON = {"creditsurv_version": "0.2.0", "kind": "multinomial", "coefficients": {"default": {"intercept": -6.0}}}


def _record(**changes):
    record = json.loads(json.dumps(RECORD))
    for dotted, value in changes.items():
        *path, last = dotted.split("__")
        target = record
        for part in path:
            target = target[part]
        target[last] = value
    return record


def _write_recorded_run(parent, name, loans, weights, record, model_json=None):
    scenarios = [{"name": s, "weight": w, "path": f"scenarios/{s}.csv"} for s, w in weights.items()]
    record = {**record, "run_id": name, "config_resolved": {**record["config_resolved"], "scenarios": scenarios}}
    with RunFolder(parent, name) as run:
        run.add_table(loans, "loan_ecl.parquet")
        if model_json is not None:
            run.add_file("hazard_model.json").write_text(json.dumps(model_json))
        return run.commit(record)


def _fingerprint(model_json):
    # The definition in RunDifferences: SHA-256 of the canonical JSON (sorted keys, no spaces) without the
    # version that wrote the file, 12 hex digits; computed here with hashlib.
    import hashlib

    data = {k: v for k, v in model_json.items() if k != "creditsurv_version"}
    return hashlib.sha256(json.dumps(data, sort_keys=True, separators=(",", ":")).encode()).hexdigest()[:12]


# L1 again in B, 12-month ECL up by half: reported 3 -> 4.5, all of it risk parameters (EAD unchanged).
L1_LATER = ("L1", 1, 100.0, {"base": 3.0, "down": 6.0}, {"base": 9.0, "down": 11.0})


def _pair(tmp_path, record_a, record_b, model_a=MODEL_JSON, model_b=MODEL_JSON):
    run_a = _write_recorded_run(tmp_path, "a", _book([L1], EVEN), EVEN, record_a, model_a)
    run_b = _write_recorded_run(tmp_path, "b", _book([L1_LATER], EVEN), EVEN, record_b, model_b)
    return compare_run_folders(run_a, run_b)


def _notes(result) -> dict:
    walk = result.walk.set_index("step")
    return {step: note for step, note in walk["note"].items() if note}


def test_the_same_model_method_and_versions_say_nothing_changed(tmp_path):
    r = _pair(tmp_path, RECORD, _record(as_of="2024-12"))
    d = r.differences
    assert (d.direction, d.changed, d.model, d.method, d.versions, d.not_recorded) == ("forward", False, (), (), (), ())
    assert d.headline() == "ECL movement 2024-11 -> 2024-12"
    assert d.summary() == [f"model, method and package versions: unchanged between the runs (model fingerprint {_fingerprint(MODEL_JSON)})"]
    assert _notes(r) == {}
    _only(r, {"risk_parameters": 1.5})  # 4.5 - 3


def test_a_later_run_a_is_compared_backwards_and_says_so(tmp_path):
    r = _pair(tmp_path, _record(as_of="2024-12"), RECORD)
    assert r.differences.direction == "backwards"
    assert r.differences.headline().startswith(
        "ECL movement 2024-12 -> 2024-11: comparing backwards, from a later month to an earlier one"
    )
    assert _notes(r) == {"opening": r.differences.headline().split(": ", 1)[1]}
    assert r.differences.to_dict()["direction"] == "backwards"
    _only(r, {"risk_parameters": 1.5})  # the walk itself is the same: B's ECL less A's


def test_two_runs_of_one_month_are_said_to_be(tmp_path):
    r = _pair(tmp_path, RECORD, RECORD)
    assert r.differences.direction == "same_month"
    assert "both runs are of the same month" in r.differences.headline()


def test_a_change_of_model_method_and_version_is_named_where_the_walk_holds_it(tmp_path):
    model_b = {**MODEL_JSON, "coefficients": {"default": {"intercept": -5.5}}}
    record_b = _record(as_of="2024-12", model__data_fingerprint="d2", model__n_rows=60_000, versions__creditsurv="0.3.0")
    record_b["config_resolved"]["model"]["ridge"] = 1.0
    record_b["config_resolved"]["windows"]["development"]["end"] = "2023-06"
    record_b["config_resolved"]["outputs"]["loan_period_tables"] = True  # not a method section: not named
    r = _pair(tmp_path, RECORD, record_b, model_b=model_b)
    d = r.differences
    assert d.model == (
        f"coefficients changed (fingerprint {_fingerprint(MODEL_JSON)} -> {_fingerprint(model_b)})",
        "fitted on other loan-months (54,385 -> 60,000)",
    )
    assert d.method == ('windows.development.end "2022-12" -> "2023-06"', "model.ridge 0.0 -> 1.0")
    assert d.versions == ("creditsurv 0.2.0 -> 0.3.0",)
    summary = "\n".join(d.summary())
    assert summary.startswith("model and method changed between the runs: model: coefficients changed")
    assert "package versions: creditsurv 0.2.0 -> 0.3.0" in summary
    assert "cannot separate the change" in summary and "inside risk_parameters for loans in the same stage" in summary
    notes = _notes(r)
    assert set(notes) == {"risk_parameters"}  # no stage transfer has loans; the EAD settings did not change
    assert "model.ridge 0.0 -> 1.0" in notes["risk_parameters"] and "creditsurv 0.2.0 -> 0.3.0" in notes["risk_parameters"]
    recorded = d.to_dict()["model_and_method"]
    assert recorded["changed"] and recorded["method"] == list(d.method) and "risk_parameters" in recorded["inside_steps"]
    # The steps and their reconciliation are those of the loan tables alone.
    pd.testing.assert_frame_equal(r.walk.drop(columns="note"), movement(_book([L1], EVEN), _book([L1_LATER], EVEN), EVEN, EVEN).walk.drop(columns="note"))


def test_a_model_file_written_by_another_version_is_the_same_model(tmp_path):
    r = _pair(tmp_path, RECORD, _record(as_of="2024-12", versions__creditsurv="0.3.0"), model_b={**MODEL_JSON, "creditsurv_version": "0.3.0"})
    assert r.differences.model == ()
    assert r.differences.versions == ("creditsurv 0.2.0 -> 0.3.0",)


def test_a_change_of_the_ead_settings_is_inside_the_exposure_step_too(tmp_path):
    record_b = _record(as_of="2024-12")
    record_b["config_resolved"]["loss"]["exposure"]["onset_months"] = 2
    r = _pair(tmp_path, RECORD, record_b)
    assert r.differences.method == ("loss.exposure.onset_months 3 -> 2",)
    assert r.differences.steps[:2] == ("exposure", "risk_parameters")
    assert _notes(r)["exposure"] == "includes the change of the EAD settings (loss.exposure.onset_months 3 -> 2)"


def test_a_change_of_hazard_source_and_a_stage_transfer_carry_the_note(tmp_path):
    benchmark = {"source": "BenchmarkCurves", "psa": 100.0, "sda": 150.0}
    moved = ("L1", 2, 100.0, {"base": 3.0, "down": 6.0}, {"base": 9.0, "down": 11.0})
    run_a = _write_recorded_run(tmp_path, "a", _book([L1], EVEN), EVEN, RECORD, MODEL_JSON)
    run_b = _write_recorded_run(tmp_path, "b", _book([moved], EVEN), EVEN, _record(as_of="2024-12", model=benchmark))
    r = compare_run_folders(run_a, run_b)
    assert r.differences.model[0] == 'kind "multinomial" -> "BenchmarkCurves"'
    assert f"coefficients changed (fingerprint {_fingerprint(MODEL_JSON)} -> none)" in r.differences.model
    assert 'psa absent -> 100.0' in r.differences.model and 'sda absent -> 150.0' in r.differences.model
    assert set(_notes(r)) == {"risk_parameters", "stage_transfer_1_to_2"}


def test_records_without_model_or_versions_say_what_was_not_compared(tmp_path):
    bare = {"as_of": "2024-11", "config_resolved": {}}
    r = _pair(tmp_path, bare, {**bare, "as_of": "2024-12"}, model_a=None, model_b=None)
    assert r.differences.not_recorded == ("model", "method", "versions")
    assert not r.differences.changed
    assert r.differences.summary() == ["model, method and package versions: not recorded in both runs, so not compared"]
