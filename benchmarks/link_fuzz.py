"""Fuzz the host link on many frames: the figures of ``docs/reliability.md``.

Runs the fuzz traffic of ``dvgate.sim.link_fuzz`` (flipped bits, truncated, paused,
repeated and lost frames, stray bytes, frames back to back) through the pure-Python
model of the board's link (``dvgate.sim.link_model.LinkModel``), which the tests hold
equal to the gateware frame by frame (``tests/test_link_fuzz.py``). With
``--gateware N`` it also replays the first runs' bytes into the gateware (Amaranth's
simulator, slow) until about N frames have been compared, and checks the two agree.

::

    python benchmarks/link_fuzz.py                    # >= 100,000 frames on the model
    python benchmarks/link_fuzz.py --frames 20000 --gateware 3000

Prints a markdown table (or writes it with ``-o FILE``).
"""

from __future__ import annotations

import argparse
import datetime
import platform
import sys
import time
from collections import Counter
from pathlib import Path

from dvgate.linkspec import LinkParams, Reason
from dvgate.params import HardwareParams
from dvgate.sim.link_fuzz import MUTATIONS, FuzzSettings, check, generate

#: Link shapes fuzzed: channels, rate width (bytes per rate), FIFO depth, underrun policy.
SHAPES = [
    ("2 ch, 12-bit rates, FIFO 4, rest", 2, 12, 4, "rest"),
    ("3 ch, 32-bit rates, FIFO 8, hold", 3, 32, 8, "hold"),
    ("1 ch, 24-bit rates, FIFO 2, rest", 1, 24, 2, "rest"),
]


def shape_link(channels: int, rate_bits: int, depth: int, policy: str) -> LinkParams:
    hw = HardwareParams(
        clock_hz=1e6, names=("x", "y", "z")[:channels], edge_rising=True, min_width_cyc=2, absence_cyc=1000,
        scheme="burst", rest=1, width_cyc=2, gap_cyc=1, order="interleaved", active_low=False, frac_bits=8,
        rate_bits=rate_bits, owed_bits=8, clamp=4, backlog=20)
    return LinkParams(hw=hw, bit_cyc=4, timeout_cyc=90, fifo_depth=depth, underrun=policy)


def run(frames: int, gateware: int) -> tuple[str, bool]:
    started = time.monotonic()
    rows = []
    totals = Counter()
    reasons = Counter()
    mutations = Counter()
    violations = []
    compared = 0
    per_shape = frames // len(SHAPES) + 1
    for label, channels, rate_bits, depth, policy in SHAPES:
        link = shape_link(channels, rate_bits, depth, policy)
        sent = seed = 0
        shape_reasons = Counter()
        while sent < per_shape:
            # Half the runs at the decoder's fastest byte rate, half at the UART's (one byte time).
            spacing = 2 if seed % 2 == 0 else link.byte_cyc
            result = generate(link, FuzzSettings(segments=400, spacing=spacing), seed=seed)
            outcome = check(result)
            if not outcome.ok:
                violations.append(f"{label}, seed {seed}: {outcome}")
            sent += result.frames_sent
            totals["frames"] += result.frames_sent
            totals["arrived"] += result.frames_arrived
            totals["applied"] += len(result.model.applied)
            totals["segments"] += sum(1 for a in result.model.applied if a.segment is not None)
            totals["underruns"] += result.model.player.underruns
            mutations.update(result.mutations)
            for reason, count in result.model.counters.rejected.items():
                shape_reasons[reason] += count
            if compared < gateware and spacing == 2:
                compared += _compare(link, result)
            seed += 1
        reasons.update(shape_reasons)
        rows.append((label, sent, seed, sum(shape_reasons.values())))
    seconds = time.monotonic() - started
    ok = not violations
    lines = [
        f"Fuzz of the host link, {datetime.date.today().isoformat()}, {platform.python_implementation()} "
        f"{platform.python_version()} on {platform.machine()}, {seconds:.0f} s.",
        "",
        "| link | frames sent | runs | rejections counted |",
        "| --- | ---: | ---: | ---: |",
        *[f"| {label} | {sent:,} | {runs} | {rej:,} |" for label, sent, runs, rej in rows],
        f"| **total** | **{totals['frames']:,}** | | **{sum(reasons.values()):,}** |",
        "",
        f"Frames that reached the board: {totals['arrived']:,}; applied: {totals['applied']:,} "
        f"({totals['segments']:,} segments); underruns: {totals['underruns']:,}.",
        "",
        "| damage done to a frame | frames |",
        "| --- | ---: |",
        *[f"| {m} | {mutations[m]:,} |" for m in MUTATIONS],
        "",
        "| rejection counted by the board | count |",
        "| --- | ---: |",
        *[f"| {r.name.lower()} | {reasons[r]:,} |" for r in Reason],
        "",
        f"Corrupted frames applied: {sum('corrupted' in v for v in violations)}; commanded segments or "
        f"commands lost or doubled: {sum('order' in v or 'velocity' in v for v in violations)}; frames that "
        f"arrived, were not applied and were not counted: {sum('uncounted' in v for v in violations)}; "
        f"runs with any violation: {len(violations)}.",
    ]
    if gateware:
        lines += ["", f"Gateware replay (Amaranth simulator): {compared:,} frames compared, frame by frame, "
                      "with the model: equal." if ok else "with the model: see the violations."]
    lines += [f"- {v}" for v in violations[:20]]
    return "\n".join(lines) + "\n", ok


def _compare(link: LinkParams, result) -> int:  # noqa: ANN001 - a FuzzResult
    """Replay a run's bytes into the gateware; raise if it differs from the model."""
    from dvgate.sim.link_bench import run_link_bytes

    run = run_link_bytes(link, result.arrivals, result.cycles)
    model = result.model
    if list(run.rejections) != [(r.cycle, r.reason) for r in model.rejections] or \
            list(run.applied) != [a.cycle for a in model.applied] or \
            run.status["rejected"] != model.counters.rejected:
        raise SystemExit(f"the gateware differs from the model on a run of {link}")
    return result.frames_sent


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--frames", type=int, default=102_000, help="frames to send in all (default 102,000)")
    parser.add_argument("--gateware", type=int, default=0, metavar="N",
                        help="also compare about N frames with the gateware (slow: ~200 frames/s)")
    parser.add_argument("-o", "--output", default="-", help="markdown file, or - for standard output")
    args = parser.parse_args(argv)
    text, ok = run(args.frames, args.gateware)
    if args.output == "-":
        sys.stdout.write(text)
    else:
        Path(args.output).write_text(text)
        print(f"wrote {args.output}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
