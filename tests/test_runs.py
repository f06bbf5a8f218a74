"""Run folders: built aside, renamed into place whole, never overwritten."""

import dataclasses
import json

import pandas as pd
import pytest

from creditsurv.errors import RunError
from creditsurv.runs import (
    MANIFEST,
    SCHEMA_VERSION,
    RunFolder,
    folder_differences,
    read_manifest,
    sha256_file,
    start_manifest,
)


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
    with pytest.raises(RunError, match="never overwrites") as info:
        RunFolder(tmp_path, "same")
    # By default the remedy of a run or a fit, whose folder name is the hash of its month, config and inputs.
    assert str(info.value).startswith(f"{tmp_path / 'same'}: already exists")
    assert str(info.value).endswith("use --out for another folder, or change the config or inputs.")


def test_the_caller_names_its_own_remedy_when_the_folder_exists(tmp_path):
    (tmp_path / "taken").mkdir()
    with pytest.raises(RunError) as info:
        RunFolder(tmp_path, "taken", hint="Remove it and try again.")
    assert str(info.value) == (
        f"{tmp_path / 'taken'}: already exists, and creditsurv never overwrites an output folder. Remove it and try again."
    )
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken"]


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
        config_resolved={"as_of": "2024-12"}, config_sha256="0" * 64, config_dir="/books", seed=7, inputs=[],
    )
    record = m.to_dict()
    assert record["as_of"] == "2024-12" and record["config_as_given"] is None  # required parts stay, even as null
    assert "scenario_weights" not in record and "validation" not in record  # a fit has neither
    m.scenario_weights = {"base": 1.0}
    assert m.to_dict()["scenario_weights"] == {"base": 1.0}
    assert set(m.to_dict()) <= {f.name for f in dataclasses.fields(RunManifest)} | {"schema_version"}
    assert m.to_dict()["schema_version"] == SCHEMA_VERSION


def _written_manifest(tmp_path) -> dict:
    """A manifest as a fit writes it: start_manifest, one output, commit."""
    from creditsurv.config import canonical_sha256

    resolved = {"as_of": "2024-12", "inputs": {"panel": {"path": "data/panel.parquet"}}}
    m = start_manifest(
        kind="fit", run_id="fit_2024-12_abc", as_of=2024 * 12 + 11, argv=["creditsurv", "fit"], config_text="as_of: 2024-12\n",
        config_resolved=resolved, config_sha256=canonical_sha256(resolved), config_dir=str(tmp_path), seed=7,
        inputs=[{"input": "inputs.panel.path", "path": "data/panel.parquet", "bytes": 10, "sha256": "a" * 64}],
    )
    with RunFolder(tmp_path, "fit_2024-12_abc") as run:
        run.add_table(_frame(), "coefficients.csv")
        final = run.commit(m)
    return final


def test_a_written_manifest_reads_back_against_its_schema(tmp_path):
    final = _written_manifest(tmp_path)
    assert read_manifest(final)["schema_version"] == SCHEMA_VERSION


@pytest.mark.parametrize("key", ["inputs", "outputs", "config_resolved", "versions", "config_sha256", "config_dir", "kind"])
def test_a_manifest_missing_a_declared_field_is_refused_by_name(tmp_path, key):
    final = _written_manifest(tmp_path)
    data = json.loads((final / MANIFEST).read_text())
    del data[key]
    (final / MANIFEST).write_text(json.dumps(data))
    with pytest.raises(RunError, match=rf"manifest\.json: .*{key}: missing"):
        read_manifest(final)


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda d: d.update(inputs={"panel": "x"}), r"inputs: expected a list, got \{'panel'"),
        (lambda d: d.update(versions=["numpy"]), r"versions: expected an object of package versions"),
        (lambda d: d["inputs"][0].pop("sha256"), r"inputs\[0\]\.sha256: missing"),
        (lambda d: d["outputs"].append("report.html"), r"outputs\[1\]: expected an object"),
        (lambda d: d["config_resolved"].update(as_of="2024-11"), r"config_resolved: its SHA-256 no longer matches"),
        (lambda d: d.update(schema_version=99), r"schema version 99 cannot be read .* reads versions 1, 2"),
    ],
    ids=["inputs-not-a-list", "versions-a-list", "input-without-hash", "output-not-an-object", "edited-config", "future-version"],
)
def test_a_manifest_that_breaks_its_schema_is_a_clear_error(tmp_path, change, message):
    final = _written_manifest(tmp_path)
    data = json.loads((final / MANIFEST).read_text())
    change(data)
    (final / MANIFEST).write_text(json.dumps(data))
    with pytest.raises(RunError, match=message):
        read_manifest(final)


def test_a_manifest_holding_a_json_list_is_refused(tmp_path):
    final = _written_manifest(tmp_path)
    (final / MANIFEST).write_text("[1, 2]")
    with pytest.raises(RunError, match=r"manifest\.json: a manifest must be a JSON object, got a JSON list"):
        read_manifest(final)


def test_a_version_1_manifest_still_reads(tmp_path):
    # Version 1 (written before schema_version existed): no schema_version, no config_dir, inputs with rows.
    final = _written_manifest(tmp_path)
    data = json.loads((final / MANIFEST).read_text())
    del data["schema_version"], data["config_dir"]
    data["inputs"][0]["rows"] = None
    (final / MANIFEST).write_text(json.dumps(data))
    assert read_manifest(final)["kind"] == "fit"


def test_the_folder_on_disk_is_compared_with_its_manifest_file_by_file(tmp_path):
    final = _written_manifest(tmp_path)
    manifest = read_manifest(final)
    assert folder_differences(final, manifest) == []
    (final / "coefficients.csv").write_text("loan_id,ecl\na,1.5\n")
    (final / "notes.txt").write_text("added later")
    assert folder_differences(final, manifest) == [
        "coefficients.csv: changed since the run (SHA-256 differs from the record "
        f"{manifest['outputs'][0]['sha256'][:12]}...)",
        "notes.txt: not an output of the run (an extra file)",
    ]
    (final / "coefficients.csv").unlink()
    assert folder_differences(final, manifest)[0] == "coefficients.csv: missing"
