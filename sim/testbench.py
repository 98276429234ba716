"""Run the emulator's gateware in Amaranth's Python simulator on a :class:`Stimulus`.

The result has the same structure as the reference model's, so tests compare the two
with ``==``. Cycle rules: ``docs/timing.md`` ("inputs applied for cycles 0..N-1,
outputs observed 1..N, status at cycle N").

Speed: inputs are set only at the cycles they change (the driver sleeps between
them) and the outputs are watched by a process that wakes only when a line changes,
so Python runs little per cycle beyond the simulator's own work.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Mapping, Sequence
from pathlib import Path

from amaranth.hdl import Module, Signal, Value
from amaranth.lib import wiring
from amaranth.sim import Simulator

from dvgate.gateware.faults import pack_faults
from dvgate.gateware.top import Emulator
from dvgate.params import IGNORE_CYCLES_BITS, HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RunResult, Status, Stimulus

__all__ = ["edges_from_levels", "input_plan", "run_amaranth", "run_cycles"]


def _clock_fs(params: HardwareParams) -> int:
    """Clock period in femtoseconds, even so the two half periods are exact."""
    return max(2, 2 * round(1e15 / params.clock_hz / 2))


def _seconds(fs: int) -> float:
    # Amaranth truncates seconds * 1e15 to an int; half a femtosecond keeps it exact.
    return (fs + 0.5) / 1e15


def input_plan(params: HardwareParams, stim: Stimulus) -> dict[int, dict[str, int]]:
    """Input port values to set at each cycle, for the cycles where something changes.

    Rate changes go through the register port: a group of ``m`` channels changing at
    cycle ``c`` is written at cycles ``c - m .. c - 1`` with the commit on the last.
    A later change of the same channel at the same cycle replaces an earlier one.
    A fault change at cycle ``c`` is written through the fault port at ``c - 1``, and an
    ignore window ``(c, L)`` through ``ignore_we``/``ignore_cycles`` at ``c - 1``. The
    fault and ignore ports appear in the plan only when the stimulus uses them (they are
    0 at reset); ``fault_data`` is the packed :class:`~dvgate.gateware.faults.FaultLayout`.

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    stim : Stimulus
        The run.

    Returns
    -------
    dict
        ``{cycle: {port name: value}}`` for the input ports of :class:`Emulator`, for
        cycles ``0 .. stim.cycles - 1``, sorted by cycle.

    Raises
    ------
    ValueError
        If a rate or fault change names a channel or a value the emulator does not have,
        the rate changes are packed too tightly to write them through the port, or two
        fault changes (or two ignore windows) need their port at the same cycle.
    """
    n_cyc = stim.cycles
    plan: dict[int, dict[str, int]] = defaultdict(dict)
    idle = 0 if params.edge_rising else 1
    plan[0].update({"strobe": idle, "arm": 0, "rate_we": 0, "rate_commit": 0})

    level = idle
    for edge in stim.strobe_edges:
        if edge >= n_cyc:
            break
        level ^= 1
        plan[edge]["strobe"] = level

    for cycle, arm in stim.arm_changes:
        if cycle < n_cyc:
            plan[max(cycle, 0)]["arm"] = int(bool(arm))

    groups: dict[int, dict[int, int]] = {}
    for change in stim.rate_changes:
        if not 0 <= change.channel < params.n:
            raise ValueError(f"rate change at cycle {change.cycle}: channel is {change.channel}, "
                             f"allowed 0 to {params.n - 1}")
        if not params.rate_min <= change.rate <= params.rate_max:
            raise ValueError(f"rate change at cycle {change.cycle}: rate is {change.rate}, allowed "
                             f"{params.rate_min} to {params.rate_max} ({params.rate_bits} bits)")
        groups.setdefault(change.cycle, {})[change.channel] = change.rate

    free = 0  # first cycle the port may write for the next group
    for cycle, rates in groups.items():
        first = cycle - len(rates)
        if first < free:
            busy = ("cycle 0 comes first" if free == 0 else
                    f"the commit of the changes at cycle {free} takes cycle {free - 1}")
            raise ValueError(
                f"rate changes at cycle {cycle}: {len(rates)} channel(s) need the write cycles "
                f"{first} to {cycle - 1} of the rate port, but {busy}; "
                f"space the changes at least one cycle per channel apart")
        for j, (channel, rate) in enumerate(rates.items()):
            plan[first + j].update({
                "rate_addr": channel,
                "rate_data": rate,
                "rate_we": 1,
                "rate_commit": int(j == len(rates) - 1),
            })
        after = plan[cycle]
        after.setdefault("rate_we", 0)
        after.setdefault("rate_commit", 0)
        free = cycle

    _plan_faults(params, stim, plan)
    _plan_ignores(stim, plan)
    return {c: plan[c] for c in sorted(plan) if c < n_cyc}


def _plan_faults(params: HardwareParams, stim: Stimulus, plan: dict[int, dict[str, int]]) -> None:
    """Fault changes: each written through the fault port on the cycle before it holds."""
    written: dict[int, int] = {}  # cycle of the write -> channel
    for change in stim.fault_changes:
        if not 0 <= change.channel < params.n:
            raise ValueError(f"fault change at cycle {change.cycle}: channel is {change.channel}, "
                             f"allowed 0 to {params.n - 1}")
        if change.cycle > stim.cycles:
            continue  # takes effect after the last observed cycle
        at = change.cycle - 1
        if at in written:
            raise ValueError(
                f"fault changes at cycle {change.cycle}: channels {written[at]} and {change.channel} both need "
                f"the fault port at cycle {at}; a fault set written at c - 1 holds from c, so changes of "
                "different channels must fall on different cycles")
        written[at] = change.channel
        plan[at].update({"fault_addr": change.channel, "fault_data": pack_faults(change.faults), "fault_we": 1})
        plan[change.cycle].setdefault("fault_we", 0)


def _plan_ignores(stim: Stimulus, plan: dict[int, dict[str, int]]) -> None:
    """Ignore windows: each written through ``ignore_we``/``ignore_cycles`` on the cycle before it starts."""
    limit = (1 << IGNORE_CYCLES_BITS) - 1
    for cycle, length in stim.ignore_windows:
        if length > limit:
            raise ValueError(f"ignore window at cycle {cycle}: length is {length}, allowed 1 to {limit} "
                             f"({IGNORE_CYCLES_BITS} bits)")
        if cycle > stim.cycles:
            continue
        # Stimulus keeps windows strictly increasing in cycle, so two never share a write cycle.
        plan[cycle - 1].update({"ignore_we": 1, "ignore_cycles": length})
        plan[cycle].setdefault("ignore_we", 0)


def edges_from_levels(changes: list[tuple[int, tuple[int, ...]]], n_lines: int,
           active_low: bool) -> tuple[Edge, ...]:
    """Pulses from the output changes ``(cycle, physical levels)`` seen after each edge."""
    idle = int(active_low)
    level = [0] * n_lines
    rise: list[int | None] = [None] * n_lines
    edges = []
    # Several wake-ups in one cycle: the last one holds the settled levels.
    settled = dict(changes)
    for cycle in sorted(settled):
        for i, phys in enumerate(settled[cycle]):
            now = phys ^ idle
            if now == level[i]:
                continue
            level[i] = now
            if now:
                rise[i] = cycle
            else:
                edges.append(Edge(i // 2, (POS, NEG)[i % 2], rise[i], cycle))
    for i in range(n_lines):
        if level[i]:
            edges.append(Edge(i // 2, (POS, NEG)[i % 2], rise[i], None))
    return tuple(sorted(edges, key=lambda e: (e.channel, e.line, e.rise)))


def run_amaranth(params: HardwareParams, stim: Stimulus, *,
                 vcd_path: str | Path | None = None) -> RunResult:
    """Simulate the gateware on ``stim`` and return what it did.

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    stim : Stimulus
        Strobe edges, rate changes and arm changes for cycles ``0 .. N-1``.
    vcd_path : str or Path, optional
        Write the waveforms (every signal of the design) to this VCD file.

    Returns
    -------
    RunResult
        Every logical pulse seen on cycles ``1 .. N``, sorted; the status and each
        channel's owed amount and pending pulses at cycle ``N``.

    Raises
    ------
    ValueError
        If the rate changes cannot be written through the register port in time.
    """
    plan_by_name = input_plan(params, stim)  # before building: it may raise
    top = Emulator(params)
    # Value.cast: fault_data is a struct view; the plan holds its packed bits.
    plan = [(at, [(Value.cast(getattr(top, name)), value) for name, value in values.items()])
            for at, values in plan_by_name.items()]
    n_cyc = stim.cycles

    m = Module()
    m.submodules.top = top
    # Cycle number for the output watcher (cycle k is after k clock edges).
    cycle = Signal(range(n_cyc + 2))
    m.d.sync += cycle.eq(cycle + 1)
    ports = [port for i in range(params.n) for port in top.output_ports(i)]

    changes: list[tuple[int, tuple[int, ...]]] = []
    results: dict = {}
    period_fs = _clock_fs(params)

    async def drive(ctx) -> None:
        now = 0
        for at, values in plan:
            if at > now:
                await ctx.delay(_seconds((at - now) * period_fs))
                now = at
            for port, value in values:
                ctx.set(port, value)
        # Inputs change half a period before the edge; this lands in cycle N.
        await ctx.delay(_seconds((n_cyc - now) * period_fs))
        results["status"] = Status(
            strobes=ctx.get(top.strobes),
            period=ctx.get(top.period),
            host_absent=bool(ctx.get(top.host_absent)),
            overrun=bool(ctx.get(top.flags.overrun)),
            clamped=bool(ctx.get(top.flags.clamped)),
            deferred=bool(ctx.get(top.flags.deferred)),
            saturated=bool(ctx.get(top.flags.saturated)),
            overruns=ctx.get(top.overruns),
            clamps=ctx.get(top.clamps),
            deferrals=ctx.get(top.deferrals),
            saturations=ctx.get(top.saturations),
            ignored=ctx.get(top.ignored),
        )
        results["channels"] = tuple(
            ChannelState(owed=ctx.get(acc.owed), pend_pos=ctx.get(em.pend_pos),
                         pend_neg=ctx.get(em.pend_neg))
            for acc, em in zip(top.accumulators, top.emitters, strict=True))
        results["cycle"] = ctx.get(cycle)

    async def watch(ctx) -> None:
        async for *levels, at in ctx.changed(*ports).sample(cycle):
            changes.append((at, tuple(levels)))

    sim = Simulator(m)
    # Edges at (k + 1/2) periods; the driver sets inputs at whole periods, between edges.
    sim.add_clock(_seconds(period_fs), phase=_seconds(period_fs // 2))
    sim.add_testbench(drive)
    sim.add_process(watch)
    if vcd_path is not None:
        with sim.write_vcd(str(vcd_path)):
            sim.run()
    else:
        sim.run()

    if results.get("cycle") != n_cyc:  # the clock and the driver must agree on time
        raise RuntimeError(f"simulation ended at cycle {results.get('cycle')}, not {n_cyc}")
    return RunResult(
        cycles=n_cyc,
        edges=edges_from_levels(changes, 2 * params.n, params.active_low),
        status=results["status"],
        channels=results["channels"],
    )


def _member(dut: wiring.Component, path: str):
    """``dut.a.b`` for ``path == "a.b"``."""
    value = dut
    for part in path.split("."):
        value = getattr(value, part)
    return value


def run_cycles(dut: wiring.Component, inputs: Sequence[Mapping[str, int]],
               watch: Sequence[str], *, vcd_path: str | Path | None = None) -> list[dict[str, int]]:
    """Drive a component cycle by cycle and read some of its signals every cycle.

    A small harness for unit tests of single components: ``inputs[k]`` gives the
    values set during cycle ``k`` (a port keeps its value until set again), and the
    ``watch`` signals are read during cycle ``k`` once those inputs have settled, so a
    combinational output shows its value at cycle ``k``.

    Parameters
    ----------
    dut : wiring.Component
        The component (its ``sync`` domain gets the clock).
    inputs : sequence of mapping
        Per cycle, ``{attribute path: value}``; paths such as ``"flags.overrun"`` or
        ``"rate_regs.we"`` reach members of members.
    watch : sequence of str
        Attribute paths to read each cycle.
    vcd_path : str or Path, optional
        Write the waveforms to this VCD file.

    Returns
    -------
    list of dict
        ``rows[k][path]`` is the value of ``path`` at cycle ``k``, for
        ``k = 0 .. len(inputs) - 1``.
    """
    sets = [[(_member(dut, path), value) for path, value in row.items()] for row in inputs]
    reads = [(path, _member(dut, path)) for path in watch]
    rows: list[dict[str, int]] = []

    async def bench(ctx) -> None:
        for row in sets:
            for port, value in row:
                ctx.set(port, value)
            rows.append({path: ctx.get(sig) for path, sig in reads})
            await ctx.tick()

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    if vcd_path is not None:
        with sim.write_vcd(str(vcd_path)):
            sim.run()
    else:
        sim.run()
    return rows
