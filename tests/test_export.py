"""``creditsurv export``: PD term structures by loan attributes and loan-level tables, recomputed from a run."""

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import demo_config_data

import creditsurv
from creditsurv.cli import main
from creditsurv.errors import ConfigError, DataError, OutputError, ReproduceMismatch
from creditsurv.exporting import EXCEL_MAX_ROWS, check_fits_a_sheet
from creditsurv.forecast import band_codes, band_labels
from creditsurv.runs import MANIFEST, folder_differences, read_manifest, sha256_file

LOAN_PERIOD_FILES = ("pd_term_structure.parquet", "pd_annual_by_loan.parquet", "ecl_schedule.parquet")


def _write_config(book: Path, reports: Path, folder: Path, **outputs) -> Path:
    import yaml

    data = demo_config_data(book, reports)
    data["outputs"].update(outputs)
    path = folder / "config.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


@pytest.fixture(scope="module")
def tabled_run(corpus_book, tmp_path_factory):
    """A run of the small book (2,000 loans) that also wrote its loan-by-period tables."""
    tmp = tmp_path_factory.mktemp("tabled")
    config = _write_config(corpus_book.book, tmp / "reports", tmp, loan_period_tables=True)
    return creditsurv.run(config, argv=["creditsurv", "run"]).path


def _padded_monthly(curves: pd.DataFrame, scenario: str, horizon: int) -> dict[str, pd.DataFrame]:
    """Each loan's monthly curves (loan x month ahead 1..horizon) for one scenario, past its maturity held at its
    final values (the documented convention) and its marginal PD 0."""
    c = curves[curves["scenario"] == scenario]
    out = {}
    for col in ("cumulative_pd", "survival", "marginal_pd"):
        wide = c.pivot(index="loan_id", columns="month_ahead", values=col).reindex(columns=range(1, horizon + 1))
        out[col] = wide.fillna(0.0) if col == "marginal_pd" else wide.ffill(axis=1)
    prev = out["survival"].shift(1, axis=1)
    prev[1] = 1.0
    out["survival_prev"] = prev
    return out


def _pooled_by(attributes: pd.DataFrame, by: str, curves: dict, weight: str, months: np.ndarray) -> pd.DataFrame:
    """The independent pooled curves: pandas groupby of the loan-level curves, weighted by count or balance."""
    w = np.ones(len(attributes)) if weight == "count" else attributes["balance"].to_numpy()
    w = pd.Series(w, index=attributes["loan_id"])
    groups = attributes.set_index("loan_id")[by]
    rows = []
    for u in months:
        frame = pd.DataFrame(
            {
                "g": groups,
                "w": w,
                "wF": w * curves["cumulative_pd"][u].reindex(w.index),
                "wS": w * curves["survival"][u].reindex(w.index),
            }
        )
        s = frame.groupby("g").sum()
        for g, r in s.iterrows():
            rows.append({by: g, "month": u, "cumulative_pd": r["wF"] / r["w"], "survival": r["wS"] / r["w"]})
    return pd.DataFrame(rows)


def test_grouped_export_equals_a_pandas_groupby_of_the_loan_level_curves(tabled_run, tmp_path):
    out = creditsurv.export(tabled_run, tmp_path, by=[("segment",), ("band",)], scenarios=("weighted", "downside"),
                            period="month", fmt="parquet").path  # fmt: skip
    loans = pd.read_parquet(tabled_run / "loan_ecl.parquet")
    live = loans[loans["stage"] != 3]
    curves = pd.read_parquet(tabled_run / "pd_term_structure.parquet")
    horizon = int(curves["month_ahead"].max())
    for scenario in ("weighted", "downside"):
        padded = _padded_monthly(curves, scenario, horizon)
        for by in ("segment", "band"):
            got = pd.read_parquet(out / f"pd_by_{by}.parquet")
            got = got[got["scenario"] == scenario]
            for weight in ("count", "balance"):
                months = np.array([1, 12, 60, 200, horizon])
                expected = _pooled_by(live, by, padded, weight, months)
                mine = got[(got["weighting"] == weight) & got["month_ahead"].isin(months)]
                merged = expected.merge(mine, left_on=[by, "month"], right_on=[by, "month_ahead"], how="left")
                # a group's rows stop at its last maturity; a group that has matured wholly has no row there
                merged = merged.dropna(subset=["cumulative_pd_y"])
                assert len(merged) >= len(months)
                np.testing.assert_allclose(merged["cumulative_pd_y"], merged["cumulative_pd_x"], rtol=1e-12)
                np.testing.assert_allclose(merged["survival_y"], merged["survival_x"], rtol=1e-12)
            # the conditional PD of month u: sum w marginal(u) / sum w S(u-1), count-weighted here
            u = 24
            g = live.set_index("loan_id")[by]
            marg = padded["marginal_pd"][u].groupby(g).sum()
            sprev = padded["survival_prev"][u].groupby(g).sum()
            row = got[(got["weighting"] == "count") & (got["month_ahead"] == u)].set_index(by)
            np.testing.assert_allclose(row["conditional_pd"], (marg / sprev).loc[row.index], rtol=1e-12)
            np.testing.assert_allclose(row["marginal_pd"], (marg / g.value_counts()).loc[row.index], rtol=1e-12)


def test_annual_export_matches_the_run_segment_table_and_holds_matured_loans(tabled_run, tmp_path):
    # the run's own segment table (pooled sums of the projection) is a second route to the same numbers
    out = creditsurv.export(tabled_run, tmp_path, by=[("segment", "band")], scenarios=("weighted",)).path
    got = pd.read_csv(out / "pd_by_segment_band.csv")
    table = pd.read_csv(tabled_run / "segment_pd_table.csv")
    table = table[table["scenario"] == "weighted"].rename(columns={"year": "year_ahead"})
    merged = got.merge(table, on=["segment", "band", "weighting", "year_ahead"], suffixes=("", "_run"))
    assert len(merged) == len(got)
    np.testing.assert_allclose(merged["cumulative_pd"], merged["cumulative_pd_run"], rtol=1e-10)
    np.testing.assert_allclose(merged["survival"], merged["survival_run"], rtol=1e-10)
    # the segment table takes F(y) - F(y - 1), a difference of two running sums near 0.1: about 1e-13 absolute
    np.testing.assert_allclose(merged["conditional_pd"], merged["conditional_pd_run"], rtol=1e-9, atol=1e-12)
    # a cumulative PD never falls, matured loans included
    for _, g in got.groupby(["segment", "band", "weighting"]):
        assert (np.diff(g.sort_values("year_ahead")["cumulative_pd"].to_numpy()) >= -1e-15).all()


def test_loan_level_tables_on_demand_are_byte_identical_to_the_run(tabled_run, tmp_path):
    loans = pd.read_parquet(tabled_run / "loan_ecl.parquet")
    every = loans["loan_id"].tolist()
    out = creditsurv.export(tabled_run, tmp_path / "all", by=[], loans=every, fmt="parquet").path
    for name in LOAN_PERIOD_FILES:
        assert sha256_file(out / name) == sha256_file(tabled_run / name), name
    # a few loans: their rows are exactly the run's rows for them
    live = loans.loc[loans["stage"] != 3, "loan_id"]
    chosen = live.iloc[[0, 7, len(live) // 2, len(live) - 1]].tolist()
    some = creditsurv.export(tabled_run, tmp_path / "some", by=[], loans=chosen, fmt="parquet").path
    for name in LOAN_PERIOD_FILES:
        run = pd.read_parquet(tabled_run / name)
        run = run[run["loan_id"].isin(chosen)].reset_index(drop=True)
        pd.testing.assert_frame_equal(pd.read_parquet(some / name), run, check_exact=True, check_categorical=False)


def test_export_checks_the_run_and_never_writes_into_it(tabled_run, tmp_path):
    before = {p.name: sha256_file(p) for p in tabled_run.rglob("*") if p.is_file()}
    with pytest.raises(OutputError, match="inside the run folder"):
        creditsurv.export(tabled_run, tabled_run / "exports")
    with pytest.raises(DataError, match="no column.*colour"):
        creditsurv.export(tabled_run, tmp_path, by=[("colour",)])
    with pytest.raises(ConfigError, match="--scenario.*sideways"):
        creditsurv.export(tabled_run, tmp_path, scenarios=("sideways",))
    with pytest.raises(DataError, match="no loan .*NOPE"):
        creditsurv.export(tabled_run, tmp_path, loans=["NOPE"])
    assert {p.name: sha256_file(p) for p in tabled_run.rglob("*") if p.is_file()} == before
    assert not list(tmp_path.iterdir())  # nothing partial left behind
    # a run folder changed after the run is refused: export believes the files on disk
    copy = tmp_path / "copy" / tabled_run.name
    shutil.copytree(tabled_run, copy)
    book = copy / "projection_inputs" / "book.parquet"
    book.write_bytes(book.read_bytes()[:-1] + b"\0")
    with pytest.raises(ReproduceMismatch, match="book.parquet"):
        creditsurv.export(copy, tmp_path / "out")


def test_export_record_and_a_second_export_beside_the_first(tabled_run, tmp_path):
    first = creditsurv.export(tabled_run, tmp_path, by=[()], period="month").path
    second = creditsurv.export(tabled_run, tmp_path, by=[()], period="month").path
    assert first != second and first.parent == second.parent
    record = read_manifest(first)
    assert record["kind"] == "export" and record["run_id"] == read_manifest(tabled_run)["run_id"]
    assert record["run_manifest_sha256"] == sha256_file(tabled_run / MANIFEST)
    assert folder_differences(first, record) == []
    assert sha256_file(first / "pd_whole_book.csv") == sha256_file(second / "pd_whole_book.csv")


def test_excel_workbook_has_one_sheet_per_table(tabled_run, tmp_path):
    out = creditsurv.export(tabled_run, tmp_path / "x", by=[("segment",), ("vintage",)], fmt="xlsx").path
    csv = creditsurv.export(tabled_run, tmp_path / "c", by=[("segment",), ("vintage",)], fmt="csv").path
    sheets = pd.read_excel(out / "pd_tables.xlsx", sheet_name=None)
    assert list(sheets) == ["pd_by_segment", "pd_by_vintage"]
    for name, sheet in sheets.items():
        pd.testing.assert_frame_equal(sheet, pd.read_csv(csv / f"{name}.csv"), check_dtype=False, rtol=1e-15)


def test_a_table_beyond_a_sheet_is_refused_before_anything_is_written():
    # the Office Open XML worksheet limit, 1,048,576 rows (from memory), one of them the header
    check_fits_a_sheet({"fits": pd.DataFrame({"x": np.zeros(EXCEL_MAX_ROWS - 1, dtype=np.int8)})})
    with pytest.raises(DataError, match="too_long: 1,048,576 rows do not fit an Excel sheet"):
        check_fits_a_sheet({"too_long": pd.DataFrame({"x": np.zeros(EXCEL_MAX_ROWS, dtype=np.int8)})})


def test_the_loan_table_carries_the_cut_columns(tabled_run, corpus_book):
    loans = pd.read_parquet(tabled_run / "loan_ecl.parquet")
    cfg = creditsurv.config_from_dict(read_manifest(tabled_run)["config_resolved"], tabled_run)
    source = pd.read_parquet(corpus_book.book / cfg.inputs.loans.path.name)
    assert list(loans.columns[:10]) == ["loan_id", "segment", "region", "band", "vintage", "origination_month", "age",
                                        "age_band", "remaining_term", "arrears_state"]  # fmt: skip
    merged = loans.merge(source, on="loan_id", suffixes=("", "_input"))
    assert len(merged) == len(loans)
    # vintage: the origination year, written independently from the input's origination month text
    assert (merged["vintage"] == merged["origination_month_input"].astype(str).str[:4].astype(int)).all()
    labels = band_labels(cfg.segments.band_edges)
    expected = [labels[c] for c in band_codes(merged[cfg.segments.band_column], cfg.segments.band_edges)]
    assert merged["band"].tolist() == expected
    assert ((merged["age_band"].str.extract(r"\[(\d+),")[0].astype(int) <= merged["age"])).all()
    assert (merged["remaining_term"] >= 1).all()
    assert set(loans.loc[loans["stage"] == 3, "arrears_state"]) == {"default"}
    live = loans[loans["stage"] != 3]
    dpd = live["days_past_due"].to_numpy()
    # arrears states of the demo config: current under 30 days, 30-59, 60-89 (the config's arrears.starts)
    assert (live.loc[dpd < 30, "arrears_state"] == "current").all()
    assert (live.loc[(dpd >= 30) & (dpd < 60), "arrears_state"] == "30-59").all()


def test_compact_run_keeps_what_export_needs_and_export_cli(corpus_book, tmp_path, capsys):
    run = corpus_book.earlier_run  # a run with the default outputs
    for name in LOAN_PERIOD_FILES:
        assert not (run / name).exists()
    assert (run / "projection_inputs" / "book.parquet").exists()
    code = main(["export", str(run), "--out", str(tmp_path), "--by", "segment,band", "--by", "", "--scenario", "baseline",
                 "--weighting", "balance", "--measures", "cumulative", "--loans", ",".join(
                     pd.read_parquet(run / "loan_ecl.parquet")["loan_id"].iloc[:3])])  # fmt: skip
    assert code == 0
    (folder,) = tmp_path.iterdir()
    table = pd.read_csv(folder / "pd_by_segment_band.csv")
    assert list(table.columns) == ["segment", "band", "scenario", "weighting", "year_ahead", "n_loans", "balance", "cumulative_pd"]
    assert set(table["scenario"]) == {"baseline"} and set(table["weighting"]) == {"balance"}
    assert (folder / "pd_whole_book.csv").exists() and (folder / "pd_term_structure.csv").exists()
    # bands in numeric order within each segment
    for _, g in table.groupby("segment", sort=False):
        order = list(dict.fromkeys(g["band"]))
        assert order == [b for b in band_labels(read_manifest(run)["config_resolved"]["segments"]["band_edges"]) if b in order]
    assert "pd_by_segment_band" in capsys.readouterr().out
