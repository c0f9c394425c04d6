"""The ``dbfit`` command line: the demo, the benchmark, SQL scripts, and the model commands for schedulers."""

from __future__ import annotations

import argparse
import sys

import duckdb

from dbfit.errors import DbfitError, UsageError

EXIT_CODES = """exit codes:
  0  success
  2  bad usage (unknown option, missing argument)
  3  a promotion gate refused the candidate (the current version and its views are unchanged)
  4  data or database error (any dbfit error: bad formula or source, unknown model, locked file, ...)"""
OK, BAD_USAGE, REFUSED, DATA_ERROR = 0, 2, 3, 4


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="dbfit",
        description="Logistic regression inside the database.",
        epilog=EXIT_CODES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", required=True)

    def command(name: str, text: str) -> argparse.ArgumentParser:
        return commands.add_parser(
            name,
            help=text,
            description=text,
            epilog=EXIT_CODES,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )

    demo = command("demo", "build an invented courier scenario in DuckDB and fit it")
    demo.add_argument(
        "--database", default="dbfit_demo.duckdb", help="DuckDB file to create (default: %(default)s)"
    )
    demo.add_argument(
        "--rows", type=int, default=1_000_000, help="deliveries to generate (default: %(default)s)"
    )
    demo.add_argument("--quiet", action="store_true", help="no per-pass progress lines")

    from dbfit.interfaces.bench import add_bench_arguments

    add_bench_arguments(
        command("bench", "measure dbfit against exported-data baselines, each in its own process")
    )

    script = command("sql", "run a .sql script with the dbfit. SQL functions installed")
    script.add_argument("file", help="the script, e.g. sql_examples/01_fit.sql")
    script.add_argument("--database", default="dbfit_demo.duckdb", help="DuckDB file (default: %(default)s)")

    from dbfit.interfaces.commands import add_model_commands

    add_model_commands(command)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        if args.command == "demo":
            from dbfit.interfaces.demo import run_demo

            run_demo(args.database, args.rows, quiet=args.quiet)
        elif args.command == "bench":
            from dbfit.interfaces.bench import run_bench_command

            run_bench_command(args)
        elif args.command == "sql":
            _run_sql_file(args.file, args.database)
        else:
            from dbfit.interfaces.commands import run_model_command

            return run_model_command(args)
    except UsageError as err:
        print(f"dbfit: {err}", file=sys.stderr)
        return BAD_USAGE
    except (DbfitError, duckdb.Error) as err:
        print(f"dbfit: {err}", file=sys.stderr)
        return DATA_ERROR
    return OK


def _run_sql_file(path: str, database: str) -> None:
    from pathlib import Path

    from dbfit.interfaces.connection import connect_existing
    from dbfit.interfaces.sql_script import format_result, run_script

    try:
        text = Path(path).read_text()
    except OSError as err:
        raise UsageError(f"the script {path} cannot be read: {err.strerror or err}") from None
    con = connect_existing(database)
    try:
        for result in run_script(con, text):
            print(result.text.splitlines()[0][:100] + (" ..." if "\n" in result.text else ""))
            print(format_result(result))
            print()
    finally:
        con.close()


if __name__ == "__main__":
    sys.exit(main())
