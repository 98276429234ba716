"""``dvgate capture``: check a logic-analyzer capture of the real pins against the model."""

from __future__ import annotations

import argparse

from dvgate.bench import check_capture, load_rate_program, parse_time, write_report
from dvgate.commands._common import add_config_args, config_from
from dvgate.sim.capture import CaptureMap, capture_map_from_args, load_capture_map

ORDER = 60


def run(args: argparse.Namespace) -> int:
    config = config_from(args)
    base = load_capture_map(args.map) if args.map else CaptureMap()
    extra = capture_map_from_args(args.signal or (), sample_rate=args.sample_rate, jitter=args.jitter,
                                  time_column=args.time_column, fmt=args.format,
                                  clock_tolerance=args.clock_tolerance)
    program = load_rate_program(args.program, config) if args.program else None
    start = parse_time(args.program_start, "--program-start") if args.program_start else None
    report = check_capture(args.capture, config, program=program, capture_map=base.merged(extra), program_start=start,
                           clock_recovery=not args.no_clock_recovery)
    written = write_report(report, args.output)
    print(report.summary(), end="")
    print(f"\nwrote {len(written)} files to {args.output}")
    return 0 if report.verdict == "pass" else 1


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "capture", help="check a logic-analyzer capture (VCD or CSV) of the real pins against the model",
        description="Read a capture of the emulator's pins, recover the emulator's clock from its output edges, "
        "drive the reference model with the capture's own strobe edges on that clock, and report matched, "
        "missing and extra pulses, widths, gaps, latency and the clock against the config. Exit status: 0 "
        "pass, 1 fail or inconclusive, 2 bad input. Bench procedure and safety "
        "cautions: docs/bench.md.",
        epilog="Never drive a computer's inputs straight from FPGA pins: isolate and level-shift, check input "
        "levels and coupling, share grounds deliberately, keep outputs idle until armed, and follow the "
        "equipment's documentation, local electrical codes and qualified people.")
    parser.add_argument("capture", help="the capture: .vcd (IEEE Std 1364) or .csv of sampled levels")
    add_config_args(parser)
    parser.add_argument("--program", metavar="FILE",
                        help="rates commanded during the capture: program.npz saved by `dvgate run`, or a TOML "
                        "file of [[step]] tables (see docs/bench.md); default: the config's initial rates")
    parser.add_argument("--program-start", metavar="TIME",
                        help="capture time at which the program starts, e.g. '1.5 ms' (default: when the arm "
                        "line rises, or the capture's start)")
    parser.add_argument("--map", metavar="FILE", help="map of capture signals to emulator lines (TOML)")
    parser.add_argument("--signal", action="append", metavar="LINE=NAME",
                        help="map one line, e.g. strobe=D0 or x_pos=~D1 (inverted); repeatable; "
                        "overrides the map file")
    parser.add_argument("--sample-rate", metavar="RATE", help="the analyzer's sample rate, e.g. '100 MHz'")
    parser.add_argument("--jitter", metavar="TIME",
                        help="timing uncertainty of one captured edge beyond the sample period (default 0 s)")
    parser.add_argument("--clock-tolerance", metavar="PPM",
                        help="tolerance of the emulator's and analyzer's clocks together (default '100 ppm')")
    parser.add_argument("--no-clock-recovery", action="store_true",
                        help="compare on the nominal time base instead of the emulator's clock recovered from its "
                        "output edges (an asynchronous strobe's cycle is then known only to within one)")
    parser.add_argument("--time-column", metavar="NAME", help="CSV: the time or sample column (default: the first)")
    parser.add_argument("--format", choices=["vcd", "csv"], help="capture format (default: from the extension)")
    parser.add_argument("-o", "--output", metavar="DIR", default="bench-report",
                        help="report folder (default: bench-report)")
    parser.set_defaults(func=run)
