"""The command line: errors as one line, exit codes, help, init."""

from pathlib import Path

import pytest

from creditsurv.cli import main
from creditsurv.config import load_config


def test_help_lists_every_command(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for command in ("make-demo-data", "init", "check", "fit", "run"):
        assert command in out


def _commands(parser) -> dict:
    """Every command's parser by name. argparse has no public way to list a parser's arguments: its
    ``_actions`` list is the one place they are."""
    (commands,) = [a for a in parser._actions if isinstance(a.choices, dict)]
    return dict(commands.choices)


def test_every_command_describes_each_argument_and_gives_an_example():
    import argparse

    from creditsurv.cli import build_parser

    parser = build_parser()
    commands = _commands(parser)
    assert {"make-demo-data", "init", "config-reference", "check", "fit", "run", "reproduce", "compare", "export"} <= set(commands)
    for name, command in {"creditsurv": parser, **commands}.items():
        assert "Example: creditsurv " in (command.description or ""), f"{name}: no example in its description"
        for action in command._actions:
            shown = action.option_strings or [action.metavar or action.dest]
            assert action.help and action.help != argparse.SUPPRESS, f"{name} {shown}: no help text"


def test_every_example_in_the_help_parses():
    # Each description's example is a command line the parser accepts, for the command it describes.
    import shlex

    from creditsurv.cli import build_parser

    parser = build_parser()
    for name, command in _commands(parser).items():
        example = shlex.split(command.description.split("Example: ", 1)[1])
        assert example[:2] == ["creditsurv", name], command.description
        assert parser.parse_args(example[1:]).command == name


def test_config_error_prints_one_line_without_traceback_and_exits_2(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("as_of: 2024-12\nas_off: 2024-11\n")
    code = main(["check", str(bad)])
    err = capsys.readouterr().err
    assert code == 2
    assert "Traceback" not in err
    lines = err.splitlines()
    assert lines[0] == f"ConfigError: {bad}: 3 problems with the config:"
    assert "  - as_off: unknown key" in err and "did you mean 'as_of'?" in err
    assert "  - inputs: missing required key" in err and "  - windows: missing required key" in err


@pytest.mark.parametrize("where", ["before the command", "after the command"])
def test_verbose_shows_the_traceback_before_or_after_the_command(tmp_path, capsys, where):
    bad = tmp_path / "bad.yaml"
    bad.write_text("as_of: 2024-12\n")
    argv = ["--verbose", "check", str(bad)] if where == "before the command" else ["check", str(bad), "--verbose"]
    assert main(argv) == 2
    err = capsys.readouterr().err
    # The traceback first, then the message as it prints without --verbose (the cli docstring).
    assert err.startswith("Traceback (most recent call last):")
    assert f"\nConfigError: {bad}: 2 problems with the config:\n" in err


def test_without_verbose_anywhere_there_is_no_traceback(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("as_of: 2024-12\n")
    assert main(["check", str(bad)]) == 2
    assert "Traceback" not in capsys.readouterr().err


def test_yaml_syntax_error_names_the_line(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("as_of: 2024-12\ninputs:\n  panel: [unclosed\n")
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"ConfigError: {bad}: YAML syntax error at line ")


def test_usage_error_exits_2(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["no-such-command"])
    assert exc.value.code == 2


def _tree(folder: Path) -> dict[str, bytes | None]:
    """Every path under ``folder`` with a file's bytes (None for a folder)."""
    return {str(p.relative_to(folder)): (p.read_bytes() if p.is_file() else None) for p in sorted(folder.rglob("*"))}


def test_init_writes_a_valid_starter_config_and_refuses_to_overwrite(tmp_path, capsys):
    assert main(["init", str(tmp_path / "book")]) == 0
    cfg = load_config(tmp_path / "book" / "config.yaml")
    assert cfg.inputs.panel.path == tmp_path / "book" / "data" / "panel.parquet"
    assert (tmp_path / "book" / "reports").is_dir()
    before = _tree(tmp_path)
    # Refusing to write over the user's file because of where the command was pointed is a usage error: exit 2
    # (the creditsurv.cli docstring), the same as make-demo-data over an existing book.
    assert main(["init", str(tmp_path / "book")]) == 2
    assert capsys.readouterr().err.splitlines() == [
        f"UsageError: {tmp_path / 'book' / 'config.yaml'}: a config already exists there, and creditsurv never "
        "overwrites a file; nothing was written. Edit that config, or give init a folder without one."
    ]
    assert _tree(tmp_path) == before


def test_init_over_a_config_makes_no_half_layout(tmp_path, capsys):
    # A folder holding only the user's config: init must not add data/ or reports/ before refusing.
    (tmp_path / "book").mkdir()
    (tmp_path / "book" / "config.yaml").write_text("as_of: 2024-12  # mine\n")
    assert main(["init", str(tmp_path / "book")]) == 2
    assert capsys.readouterr().err.startswith("UsageError: ")
    assert _tree(tmp_path) == {"book": None, "book/config.yaml": b"as_of: 2024-12  # mine\n"}


def test_init_with_a_file_where_a_folder_goes_writes_nothing(tmp_path, capsys):
    (tmp_path / "book").mkdir()
    (tmp_path / "book" / "reports").write_text("notes\n")
    assert main(["init", str(tmp_path / "book")]) == 2
    assert capsys.readouterr().err.startswith(f"UsageError: {tmp_path / 'book' / 'reports'}: a file where init makes a folder")
    assert _tree(tmp_path) == {"book": None, "book/reports": b"notes\n"}


def test_init_refused_by_the_system_midway_leaves_nothing_behind(tmp_path, monkeypatch, capsys):
    import errno
    import os

    real_mkdir = Path.mkdir

    def mkdir(self, *args, **kwargs):
        if self.name == "reports":  # made after book/, book/data/ and book/data/scenarios/
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", mkdir)
    assert main(["init", str(tmp_path / "new" / "book")]) == 1
    assert capsys.readouterr().err.startswith(f"OutputError: {tmp_path / 'new' / 'book' / 'reports'}: cannot write the starter layout")
    assert _tree(tmp_path) == {}


def test_init_into_a_folder_that_holds_data_keeps_it(tmp_path):
    (tmp_path / "book" / "data").mkdir(parents=True)
    (tmp_path / "book" / "data" / "panel.parquet").write_bytes(b"the user's")
    assert main(["init", str(tmp_path / "book")]) == 0
    assert (tmp_path / "book" / "data" / "panel.parquet").read_bytes() == b"the user's"
    assert (tmp_path / "book" / "config.yaml").is_file() and (tmp_path / "book" / "data" / "scenarios").is_dir()


def test_make_demo_data_refuses_to_overwrite(tmp_path, capsys):
    args = ["make-demo-data", str(tmp_path / "d"), "--loans", "50", "--seed", "1"]
    assert main(args) == 0
    assert main(args) == 2
    assert capsys.readouterr().err.startswith("SimulationError: ")


def test_progress_is_silent_unless_stderr_is_a_terminal():
    import io

    from creditsurv.cli import TerminalProgress

    class Tty(io.StringIO):
        def isatty(self):
            return True

    quiet = io.StringIO()
    TerminalProgress(quiet)("projection and ECL", 5, 10)
    assert quiet.getvalue() == ""
    tty = Tty()
    bar = TerminalProgress(tty)
    bar("projection and ECL", None, None)
    bar("projection and ECL", 5, 10)
    bar("projection and ECL", 10, 10)
    out = tty.getvalue()
    assert "projection and ECL ..." in out
    assert "5/10 loans" in out and "10/10 loans" in out and "#" * 30 in out


def test_starter_config_follows_the_demo_config():
    # The starter is the demo config with the demo's paths and name replaced.
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    demo = (root / "configs" / "demo.yaml").read_text()
    starter = (root / "creditsurv" / "config" / "starter.yaml").read_text()
    expected = (
        demo.replace("# creditsurv demo config — Quillfield Home Loans, a fictional lender.\n",
                     "# creditsurv starter config: put your files under data/ and adapt the column names.\n")
        .replace("name: quillfield-demo\n", "name: my-book\n")
        .replace("synthetic_data: true                      # the demo book is simulated: the report says so\n", "")
        .replace("../data_demo/", "data/")
        .replace("dir: ../reports", "dir: reports")
    )
    assert starter == expected


def _subclasses(cls):
    for sub in cls.__subclasses__():
        yield sub
        yield from _subclasses(sub)


def test_every_error_class_exits_as_the_cli_docstring_states():
    import creditsurv.cli
    from creditsurv import errors

    # The rules of the creditsurv.cli docstring: 2 usage or config, 3 a reproduction that does not match
    # its record, 1 every other problem (data, features, model, projection, run, output).
    usage_or_config = {errors.ConfigError, errors.SimulationError, errors.UsageError}
    mismatch = {errors.ReproduceMismatch}
    found = list(_subclasses(errors.CreditsurvError))
    assert set(found) >= usage_or_config | mismatch | {errors.DataError, errors.FeatureError, errors.OutputError}
    for cls in found:
        expected = 2 if cls in usage_or_config else 3 if cls in mismatch else 1
        assert cls.exit_code == expected, f"{cls.__name__} exits {cls.exit_code}, the rules say {expected}"
    for code in ("0 --", "1 --", "2 --", "3 --", "128 + N"):
        assert code in creditsurv.cli.__doc__


def test_creditsurv_warnings_print_as_one_line():
    from creditsurv import DataCheckWarning
    from creditsurv.cli import format_warning

    text = "loans.parquet: 3 loans have a negative balance (loan_id 1, 2, 3)"
    # The one-line form of the cli docstring: no source path, no line number; other warnings as Python shows them.
    assert format_warning(text, DataCheckWarning, "/somewhere/creditsurv/data/_checks.py", 120) == f"DataCheckWarning: {text}\n"
    assert format_warning("not ours", RuntimeWarning, "/somewhere/else.py", 7, "x = 1").startswith(
        "/somewhere/else.py:7: RuntimeWarning: not ours"
    )


# --------------------------------------------------------------------------- a folder that already exists


@pytest.fixture
def workspace(corpus_book, tmp_path):
    """A copy of the small book's workspace with its one finished run (``conftest.corpus_book``)."""
    return corpus_book.copy_to(tmp_path / "ws")


def _folder_taken_at_the_last_moment(monkeypatch):
    """Make every new output folder's name taken just before the command creates it, as another process would."""
    import creditsurv.runs

    real = creditsurv.runs.RunFolder

    def racing(parent, name, **kwargs):
        (Path(parent) / name).mkdir(parents=True)
        return real(parent, name, **kwargs)

    monkeypatch.setattr(creditsurv.runs, "RunFolder", racing)


def test_compare_into_an_existing_movement_folder_says_remove_it_or_use_out(workspace, capsys):
    run = str(workspace.earlier_run)
    assert main(["compare", run, run]) == 0
    (movement,) = [p for p in workspace.reports.iterdir() if p.name.startswith("movement_")]
    capsys.readouterr()
    assert main(["compare", run, run]) == 1
    first = capsys.readouterr().err.splitlines()[0]
    assert first == (
        f"RunError: {movement}: already exists, and creditsurv never overwrites an output folder. It holds the movement "
        "between these two runs, made by an earlier compare: remove it, or use --out for another folder."
    )
    assert main(["compare", run, run, "--out", str(workspace.root / "elsewhere")]) == 0


def test_a_run_into_an_existing_run_folder_names_the_runs_remedy(workspace, capsys):
    # The run's remedy (the RunFolder default): its folder name is the hash of month, config and inputs.
    assert main(["run", str(workspace.config)]) == 1
    first = capsys.readouterr().err.splitlines()[0]
    assert first.startswith(f"RunError: {workspace.earlier_run}: already exists, and creditsurv never overwrites")
    assert first.endswith("same config and inputs: use --out for another folder, or change the config or inputs.")


def test_reproduce_and_export_number_their_folders_and_say_so_when_one_is_taken(workspace, monkeypatch, capsys):
    run = workspace.earlier_run
    _folder_taken_at_the_last_moment(monkeypatch)
    assert main(["reproduce", str(run)]) == 1
    first = capsys.readouterr().err.splitlines()[0]
    assert first.startswith(f"RunError: {run.parent / 'reproductions' / (run.name + '_repro1')}: already exists")
    assert first.endswith("another reproduction of this run took the number at the same moment: run the command again for the next one.")

    assert main(["export", str(run), "--by", ""]) == 1
    first = capsys.readouterr().err.splitlines()[0]
    assert first.startswith(f"RunError: {run.parent / 'exports' / ('export_' + run.name)}: already exists")
    assert first.endswith("another export of this run took the name at the same moment: run the command again for the next one.")


# --------------------------------------------------------------------------- config-reference


def _documented_rows() -> list[str]:
    """The config reference table of DEVELOPERS.md (tests/test_docs.py keeps it equal to the schema)."""
    text = (Path(__file__).resolve().parents[1] / "DEVELOPERS.md").read_text()
    return text.split("<!-- config-reference:start -->\n", 1)[1].split("\n<!-- config-reference:end -->", 1)[0].splitlines()


def test_config_reference_prints_the_documented_table(capsys):
    assert main(["config-reference"]) == 0
    assert capsys.readouterr().out.splitlines() == _documented_rows()


def test_config_reference_of_one_section(capsys):
    assert main(["config-reference", "--key", "staging"]) == 0
    rows = capsys.readouterr().out.splitlines()
    documented = _documented_rows()
    assert rows == documented[:2] + [r for r in documented[2:] if r.startswith("| `staging")]
    assert len(rows) > 5


def test_config_reference_of_a_key_that_does_not_exist_is_a_usage_error(capsys):
    assert main(["config-reference", "--key", "stagng"]) == 2
    assert capsys.readouterr().err.splitlines() == [
        "UsageError: --key stagng: no config key starts with 'stagng'; did you mean 'staging'?"
    ]


def test_the_starter_config_points_at_the_reference_a_pip_install_has():
    # DEVELOPERS.md is not in the installed package; the config-reference command is.
    import creditsurv.config

    starter = (Path(creditsurv.config.__file__).parent / "starter.yaml").read_text()
    assert "# creditsurv config-reference (--key staging for one section).\n" in starter
    assert "DEVELOPERS.md" not in starter
