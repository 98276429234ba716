"""Run the emulator with its host link in Amaranth's simulator, on a byte schedule.

The testbench drives the serial pin bit by bit (8N1, ``bit_cyc`` cycles per bit) and
the strobe pin, and records every output edge, every change of the live rates and of
the arm input, every write of the emulator's fault and ignore ports, and the bytes the
board sends back (decoded from its serial pin). The result holds plain Python data, for
comparison with ``dvgate.sim.link_model``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from amaranth.hdl import Module, Mux, Signal
from amaranth.lib import wiring
from amaranth.sim import Simulator

from dvgate.gateware.link import ACCEPTED_WORD, reject_word
from dvgate.gateware.linked_top import LinkedTop, fault_fields, host_to_player
from dvgate.linkspec import BITS_PER_BYTE, LinkParams, Reason
from dvgate.params import HardwareParams
from dvgate.sim.link_model import WireByte
from dvgate.sim.testbench import edges_from_levels
from dvgate.sim.trace import Edge


@dataclass(frozen=True)
class LinkedRun:
    """What the linked gateware did during a run.

    Attributes
    ----------
    cycles : int
        Run length.
    edges : tuple of Edge
        Logical output pulses (as :func:`dvgate.sim.testbench.run_amaranth` gives them).
    rates : tuple of (int, tuple of int)
        ``(cycle, live rates)`` from each cycle the live rates changed.
    arm : tuple of (int, int)
        ``(cycle, level)`` of the emulator's ``arm`` input from each change.
    tx : tuple of (int, int)
        ``(cycle, byte)``: bytes the board sent, with the cycle their start bit fell.
    status : dict
        Link and player registers at the end: ``next_seq``, ``accepted``, ``rejected``
        (by :class:`Reason`), ``play``, ``level``, ``played``, ``underruns``, ``armed``,
        and the emulator's ``ignored`` counter.
    faults : tuple of (int, int, int)
        ``(cycle, channel, bits)``: each write of the emulator's fault port, with the
        cycle the set holds from and the packed :class:`~dvgate.gateware.faults.FaultLayout`.
    ignores : tuple of (int, int)
        ``(cycle, length)``: each write of the ignore port, with the cycle its window starts.
    """

    cycles: int
    edges: tuple[Edge, ...]
    rates: tuple[tuple[int, tuple[int, ...]], ...]
    arm: tuple[tuple[int, int], ...]
    tx: tuple[tuple[int, int], ...]
    status: dict
    faults: tuple[tuple[int, int, int], ...] = ()
    ignores: tuple[tuple[int, int], ...] = ()


def _rates_of(hw: HardwareParams):  # noqa: ANN202 - returns a small closure
    """A function reading every channel's signed rate out of the rate registers' raw bits."""
    width = hw.rate_bits

    def split(raw: int) -> tuple[int, ...]:
        out = []
        for i in range(hw.n):
            v = (raw >> (i * width)) & ((1 << width) - 1)
            out.append(v - (1 << width) if v >> (width - 1) else v)
        return tuple(out)

    return split


def _port_writes(m: Module, ports: wiring.Component, cycle: Signal) -> tuple:
    """Latch each write of the fault and ignore ports, so a watcher wakes once per write.

    ``ports`` has ``fault_we``, ``fault_addr``, ``fault_data``, ``ignore_we`` and
    ``ignore_cycles`` (the host link's outputs or the emulator's inputs). Returns the
    watcher processes and the lists they fill: ``(cycle, channel, bits)`` with the cycle
    a fault set holds from, and ``(cycle, length)`` with the cycle a window starts.
    """
    f_count, f_addr, f_data = Signal(16), Signal.like(ports.fault_addr), Signal(len(ports.fault_data.as_value()))
    i_count, i_cycles = Signal(16), Signal.like(ports.ignore_cycles)
    with m.If(ports.fault_we):
        m.d.sync += [f_count.eq(f_count + 1), f_addr.eq(ports.fault_addr), f_data.eq(ports.fault_data.as_value())]
    with m.If(ports.ignore_we):
        m.d.sync += [i_count.eq(i_count + 1), i_cycles.eq(ports.ignore_cycles)]
    faults: list[tuple[int, int, int]] = []
    ignores: list[tuple[int, int]] = []

    # The latches change on the edge after the write: ``at`` is the first cycle it holds.
    async def watch_faults(ctx) -> None:
        async for _, addr, bits, at in ctx.changed(f_count).sample(f_addr, f_data, cycle):
            if at:  # the first wake-up, at cycle 0, gives the values at reset
                faults.append((at, addr, bits))

    async def watch_ignores(ctx) -> None:
        async for _, length, at in ctx.changed(i_count).sample(i_cycles, cycle):
            if at:
                ignores.append((at, length))

    return (watch_faults, watch_ignores), faults, ignores


def wire_levels(wire: Sequence[WireByte], bit_cyc: int) -> list[tuple[int, int]]:
    """``(cycle, level)`` changes of a serial line carrying ``wire`` (idle high).

    One start bit low, eight data bits least significant first, one stop bit high, each
    ``bit_cyc`` cycles (common practice, no source).
    """
    out: list[tuple[int, int]] = []
    level = 1
    for w in wire:
        if out and w.start < out[-1][0]:
            raise ValueError(f"byte at cycle {w.start} overlaps the one before")
        bits = [0] + [(w.value >> i) & 1 for i in range(8)] + [1]
        for k, bit in enumerate(bits):
            if bit != level:
                out.append((w.start + k * bit_cyc, bit))
                level = bit
    return out


def decode_line(changes: Sequence[tuple[int, int]], bit_cyc: int) -> list[tuple[int, int]]:
    """Bytes on a serial line from its level changes: ``(start cycle, byte)``.

    Each bit is read in its middle, counted from the start bit's falling edge.
    """
    times = [c for c, _ in changes]
    levels = [v for _, v in changes]

    def level_at(cycle: int) -> int:
        lo, hi = 0, len(times)
        while lo < hi:  # last change at or before cycle
            mid = (lo + hi) // 2
            if times[mid] <= cycle:
                lo = mid + 1
            else:
                hi = mid
        return levels[lo - 1] if lo else 1

    out = []
    index = 0
    while index < len(changes):
        start, level = changes[index]
        if level != 0:
            index += 1
            continue
        value = 0
        for bit in range(8):
            value |= level_at(start + (bit + 1) * bit_cyc + bit_cyc // 2) << bit
        out.append((start, value))
        end = start + BITS_PER_BYTE * bit_cyc - bit_cyc // 2  # middle of the stop bit
        while index < len(changes) and changes[index][0] <= end:
            index += 1
    return out


def run_linked(link: LinkParams, wire: Sequence[WireByte], cycles: int, *,
               strobe_edges: Sequence[int] = (), arm_pin: int = 1,
               vcd_path: str | Path | None = None) -> LinkedRun:
    """Simulate :class:`~dvgate.gateware.linked_top.LinkedTop` for ``cycles`` cycles.

    Parameters
    ----------
    link : LinkParams
        The emulator and its link.
    wire : sequence of WireByte
        Bytes sent to the board and the cycle each start bit falls.
    cycles : int
        Run length.
    strobe_edges : sequence of int
        Cycles at which the strobe pin toggles (inactive at reset).
    arm_pin : int
        Level of the arm pin throughout.
    vcd_path : str or Path, optional
        Write the waveforms to this VCD file.
    """
    hw = link.hw
    top = LinkedTop(link)
    m = Module()
    m.submodules.top = top
    cycle = Signal(range(cycles + 2))
    m.d.sync += cycle.eq(cycle + 1)

    strobe_active = 1 if hw.edge_rising else 0
    events: list[tuple[int, object, int]] = []
    for c, level in wire_levels(wire, link.bit_cyc):
        events.append((c, top.rx, level))
    for k, c in enumerate(strobe_edges):
        events.append((c, top.strobe, strobe_active if k % 2 == 0 else 1 - strobe_active))
    events = [e for e in events if e[0] < cycles]
    events.sort(key=lambda e: e[0])

    ports = [port for i in range(hw.n) for port in top.emulator.output_ports(i)]
    live = top.emulator.rate_regs.rates.as_value()
    split = _rates_of(hw)
    emu_arm = top.emulator.arm
    out_changes: list[tuple[int, tuple[int, ...]]] = []
    rate_changes: list[tuple[int, tuple[int, ...]]] = []
    arm_changes: list[tuple[int, int]] = []
    tx_changes: list[tuple[int, int]] = []
    status: dict = {}
    watchers, fault_writes, ignore_writes = _port_writes(m, top.emulator, cycle)

    async def drive(ctx) -> None:
        ctx.set(top.arm, arm_pin)
        ctx.set(top.strobe, 1 - strobe_active)
        now = 0
        for at, port, value in events:
            if at > now:
                await ctx.tick().repeat(at - now)
                now = at
            ctx.set(port, value)
        if cycles > now:
            await ctx.tick().repeat(cycles - now)
        host, player = top.host, top.player
        status.update(
            cycle=ctx.get(cycle),
            **_link_status(ctx, host, player),
            counts=[tuple(_pulse_count(ctx, top.counters, 2 * i + k) for k in range(2)) for i in range(hw.n)],
            ignored=ctx.get(top.emulator.ignored),
        )

    async def watch_outputs(ctx) -> None:
        async for *levels, at in ctx.changed(*ports).sample(cycle):
            out_changes.append((at, tuple(levels)))

    async def watch_rates(ctx) -> None:
        async for raw, at in ctx.changed(live).sample(cycle):
            rate_changes.append((at, split(raw)))

    async def watch_arm(ctx) -> None:
        async for level, at in ctx.changed(emu_arm).sample(cycle):
            arm_changes.append((at, level))

    async def watch_tx(ctx) -> None:
        async for level, at in ctx.changed(top.tx).sample(cycle):
            tx_changes.append((at, level))

    sim = Simulator(m)
    sim.add_clock(1e-6)
    sim.add_testbench(drive)
    for proc in (watch_outputs, watch_rates, watch_arm, watch_tx, *watchers):
        sim.add_process(proc)
    if vcd_path is not None:
        with sim.write_vcd(str(vcd_path)):
            sim.run()
    else:
        sim.run()
    if status.get("cycle") != cycles:
        raise RuntimeError(f"simulation ended at cycle {status.get('cycle')}, not {cycles}")
    return LinkedRun(
        cycles=cycles,
        edges=edges_from_levels(out_changes, 2 * hw.n, hw.active_low),
        rates=tuple(rate_changes),
        arm=tuple(arm_changes),
        tx=tuple(decode_line(tx_changes, link.bit_cyc)),
        status=status,
        faults=tuple(fault_writes),
        ignores=tuple(ignore_writes),
    )


@dataclass(frozen=True)
class LinkBytesRun:
    """What the link's command layer and player did with bytes fed straight in.

    Attributes
    ----------
    rejections : tuple of (int, Reason)
        Cycle and reason of every rejection.
    applied : tuple of int
        Cycles at which a frame was applied.
    rates : tuple of (int, tuple of int)
        ``(cycle, live rates)`` from each cycle the live rates changed.
    arm : tuple of (int, int)
        ``(cycle, level)`` of the player's arm output from each change.
    replies : tuple of bytes
        Frames the encoder sent, split at the flag bytes (with the emulator's fault stages
        behind the fault port, so their fault sets are in the replies; the other fields
        of the emulator are zero).
    status : dict
        As :attr:`LinkedRun.status` (without the emulator's fields).
    faults, ignores : tuple
        The link's fault and ignore port writes, as :attr:`LinkedRun.faults` and
        :attr:`LinkedRun.ignores`.
    """

    rejections: tuple[tuple[int, Reason], ...]
    applied: tuple[int, ...]
    rates: tuple[tuple[int, tuple[int, ...]], ...]
    arm: tuple[tuple[int, int], ...]
    replies: tuple[bytes, ...]
    status: dict
    faults: tuple[tuple[int, int, int], ...] = ()
    ignores: tuple[tuple[int, int], ...] = ()


def run_link_bytes(link: LinkParams, arrivals: Sequence[tuple[int, int, int]], cycles: int) -> LinkBytesRun:
    """Feed bytes straight into the link's command layer, with the segment player behind it.

    No UART: ``arrivals`` gives ``(cycle, byte, framing_error)`` as the receiver would
    offer them (at least two cycles apart), so many frames fit in a short simulation.
    The player drives a bank of rate registers; the encoder's bytes are taken as soon as
    offered.
    """
    from dvgate.gateware.faults import FaultStage
    from dvgate.gateware.link import HostLink
    from dvgate.gateware.rates import RateRegisters
    from dvgate.gateware.segments import SegmentPlayer

    hw = link.hw
    m = Module()
    m.submodules.host = host = HostLink(link)
    m.submodules.player = player = SegmentPlayer(link)
    m.submodules.regs = regs = RateRegisters(hw)
    # The emulator's fault stages behind the fault port, for the telemetry's fault set.
    for i in range(hw.n):
        m.submodules[f"fault{i}"] = stage = FaultStage(hw)
        m.d.comb += [stage.we.eq(host.fault_we & (host.fault_addr == i)), stage.data.eq(host.fault_data)]
        with m.If(host.tm_channel == i):
            m.d.comb += fault_fields(host.tm, stage.faults)
    cycle = Signal(range(cycles + 2))
    m.d.sync += cycle.eq(cycle + 1)
    m.d.comb += [
        *host_to_player(host, player),
        regs.addr.eq(player.rate_addr),
        regs.data.eq(player.rate_data),
        regs.we.eq(player.rate_we),
        regs.commit.eq(player.rate_commit),
        host.o.ready.eq(1),
        host.tm.level.eq(player.level),
        host.tm.free.eq(player.free),
        host.tm.played.eq(player.played),
        host.tm.underruns.eq(player.underruns),
        host.tm.state.eq(player.play | (player.arm << 2)),
    ]
    # Each byte the encoder sends, latched, so the watcher wakes only when one is sent.
    out_count = Signal(16)
    out_byte = Signal(8)
    with m.If(host.o.valid):
        m.d.sync += [out_count.eq(out_count + 1), out_byte.eq(host.o.payload)]
    live = regs.rates.as_value()
    split = _rates_of(hw)
    watchers, fault_writes, ignore_writes = _port_writes(m, host, cycle)

    rejections: list[tuple[int, Reason]] = []
    applied: list[int] = []
    rate_changes: list[tuple[int, tuple[int, ...]]] = []
    arm_changes: list[tuple[int, int]] = []
    sent = bytearray()
    status: dict = {}

    async def drive(ctx) -> None:
        now = 0
        for at, value, error in arrivals:
            if at >= cycles:
                break
            if at < now:
                raise ValueError(f"byte at cycle {at} comes before cycle {now}")
            if at > now:
                await ctx.tick().repeat(at - now)
                now = at
            ctx.set(host.i.valid, 1)
            ctx.set(host.i.payload.data, value)
            ctx.set(host.i.payload.framing_error, error)
            await ctx.tick()
            ctx.set(host.i.valid, 0)
            now += 1
        if cycles > now:
            await ctx.tick().repeat(cycles - now)
        status.update(
            cycle=ctx.get(cycle),
            **_link_status(ctx, host, player),
        )

    async def watch_rates(ctx) -> None:
        async for raw, at in ctx.changed(live).sample(cycle):
            rate_changes.append((at, split(raw)))

    async def watch_arm(ctx) -> None:
        async for level, at in ctx.changed(player.arm).sample(cycle):
            arm_changes.append((at, level))

    async def watch_out(ctx) -> None:
        async for _, value in ctx.changed(out_count).sample(out_byte):
            sent.append(value)

    # Each frame's outcome, latched, so the watcher wakes once per frame that ends.
    ends, outcome = Signal(16), Signal(4)
    with m.If(host.apply_stb | host.reject_stb):
        m.d.sync += [ends.eq(ends + 1), outcome.eq(Mux(host.apply_stb, len(Reason), host.reason))]

    async def watch_outcomes(ctx) -> None:
        async for _, kind, at in ctx.changed(ends).sample(outcome, cycle):
            if not at:  # the first wake-up, at cycle 0, gives the values at reset
                continue
            # The latch changes on the edge after the frame ends: the end was at at - 1.
            if kind == len(Reason):
                applied.append(at - 1)
            else:
                rejections.append((at - 1, Reason(kind)))

    sim = Simulator(m)
    sim.add_clock(1e-6)
    sim.add_testbench(drive)
    for proc in (watch_outcomes, watch_rates, watch_arm, watch_out, *watchers):
        sim.add_process(proc)
    sim.run()
    if status.get("cycle") != cycles:
        raise RuntimeError(f"simulation ended at cycle {status.get('cycle')}, not {cycles}")
    replies = tuple(b"\x7e" + part for part in bytes(sent).split(b"\x7e")[1:])
    return LinkBytesRun(tuple(rejections), tuple(applied), tuple(rate_changes), tuple(arm_changes), replies, status,
                        tuple(fault_writes), tuple(ignore_writes))


def _pulse_count(ctx, counters, line: int) -> int:
    """A line's pulse count: its total in memory plus its pending edges (wraps at 32 bits)."""
    return (ctx.get(counters.totals.data[line]) + ctx.get(counters.pending[line])) & 0xFFFF_FFFF


def _link_status(ctx, host, player) -> dict:
    """The command layer's and the player's state, as both benches report it."""
    words = host.counters.data
    low, high = (ctx.get(words[ACCEPTED_WORD + k]) for k in range(2))
    return dict(
        next_seq=ctx.get(host.next_seq),
        accepted=low | high << 16,
        rejected={r: ctx.get(words[reject_word(r)]) for r in Reason},
        play=ctx.get(player.play),
        level=ctx.get(player.level),
        played=ctx.get(player.played),
        underruns=ctx.get(player.underruns),
        armed=ctx.get(player.arm),
    )
