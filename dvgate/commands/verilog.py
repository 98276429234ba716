"""``dvgate verilog``: the Verilog of the emulator's top, ports named after the channels."""

from __future__ import annotations

import argparse

from dvgate.commands._common import add_config_args, config_from, write_atomically

ORDER = 30


def run(args: argparse.Namespace) -> int:
    from dvgate.gateware.top import write_verilog

    config = config_from(args)
    text = write_verilog(config.hw)
    if args.output == "-":
        print(text, end="")
    else:
        path = write_atomically(args.output, text)
        print(f"wrote {path}: module dvgate_top, {config.hw.n} channels ({', '.join(config.hw.names)})")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("verilog", help="write the Verilog of the emulator")
    add_config_args(parser)
    parser.add_argument("-o", "--output", required=True, metavar="FILE", help="Verilog file to write ('-' for stdout)")
    parser.set_defaults(func=run)
