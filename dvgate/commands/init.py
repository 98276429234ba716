"""``dvgate init``: write the example config."""

from __future__ import annotations

import argparse
from importlib import resources

from dvgate.cli import SAFETY
from dvgate.commands._common import write_atomically

ORDER = 10


def example_config_text() -> str:
    """The bundled example config (invented bench data)."""
    return resources.files("dvgate").joinpath("examples/bench.toml").read_text()


def run(args: argparse.Namespace) -> int:
    path = write_atomically(args.path, example_config_text(), force=args.force)
    print(f"wrote {path}: three accelerometer channels, burst scheme, 12 MHz clock (invented example)")
    print(f"next: dvgate check {path}  then  dvgate sim {path} --seconds 2")
    print(f"safety: {SAFETY}")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("init", help="write an example emulator config")
    parser.add_argument("path", nargs="?", default="dvgate.toml", help="where to write it (default dvgate.toml)")
    parser.add_argument("--force", action="store_true", help="overwrite an existing file")
    parser.set_defaults(func=run)
