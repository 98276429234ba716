"""Simulation speed: the Python simulation, the compiled engine and Icarus Verilog on one program.

All engines run the same stimulus of the 3-channel example (``dvgate/examples/bench.toml``:
12 MHz clock, a strobe every 1 ms, burst scheme), and each result is checked equal to the
reference model's before its time counts. The compiled engine is measured three ways:
on the same short program (process start included), on a long program with its fast
path (the sustained rate), and on the long program stepping every cycle (fast path off).
Then the compiled engine from 1 to 16 channels, and the reference model's strobes/s.

::

    python benchmarks/sim_speed.py                 # about two minutes, builds included
    python benchmarks/sim_speed.py -o table.md     # also write the markdown there

Builds are cached (``DVGATE_CACHE``); the first run also compiles the designs, which is
not timed.
"""

from __future__ import annotations

import argparse
import datetime
import time
from pathlib import Path

from machine import describe

from dvgate.config import load_config
from dvgate.sim.compiled import build, compiler_description, count_compiled, run_compiled
from dvgate.sim.hdl_sims import find_simulator, run_icarus, run_verilator
from dvgate.sim.model import run_model, simulate
from dvgate.sim.stimulus import stimulus_for
from dvgate.sim.testbench import run_amaranth

EXAMPLE = Path(__file__).resolve().parents[1] / "dvgate" / "examples" / "bench.toml"


def timed(run, *args, repeat: int = 1, **kwargs):
    """The best wall time of ``repeat`` calls, and the last result."""
    best, result = float("inf"), None
    for _ in range(repeat):
        start = time.perf_counter()
        result = run(*args, **kwargs)
        best = min(best, time.perf_counter() - start)
    return best, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--short", type=float, default=0.01, help="seconds of the shared program (default 0.01)")
    parser.add_argument("--long", type=float, default=10.0, help="seconds of the long program (default 10)")
    parser.add_argument("-o", "--output", help="also write the markdown to this file")
    args = parser.parse_args()

    config = load_config(EXAMPLE)
    hw = config.hw
    clock = config.clock_hz
    short = stimulus_for(config, args.short)
    long_ = stimulus_for(config, args.long)
    want_short = run_model(hw, short)
    build(hw)

    rows = []  # (engine, program, cycles, seconds)

    def row(engine: str, program: str, cycles: int, seconds: float) -> None:
        rows.append((engine, program, cycles, seconds))
        print(f"  {engine:<40} {program:<28} {cycles / seconds:>14,.0f} cycles/s", flush=True)

    print(f"machine: {describe()}")
    print(f"compiler: {compiler_description()}")
    seconds, got = timed(run_amaranth, hw, short)
    assert got == want_short, "python simulation differs from the model"
    row("Python simulation (Amaranth)", f"{args.short * 1e3:g} ms", short.cycles, seconds)
    python_rate = short.cycles / seconds

    seconds, got = timed(run_compiled, hw, short, repeat=3)
    assert got == want_short, "compiled engine differs from the model"
    row("compiled engine (CXXRTL)", f"{args.short * 1e3:g} ms", short.cycles, seconds)

    for name, run in (("Icarus Verilog", run_icarus), ("Verilator", run_verilator)):
        if find_simulator(name.split()[0].lower()) is None:
            print(f"  {name}: not installed, skipped")
            continue
        run(hw, short)  # build outside the timing
        seconds, got = timed(run, hw, short)
        assert got == want_short, f"{name} differs from the model"
        row(name, f"{args.short * 1e3:g} ms", short.cycles, seconds)

    model_long = simulate(hw, long_, record=False)
    seconds, counted = timed(count_compiled, hw, long_, repeat=3)
    assert counted.counts == tuple(model_long.counts) and counted.result.status == model_long.result.status
    row("compiled engine, fast path", f"{args.long:g} s (counts)", long_.cycles, seconds)
    fast_rate = long_.cycles / seconds
    plain = stimulus_for(config, min(args.long, 2.0))
    plain_model = simulate(hw, plain, record=False)
    seconds, counted = timed(count_compiled, hw, plain, fast=False)
    assert counted.counts == tuple(plain_model.counts) and counted.skipped == 0
    row("compiled engine, every cycle evaluated", f"{min(args.long, 2.0):g} s (counts)", plain.cycles, seconds)
    plain_rate = plain.cycles / seconds

    print("channels (compiled engine, example config with N channels):")
    scale = []
    for n in (1, 2, 4, 8, 16):
        cfg_n = load_config(EXAMPLE, channels=n)
        stim_n = stimulus_for(cfg_n, min(args.long, 5.0))
        build(cfg_n.hw)
        want = simulate(cfg_n.hw, stim_n, record=False)
        fast_s, got_fast = timed(count_compiled, cfg_n.hw, stim_n, repeat=2)
        plain_stim = stimulus_for(cfg_n, 0.5)
        plain_s, got_plain = timed(count_compiled, cfg_n.hw, plain_stim, fast=False)
        assert got_fast.counts == tuple(want.counts)
        scale.append((n, stim_n.cycles / fast_s, plain_stim.cycles / plain_s))
        print(f"  {n:>2} channels: {scale[-1][1]:>14,.0f} cycles/s fast path, {scale[-1][2]:>12,.0f} every cycle",
              flush=True)

    model_stim = stimulus_for(config, 60.0)
    seconds, model_run = timed(simulate, hw, model_stim, record=False)
    model_rate = len(model_run.strobes) / seconds

    lines = [
        f"Measured {datetime.date.today().isoformat()} on {describe()}; compiler {compiler_description()}.",
        f"Example config: {hw.n} channels, {clock / 1e6:g} MHz clock, strobe every {config.strobe_period_cyc} "
        "cycles, burst scheme. Every result below was checked equal to the reference model's.",
        "",
        "| engine | program | cycles | cycles/s | vs Python | vs real time at the config's clock |",
        "| --- | --- | ---: | ---: | ---: | ---: |",
    ]
    for engine, program, cycles, secs in rows:
        rate = cycles / secs
        lines.append(f"| {engine} | {program} | {cycles:,} | {rate:,.0f} | {rate / python_rate:,.1f}x | "
                     f"{rate / clock:,.2f}x |")
    lines += [
        "",
        f"Target: 20,000,000 cycles/s for the 3-channel example. Fast path: {fast_rate:,.0f} "
        f"({fast_rate / 20e6:.1f}x the target); every cycle evaluated: {plain_rate:,.0f} "
        f"({plain_rate / 20e6:.2f}x the target).",
        "",
        "| channels | compiled, fast path (cycles/s) | compiled, every cycle (cycles/s) |",
        "| ---: | ---: | ---: |",
    ]
    lines += [f"| {n} | {f:,.0f} | {p:,.0f} |" for n, f, p in scale]
    lines += ["", f"Reference model: {model_rate:,.0f} strobes/s ({len(model_run.strobes):,} strobes of the "
                  f"example, {hw.n} channels, counts only)."]
    text = "\n".join(lines) + "\n"
    print()
    print(text)
    if args.output:
        Path(args.output).write_text(text)


if __name__ == "__main__":
    main()
