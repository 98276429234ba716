"""``dvgate check``: validate a config and print its derived figures."""

from __future__ import annotations

import argparse

from dvgate.commands._common import add_config_args, config_from, console, table
from dvgate.derived import derived_figures, figure_rows

ORDER = 20


def run(args: argparse.Namespace) -> int:
    config = config_from(args)
    figures = derived_figures(config)
    out = console()
    out.print(table(f"{config.source}: valid", ["figure", "value"], figure_rows(config, figures)))
    for warning in figures.warnings:
        out.print(f"warning: {warning}")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("check", help="validate a config and print its derived figures")
    add_config_args(parser)
    parser.set_defaults(func=run)
