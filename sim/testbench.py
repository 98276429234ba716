"""Run the emulator's gateware in Amaranth's Python simulator on a :class:`Stimulus`.

The result has the same structure as the reference model's, so tests compare the two
with ``==``. Cycle rules: ``docs/timing.md`` ("inputs applied for cycles 0..N-1,
outputs observed 1..N, status at cycle N").

Speed: inputs are set only at the cycles they change (the driver sleeps between
them) and the outputs are watched by a process that wakes only when a line changes,
so Python runs little per cycle beyond the simulator's own work.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from amaranth.hdl import Module, Signal, Value
from amaranth.lib import wiring
from amaranth.sim import Simulator

from dvgate.gateware.faults import pack_faults
from dvgate.gateware.shared_top import emulator_top
from dvgate.params import IGNORE_CYCLES_BITS, HardwareParams
from dvgate.sim.trace import NEG, POS, ChannelState, Edge, RateChange, RateChanges, RunResult, Status, Stimulus

__all__ = ["PLAN_PORTS", "InputWrites", "edges_from_levels", "input_plan", "input_writes", "run_amaranth",
           "run_cycles"]


def _clock_fs(params: HardwareParams) -> int:
    """Clock period in femtoseconds, even so the two half periods are exact."""
    return max(2, 2 * round(1e15 / params.clock_hz / 2))


def _seconds(fs: int) -> float:
    # Amaranth truncates seconds * 1e15 to an int; half a femtosecond keeps it exact.
    return (fs + 0.5) / 1e15


#: The input ports a plan sets, in the order :attr:`InputWrites.port` numbers them.
PLAN_PORTS = ("strobe", "arm", "rate_we", "rate_commit", "rate_addr", "rate_data", "fault_we", "fault_addr",
              "fault_data", "ignore_we", "ignore_cycles")
_PORT = {name: index for index, name in enumerate(PLAN_PORTS)}
#: Entries of the plan: (cycles, port number, value or values), applied in list order.
_Entries = list[tuple[np.ndarray, int, np.ndarray | int]]


@dataclass(frozen=True, eq=False)
class InputWrites:
    """The input plan as arrays: port ``PLAN_PORTS[port[i]]`` takes ``value[i]`` from ``cycle[i]`` on.

    One entry per cycle and port, sorted by cycle and then by port number (the order of
    :data:`PLAN_PORTS`).

    Attributes
    ----------
    cycle : ndarray of int64
    port : ndarray of int8
    value : ndarray of int64 (of Python ints when the rate register is wider than 64 bits)
    """

    cycle: np.ndarray
    port: np.ndarray
    value: np.ndarray

    def __len__(self) -> int:
        return len(self.cycle)


def input_plan(params: HardwareParams, stim: Stimulus) -> dict[int, dict[str, int]]:
    """Input port values to set at each cycle, for the cycles where something changes.

    Rate changes go through the register port: a group of ``m`` channels changing at
    cycle ``c`` is written at cycles ``c - m .. c - 1`` with the commit on the last.
    A later change of the same channel at the same cycle replaces an earlier one.
    A fault change at cycle ``c`` is written through the fault port at ``c - 1``, and an
    ignore window ``(c, L)`` through ``ignore_we``/``ignore_cycles`` at ``c - 1``. The
    fault and ignore ports appear in the plan only when the stimulus uses them (they are
    0 at reset); ``fault_data`` is the packed :class:`~dvgate.gateware.faults.FaultLayout`.
    The same plan as :func:`input_writes` (which computes it), as dictionaries.

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
    writes = input_writes(params, stim)
    plan: dict[int, dict[str, int]] = {}
    for cycle, port, value in zip(writes.cycle.tolist(), writes.port.tolist(), writes.value.tolist(), strict=True):
        plan.setdefault(cycle, {})[PLAN_PORTS[port]] = value
    return plan


def input_writes(params: HardwareParams, stim: Stimulus, *, strobe: bool = True) -> InputWrites:
    """The plan of :func:`input_plan` as arrays, without a Python object per write.

    For long runs (the compiled engine writes its stimulus records from it): the rate
    changes are grouped and placed on the port with array operations, so a program of
    millions of changes costs a few arrays. Rules, checks and messages: :func:`input_plan`.

    Parameters
    ----------
    params : HardwareParams
        The emulator.
    stim : Stimulus
        The run.
    strobe : bool
        Include the strobe pin's edges (``False``: only its idle level at cycle 0, for a
        caller that writes the edges itself).

    Raises
    ------
    ValueError
        As :func:`input_plan`.
    """
    n_cyc = stim.cycles
    # Entries in the order the plan applies them: at one cycle and port the last one
    # holds; a default (the port's idle value the cycle after a write) only where
    # nothing else sets that port at that cycle.
    sets: _Entries = []
    defaults: _Entries = []
    idle = 0 if params.edge_rising else 1
    at_reset = np.zeros(1, np.int64)
    shared = params.datapath == "shared"
    sets += [(at_reset, _PORT["strobe"], idle), (at_reset, _PORT["arm"], 0)]
    if not shared:
        sets += [(at_reset, _PORT["rate_we"], 0), (at_reset, _PORT["rate_commit"], 0)]
    if strobe:
        edges = np.asarray(stim.strobe_edges, dtype=np.int64)
        edges = edges[edges < n_cyc]
        sets.append((edges, _PORT["strobe"], idle ^ ((np.arange(len(edges), dtype=np.int64) + 1) & 1)))
    arm = _plan_arm(params, stim)
    if arm:
        sets.append((np.array([c for c, _ in arm], np.int64), _PORT["arm"], np.array([v for _, v in arm], np.int64)))
    if shared:
        if len(stim.rate_changes):
            first = stim.rate_changes[0]
            raise ValueError(f"rate change at cycle {first.cycle}: the shared datapath keeps every channel at its "
                             "config rate; use datapath 'per_channel' to change rates")
    else:
        _plan_rates(params, stim, sets, defaults)
    _plan_faults(params, stim, sets, defaults)
    _plan_ignores(stim, sets, defaults)

    # Resolve on one packed key per entry (cycle, then port: 16 ports at most), sorted
    # stably so the entry applied last comes last; cycles past the run are dropped first
    # (so the key cannot overflow).
    if n_cyc >= 1 << 58:
        raise ValueError(f"a run of {n_cyc} cycles is longer than the plan can number (2**58)")
    wide = params.rate_bits > 64  # rates as Python ints then
    parts = [(np.asarray(c, np.int64), p, v) for c, p, v in [*defaults, *sets]]
    inside = [c < n_cyc for c, _, _ in parts]
    key = np.concatenate([c[m] * 16 + p for (c, p, _), m in zip(parts, inside, strict=True)])
    value = np.concatenate([np.broadcast_to(np.asarray(v, dtype=object if wide else np.int64), c.shape)[m]
                            for (c, _, v), m in zip(parts, inside, strict=True)])
    del parts, inside
    order = np.argsort(key, kind="stable")
    key = key[order]
    last = np.ones(len(key), dtype=bool)
    np.not_equal(key[1:], key[:-1], out=last[:-1])
    return InputWrites(key[last] >> 4, (key[last] & 15).astype(np.int8), value[order[last]])


def _plan_arm(params: HardwareParams, stim: Stimulus) -> list[tuple[int, int]]:
    """Writes of the ``arm`` port: at the change's cycle, or ``arm_lead`` cycles before it.

    The shared datapath takes ``arm`` ahead (``HardwareParams.arm_lead``) and follows
    changes exactly when they are ``arm_spacing`` cycles apart; a change it cannot follow
    is refused.
    """
    lead, spacing = params.arm_lead, params.arm_spacing
    out: list[tuple[int, int]] = []
    level, last = 0, None
    for cycle, value in stim.arm_changes:
        value = int(bool(value))
        if cycle >= stim.cycles:
            break
        if lead and value != level:
            if cycle < lead:
                raise ValueError(f"arm change at cycle {cycle}: the shared datapath takes arm {lead} cycles "
                                 f"ahead, so the first change can come at cycle {lead}")
            if last is not None and cycle - last < spacing:
                raise ValueError(f"arm changes at cycles {last} and {cycle}: the shared datapath needs them "
                                 f"at least {spacing} cycles apart")
            last = cycle
        level = value
        if cycle - lead >= 0 or value:
            out.append((max(cycle - lead, 0), value))
    return out


def _check_rate_change(params: HardwareParams, change: RateChange) -> None:
    if not 0 <= change.channel < params.n:
        raise ValueError(f"rate change at cycle {change.cycle}: channel is {change.channel}, "
                         f"allowed 0 to {params.n - 1}")
    if not params.rate_min <= change.rate <= params.rate_max:
        raise ValueError(f"rate change at cycle {change.cycle}: rate is {change.rate}, allowed "
                         f"{params.rate_min} to {params.rate_max} ({params.rate_bits} bits)")


def _plan_rates(params: HardwareParams, stim: Stimulus, sets: _Entries, defaults: _Entries) -> None:
    """Rate changes: each cycle's group written on the cycles before it, the commit on the last."""
    changes = stim.rate_changes
    if not len(changes):
        return
    if isinstance(changes, RateChanges):
        bad = ((changes.channel < 0) | (changes.channel >= params.n) | (changes.rate < params.rate_min)
               | (changes.rate > params.rate_max))
        if bad.any():
            _check_rate_change(params, changes[int(np.argmax(bad))])
        cyc, ch = changes.cycle, changes.channel
        rate: np.ndarray = changes.rate
    else:
        for change in changes:  # before any array: a value may not fit one
            _check_rate_change(params, change)
        n = len(changes)
        cyc = np.fromiter((c.cycle for c in changes), np.int64, n)
        ch = np.fromiter((c.channel for c in changes), np.int64, n)
        rate = np.array([c.rate for c in changes], dtype=object if params.rate_bits > 64 else np.int64)
    # One write per channel and cycle: the channel's place is its first change there,
    # its value the last one (the changes are sorted by cycle, so groups stay in order).
    index = np.arange(len(cyc))
    order = np.lexsort((index, ch, cyc))
    same = (cyc[order][1:] == cyc[order][:-1]) & (ch[order][1:] == ch[order][:-1])
    first = order[np.flatnonzero(np.concatenate(([True], ~same)))]
    final = order[np.flatnonzero(np.concatenate((~same, [True])))]
    place = np.argsort(first, kind="stable")
    first, final = first[place], final[place]
    del order, same, place, index
    at_cycle, channel, value = cyc[first], ch[first], rate[final]
    starts = np.flatnonzero(np.concatenate(([True], at_cycle[1:] != at_cycle[:-1])))
    size = np.diff(np.append(starts, len(at_cycle)))
    group = at_cycle[starts]
    # The port writes a group at c - m .. c - 1, after the previous group's commit (at its c - 1).
    begin = group - size
    free = np.concatenate(([0], group[:-1]))
    tight = begin < free
    if tight.any():
        k = int(np.argmax(tight))
        cycle, m, lo, busy_at = int(group[k]), int(size[k]), int(begin[k]), int(free[k])
        busy = ("cycle 0 comes first" if busy_at == 0 else
                f"the commit of the changes at cycle {busy_at} takes cycle {busy_at - 1}")
        raise ValueError(
            f"rate changes at cycle {cycle}: {m} channel(s) need the write cycles "
            f"{lo} to {cycle - 1} of the rate port, but {busy}; "
            f"space the changes at least one cycle per channel apart")
    j = np.arange(len(at_cycle)) - np.repeat(starts, size)
    m_each = np.repeat(size, size)
    write = at_cycle - m_each + j
    sets.append((write, _PORT["rate_addr"], channel))
    sets.append((write, _PORT["rate_data"], value))
    sets.append((write, _PORT["rate_we"], 1))
    sets.append((write, _PORT["rate_commit"], (j == m_each - 1).astype(np.int64)))
    defaults.append((group, _PORT["rate_we"], 0))
    defaults.append((group, _PORT["rate_commit"], 0))


def _plan_faults(params: HardwareParams, stim: Stimulus, sets: _Entries, defaults: _Entries) -> None:
    """Fault changes: each written through the fault port on the cycle before it holds."""
    written: dict[int, int] = {}  # cycle of the write -> channel
    rows = []
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
        rows.append((at, change.channel, pack_faults(change.faults), change.cycle))
    if rows:
        at = np.array([r[0] for r in rows], np.int64)
        sets.append((at, _PORT["fault_addr"], np.array([r[1] for r in rows], np.int64)))
        sets.append((at, _PORT["fault_data"], np.array([r[2] for r in rows], np.int64)))
        sets.append((at, _PORT["fault_we"], 1))
        defaults.append((np.array([r[3] for r in rows], np.int64), _PORT["fault_we"], 0))


def _plan_ignores(stim: Stimulus, sets: _Entries, defaults: _Entries) -> None:
    """Ignore windows: each written through ``ignore_we``/``ignore_cycles`` on the cycle before it starts."""
    limit = (1 << IGNORE_CYCLES_BITS) - 1
    rows = []
    for cycle, length in stim.ignore_windows:
        if length > limit:
            raise ValueError(f"ignore window at cycle {cycle}: length is {length}, allowed 1 to {limit} "
                             f"({IGNORE_CYCLES_BITS} bits)")
        if cycle > stim.cycles:
            continue
        # Stimulus keeps windows strictly increasing in cycle, so two never share a write cycle.
        rows.append((cycle, length))
    if rows:
        start = np.array([c for c, _ in rows], np.int64)
        sets.append((start - 1, _PORT["ignore_we"], 1))
        sets.append((start - 1, _PORT["ignore_cycles"], np.array([n for _, n in rows], np.int64)))
        defaults.append((start, _PORT["ignore_we"], 0))


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
                 vcd_path: str | Path | None = None,
                 anchors: list[tuple[int, int] | None] | None = None) -> RunResult:
    """Simulate the gateware on ``stim`` and return what it did.

    Parameters
    ----------
    params : HardwareParams
        The emulator (its ``datapath`` chooses the top).
    stim : Stimulus
        Strobe edges, rate changes and arm changes for cycles ``0 .. N-1``.
    vcd_path : str or Path, optional
        Write the waveforms (every signal of the design) to this VCD file.
    anchors : list, optional
        Shared datapath only: filled with, per channel, ``(cycle, owed)``, the owed amount
        the datapath holds for that cycle (its last anchor, which may lie a few cycles
        past ``N``), or None while a visit is writing the channel's words at ``N``.

    Returns
    -------
    RunResult
        Every logical pulse seen on cycles ``1 .. N``, sorted; the status and each
        channel's owed amount and pending pulses at cycle ``N``. The shared datapath has
        no owed register: its ``owed`` is None (see ``anchors``).

    Raises
    ------
    ValueError
        If the rate changes cannot be written through the register port in time.
    """
    plan_by_name = input_plan(params, stim)  # before building: it may raise
    top = emulator_top(params)
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
        if params.datapath == "shared":
            results["channels"] = tuple(ChannelState(owed=None, pend_pos=None, pend_neg=None)
                                        for _ in top.emitters)
            if anchors is not None:
                anchors[:] = top.owed.held(ctx, n_cyc)
        else:
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
