"""``dvgate simboard``: a simulated board behind a pseudo-terminal, for `dvgate stream` without hardware."""

from __future__ import annotations

import argparse
import time

from dvgate.config import load_config

ORDER = 81


def run(args: argparse.Namespace) -> int:
    from dvgate.sim.simboard import simboard_for

    config = load_config(args.config)
    board = simboard_for(config).start()
    print(board.port, flush=True)
    print(f"simulated board for {args.config} on {board.port} (Amaranth simulator: thousands of cycles per "
          f"second, so use a long reply timeout)\n"
          f"stream to it with: dvgate stream PROGRAM --port {board.port} --config {args.config} "
          "--reply-timeout 60\nCtrl-C stops it.", flush=True)
    try:
        while True:
            time.sleep(0.5)
    except KeyboardInterrupt:
        state = board.stop()
        print(f"stopped after {state.cycles} cycles: played {state.played} segments, underruns {state.underruns}, "
              f"{state.bytes_in} bytes in, {state.bytes_out} bytes out")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "simboard", help="run the linked gateware in the simulator behind a pseudo-terminal",
        description="Simulate a board running the emulator with its host link, behind a pseudo-terminal that "
                    "`dvgate stream --port` opens like a serial port. Prints the port's path on the first line.")
    parser.add_argument("config", help="emulator config (TOML) with its [link] section")
    parser.set_defaults(func=run)
