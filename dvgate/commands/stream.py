"""``dvgate stream``: play a pulse program to a board over its serial link and check the counts."""

from __future__ import annotations

import argparse
import sys

from dvgate.cli import SAFETY
from dvgate.commands._common import add_link_args, console, table
from dvgate.config import load_config
from dvgate.linkspec import link_params, link_settings
from dvgate.stream import LinkLost, describe_faults, load_stream_program, open_port, progress_bar, stream

ORDER = 80

#: Exit status when the link is lost mid-stream (1: the counts do not match; 2: bad input).
EXIT_LINK_LOST = 3


def run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    link = link_params(config)
    segments, refits = load_stream_program(args.program, config)
    port = open_port(args.port, link_settings(config).baud)
    out = console()
    out.print(f"safety: the stream arms the board's outputs. {SAFETY}")
    names = [c.name for c in config.channels]
    try:
        with progress_bar(out, config.clock_hz) as progress:
            report = stream(port, link, segments, names=names, reply_timeout=args.reply_timeout,
                            progress=progress)
    except LinkLost as error:
        print(f"dvgate stream: error: the link to {args.port} was lost mid-stream: {error}. The board now plays "
              f"its underrun policy ({link.underrun!r}: "
              f"{'zero rates, rest pulses only' if link.underrun == 'rest' else 'the last rates, held'}) with its "
              "outputs still armed; disarm it or power it down before touching the wiring.", file=sys.stderr)
        return EXIT_LINK_LOST
    finally:
        port.close()
    rows = [[c.name, f"{c.asked_pulses:.6f}", str(c.pos), str(c.neg), str(c.net),
             f"{c.pend_pos - c.pend_neg}", f"{c.owed_pulses:+.6f}", "exact" if c.exact else "MISMATCH"]
            for c in report.channels]
    out.print(table(f"{report.segments} segments streamed in {report.seconds:.1f} s",
                    ["channel", "asked (pulses)", "pos", "neg", "net", "pending", "still owed", "books"], rows))
    rejected = ", ".join(f"{r.name.lower()} {n}" for r, n in report.rejected.items() if n) or "none"
    out.print(f"frames sent {report.frames_sent} (resent {report.frames_resent}), telemetry reads "
              f"{report.telemetry_reads}, rejected by the board: {rejected}; underruns {report.underruns}; "
              f"strobes {report.strobes}" + (f" (ignored {report.ignored})" if report.ignored else "")
              + (f"; {report.refits} short segment span(s) refitted" if report.refits else ""))
    if report.faults:
        out.print("faults in force: " + "; ".join(f"channel {name}: {describe_faults(faults)}"
                                                  for name, faults in report.faults.items()))
    for problem in report.problems():
        out.print(f"problem: {problem}")
    if report.ok:
        out.print("the board emitted exactly what the program asked for, channel by channel "
                  "(emitted + pending + still owed = the program's integral, in fixed point)")
        return 0
    return 1


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "stream", help="play a pulse program to a board over its serial link and check the counts",
        description="Stream a pulse program (.npz, as `dvgate run` writes) to a board running the linked "
                    "gateware, keeping its segment FIFO ahead of playback, then check from its telemetry that it "
                    "emitted exactly what the program asked for. Exit status: 0 exact, 1 counts differ, "
                    f"2 bad input, {EXIT_LINK_LOST} link lost mid-stream.")
    parser.add_argument("program", help="pulse program (.npz)")
    add_link_args(parser)
    parser.set_defaults(func=run)
