"""``dvgate sim``: cycle-accurate simulation of the config's strobe, checked against the model."""

from __future__ import annotations

import argparse

from dvgate.commands._common import add_config_args, config_from, console, table
from dvgate.errors import UserError
from dvgate.simulate import simulate_config

ORDER = 40


def run(args: argparse.Namespace) -> int:
    config = config_from(args)
    if not 0 < args.seconds <= 3600:
        raise UserError(f"--seconds = {args.seconds!r}: allowed: more than 0, at most 3600")
    from dvgate.sim.engines import get_engine

    engine, description = get_engine(args.engine, config.hw.datapath)
    report = simulate_config(config, args.seconds, engine=engine, engine_name=description, vcd_path=args.vcd)
    out = console()
    rows = []
    for ch in report.channels:
        rows.append([ch.name, str(ch.pos), str(ch.neg), f"{ch.net:+d}",
                     f"{ch.dv_emitted:+.6g} {ch.unit}", f"{ch.dv_commanded:+.6g} {ch.unit}"])
    verdict = "simulation and model agree" if report.agree else "SIMULATION AND MODEL DIFFER"
    out.print(table(f"{report.cycles} cycles ({report.seconds:.6g} s), engine: {report.engine}: {verdict}",
                    ["channel", "pos", "neg", "net", "delta-V emitted", "delta-V commanded"], rows))
    status = report.engine_result.status
    out.print(f"strobes {status.strobes}, overruns {status.overruns}, clamps {status.clamps}, "
              f"deferrals {status.deferrals}, saturations {status.saturations}, host_absent {status.host_absent}")
    for line in report.differences:
        out.print(line)
    if args.vcd:
        out.print(f"wrote {args.vcd}")
    return 0 if report.agree else 1


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser("sim", help="simulate the gateware cycle by cycle and check it against the model")
    add_config_args(parser)
    parser.add_argument("--seconds", type=float, default=0.005, help="simulated time (default 0.005)")
    parser.add_argument("--engine", choices=["python", "compiled"], default=None,
                        help="simulation engine (default: compiled where a C++ compiler is found)")
    parser.add_argument("--vcd", metavar="FILE",
                        help="write a VCD of the run (the compiled engine then evaluates every cycle)")
    parser.set_defaults(func=run)
