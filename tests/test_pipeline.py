"""The monthly run end to end on a small synthetic book: tables, identities, record."""

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from conftest import demo_config_data

import creditsurv
from creditsurv import pipeline
from creditsurv.cli import main
from creditsurv.errors import DataCheckWarning
from creditsurv.runs import MANIFEST, sha256_file

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def small_book(corpus_book):
    """The small book (2,000 loans): every pipeline test runs the whole job at least once."""
    return corpus_book.book


def _config(book: Path, tmp: Path, outputs=None, **model) -> Path:
    data = demo_config_data(book, tmp / "reports")
    data["outputs"].update(outputs or {})
    data["model"].update(model)
    path = tmp / "config.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


@pytest.fixture(scope="module")
def demo_run(small_book, tmp_path_factory):
    tmp = tmp_path_factory.mktemp("run")
    outcome = creditsurv.run(_config(small_book, tmp, outputs={"loan_period_tables": True}), argv=["creditsurv", "run"])
    return outcome.path


def test_run_writes_every_table_with_the_documented_columns(demo_run):
    ts = pq.read_schema(demo_run / "pd_term_structure.parquet").names
    assert ts[:7] == ["loan_id", "scenario", "month_ahead", "loan_age", "h_default", "h_prepay", "survival"]
    for col in ("marginal_pd", "cumulative_pd", "cumulative_prepay"):
        assert col in ts
    loans = pd.read_parquet(demo_run / "loan_ecl.parquet")
    for col in ("loan_id", "segment", "stage", "pd_12m", "pd_lifetime", "ead", "lgd", "ecl_12m", "ecl_lifetime", "ecl_reported"):
        assert col in loans.columns
    schedule = pq.read_schema(demo_run / "ecl_schedule.parquet").names
    assert schedule == ["loan_id", "scenario", "month_ahead", "ead", "lgd", "marginal_pd", "discount_factor", "expected_loss"]
    for name in ("segment_summary.csv", "segment_pd_table.csv", "segment_pd_matrix.csv", "segment_speeds.csv",
                 "equivalent_speeds.csv", "coefficients.csv", "data_checks.csv", "event_counts.csv", "hazard_model.json"):
        assert (demo_run / name).exists(), name


def test_the_age_tail_sensitivity_is_the_run_with_the_other_rule(demo_run, small_book, tmp_path):
    # The run holds the hazard's age effect beyond the last supported age (model.baseline.tail: hold, the
    # default); its sensitivity row for the other rule must be what a run with that rule reports.
    tail = pd.read_csv(demo_run / "age_tail_sensitivity.csv")
    manifest = json.loads((demo_run / "manifest.json").read_text())
    assert tail["tail"].tolist() == ["hold", "extrapolate"] and tail["in_use"].tolist() == [True, False]
    assert tail.loc[0, "ecl_reported"] == pytest.approx(manifest["totals"]["ecl_reported"], rel=1e-12)
    model = json.loads((demo_run / "hazard_model.json").read_text())
    supported = model["features"]["learned"]["supported_age"]
    assert manifest["totals"]["age_tail"]["supported_age"] == supported == tail.loc[0, "supported_age"]
    assert 0 < tail.loc[0, "share_of_defaults_beyond"] < 1
    data = demo_config_data(small_book, tmp_path / "reports")
    data["model"]["baseline"]["tail"] = "extrapolate"
    other = creditsurv.run(_write(data, tmp_path))
    again = pd.read_csv(other.path / "age_tail_sensitivity.csv")
    assert again["tail"].tolist() == ["extrapolate", "hold"]
    assert again.loc[0, "ecl_reported"] == pytest.approx(tail.loc[1, "ecl_reported"], rel=1e-12)
    assert again.loc[1, "ecl_reported"] == pytest.approx(tail.loc[0, "ecl_reported"], rel=1e-12)
    assert again.loc[0, "share_of_defaults_beyond"] == pytest.approx(tail.loc[1, "share_of_defaults_beyond"], rel=1e-12)


def test_run_writes_the_observed_arrears_states_and_transitions(demo_run):
    loans = pd.read_parquet(demo_run / "loan_ecl.parquet")
    states = pd.read_csv(demo_run / "arrears_states.csv").set_index("state")
    assert states.index.tolist() == ["current", "30-59", "60-89", "default"]
    assert states["loans"].sum() == len(loans)
    np.testing.assert_allclose(states["balance"].sum(), loans["balance"].sum(), rtol=1e-12)
    # the default state is stage 3 (IFRS 9 B5.5.37); loans 30 or more days past due are stage 2 by the backstop (5.5.11)
    assert states.loc["default", "loans"] == (loans["stage"] == 3).sum()
    assert states.loc[["30-59", "60-89"], "loans"].sum() == ((loans["stage"] == 2) & (loans["days_past_due"] >= 30)).sum() > 0
    matrix = pd.read_csv(demo_run / "arrears_matrix.csv")
    assert matrix["window"].unique().tolist() == ["development", "out_of_time", "all"]
    shares = matrix[["current", "30-59", "60-89", "default", "prepaid"]].to_numpy()
    np.testing.assert_allclose(shares.sum(axis=1), 1.0, rtol=1e-12)
    transitions = pd.read_csv(demo_run / "arrears_transitions.csv")
    everything = matrix[matrix["window"] == "all"]
    assert transitions["loan_months"].sum() == everything["loan_months"].sum()


def test_survival_plus_cumulative_incidences_is_one_for_every_loan_and_month(demo_run):
    # S(u) + F_D(u) + F_P(u) = 1: every loan alive at the start ends each month in
    # exactly one state (the discrete-time Aalen-Johansen identity).
    pf = pq.ParquetFile(demo_run / "pd_term_structure.parquet")
    rows = 0
    for batch in pf.iter_batches(columns=["survival", "cumulative_pd", "cumulative_prepay"], batch_size=1_000_000):
        total = batch.column(0).to_numpy() + batch.column(1).to_numpy() + batch.column(2).to_numpy()
        np.testing.assert_allclose(total, 1.0, rtol=0, atol=1e-12)
        rows += batch.num_rows
    assert rows > 1_000_000


def test_reported_ecl_follows_the_stage(demo_run):
    # IFRS 9 5.5.5: 12-month ECL in stage 1; 5.5.3: lifetime ECL in stages 2 and 3;
    # 5.5.17: reported = probability-weighted over the scenarios.
    loans = pd.read_parquet(demo_run / "loan_ecl.parquet")
    manifest = json.loads((demo_run / MANIFEST).read_text())
    weights = manifest["scenario_weights"]
    s1 = loans["stage"] == 1
    np.testing.assert_allclose(loans.loc[s1, "ecl_reported"], loans.loc[s1, "ecl_12m"], rtol=1e-12)
    np.testing.assert_allclose(loans.loc[~s1, "ecl_reported"], loans.loc[~s1, "ecl_lifetime"], rtol=1e-12)
    weighted = sum(w * loans[f"ecl_lifetime_{s}"] for s, w in weights.items())
    np.testing.assert_allclose(loans["ecl_lifetime"], weighted, rtol=1e-12)
    assert set(loans["stage"]) <= {1, 2, 3} and (loans["stage"] == 3).any()
    assert manifest["totals"]["ecl_reported"] == pytest.approx(loans["ecl_reported"].sum(), rel=1e-12)


def test_manifest_records_inputs_config_and_every_output_hash(demo_run, small_book):
    manifest = json.loads((demo_run / MANIFEST).read_text())
    for out in manifest["outputs"]:
        assert out["sha256"] == sha256_file(demo_run / out["file"])
    inputs = {Path(i["path"]).name: i for i in manifest["inputs"]}
    assert inputs["panel.parquet"]["sha256"] == sha256_file(small_book / "panel.parquet")
    assert manifest["config_resolved"]["as_of"] == "2024-12"
    assert manifest["model"]["converged"] is True
    # Every file in the folder is recorded (and nothing else is there).
    on_disk = sorted(str(p.relative_to(demo_run)) for p in demo_run.rglob("*") if p.is_file())
    assert on_disk == sorted([MANIFEST, *[o["file"] for o in manifest["outputs"]]])


def test_benchmark_curves_run_reports_their_own_speeds(small_book, tmp_path):
    # A run on the PSA / SDA standard's own assumptions reports those speeds back:
    # SMM = prepaid / exposure recovers the standard's SMM exactly, so the
    # equivalent multiple is the one configured.
    cfg = _config(small_book, tmp_path, source="benchmark", psa=150.0, sda=200.0)
    outcome = creditsurv.run(cfg)
    speeds = pd.read_csv(outcome.path / "equivalent_speeds.csv")
    np.testing.assert_allclose(speeds["psa"], 150.0, rtol=1e-9)
    np.testing.assert_allclose(speeds["sda"], 200.0, rtol=1e-9)
    assert not (outcome.path / "coefficients.csv").exists()
    # by default (outputs.loan_period_tables: false) no loan-by-period table is written
    assert not (outcome.path / "pd_term_structure.parquet").exists()
    assert not (outcome.path / "ecl_schedule.parquet").exists()
    assert not (outcome.path / "pd_annual_by_loan.parquet").exists()
    assert (outcome.path / "loan_ecl.parquet").exists()


def test_as_of_override_and_never_overwriting(small_book, tmp_path, capsys):
    cfg = _config(small_book, tmp_path)
    args = ["run", str(cfg), "--as-of", "2024-11", "--out", str(tmp_path / "runs")]
    # The panel runs to 2024-12: rows after the reporting month are excluded, with a warning.
    with pytest.warns(DataCheckWarning, match="months_after_as_of"):
        assert main(args) == 0
    (first,) = (tmp_path / "runs").iterdir()
    assert first.name.startswith("2024-11_")
    with pytest.warns(DataCheckWarning):
        assert main(args) == 1
    assert "never overwrites" in capsys.readouterr().err


def test_failure_mid_run_leaves_no_folder(small_book, tmp_path, monkeypatch):
    cfg = _config(small_book, tmp_path)

    def broken(*args, **kwargs):
        raise RuntimeError("injected failure")

    monkeypatch.setattr(pipeline, "project_book", broken)
    with pytest.raises(RuntimeError, match="injected"):
        creditsurv.run(cfg, out=tmp_path / "runs")
    assert list((tmp_path / "runs").iterdir()) == []


# --------------------------------------------------------------------------- reproduce and compare


@pytest.fixture(scope="module")
def own_book(corpus_book, tmp_path_factory):
    """A private copy of the small book (2,000 loans), so a test may change an input file."""
    folder = tmp_path_factory.mktemp("own") / "book"
    shutil.copytree(corpus_book.book, folder)
    return folder


def test_a_second_run_is_byte_identical_and_reproduce_exits_0(own_book, tmp_path, capsys):
    # reproduce runs the config again from the record and compares every output's bytes with the first run's
    cfg = _config(own_book, tmp_path)
    a = creditsurv.run(cfg, out=tmp_path / "a").path
    assert main(["reproduce", str(a), "--out", str(tmp_path / "again")]) == 0
    assert "outputs match byte for byte" in capsys.readouterr().out
    (again,) = (tmp_path / "again").iterdir()
    hashes = [{o["file"]: o["sha256"] for o in json.loads((d / MANIFEST).read_text())["outputs"]} for d in (a, again)]
    assert hashes[0] == hashes[1] and len(hashes[0]) > 10

    # One byte of one input changed: reproduce refuses and names the file.
    macro = own_book / "macro_history.csv"
    text = macro.read_bytes()
    macro.write_bytes(text[:-2] + (b"1" if text[-2:-1] != b"1" else b"2") + text[-1:])
    try:
        assert main(["reproduce", str(a), "--out", str(tmp_path / "again2")]) == 1
        err = capsys.readouterr().err
        assert err.startswith("RunError: cannot reproduce")
        assert f"inputs.macro.path: {macro}: changed since the run" in err
        assert not (tmp_path / "again2").exists()
    finally:
        macro.write_bytes(text)


def test_reproduce_reports_a_changed_output_as_a_mismatch(demo_run, tmp_path, capsys):
    # A tampered output (row order changed) no longer matches its record: exit 3.
    copy = tmp_path / demo_run.name
    shutil.copytree(demo_run, copy)
    seg = copy / "segment_summary.csv"
    lines = seg.read_text().splitlines()
    seg.write_text("\n".join([lines[0], *reversed(lines[1:])]) + "\n")
    manifest = json.loads((copy / MANIFEST).read_text())
    for o in manifest["outputs"]:
        if o["file"] == "segment_summary.csv":
            o["sha256"] = sha256_file(seg)
    (copy / MANIFEST).write_text(json.dumps(manifest))
    assert main(["reproduce", str(copy), "--out", str(tmp_path / "r")]) == 3
    assert "segment_summary.csv" in capsys.readouterr().err


def test_two_month_refresh_walk_reconciles_and_the_sicr_history_runs_on(small_book, tmp_path):
    # The month-on-month ECL walk: its parts sum to the change in total ECL. And probation after a SICR exit
    # needs last month's triggers: the prior run's `months_since_sicr`, one month on.
    import json

    with pytest.warns(DataCheckWarning):
        prev = creditsurv.run(_config(small_book, tmp_path), as_of="2024-11", out=tmp_path / "runs").path
    assert json.loads((prev / "manifest.json").read_text())["totals"]["sicr_history"].startswith("no SICR history")
    (tmp_path / "second").mkdir()
    this = creditsurv.run(_config(small_book, tmp_path / "second", outputs={"prior_run": str(prev)}), out=tmp_path / "runs").path
    outcome = creditsurv.compare(prev, this)
    walk = pd.read_csv(outcome.path / "movement_walk.csv")
    a = pd.read_parquet(prev / "loan_ecl.parquet")["ecl_reported"].sum()
    b = pd.read_parquet(this / "loan_ecl.parquet")["ecl_reported"].sum()
    steps = walk[~walk["step"].isin(["opening", "closing"])]
    assert steps["ecl_change"].sum() == pytest.approx(b - a, rel=1e-9, abs=1e-6)
    assert walk.loc[walk["step"] == "closing", "ecl_balance"].item() == pytest.approx(b, rel=1e-12)
    assert (walk.loc[walk["step"] == "closed_or_repaid", "loans"] > 0).all()
    for name in ("stage_migration.csv", "pd_change_by_segment.csv"):
        assert (outcome.path / name).exists()
    # the run with outputs.prior_run wrote the same walk itself
    pd.testing.assert_frame_equal(pd.read_csv(this / "movement_walk.csv"), walk)
    # November then December, one config: the months in order and nothing changed but the data
    lines = outcome.text.splitlines()
    assert lines[0] == "ECL movement 2024-11 -> 2024-12"
    assert "model, method and package versions: unchanged between the runs (model fingerprint " in outcome.text
    movement_record = json.loads((outcome.path / "manifest.json").read_text())
    assert movement_record["direction"] == "forward" and movement_record["model_and_method"]["changed"] is False

    # December against November: compared all the same, backwards, and said so first; the walk's steps are the
    # forward walk's with the sign turned for the loans in both runs (closed and new swap places).
    backwards = creditsurv.compare(this, prev)
    assert backwards.text.splitlines()[0].startswith(
        "ECL movement 2024-12 -> 2024-11: comparing backwards, from a later month to an earlier one"
    )
    assert json.loads((backwards.path / "manifest.json").read_text())["direction"] == "backwards"
    back = pd.read_csv(backwards.path / "movement_walk.csv").set_index("step")
    assert back.loc["opening", "note"].startswith("comparing backwards")
    fwd = walk.set_index("step")
    assert back.loc["new_loans", "ecl_change"] == pytest.approx(-fwd.loc["closed_or_repaid", "ecl_change"], rel=1e-12)
    assert back.loc["closing", "ecl_balance"] == pytest.approx(fwd.loc["opening", "ecl_balance"], rel=1e-12)

    totals = json.loads((this / "manifest.json").read_text())["totals"]
    assert totals["sicr_history"] == f"SICR history from the prior run {prev}"
    a = pd.read_parquet(prev / "loan_ecl.parquet").set_index("loan_id")
    b = pd.read_parquet(this / "loan_ecl.parquet").set_index("loan_id")
    both = b.index.intersection(a.index)
    assert len(both) > 100
    fired = b["stage_reason"].str.contains("sicr|watch_list").reindex(both)
    expected = np.where(fired, 0.0, a.loc[both, "months_since_sicr"] + 1.0)
    live = ~b.loc[both, "stage"].eq(3).to_numpy()
    np.testing.assert_array_equal(b.loc[both, "months_since_sicr"].to_numpy()[live], expected[live])
    # the counts by reason in the record are the loan table's
    counts = b[b["stage"] > 1].groupby(["stage", "stage_reason"]).size()
    assert {(int(k[0]), k[1]): int(v) for k, v in counts.items()} == {
        (int(st), r): n for st, by in totals["stage_reasons"].items() for r, n in by.items()
    }


def test_compare_names_a_change_of_model_and_where_the_walk_holds_it(demo_run, small_book, tmp_path):
    # The same book and month with a ridge penalty: another model (coefficients) by another method (model.ridge).
    ridge = creditsurv.run(_config(small_book, tmp_path, ridge=5.0), argv=["creditsurv", "run"]).path
    outcome = creditsurv.compare(demo_run, ridge, out=tmp_path / "movement")
    lines = outcome.text.splitlines()
    assert lines[0].startswith("ECL movement 2024-12 -> 2024-12: both runs are of the same month")
    (changed,) = [line for line in lines if line.startswith("model and method changed between the runs: ")]
    assert "model: coefficients changed (fingerprint " in changed
    assert "method: model.ridge 0.0 -> 5.0" in changed and "package versions" not in changed
    assert "it is inside risk_parameters for loans in the same stage" in outcome.text

    walk = pd.read_csv(outcome.path / "movement_walk.csv").set_index("step")
    assert "model.ridge 0.0 -> 5.0" in walk.loc["risk_parameters", "note"]
    # It still reconciles: the steps sum to the move between the loan tables' totals.
    a = pd.read_parquet(demo_run / "loan_ecl.parquet")["ecl_reported"].sum()
    b = pd.read_parquet(ridge / "loan_ecl.parquet")["ecl_reported"].sum()
    steps = walk.drop(index=["opening", "closing"])["ecl_change"]
    assert steps.sum() == pytest.approx(b - a, rel=1e-9)
    assert abs(walk.loc["risk_parameters", "ecl_change"]) > 0
    record = json.loads((outcome.path / "manifest.json").read_text())["model_and_method"]
    assert record["changed"] and record["method"] == ["model.ridge 0.0 -> 5.0"]
    assert record["model_fingerprints"]["run_a"] != record["model_fingerprints"]["run_b"]


def test_report_is_self_contained_and_shows_the_runs_numbers(demo_run):
    from html.parser import HTMLParser

    from creditsurv.report import fmt_money

    text = (demo_run / "report.html").read_text(encoding="utf-8")

    class Collect(HTMLParser):
        def __init__(self):
            super().__init__()
            self.ids, self.imgs = set(), []

        def handle_starttag(self, tag, attrs):
            attrs = dict(attrs)
            if "id" in attrs:
                self.ids.add(attrs["id"])
            if tag == "img":
                self.imgs.append(attrs.get("src", ""))

    parser = Collect()
    parser.feed(text)
    for section in ("summary", "cautions", "data-checks", "events", "model", "pd-term-structure", "ecl", "speeds", "run-record"):
        assert section in parser.ids, section
    assert parser.imgs and all(src.startswith("data:image/png;base64,") for src in parser.imgs)
    assert "<script" not in text and 'src="http' not in text
    loans = pd.read_parquet(demo_run / "loan_ecl.parquet")
    assert fmt_money(loans["ecl_reported"].sum()) in text
    assert fmt_money(loans["ead"].sum()) in text
    assert "validated independently under the institution&#x27;s model risk policy" in text
    assert "Accounting judgement and local supervisory rules prevail" in text
    # the staging's sensitivity: at the configured threshold, the run's own stage 2 and reported ECL
    sens = pd.read_csv(demo_run / "sicr_sensitivity.csv").set_index("multiplier")
    assert sens.loc[1.0, "stage_2_loans"] == (loans["stage"] == 2).sum()
    assert sens.loc[1.0, "ecl_reported"] == pytest.approx(loans["ecl_reported"].sum(), rel=1e-12)
    assert sens["stage_2_sicr_loans"].is_monotonic_decreasing
    for caption in ("Stage 2 and ECL against the relative SICR threshold", "Arrears states at the reporting month",
                    "Stages 2 and 3 by reason"):  # fmt: skip
        assert caption in text, caption


def test_fit_command_writes_a_model_that_loads_and_predicts_the_same(small_book, tmp_path, capsys):
    from creditsurv.model import load_model

    cfg = _config(small_book, tmp_path)
    assert main(["fit", str(cfg), "--out", str(tmp_path / "fits")]) == 0
    (folder,) = (tmp_path / "fits").iterdir()
    assert folder.name.startswith("fit_2024-12_")
    coefficients = pd.read_csv(folder / "coefficients.csv")
    assert list(coefficients.columns) == ["cause", "term", "estimate", "std_error", "z", "p_value", "ci_lo", "ci_hi"]
    model = load_model(folder / "hazard_model.json")
    summary = model.summary()
    np.testing.assert_allclose(summary["estimate"], coefficients["estimate"], rtol=1e-15)
    # z and the 95% interval follow from the estimate and its standard error (normal approximation).
    np.testing.assert_allclose(coefficients["z"], coefficients["estimate"] / coefficients["std_error"], rtol=1e-12)
    np.testing.assert_allclose(coefficients["ci_hi"] - coefficients["estimate"], 1.959963984540054 * coefficients["std_error"], rtol=1e-9)
    manifest = json.loads((folder / MANIFEST).read_text())
    assert manifest["kind"] == "fit" and manifest["model"]["converged"]
    assert "fitted a multinomial model" in capsys.readouterr().out


def test_fit_command_fits_the_multi_state_model_and_a_run_projects_it(small_book, tmp_path, capsys):
    from creditsurv.model import MultiStateResults, load_model

    cfg = _config(small_book, tmp_path, kind="multi_state")
    assert main(["fit", str(cfg), "--out", str(tmp_path / "fits")]) == 0
    (folder,) = (tmp_path / "fits").iterdir()
    out = capsys.readouterr().out
    assert out.startswith("fitted a multi-state model, 3 arrears states") and "reduced: " in out
    model = load_model(folder / "hazard_model.json")
    assert isinstance(model, MultiStateResults) and model.converged
    fits = pd.read_csv(folder / "transition_fits.csv")
    assert fits.groupby("origin")["design"].apply(lambda d: (d == "reference").sum()).tolist() == [1, 1, 1]
    coefficients = pd.read_csv(folder / "coefficients.csv")
    assert list(coefficients.columns[:4]) == ["origin", "destination", "cause", "term"]
    # every estimated parameter is in the table, and nothing else
    assert len(coefficients) == fits["parameters"].sum()
    manifest = json.loads((folder / MANIFEST).read_text())
    assert manifest["model"]["kind"] == "multi_state" and len(manifest["model"]["transitions"]) == len(fits)
    assert main(["run", str(cfg), "--out", str(tmp_path / "runs")]) == 0
    assert "hazards: multi-state model, 3 arrears states" in capsys.readouterr().out
    (run,) = (tmp_path / "runs").iterdir()
    assert isinstance(load_model(run / "hazard_model.json"), MultiStateResults)
    assert (run / "transition_fits.csv").read_bytes() == (folder / "transition_fits.csv").read_bytes()
    loans = pd.read_parquet(run / "loan_ecl.parquet")
    # the projection starts each loan in its arrears state: loans 30-89 days past due carry far higher PDs
    late = loans[(loans["days_past_due"] >= 30) & (loans["stage"] != 3)]
    current = loans[loans["days_past_due"] < 30]
    assert len(late) > 5 and late["pd_12m"].median() > 3 * current["pd_12m"].median()
    # the loan-level curves of a multi-state run, from export (a compact run keeps no loan-by-period table)
    chosen = loans.loc[loans["stage"] != 3, "loan_id"].iloc[::50].tolist()
    exported = creditsurv.export(run, tmp_path / "exports", by=[], loans=chosen, fmt="parquet").path
    pf = pd.read_parquet(exported / "pd_term_structure.parquet", columns=["survival", "cumulative_pd", "cumulative_prepay"])
    assert len(pf) > 1000
    np.testing.assert_allclose(pf.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert len(pd.read_csv(run / "validation" / "hazard_by_age.csv")) > 0
    # the out-of-time moves one month ahead: each state's rows add up to its months on both sides, and the actual
    # counts are those of the observed transition table (another query: arrears_transitions.csv)
    moves = pd.read_csv(run / "validation" / "backtest_transitions.csv")
    for origin, rows in moves.groupby("origin"):
        assert rows["expected"].sum() == pytest.approx(rows["n"].iloc[0], rel=1e-9)
        assert rows["actual"].sum() == rows["n"].iloc[0]
    # a common factor only adds variance (Vasicek: P(both) >= p^2 for a correlation >= 0): |z_factor| <= |z|; each
    # move (not staying) has a verdict read from it
    seen = moves.dropna(subset=["z"])
    assert (seen["z_factor"].abs() <= seen["z"].abs() + 1e-12).all()
    judged = pd.read_csv(run / "validation" / "verdicts.csv").query("area == 'backtest_transitions'")
    assert sorted(judged["item"]) == sorted(f"{o} to {d}" for o, d in zip(moves["origin"], moves["destination"]) if o != d)
    counted = pd.read_csv(run / "arrears_transitions.csv")
    oot = counted[(counted["month"] >= "2023-01") & (counted["month"] <= "2024-06")]
    by_move = oot.groupby(["origin", "destination"])["loan_months"].sum()
    got = moves[moves["actual"] > 0].set_index(["origin", "destination"])["actual"]
    assert got.sort_index().to_dict() == by_move[by_move > 0].sort_index().to_dict()
    # On the rows it was fitted to, a multinomial logit with a free intercept per end state reproduces each end
    # state's count (its likelihood equations; McCullagh & Nelder, Generalized Linear Models, the sufficient
    # statistic of the intercept; cited from memory): observed and model matrices of the development window agree
    dev = pd.read_csv(run / "validation" / "transitions_development.csv")
    np.testing.assert_allclose(dev["expected"], dev["actual"], rtol=1e-6, atol=1e-6)
    report = (run / "report.html").read_text()
    assert "One-month transition matrix, development window: model" in report
    assert "<h3>Arrears states by vintage</h3>" in report and 'alt="Arrears states by vintage"' in report
    # The model against the non-parametric multi-state estimate, vintage by vintage and state by state. Two
    # routes meet here. Model: the chain's mass in default and prepaid is the cumulative incidence of the
    # competing-risk table. Observed: the default state's Aalen-Johansen occupation, from loan-month transitions,
    # is the cumulative incidence of first default from per-loan lifetimes as long as nobody has been censored
    # (both are then the plain share of the vintage); after censoring the multi-state estimate weights the
    # censored loans by their arrears state, so the two differ by sampling noise only.
    states = pd.read_csv(run / "validation" / "states_by_vintage.csv")
    assert set(states["state"]) == {"current", "30-59", "60-89", "default", "prepaid"}
    for column in ("model", "observed"):
        np.testing.assert_allclose(states.groupby(["vintage", "age"])[column].sum(), 1.0, rtol=0, atol=1e-9)
    incidence = pd.read_csv(run / "validation" / "incidence_by_vintage.csv")
    wide = incidence.pivot_table(index=["vintage", "age"], columns="cause", values=["observed", "n_risk"])
    n0 = wide[("n_risk", "default")].groupby(level="vintage").transform("first")
    gone = n0 * (wide[("observed", "default")] + wide[("observed", "prepay")])
    at_risk_next = wide[("n_risk", "default")].groupby(level="vintage").shift(-1)
    uncensored = ((at_risk_next - (n0 - gone)).abs() < 1e-6).groupby(level="vintage").cummin()
    assert uncensored.sum() > 20
    for state, cause in (("default", "default"), ("prepaid", "prepay")):
        a = states[states["state"] == state].set_index(["vintage", "age"]).sort_index()
        b = incidence[incidence["cause"] == cause].set_index(["vintage", "age"]).sort_index().loc[a.index]
        np.testing.assert_allclose(a["model"], b["model"], rtol=0, atol=1e-12)
        first = uncensored.reindex(a.index, fill_value=False).to_numpy()
        np.testing.assert_allclose(a["observed"][first], b["observed"][first], rtol=0, atol=1e-12)
        assert (a["observed"] - b["observed"]).abs().max() < 0.05
    # every vintage can reach 60-89 from its third month, in the model; the data show it reached too
    late = states[(states["state"] == "60-89") & (states["age"] >= 3)]
    assert (late["model"] > 0).all() and late["observed"].max() > 0


def test_a_run_projects_a_panel_covariate_from_the_reporting_month_value(small_book, tmp_path):
    # A panel column at lag 1 (here the balance at the previous month-end) is fitted on the previous month-end's
    # values and projected from each loan's value at the reporting month (held): the run needs no panel rows
    # beyond the reporting month and records how the input is filled and projected.
    data = demo_config_data(small_book, tmp_path / "reports")
    data["model"]["covariates"].append(
        {"name": "balance_before", "column": "balance", "lag": 1, "before_first": 250000.0, "transform": "standardise"}
    )
    outcome = creditsurv.run(_write(data, tmp_path))
    model = json.loads((outcome.path / "hazard_model.json").read_text())
    (cov,) = [c for c in model["features"]["covariates"] if c["name"] == "balance_before"]
    assert (cov["lag"], cov["before_first"], cov["projection"]) == (1, 250000.0, "hold")
    assert "balance_before" in model["features"]["learned"]["covariates"]  # standardised on the lagged values
    loans = pd.read_parquet(outcome.path / "loan_ecl.parquet")
    assert np.isfinite(loans["pd_lifetime"]).all() and (loans["pd_lifetime"] > 0).all()


def test_a_loan_past_its_term_with_a_balance_left_does_not_stop_the_run(small_book, tmp_path):
    # Two live loans whose term ran out two months before the reporting month with their balance unpaid (an
    # extension, say): the run prices them as due next month and counts them, instead of stopping.
    import shutil

    book = tmp_path / "book"
    shutil.copytree(small_book, book)
    loans = pd.read_parquet(book / "loans.parquet")
    panel = pd.read_parquet(book / "panel.parquet", columns=["loan_id", "month", "age", "days_past_due"])
    last = panel[panel["month"] == panel["month"].max()]
    chosen = last[last["days_past_due"] == 0].sort_values("loan_id").iloc[:2]
    term = dict(zip(chosen["loan_id"], chosen["age"] - 2))
    loans["term_months"] = [term.get(i, t) for i, t in zip(loans["loan_id"], loans["term_months"])]
    loans.to_parquet(book / "loans.parquet", index=False)
    outcome = creditsurv.run(_write(demo_config_data(book, tmp_path / "reports"), tmp_path))
    manifest = json.loads((outcome.path / "manifest.json").read_text())
    assert manifest["totals"]["past_term"] == 2
    ecl = pd.read_parquet(outcome.path / "loan_ecl.parquet").set_index("loan_id").loc[list(term)]
    assert (ecl["pd_lifetime"] == ecl["pd_12m"]).all() and (ecl["ecl_reported"] > 0).all()
    assert "2 live loans are at or past their contractual term" in (outcome.path / "report.html").read_text()


# --------------------------------------------------------------------------- the preflight


def _write(data: dict, tmp: Path) -> Path:
    path = tmp / "config.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def _no_fit(monkeypatch):
    """Any fit or data check fails the test: the preflight must stop the run before them."""

    def boom(*args, **kwargs):
        raise AssertionError("the run reached the data checks or the fit")

    monkeypatch.setattr(pipeline, "hazard_source", boom)
    monkeypatch.setattr(pipeline, "check_and_label", boom)


def test_a_bad_scenario_file_stops_the_run_before_the_checks_and_fit(small_book, tmp_path, monkeypatch):
    data = demo_config_data(small_book, tmp_path / "reports")
    (downside,) = [s for s in data["scenarios"] if s["name"] == "downside"]
    bad = tmp_path / "downside.csv"
    header, *rows = Path(downside["path"]).read_text().splitlines()
    bad.write_text("\n".join([header, rows[0], *rows[2:]]) + "\n")  # a month missing inside the path
    downside["path"] = str(bad)
    _no_fit(monkeypatch)
    with pytest.raises(creditsurv.ProjectionError, match=r"scenario 'downside' \(.*downside\.csv\): missing months inside the path"):
        creditsurv.run(_write(data, tmp_path))
    assert not (tmp_path / "reports").exists()


def test_columns_the_config_names_and_the_reporting_month_are_checked_together(small_book, tmp_path, monkeypatch):
    data = demo_config_data(small_book, tmp_path / "reports")
    data["segments"]["column"] = "regoin"
    data["as_of"] = "2025-06"  # the demo book runs to 2024-12
    _no_fit(monkeypatch)
    with pytest.raises(creditsurv.DataError) as info:
        creditsurv.run(_write(data, tmp_path))
    text = str(info.value)
    assert text.startswith("2 problems with the config against the input data:")
    assert re.search(r"segments\.column: column 'regoin' is not in the loan table \S*loans\.parquet; did you mean 'region'\?", text)
    assert re.search(r"as_of: 2025-06 is after the panel's last month 2024-12 \(\S*panel\.parquet\)", text)


def test_every_name_the_config_gives_is_checked_before_the_checks_and_fit(small_book, tmp_path, monkeypatch):
    # Each misspelling below is one edit from a name in the demo book (configs/demo.yaml's columns and
    # series); the preflight must report all of them at once, each with its config key and the closest name.
    data = demo_config_data(small_book, tmp_path / "reports")
    data["segments"]["band_column"] = "credit_scor"
    data["staging"]["pd_at_origination_column"] = "orig_ltvv"
    data["model"]["covariates"][2]["column"] = "dtii"
    data["collateral"]["hpi_series"] = "hpi-{region}"
    data["collateral"]["market_rate_series"] = "mortage_rate"
    data["default_definition"]["status_codes"] = ["charged_of"]
    data["validation"] = {"prior_model": str(tmp_path / "no_model.json")}
    _no_fit(monkeypatch)
    with pytest.raises(creditsurv.DataError) as info:
        creditsurv.run(_write(data, tmp_path))
    text = str(info.value)
    assert text.startswith("7 problems with the config against the input data:")
    for expected in (
        "segments.band_column: column 'credit_scor' is not in the loan table",
        "did you mean 'credit_score'?",
        "staging.pd_at_origination_column: column 'orig_ltvv' is not in the loan table",
        "did you mean 'orig_ltv'?",
        "model.covariates[2].column: column 'dtii' is in neither the loan table",
        "did you mean 'dti'?",
        "collateral.hpi_series: 'hpi-{region}' names series that are not in the macro history",
        "did you mean 'hpi_",
        "collateral.market_rate_series: series 'mortage_rate' is not in the macro history",
        "did you mean 'mortgage_rate'?",
        "default_definition.status_codes: 'charged_of' never occurs in the status column",
        "did you mean 'charged_off'?",
        f"validation.prior_model: no file {tmp_path / 'no_model.json'}",
    ):
        assert expected in text, expected
    assert "loans.parquet" in text and "macro_history.csv" in text and "panel.parquet" in text


def test_a_segment_column_of_the_panel_is_refused_before_the_fit(small_book, tmp_path, monkeypatch):
    # The book at the reporting month carries the loan table's columns only (data.BOOK_SQL); a panel
    # column as the segment used to fail inside the projection, after the fit.
    data = demo_config_data(small_book, tmp_path / "reports")
    data["segments"]["column"] = "days_past_due"
    _no_fit(monkeypatch)
    with pytest.raises(creditsurv.DataError, match=r"segments\.column: column 'days_past_due' is not in the loan table .*loans\.parquet"):
        creditsurv.run(_write(data, tmp_path))


def test_a_scenario_that_does_not_carry_on_from_the_reporting_month_stops_the_run_before_the_fit(small_book, tmp_path, monkeypatch):
    data = demo_config_data(small_book, tmp_path / "reports")
    (downside,) = [s for s in data["scenarios"] if s["name"] == "downside"]
    late = tmp_path / "downside_late.csv"
    header, *rows = Path(downside["path"]).read_text().splitlines()
    late.write_text("\n".join([header, *rows[2:]]) + "\n")  # starts two months after the month after as_of
    downside["path"] = str(late)
    _no_fit(monkeypatch)
    with pytest.raises(creditsurv.ProjectionError, match=r"scenario 'downside' \(.*downside_late\.csv\): the path starts at 2025-03 but the as-of month is 2024-12; months 2025-01\.\.2025-02"):
        creditsurv.run(_write(data, tmp_path))


def test_fit_and_check_run_the_preflight_of_the_fit(small_book, tmp_path, monkeypatch):
    data = demo_config_data(small_book, tmp_path / "reports")
    data["model"]["covariates"][0]["column"] = "credit_scor"
    data["segments"]["column"] = "regoin"  # a run's column: neither fit nor check reads it
    path = _write(data, tmp_path)
    _no_fit(monkeypatch)
    for command in (creditsurv.fit, pipeline.check):
        with pytest.raises(creditsurv.DataError) as info:
            command(path)
        assert str(info.value).startswith("1 problem with the config against the input data: model.covariates[0].column")
        assert "did you mean 'credit_score'?" in str(info.value)


def test_a_bad_sicr_history_column_is_named_with_its_loans():
    # staging.sicr_history_column holds whole months since the last SICR or watch-list trigger, or nothing
    from types import SimpleNamespace

    from creditsurv.errors import DataError
    from creditsurv.loss import SICR_HISTORY
    from creditsurv.pipeline import with_sicr_history

    cfg = SimpleNamespace(
        staging=SimpleNamespace(sicr_history_column="sicr_months"),
        inputs=SimpleNamespace(loans=SimpleNamespace(path="book/loans.parquet")),
        outputs=SimpleNamespace(prior_run=None),
    )
    good = pd.DataFrame({"loan_id": ["a", "b", "c"], "sicr_months": [0.0, None, 4.0]})
    book, text = with_sicr_history(cfg, 100, good)
    np.testing.assert_array_equal(book[SICR_HISTORY], [0.0, np.nan, 4.0])
    assert text == "SICR history from the loan-table column 'sicr_months'"
    bad = pd.DataFrame({"loan_id": ["a", "b", "c"], "sicr_months": [1.5, -1.0, 2.0]})
    with pytest.raises(DataError, match=r"^book/loans.parquet: staging.sicr_history_column: column 'sicr_months' must hold "
                                        r"whole months \(0 or more\) or be empty; not so for 2 loans \(a, b\)"):
        with_sicr_history(cfg, 100, bad)
