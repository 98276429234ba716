"""The ``dvgate`` command line: parses arguments and calls the package's API.

It holds no logic of its own; every subcommand lives in ``dvgate.commands``.
"""

from __future__ import annotations

import argparse
import sys

from dvgate import __version__
from dvgate.commands import command_modules
from dvgate.errors import UserError

SAFETY = (
    "Before wiring to real equipment: isolate and level-shift (never drive a computer's inputs "
    "straight from FPGA pins), check the computer's input levels and coupling, share grounds "
    "deliberately, keep outputs idle until armed, and follow the equipment's documentation, "
    "local electrical codes and qualified people."
)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand registered."""
    parser = argparse.ArgumentParser(
        prog="dvgate",
        description="Gateware that answers a computer's strobe with accelerometer pulse pairs, "
        "proven cycle by cycle against a reference model.",
        epilog=SAFETY,
    )
    parser.add_argument("--version", action="version", version=f"dvgate {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for module in command_modules():
        module.register(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except UserError as error:
        print(f"dvgate {args.command}: error: {error}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"dvgate {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
