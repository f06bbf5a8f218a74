"""Reproducing a run from its record: the folder as recorded, the inputs found by their hashes, the outputs judged.

The pipeline re-runs the month (it owns the stages); this module says whether
a run can be reproduced and whether the fresh run matches the record:

1. :func:`check_folder_on_disk`: the run folder is exactly what its manifest
   records (every output re-hashed, no file missing or added), else exit 3.
2. :func:`locate_inputs`: every recorded input is found (where the config's
   folder was, or anywhere under a folder the validator names) and its bytes
   hash to the record, else exit 1 naming the file.
3. :func:`stage_inputs`: the found files are linked under a scratch folder at
   their recorded paths relative to a stand-in config folder, so the fresh run
   names every file exactly as the recorded run did.
4. :func:`judge_reproduction`: the fresh run against the record.
"""

from __future__ import annotations

import os
from collections import defaultdict
from pathlib import Path, PurePosixPath

from ..errors import ReproduceMismatch, RunError, problem_list
from ._folder import compare_outputs, folder_differences, read_manifest, sha256_file

__all__ = ["check_folder_on_disk", "judge_reproduction", "locate_inputs", "reproduction_name", "stage_inputs"]


def check_folder_on_disk(run_dir: Path, manifest: dict) -> None:
    """Raise ``ReproduceMismatch`` (exit 3) naming every output changed, missing or added since the run."""
    problems = folder_differences(run_dir, manifest)
    if problems:
        raise ReproduceMismatch(
            f"{run_dir}: {problem_list(problems, 'the run folder against its manifest')}\n"
            "The folder is not what the run wrote; its numbers cannot be trusted as recorded."
        )


def locate_inputs(manifest: dict, inputs_dir: Path | None = None) -> dict[str, Path]:
    """Every recorded input, found on disk and checked against its SHA-256: recorded path -> file.

    Without ``inputs_dir`` each input is looked for at its recorded path under the
    config's folder of the run (``config_dir``). With ``inputs_dir`` every file under
    that folder (recursively) whose size and SHA-256 match a recorded input is that
    input, wherever it lies and whatever its name; the recorded place is the fallback.

    Raises
    ------
    RunError
        Naming every input that is missing or whose bytes differ from the record (exit 1).
    """
    recorded = manifest["inputs"]
    config_dir = Path(manifest["config_dir"])
    by_hash = _files_by_hash(Path(inputs_dir), recorded) if inputs_dir is not None else {}
    found, problems = {}, []
    for item in recorded:
        rel = item["path"]
        if item["sha256"] in by_hash:
            found[rel] = by_hash[item["sha256"]]
            continue
        place = Path(os.path.normpath(config_dir / rel))
        if not place.is_file():
            where = f" or anywhere under {inputs_dir}" if inputs_dir is not None else ""
            problems.append(f"{item['input']}: {place}: missing{where}")
        elif sha256_file(place) != item["sha256"]:
            problems.append(f"{item['input']}: {place}: changed since the run (SHA-256 differs from the record {item['sha256'][:12]}...)")
        else:
            found[rel] = place
    if problems:
        hint = "" if inputs_dir is not None else "\nIf the inputs now live elsewhere, give their folder with --inputs."
        raise RunError(f"cannot reproduce {manifest['run_id']}: {problem_list(problems, 'the recorded inputs')}{hint}")
    return found


def _files_by_hash(folder: Path, recorded: list[dict]) -> dict[str, Path]:
    """Files under ``folder`` whose size and SHA-256 match a recorded input (only same-size files are hashed)."""
    if not folder.is_dir():
        raise RunError(f"--inputs {folder}: no such folder")
    wanted = defaultdict(set)
    for item in recorded:
        wanted[item["bytes"]].add(item["sha256"])
    out = {}
    for root, _dirs, files in os.walk(folder):
        for name in sorted(files):
            p = Path(root) / name
            try:
                size = p.stat().st_size
            except OSError:
                continue
            if size in wanted:
                digest = sha256_file(p)
                if digest in wanted[size]:
                    out.setdefault(digest, p)
    return out


def stage_inputs(found: dict[str, Path], scratch: Path) -> Path:
    """Link every found input under ``scratch`` at its recorded path; return the stand-in config folder.

    The stand-in folder sits deep enough that recorded paths leading out of the
    config's folder (``../data/panel.parquet``) stay inside ``scratch``.
    """
    ups = max((sum(1 for part in PurePosixPath(rel).parts if part == "..") for rel in found), default=0)
    folder = Path(scratch).joinpath("config", *(["up"] * ups))
    folder.mkdir(parents=True)
    for rel, source in found.items():
        link = Path(os.path.normpath(folder / rel))
        if not link.is_relative_to(scratch):
            raise RunError(f"{rel}: a recorded input path that cannot be laid out for a reproduction")
        link.parent.mkdir(parents=True, exist_ok=True)
        link.symlink_to(Path(source).resolve())
    return folder


def reproduction_name(parent: Path, name: str) -> str:
    """The first free folder name ``<name>_repro<i>`` under ``parent``."""
    for i in range(1, 10_000):
        candidate = f"{name}_repro{i}"
        if not (Path(parent) / candidate).exists():
            return candidate
    raise RunError(f"{parent}: no free folder name for a reproduction of {name}")  # pragma: no cover


def judge_reproduction(run_dir: Path, fresh: Path) -> str:
    """Compare a fresh run with the recorded one; return the summary text or raise ``ReproduceMismatch``.

    The fresh run must read inputs with the same hashes and carry the same run
    id. With the same package versions every output must match byte for byte.
    With other versions the largest numeric difference per table and column is
    reported, and a largest relative difference within 1e-8 is accepted as
    numerically the same.
    """
    run_dir, fresh = Path(run_dir), Path(fresh)
    manifest, new_manifest = read_manifest(run_dir), read_manifest(fresh)
    lines = [f"reproduced {run_dir.name} into {fresh}"]
    recorded = sorted((i["input"], i["path"], i["sha256"]) for i in manifest["inputs"])
    read = sorted((i["input"], i["path"], i["sha256"]) for i in new_manifest["inputs"])
    if recorded != read or manifest["run_id"] != new_manifest["run_id"]:
        lines.append(
            f"the fresh run read other inputs than the record (run id {new_manifest['run_id']} against "
            f"{manifest['run_id']}): an input changed while it was being reproduced"
        )
        raise ReproduceMismatch("\n".join(lines))
    report = compare_outputs(run_dir, fresh, manifest, new_manifest)
    same_versions = manifest["versions"] == new_manifest["versions"]
    if report.all_match:
        lines.append(f"all {report.n_outputs} outputs match byte for byte")
        return "\n".join(lines)
    lines.append(f"{len(report.mismatched)} of {report.n_outputs} outputs differ: {', '.join(report.mismatched)}")
    if not same_versions:
        diff = {k: (manifest["versions"].get(k), v) for k, v in new_manifest["versions"].items() if manifest["versions"].get(k) != v}
        lines.append("package versions differ: " + ", ".join(f"{k} {a} -> {b}" for k, (a, b) in diff.items()))
        lines.append(report.differences_text())
        if report.max_relative_difference <= 1e-8:
            lines.append("largest relative difference is within 1e-8: numerically the same")
            return "\n".join(lines)
    elif report.differences is not None:
        lines.append(report.differences_text())
    raise ReproduceMismatch("\n".join(lines))
