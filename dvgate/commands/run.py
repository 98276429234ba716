"""``dvgate run``: a scenario or CSV profile through the emulator to what the computer reads."""

from __future__ import annotations

import argparse

from dvgate.commands._common import add_config_args, config_from, console
from dvgate.report import check_target, print_summary, summarize, write_report
from dvgate.run import ENGINE_NAMES, engine_by_name, run_pipeline

ORDER = 50


def run(args: argparse.Namespace) -> int:
    config = config_from(args)
    check_target(args.output)
    engine, description = engine_by_name(args.engine)
    out = console()
    outcome = run_pipeline(args.profile, config, engine=engine, engine_name=description,
                           progress=out.is_terminal)
    summary = summarize(outcome)
    with out.status("writing the report"):
        folder = write_report(outcome, args.output, summary)
    print_summary(out, summary)
    out.print(f"wrote {folder}/ (summary.md, summary.json, program.npz, plots)")
    return 0 if summary["books_balance"] else 1


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "run", help="run a scenario or CSV profile through the emulator and report what the computer reads",
        description="Profile -> rate program -> cycle-accurate simulation -> the computer's counters -> a report "
                    "folder with plots, summary.md and summary.json. Exits 1 if the engine's books do not balance.")
    parser.add_argument("profile", metavar="SCENARIO_OR_CSV",
                        help="a scenario file (.toml, e.g. dvgate/examples/scenario_demo.toml) or a CSV profile "
                             "whose header names time and every channel with units")
    add_config_args(parser)
    parser.add_argument("-o", "--output", metavar="DIR", default="dvgate-report",
                        help="report folder (default: dvgate-report); an earlier report there is replaced")
    parser.add_argument("--engine", choices=ENGINE_NAMES, default=None,
                        help="simulation engine (default: the compiled gateware where a C++ compiler is found, "
                             "else the event-driven reference model; never Amaranth's slow simulator). The "
                             "compiled engine counts the pulses itself, so memory does not grow with them; the "
                             "others return every pulse edge (fine for short profiles)")
    parser.set_defaults(func=run)
