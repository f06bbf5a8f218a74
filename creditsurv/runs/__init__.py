"""Runs: the run folder (written whole or not at all), its manifest, output comparison and the ECL movement."""

from ._basis import BASIS_NAMES, accounting_basis, check_same_basis
from ._folder import (
    MANIFEST,
    RUN_FILES_READ,
    OutputComparison,
    RunFolder,
    compare_outputs,
    describe_inputs,
    folder_differences,
    read_manifest,
    remove_stale_incomplete,
    sha256_file,
    write_table,
)
from ._manifest import (
    READABLE_VERSIONS,
    SCHEMA_VERSION,
    RunManifest,
    check_manifest,
    package_versions,
    run_identity,
    start_manifest,
)
from ._movement import (
    EAD_KEYS,
    METHOD_SECTIONS,
    WALK_STEPS,
    MovementResult,
    RunDifferences,
    check_walk_reconciles,
    compare_run_folders,
    movement,
    movement_against_run,
    sicr_history_of_run,
)
from ._reproduce import (
    check_folder_on_disk,
    judge_reproduction,
    locate_inputs,
    reproduction_name,
    stage_inputs,
)

__all__ = [
    "BASIS_NAMES", "accounting_basis", "check_same_basis",
    "MANIFEST", "MovementResult", "OutputComparison", "RunFolder", "RunManifest", "start_manifest", "WALK_STEPS", "check_walk_reconciles",
    "EAD_KEYS", "METHOD_SECTIONS", "RunDifferences", "check_folder_on_disk", "locate_inputs", "stage_inputs", "compare_outputs", "compare_run_folders", "describe_inputs", "judge_reproduction",
    "movement", "movement_against_run", "sicr_history_of_run", "reproduction_name", "package_versions",
    "read_manifest", "run_identity", "sha256_file", "write_table", "READABLE_VERSIONS", "SCHEMA_VERSION", "RUN_FILES_READ",
    "check_manifest", "folder_differences", "remove_stale_incomplete",
]  # fmt: skip
