"""The ``creditsurv`` command line: argument parsing and display only.

Exit codes (the project's one statement of them; every ``CreditsurvError`` subclass's
``exit_code`` follows it, and ``tests/test_cli.py`` holds that):

* 0 -- success.
* 1 -- a problem in the data or the machine: data and data-check errors, a feature that cannot be
  evaluated on the data, model, projection, engine (a failed Spark step) and run errors, an output the operating system refuses
  to write (``OutputError``).
* 2 -- usage or config errors: the command line or the YAML config is wrong (``ConfigError``,
  argparse's own usage errors), a command pointed at a user's file it would have to overwrite or
  asked for a config key that does not exist (``UsageError``: ``init`` where a config exists,
  ``config-reference --key`` with no such key), or bad arguments to the demo simulator.
* 3 -- a reproduced run does not match its record (``ReproduceMismatch``).
* 128 + N -- stopped by signal N (130 for Ctrl-C, SIGINT; 143 for SIGTERM, what a scheduler sends;
  129 for SIGHUP). All three clean up alike: no ``.incomplete-*`` folder and no temporary folder
  is left behind.

Errors print as one line ``ErrorName: message`` on stderr (a traceback only with ``--verbose``);
creditsurv's warnings print as one line ``WarningName: message``.
"""

from __future__ import annotations

import argparse
import signal
import sys
import traceback
import warnings
from pathlib import Path

from . import __version__
from .errors import CreditsurvError, CreditsurvWarning, OutputError


def _cmd_make_demo_data(args) -> int:
    from .demo import arrears_behaviour, write_demo_book

    hazard = arrears_behaviour() if args.kind == "arrears" else None
    summary = write_demo_book(args.out_dir, args.loans, args.seed, hazard=hazard)
    events = ", ".join(f"{n:,} {kind}" for kind, n in summary["events"].items())
    print(f"wrote a synthetic book of {summary['loans']:,} loans ({summary['rows']:,} loan-months) to {args.out_dir}")
    print(f"  outcomes: {events}")
    for name, size in summary["files"].items():
        print(f"  {name}: {size:,} bytes")
    return 0


def _cmd_check(args) -> int:
    from .pipeline import check

    outcome = check(args.config, out=args.out)
    print(outcome.text)
    return 1 if outcome.failed else 0


def _cmd_fit(args) -> int:
    from .pipeline import fit

    outcome = fit(args.config, out=args.out, argv=sys.argv)
    print(outcome.text)
    return 0


class TerminalProgress:
    """Progress on stderr when it is a terminal; silent otherwise (logs, CI, pipes)."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.active = self.stream.isatty()
        self._label = None

    def __call__(self, label: str, done: int | None, total: int | None) -> None:
        if not self.active:
            return
        if done is None or not total:
            if self._label is not None:
                self.stream.write("\n")
            self.stream.write(f"{label} ...")
            self._label = None if done is None else label
            self.stream.write("\n")
            self.stream.flush()
            return
        width = 30
        filled = int(width * done / total)
        self.stream.write(f"\r  [{'#' * filled}{'.' * (width - filled)}] {done:,}/{total:,} loans")
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()


def _cmd_run(args) -> int:
    from .pipeline import run

    outcome = run(args.config, as_of=args.as_of, out=args.out, argv=sys.argv, progress=TerminalProgress())
    print(outcome.text)
    return 0


def _cmd_reproduce(args) -> int:
    from .pipeline import reproduce

    outcome = reproduce(args.run_dir, out=args.out, inputs=args.inputs, progress=TerminalProgress())
    print(outcome.text)
    return 0


def _cmd_compare(args) -> int:
    from .pipeline import compare

    outcome = compare(args.run_a, args.run_b, out=args.out)
    print(outcome.text)
    return 0


def _comma_list(text: str) -> tuple[str, ...]:
    return tuple(x.strip() for x in text.split(",") if x.strip())


def _cmd_export(args) -> int:
    from .pipeline import export

    by = [_comma_list(b) for b in args.by] if args.by else [("segment",)]
    loans = None
    if args.loans is not None:
        loans = list(_comma_list(args.loans))
    if args.loans_file is not None:
        loans = (loans or []) + _read_loan_list(args.loans_file)
    outcome = export(
        args.run_dir, out=args.out, by=by, scenarios=tuple(args.scenario or ("weighted",)),
        weightings=_comma_list(args.weighting), measures=_comma_list(args.measures), period=args.period,
        fmt=args.format, loans=loans,
    )  # fmt: skip
    print(outcome.text)
    return 0


def _read_loan_list(path: Path) -> list[str]:
    """Loan ids from a text file, one per line, or a CSV file with a ``loan_id`` column."""
    from .errors import DataError

    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise DataError(f"{path}: cannot read the loan list (--loans-file): {exc.strerror or exc}") from None
    lines = [line.strip() for line in text.splitlines() if line.strip()]
    if lines and "," in lines[0]:
        header = [c.strip() for c in lines[0].split(",")]
        if "loan_id" not in header:
            raise DataError(f"{path}: a CSV loan list needs a loan_id column; has {header} (--loans-file)")
        at = header.index("loan_id")
        return [line.split(",")[at].strip() for line in lines[1:]]
    return [x for x in lines if x != "loan_id"]


def _cmd_config_reference(args) -> int:
    from .pipeline import config_reference

    print(config_reference(args.key).text)
    return 0


def _cmd_init(args) -> int:
    from .pipeline import init_project

    for path in init_project(args.dir):
        print(f"wrote {path}")
    return 0


VERBOSE_HELP = "on an error, show the traceback too (before or after the command's name)"
CONFIG_HELP = "the YAML config, e.g. configs/demo.yaml"


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="creditsurv",
        description="Lifetime PD and ECL from loan-month panels, with prepayment as a competing risk. "
        "Example: creditsurv run configs/demo.yaml",
    )
    parser.add_argument("--version", action="version", version=f"creditsurv {__version__}")
    parser.add_argument("--verbose", action="store_true", help=VERBOSE_HELP)
    # Every command takes --verbose after its name too. The parent's default is suppressed, so a command that
    # is not given it leaves the top-level value (set by `creditsurv --verbose COMMAND`) as it is.
    verbose = argparse.ArgumentParser(add_help=False)
    verbose.add_argument("--verbose", action="store_true", default=argparse.SUPPRESS, help=VERBOSE_HELP)
    sub = parser.add_subparsers(
        dest="command", metavar="COMMAND", required=True, help="one of these; creditsurv COMMAND --help describes it"
    )

    p = sub.add_parser(
        "make-demo-data", parents=[verbose], help="simulate a synthetic loan book (fictional lender)",
        description="Simulate the book of a fictional lender: a loan-month panel, a loan table, macro history, "
        "three scenarios and the true parameters they were drawn from, written into a folder (files already "
        "there are never overwritten). Example: creditsurv make-demo-data data_small --loans 2000 --seed 7",
    )  # fmt: skip
    p.add_argument("out_dir", type=Path, metavar="OUT_DIR", help="folder to write the book into, made if missing, e.g. data_small")
    p.add_argument("--loans", type=int, default=20_000, help="number of loans (default 20000), e.g. --loans 2000")
    p.add_argument("--seed", type=int, default=20261202, help="random seed (default 20261202): the same seed, the same book")
    p.add_argument(
        "--kind", choices=("arrears", "competing"), default="arrears",
        help="arrears: loans move between arrears states, with cures and a refreshed score (the shipped demo); "
        "competing: default and prepayment from one competing-risk hazard",
    )  # fmt: skip
    p.set_defaults(func=_cmd_make_demo_data)

    p = sub.add_parser(
        "init", parents=[verbose], help="write a commented starter config and folder layout",
        description="Write a commented starter config (config.yaml) and the folders it names (data/, "
        "data/scenarios/, reports/) into a folder. A config already there is never overwritten: the command "
        "stops (exit 2) and writes nothing. Example: creditsurv init my-book",
    )  # fmt: skip
    p.add_argument("dir", type=Path, metavar="DIR", help="the project folder, made if missing, e.g. my-book")
    p.set_defaults(func=_cmd_init)

    p = sub.add_parser(
        "config-reference", parents=[verbose], help="print every config key: type, default and meaning",
        description="Print every key of the YAML config with its type, default and meaning, as a Markdown table. "
        "Example: creditsurv config-reference --key staging",
    )  # fmt: skip
    p.add_argument("--key", default=None, metavar="PREFIX", help="only the keys that start with PREFIX, e.g. --key staging or --key model.fit")
    p.set_defaults(func=_cmd_config_reference)

    p = sub.add_parser(
        "check", parents=[verbose], help="run the data checks on the config's inputs",
        description="Run the data checks on the config's inputs and print each check's severity, count and "
        "examples; exits 1 when a check of severity error fired. Example: creditsurv check configs/demo.yaml "
        "--out checks.csv",
    )  # fmt: skip
    p.add_argument("config", type=Path, metavar="CONFIG", help=CONFIG_HELP)
    p.add_argument("--out", type=Path, default=None, metavar="FILE",
                   help="also write the check table to this CSV file, which must not exist, e.g. --out checks.csv")  # fmt: skip
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser(
        "fit", parents=[verbose], help="fit the hazard model and write its JSON and coefficient table",
        description="Check the data, label the events and fit the hazard model; write the model JSON, its "
        "coefficient table and the data checks into a new folder. Example: creditsurv fit configs/demo.yaml --out fits",
    )  # fmt: skip
    p.add_argument("config", type=Path, metavar="CONFIG", help=CONFIG_HELP)
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="folder to create the fit's folder in (default: outputs.dir of the config, else reports/ beside it)")  # fmt: skip
    p.set_defaults(func=_cmd_fit)

    p = sub.add_parser(
        "run", parents=[verbose], help="the monthly job: checks, fit, projection, ECL, report",
        description="The monthly job: data checks, events, the hazard model, projection under the scenarios, "
        "staging, ECL, validation and the report, written as one new run folder. Example: creditsurv run "
        "configs/demo.yaml --as-of 2024-11",
    )  # fmt: skip
    p.add_argument("config", type=Path, metavar="CONFIG", help=CONFIG_HELP)
    p.add_argument("--as-of", default=None, metavar="YYYY-MM", help="reporting month in place of the config's as_of, e.g. --as-of 2024-11")
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="folder to create the run folder in (default: outputs.dir of the config, else reports/ beside it)")  # fmt: skip
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser(
        "reproduce", parents=[verbose], help="re-run a past run from its manifest and compare every output",
        description="Check a finished run folder against its record, find its inputs by SHA-256, re-run the "
        "month into a new numbered folder and compare every output; exits 3 when they differ. Example: "
        "creditsurv reproduce reports/2024-12_1a2b3c4d5e --inputs /data/archive",
    )  # fmt: skip
    p.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="a folder written by creditsurv run, e.g. reports/2024-12_1a2b3c4d5e")
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="folder to create the fresh run in (default: reproductions/ beside RUN_DIR)")  # fmt: skip
    p.add_argument(
        "--inputs", type=Path, default=None, metavar="DIR",
        help="where the run's input files are now: any file under DIR whose SHA-256 matches a recorded input is used",
    )
    p.set_defaults(func=_cmd_reproduce)

    p = sub.add_parser(
        "compare", parents=[verbose], help="ECL movement from run A to run B: walk, stage migration, PD change",
        description="The ECL walk from run A's total to run B's, the stage migration and the lifetime PD change, "
        "written into a new movement folder. Run A is normally the earlier month; the first line of the output "
        "says when it is not, and a change of model, method or package versions between the runs is named. "
        "Example: creditsurv compare reports/2024-11_0a1b2c3d4e reports/2024-12_1a2b3c4d5e",
    )  # fmt: skip
    p.add_argument("run_a", type=Path, metavar="RUN_A", help="the opening run folder, normally last month's, e.g. reports/2024-11_0a1b2c3d4e")
    p.add_argument("run_b", type=Path, metavar="RUN_B", help="the closing run folder, normally this month's, e.g. reports/2024-12_1a2b3c4d5e")
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="folder to create the movement folder in (default: the folder holding RUN_B)")  # fmt: skip
    p.set_defaults(func=_cmd_compare)

    p = sub.add_parser(
        "export", parents=[verbose], help="PD term structures of a finished run by any loan attributes, and chosen loans' tables",
        description="Recompute a finished run's PD term structures from what the run kept and write them, grouped "
        "by loan attributes, outside the run folder (which is checked against its manifest first and never "
        "changes). Example: creditsurv export reports/2024-12_1a2b3c4d5e --by segment --by band --by segment,vintage "
        "--scenario weighted --scenario downside --format xlsx",
    )  # fmt: skip
    p.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="a folder written by creditsurv run, e.g. reports/2024-12_1a2b3c4d5e")
    p.add_argument(
        "--by", action="append", metavar="COLUMNS",
        help="one table per use: loan-table columns to group by, comma separated (segment, band, vintage, stage, "
        "age_band, arrears_state, region, stage_reason, ...), e.g. --by segment,band; an empty value is the "
        "whole book; default --by segment",
    )  # fmt: skip
    p.add_argument(
        "--scenario", action="append", metavar="NAME",
        help="a scenario of the run, or weighted (the probability-weighted curves); repeat for several; default weighted",
    )
    p.add_argument("--weighting", default="count,balance", metavar="count,balance",
                   help="average over loans (count) and/or by balance at the reporting month (balance); default both")  # fmt: skip
    p.add_argument(
        "--measures", default="cumulative,marginal,conditional,survival", metavar="LIST",
        help="cumulative PD, marginal PD of the period, conditional PD (given survival to the period's start), "
        "survival; default all four, e.g. --measures cumulative,conditional",
    )  # fmt: skip
    p.add_argument("--period", choices=("year", "month"), default="year", help="years or months ahead (default year)")
    p.add_argument("--format", choices=("csv", "parquet", "xlsx"), default="csv",
                   help="csv, parquet, or xlsx (one workbook, a sheet per table); default csv")  # fmt: skip
    p.add_argument("--loans", default=None, metavar="IDS",
                   help="also write the loan-by-period tables of these loans, comma separated, e.g. --loans Q000123,Q004567")  # fmt: skip
    p.add_argument("--loans-file", type=Path, default=None, metavar="FILE",
                   help="as --loans, the ids read from a file: one per line, or a CSV with a loan_id column")  # fmt: skip
    p.add_argument("--out", type=Path, default=None, metavar="DIR",
                   help="folder to create the export folder in (default: exports/ beside RUN_DIR)")  # fmt: skip
    p.set_defaults(func=_cmd_export)
    return parser


class Stopped(KeyboardInterrupt):
    """Raised in the main thread by a SIGTERM or SIGHUP handler, so that the cleanup of Ctrl-C runs."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def _raise_stopped(signum, frame):
    raise Stopped(signum)


def format_warning(message, category, filename, lineno, line=None) -> str:
    """creditsurv's warnings as one line ``WarningName: message``; others as Python formats them."""
    if issubclass(category, CreditsurvWarning):
        return f"{category.__name__}: {message}\n"
    return _python_format_warning(message, category, filename, lineno, line)


_python_format_warning = warnings.formatwarning


def _handle_signals() -> dict:
    """SIGTERM and SIGHUP raise :class:`Stopped` (as SIGINT raises KeyboardInterrupt); returns the old handlers."""
    old = {}
    for name in ("SIGTERM", "SIGHUP"):
        signum = getattr(signal, name, None)
        if signum is not None:
            try:
                old[signum] = signal.signal(signum, _raise_stopped)
            except ValueError:  # not the main thread: leave the handlers alone
                pass
    return old


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    old_handlers = _handle_signals()
    # Only the text of a shown warning changes: filters, and recording by callers, stay as they are.
    warnings.formatwarning = format_warning
    try:
        return args.func(args)
    except CreditsurvError as exc:
        if args.verbose:
            traceback.print_exc()
        print(f"{type(exc).__name__}: {exc}", file=sys.stderr)
        return exc.exit_code
    except OSError as exc:
        # Outputs are written through OutputError where they are made; this is the net for the rest.
        if args.verbose:
            traceback.print_exc()
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"{OutputError.__name__}: {where}{exc.strerror or exc}", file=sys.stderr)
        return OutputError.exit_code
    except Stopped as exc:
        name = signal.Signals(exc.signum).name
        print(f"stopped by {name}; unfinished outputs were removed", file=sys.stderr)
        return 128 + exc.signum
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 128 + signal.SIGINT
    finally:
        warnings.formatwarning = _python_format_warning
        for signum, handler in old_handlers.items():
            signal.signal(signum, handler)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
