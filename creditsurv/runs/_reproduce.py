"""Reproducing a run from its record: the inputs must be unchanged, and the outputs are judged.

The pipeline re-runs the month (it owns the stages); this module says whether
a run can be reproduced and whether the fresh run matches the record.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import ReproduceMismatch, RunError
from ._folder import compare_outputs, read_manifest, sha256_file

__all__ = ["check_inputs_unchanged", "judge_reproduction", "reproduction_name"]


def check_inputs_unchanged(run_dir: Path, manifest: dict) -> None:
    """Raise ``RunError`` naming every input that is missing or whose SHA-256 differs from the record."""
    if manifest.get("kind") != "run":
        raise RunError(f"{run_dir}: not a run folder made by creditsurv run (kind {manifest.get('kind')!r})")
    changed = []
    for item in manifest["inputs"]:
        path = Path(item["path"])
        if not path.exists():
            changed.append(f"{path}: missing")
        elif sha256_file(path) != item["sha256"]:
            changed.append(f"{path}: SHA-256 differs from the run's record ({item['sha256'][:12]}...)")
    if changed:
        n = len(changed)
        raise RunError(
            f"cannot reproduce {Path(run_dir).name}: {n} input{'s' if n > 1 else ''} changed since the run:\n"
            + "\n".join(f"  - {c}" for c in changed)
        )


def reproduction_name(parent: Path, name: str) -> str:
    """The first free folder name ``<name>_repro<i>`` under ``parent``."""
    for i in range(1, 10_000):
        candidate = f"{name}_repro{i}"
        if not (Path(parent) / candidate).exists():
            return candidate
    raise RunError(f"{parent}: no free folder name for a reproduction of {name}")  # pragma: no cover


def judge_reproduction(run_dir: Path, fresh: Path) -> str:
    """Compare a fresh run with the recorded one; return the summary text or raise ``ReproduceMismatch``.

    With the same package versions every output must match byte for byte. With
    other versions the largest numeric difference per table and column is
    reported, and a largest relative difference within 1e-8 is accepted as
    numerically the same.
    """
    run_dir, fresh = Path(run_dir), Path(fresh)
    manifest, new_manifest = read_manifest(run_dir), read_manifest(fresh)
    report = compare_outputs(run_dir, fresh, manifest, new_manifest)
    same_versions = manifest["versions"] == new_manifest["versions"]
    lines = [f"reproduced {run_dir.name} into {fresh}"]
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
