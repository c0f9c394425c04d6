"""The ``dbfit`` command line."""

from __future__ import annotations

import argparse
import sys

from dbfit.errors import DbfitError


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="dbfit", description="Logistic regression inside the database.")
    commands = parser.add_subparsers(dest="command", required=True)

    demo = commands.add_parser("demo", help="build an invented courier scenario in DuckDB and fit it")
    demo.add_argument("--database", default="dbfit_demo.duckdb", help="DuckDB file to create (default: %(default)s)")
    demo.add_argument("--rows", type=int, default=1_000_000, help="deliveries to generate (default: %(default)s)")
    demo.add_argument("--quiet", action="store_true", help="no per-pass progress lines")

    bench = commands.add_parser("bench", help="measure dbfit against export+statsmodels and in-memory numpy")
    bench.add_argument("--scenario", default="core", choices=["core", "levels", "segments", "outofcore", "all"],
                       help="what to measure (default: %(default)s)")
    bench.add_argument("--rows", type=int, default=None, help="rows (default: the scenario's own size)")
    bench.add_argument("--predictors", type=int, default=None, help="numeric predictors (default: per scenario)")
    bench.add_argument("--levels", type=int, default=5000, help="levels of the categorical in 'levels'")
    bench.add_argument("--segments", type=int, default=1000, help="segments in 'segments'")
    bench.add_argument("--memory-limit", default="2GB", help="DuckDB memory_limit in 'outofcore'")
    bench.add_argument("--keep", default=None, help="core: reuse or keep the data in this DuckDB file")

    script = commands.add_parser("sql", help="run a .sql script with the dbfit. SQL functions installed")
    script.add_argument("file", help="the script, e.g. sql_examples/01_fit.sql")
    script.add_argument("--database", default="dbfit_demo.duckdb", help="DuckDB file (default: %(default)s)")

    args = parser.parse_args(argv)
    try:
        if args.command == "demo":
            from dbfit.demo import run_demo

            run_demo(args.database, args.rows, quiet=args.quiet)
        elif args.command == "bench":
            from dbfit.bench import run_bench

            run_bench(args.scenario, args.rows, args.predictors, args.keep, args.levels, args.segments, args.memory_limit)
        elif args.command == "sql":
            _run_sql_file(args.file, args.database)
    except DbfitError as err:
        print(f"dbfit: {err}", file=sys.stderr)
        return 2
    return 0


def _run_sql_file(path: str, database: str) -> None:
    from pathlib import Path

    from dbfit.connection import connect
    from dbfit.sqlscript import format_result, run_script

    con = connect(database)
    try:
        for result in run_script(con, Path(path).read_text()):
            print(result.text.splitlines()[0][:100] + (" ..." if "\n" in result.text else ""))
            print(format_result(result))
            print()
    finally:
        con.close()


if __name__ == "__main__":
    sys.exit(main())
