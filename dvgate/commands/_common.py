"""Argument helpers shared by the subcommands (no logic beyond reading arguments)."""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

from rich.console import Console
from rich.table import Table

from dvgate.config import Config, load_config
from dvgate.errors import UserError


def add_config_args(parser: argparse.ArgumentParser) -> None:
    """The config path and the options that retune it without editing the file."""
    parser.add_argument("config", help="emulator config (TOML); `dvgate init` writes an example")
    parser.add_argument("--channels", type=int, metavar="N", help="use N channels instead of the file's")
    parser.add_argument("--weight", metavar="Q", help="pulse weight for every channel, e.g. '0.01 m/s'")


def add_link_args(parser: argparse.ArgumentParser) -> None:
    """The serial port, config and reply timeout of the commands that talk to a board."""
    parser.add_argument("--port", required=True, metavar="DEV",
                        help="serial port (e.g. /dev/ttyUSB1, COM4, or the path `dvgate simboard` prints)")
    parser.add_argument("--config", default="dvgate.toml",
                        help="emulator config with its [link] section (default: dvgate.toml)")
    parser.add_argument("--reply-timeout", type=float, default=1.0, metavar="S",
                        help="seconds to wait for a telemetry reply (default 1; a simulated board needs 60 or more)")


def config_from(args: argparse.Namespace) -> Config:
    """Load the config that the arguments name, retuned as they say."""
    return load_config(args.config, channels=args.channels, weight=args.weight)


def console() -> Console:
    """Where tables go: standard output, without colour codes when it is not a terminal."""
    return Console(highlight=False, soft_wrap=False, width=max(100, Console().width))


def table(title: str, columns: list[str], rows: list[list[str]] | list[tuple[str, ...]]) -> Table:
    """A plain table with the given header."""
    out = Table(title=title, title_justify="left", show_lines=False)
    for column in columns:
        out.add_column(column)
    for row in rows:
        out.add_row(*row)
    return out


def write_atomically(path: str | Path, text: str, *, force: bool = True) -> Path:
    """Write ``text`` to ``path`` whole or not at all (a temp file renamed into place)."""
    path = Path(path)
    if path.exists() and not force:
        raise UserError(f"{path}: exists already; pass --force to overwrite it")
    if path.is_dir():
        raise UserError(f"{path}: is a folder; give a file name")
    if not path.parent.exists():
        raise UserError(f"{path.parent}: no such folder")
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w") as handle:
            handle.write(text)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
