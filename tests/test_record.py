"""The run record: every file read is hashed, the id does not depend on where files live, a moved run reproduces.

The cases where the record refuses (changed inputs, an edited folder, a broken manifest) are in the corpus
(``tests/test_bad_inputs.py``); these tests hold what a good record must contain and allow.
"""

from __future__ import annotations

import json
import shutil

import pandas as pd

from creditsurv.cli import main
from creditsurv.runs import MANIFEST, read_manifest, sha256_file


def _outputs(run) -> dict[str, str]:
    return {o["file"]: o["sha256"] for o in read_manifest(run)["outputs"]}


def _new_run(ws):
    before = {p.name for p in ws.reports.iterdir()}
    assert main(["run", str(ws.config)]) == 0
    (new,) = [p for p in ws.reports.iterdir() if p.name not in before and not p.name.startswith(".")]
    return new


def test_every_file_a_run_reads_is_an_input_of_its_record_and_its_report(corpus_book, tmp_path):
    ws = corpus_book.copy_to(tmp_path / "ws")
    earlier = ws.earlier_run
    shutil.copy(earlier / "hazard_model.json", ws.root / "saved_model.json")
    shutil.copy(earlier / "hazard_model.json", ws.root / "last_quarter_model.json")

    def use_saved_files(d):
        d["model"]["path"] = "saved_model.json"
        d["validation"] = {"prior_model": "last_quarter_model.json", "bootstrap": 20}
        d["outputs"]["prior_run"] = f"reports/{earlier.name}"

    ws.edit_config(use_saved_files)
    run = _new_run(ws)
    manifest = read_manifest(run)
    recorded = {(i["input"], i["path"]): i["sha256"] for i in manifest["inputs"]}
    expected = {
        ("inputs.panel.path", "book/panel.parquet"), ("inputs.loans.path", "book/loans.parquet"),
        ("inputs.macro.path", "book/macro_history.csv"), ("scenarios[0].path", "book/scenarios/baseline.csv"),
        ("scenarios[1].path", "book/scenarios/upside.csv"), ("scenarios[2].path", "book/scenarios/downside.csv"),
        ("model.path", "saved_model.json"), ("validation.prior_model", "last_quarter_model.json"),
        ("outputs.prior_run", f"reports/{earlier.name}/manifest.json"),
        ("outputs.prior_run", f"reports/{earlier.name}/loan_ecl.parquet"),
    }  # fmt: skip
    assert set(recorded) == expected
    for (_key, rel), digest in recorded.items():
        assert digest == sha256_file(ws.root / rel), rel
    # The report's run record lists every one of them, by the path the record gives.
    report = (run / "report.html").read_text()
    for _key, rel in expected:
        assert rel in report, rel
    assert str(ws.root) not in report and str(ws.root) not in (run / "data_checks.csv").read_text()


def test_a_rate_table_is_an_input_of_the_record(corpus_book, tmp_path):
    ws = corpus_book.copy_to(tmp_path / "ws")
    # Flat monthly hazards by age: 0.2% default, 1% prepayment (a made-up table; only its record is tested).
    pd.DataFrame({"age": range(1, 481), "default": 0.002, "prepay": 0.01}).to_csv(ws.root / "rates.csv", index=False)
    ws.edit_config(lambda d: d["model"].update(source="table", table="rates.csv"))
    manifest = read_manifest(_new_run(ws))
    (item,) = [i for i in manifest["inputs"] if i["input"] == "model.table"]
    assert item["path"] == "rates.csv" and item["sha256"] == sha256_file(ws.root / "rates.csv")


def test_the_same_config_and_files_in_two_places_make_the_same_run_byte_for_byte(corpus_book, tmp_path):
    # The id hashes the config without its paths and the files' contents; outputs name files relative to
    # the config's folder. Two checkouts of the same commit and data therefore agree on everything.
    runs = []
    for place in ("first/checkout", "second"):
        ws = corpus_book.copy_to(tmp_path / place)
        shutil.rmtree(ws.earlier_run)
        ws.edit_config(lambda d: d["outputs"].update(dir="runs"))
        assert main(["run", str(ws.config), "--out", str(tmp_path / place / "elsewhere")]) == 0
        (run,) = list((tmp_path / place / "elsewhere").iterdir())
        runs.append(run)
    a, b = runs
    assert a.name == b.name == corpus_book.earlier_run.name  # outputs.dir and --out are not part of the id
    assert _outputs(a) == _outputs(b)


def test_a_run_moved_to_another_folder_reproduces_from_inputs_found_by_their_hashes(corpus_book, tmp_path, capsys):
    ws = corpus_book.copy_to(tmp_path / "ws")
    # The validator's copy: the run folder alone, and the inputs in a flat folder under other names.
    received = tmp_path / "validator"
    shutil.copytree(ws.earlier_run, received / "run")
    inputs = received / "inputs"
    inputs.mkdir()
    for i, item in enumerate(read_manifest(ws.earlier_run)["inputs"]):
        shutil.copy(ws.root / item["path"], inputs / f"file{i}.bin")
    shutil.rmtree(ws.root)  # the original place is gone
    capsys.readouterr()
    code = main(["reproduce", str(received / "run"), "--inputs", str(inputs), "--out", str(received / "again")])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "outputs match byte for byte" in out
    (fresh,) = list((received / "again").iterdir())
    assert _outputs(fresh) == _outputs(received / "run")
    fresh_manifest = json.loads((fresh / MANIFEST).read_text())
    assert fresh_manifest["run_id"] == read_manifest(received / "run")["run_id"]
    assert fresh_manifest["command"][-2:] == ["--inputs", str(inputs)]
