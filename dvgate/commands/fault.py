"""``dvgate fault``: set a channel's fault injection, or ignore the strobes, over the host link."""

from __future__ import annotations

import argparse
import sys

from dvgate.commands._common import add_link_args, console
from dvgate.commands.stream import EXIT_LINK_LOST
from dvgate.config import load_config
from dvgate.errors import UserError
from dvgate.linkspec import link_params, link_settings
from dvgate.stream import (
    FAULT_WORDS,
    IGNORED_MAX,
    LinkLost,
    describe_faults,
    open_port,
    parse_fault_setting,
    parse_ignore_window,
    send_settings,
)

ORDER = 82
#: Exit status when every frame was applied but a channel's fault set read back differs.
EXIT_READ_BACK = 1


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    link = link_params(config)
    if args.channel is None and args.ignore_strobes is None:
        raise UserError("give a CHANNEL with its fault setting, or --ignore-strobes DURATION, or both")
    faults = [] if args.channel is None else [parse_fault_setting(config, args.channel, args.setting)]
    ignore = None if args.ignore_strobes is None else parse_ignore_window(config, args.ignore_strobes)
    port = open_port(args.port, link_settings(config).baud)
    try:
        report = send_settings(port, link, faults, ignore, reply_timeout=args.reply_timeout)
    except LinkLost as error:
        print(f"dvgate fault: error: the link to {args.port} failed: {error}. Nothing is known to be set; "
              "run the command again.", file=sys.stderr)
        return EXIT_LINK_LOST
    finally:
        port.close()
    out = console()
    for k, setting in enumerate(report.faults):
        out.print(f"channel {config.channels[setting.channel].name}: {describe_faults(setting.faults)} "
                  f"(frame {report.seq(k)}, applied once)")
    if report.ignore is not None:
        out.print(f"strobes ignored for {report.ignore} cycles ({report.ignore / config.clock_hz:.6g} s) "
                  f"(frame {report.seq(len(report.faults))}, applied once)")
    if report.resent:
        out.print(f"{report.resent} frame(s) sent again: the board had not applied them")
    for channel, faults in report.in_force.items():
        out.print(f"read back: channel {config.channels[channel].name}: {describe_faults(faults)}")
    saturated = " or more (the count stops there)" if report.ignored == IGNORED_MAX else ""
    out.print(f"read back: {report.ignored}{saturated} strobe(s) ignored since reset")
    for channel in report.mismatched:
        out.print(f"problem: channel {config.channels[channel].name}'s fault set read back is not the one sent "
                  "(another host is talking to the board?)")
    # A script driving a test must not take a set it did not get for one it did.
    return EXIT_READ_BACK if report.mismatched else 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "fault", help="set a channel's fault injection, or ignore the strobes, over the serial link",
        description="Set the whole fault set of one channel of a board running the linked gateware (it replaces "
                    "the channel's set; no setting, or 'none', clears it), and/or make the board ignore the "
                    "strobes for a window. Each setting is applied exactly once (docs/link.md, 'Faults'). "
                    f"Settings: {', '.join(FAULT_WORDS)}. Exit status: 0 applied and read back, "
                    f"{EXIT_READ_BACK} applied but a set read back differs, 2 bad input, {EXIT_LINK_LOST} link failed.")
    parser.add_argument("channel", nargs="?", metavar="CHANNEL", help="channel name or index")
    parser.add_argument("setting", nargs="*", metavar="SETTING",
                        help="silence_pos, stuck_neg, swap, no_rest, 'storm=50 us', storm_neg, ... or none")
    parser.add_argument("--ignore-strobes", metavar="DURATION",
                        help="ignore the strobes detected in this window from now (e.g. '5 ms', '1200 cycles')")
    add_link_args(parser)
    parser.set_defaults(func=run)
