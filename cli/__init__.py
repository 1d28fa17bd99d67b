"""The ``counterbid`` command line: one module per sub-command, imported lazily.

Each module in ``COMMANDS`` defines ``add_arguments(parser)`` and ``run(args) -> int``. Bad input
raises :class:`counterbid.estimators.InputError`; it is printed as one line
``counterbid: error: <what, where>`` with exit status 2 and no traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys

# name -> (module, one-line help). Add a sub-command by adding a module and a line here.
COMMANDS: dict[str, tuple[str, str]] = {
    "estimate": ("counterbid.cli.estimate", "per-arm revenue, welfare and lift from a bid log"),
    "simulate": ("counterbid.cli.simulate", "write an equilibrium bid log for an experiment spec (demo, tests)"),
    "check": ("counterbid.cli.check", "data checks of a bid log: contract, sample ratio, equilibrium, drift, warm-up"),
    "backfill": ("counterbid.cli.backfill", "run the daily DAG in-process for each day of a range (no scheduler needed)"),
    "study": ("counterbid.cli.study", "Monte Carlo validation study: CSV, figures and a markdown summary"),
    "plan": ("counterbid.cli.plan", "predicted interval half-widths per traffic share, and the smallest share that suffices"),
    "grant-reader": ("counterbid.cli.grant_reader", "a read-only role for dashboards on a PostgreSQL results database"),
}

EXIT_INPUT = 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, like every other input error
        self.exit(EXIT_INPUT, f"counterbid: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="counterbid", description="Per-arm estimates for auction-rule experiments.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.set_defaults(_module=module)
        importlib.import_module(module).add_arguments(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    from counterbid.estimators.errors import InputError

    args = build_parser().parse_args(argv)
    try:
        return int(importlib.import_module(args._module).run(args) or 0)
    except InputError as exc:
        print(f"counterbid: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
