"""Run folders: built aside, renamed into place whole, never overwritten."""

import dataclasses
import json

import pandas as pd
import pytest

from creditsurv.errors import RunError
from creditsurv.runs import MANIFEST, RunFolder, sha256_file


def _frame():
    return pd.DataFrame({"loan_id": ["a", "b"], "ecl": [1.5, 2.25]})


def test_committed_run_has_every_output_hashed_and_manifest(tmp_path):
    with RunFolder(tmp_path, "2024-12_abc") as run:
        run.add_table(_frame(), "loan_ecl.parquet", csv=True)
        final = run.commit({"run_id": "2024-12_abc"})
    manifest = json.loads((final / MANIFEST).read_text())
    assert [o["file"] for o in manifest["outputs"]] == ["loan_ecl.csv", "loan_ecl.parquet"]
    for o in manifest["outputs"]:
        assert o["sha256"] == sha256_file(final / o["file"])
        assert o["rows"] == 2
    assert [p.name for p in tmp_path.iterdir()] == ["2024-12_abc"]


def test_exception_mid_run_leaves_no_folder_and_existing_runs_untouched(tmp_path):
    with RunFolder(tmp_path, "first") as run:
        run.add_table(_frame(), "t.parquet")
        first = run.commit({})
    before = sha256_file(first / "t.parquet")
    with pytest.raises(ZeroDivisionError):
        with RunFolder(tmp_path, "second") as run:
            run.add_table(_frame(), "t.parquet")
            1 / 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["first"]
    assert sha256_file(first / "t.parquet") == before


def test_a_run_never_overwrites_an_existing_one(tmp_path):
    with RunFolder(tmp_path, "same") as run:
        run.commit({})
    with pytest.raises(RunError, match="never overwrites"):
        RunFolder(tmp_path, "same")


def test_parquet_writing_is_byte_deterministic(tmp_path):
    for name in ("a", "b"):
        with RunFolder(tmp_path, name) as run:
            run.add_table(_frame(), "t.parquet")
            run.commit({})
    assert sha256_file(tmp_path / "a" / "t.parquet") == sha256_file(tmp_path / "b" / "t.parquet")


def test_the_manifest_is_declared_and_leaves_out_parts_a_command_did_not_produce():
    from creditsurv.runs import RunManifest, start_manifest

    m = start_manifest(
        kind="fit", run_id="fit_2024-12_abc", as_of=2024 * 12 + 11, argv=["creditsurv", "fit"], config_text=None,
        config_resolved={"as_of": "2024-12"}, config_sha256="0" * 64, seed=7, inputs=[],
    )
    record = m.to_dict()
    assert record["as_of"] == "2024-12" and record["config_as_given"] is None  # required parts stay, even as null
    assert "scenario_weights" not in record and "validation" not in record  # a fit has neither
    m.scenario_weights = {"base": 1.0}
    assert m.to_dict()["scenario_weights"] == {"base": 1.0}
    assert set(m.to_dict()) <= {f.name for f in dataclasses.fields(RunManifest)}
