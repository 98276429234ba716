# amaranth: UnusedElaboratable=no
"""UART receiver and transmitter, checked bit by bit in simulation.

The framing (one start bit low, eight data bits least significant first, one stop bit
high, each bit lasting clock / baud cycles) is common practice, no source.
"""

from __future__ import annotations

import random

import pytest
from amaranth.sim import Simulator

from dvgate.gateware.uart_rx import UartRx
from dvgate.gateware.uart_tx import UartTx


def wire_bits(byte: int, stop: int = 1) -> list[int]:
    """Levels of one 8N1 character, one entry per bit (common practice, no source)."""
    return [0] + [(byte >> i) & 1 for i in range(8)] + [stop]


def waveform(chars: list[tuple[int, int]], bit_cyc: float, idle: int = 5) -> tuple[list[int], list[int]]:
    """Per-cycle pin levels for characters ``(byte, stop)``, and the cycle each start bit falls.

    A fractional ``bit_cyc`` gives a sender whose baud rate is off from the receiver's.
    """
    levels = [1] * idle
    starts = []
    for byte, stop in chars:
        starts.append(len(levels))
        origin = len(levels)
        for k, level in enumerate(wire_bits(byte, stop)):
            end = origin + round((k + 1) * bit_cyc)
            levels += [level] * (end - len(levels))
    return levels + [1] * (12 * int(bit_cyc) + 10), starts


def run_rx(levels: list[int], bit_cyc: int) -> list[tuple[int, int, int]]:
    """Drive the receiver's pin; return ``(cycle, byte, framing_error)`` for each byte."""
    dut = UartRx(bit_cyc)
    got = []

    async def bench(ctx):
        for cycle, level in enumerate(levels):
            ctx.set(dut.rx, level)
            if ctx.get(dut.o.valid):
                got.append((cycle, ctx.get(dut.o.payload.data), ctx.get(dut.o.payload.framing_error)))
            await ctx.tick()

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return got


def run_tx(data: list[int], bit_cyc: int, gaps: dict[int, int] | None = None) -> tuple[list[int], list[int]]:
    """Offer bytes to the transmitter as fast as it takes them (or after a gap before some).

    Returns the per-cycle pin levels and the cycle each byte was taken.
    """
    dut = UartTx(bit_cyc)
    gaps = gaps or {}
    levels, taken = [], []

    async def bench(ctx):
        index, wait = 0, gaps.get(0, 0)
        total = (len(data) * 10 + 4) * bit_cyc + sum(gaps.values()) + 10
        for cycle in range(total):
            offer = index < len(data) and wait == 0
            ctx.set(dut.i.valid, offer)
            if offer:
                ctx.set(dut.i.payload, data[index])
            levels.append(ctx.get(dut.tx))
            if offer and ctx.get(dut.i.ready):
                taken.append(cycle)
                index += 1
                wait = gaps.get(index, 0)
            elif wait:
                wait -= 1
            await ctx.tick()

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return levels, taken


@pytest.mark.parametrize("bit_cyc", [4, 5, 8, 13])
def test_transmitter_frames_bit_by_bit(bit_cyc):
    data = [0x00, 0xFF, 0x55, 0xA3, 0x7E, 0x01]
    levels, taken = run_tx(data, bit_cyc)
    # Back to back: each byte starts exactly ten bit times after the one before.
    assert [b - a for a, b in zip(taken, taken[1:], strict=False)] == [10 * bit_cyc] * (len(data) - 1)
    for byte, t in zip(data, taken, strict=True):
        expected = []
        for level in wire_bits(byte):
            expected += [level] * bit_cyc
        # Start bit from the cycle after the byte was taken; every bit exactly bit_cyc cycles.
        assert levels[t + 1: t + 1 + 10 * bit_cyc] == expected, f"byte {byte:#04x}"
    assert levels[0] == 1 and levels[-1] == 1  # idles high


def test_transmitter_idles_high_between_spaced_bytes():
    levels, taken = run_tx([0x12, 0x34], 4, gaps={1: 60})
    assert taken[1] - taken[0] == 61  # offered 60 cycles after the first was taken
    assert all(levels[taken[0] + 41: taken[1] + 1])


@pytest.mark.parametrize("bit_cyc", [4, 7, 16])
def test_receiver_samples_mid_bit_and_reports_at_the_documented_cycle(bit_cyc):
    data = [0x00, 0xFF, 0x7E, 0x7D, 0x81, 0x3C]
    levels, starts = waveform([(b, 1) for b in data], bit_cyc)
    got = run_rx(levels, bit_cyc)
    assert [(b, e) for _, b, e in got] == [(b, 0) for b in data]
    # docs/link.md: a start bit falling at t0 gives the byte at t0 + 9 bit + bit // 2 + 3.
    assert [c for c, _, _ in got] == [t0 + 9 * bit_cyc + bit_cyc // 2 + 3 for t0 in starts]


@pytest.mark.parametrize("error", [-0.02, 0.02])
def test_receiver_tolerates_two_percent_baud_error(error):
    bit_cyc = 16
    rng = random.Random(7)
    data = [rng.randrange(256) for _ in range(12)]
    levels, _ = waveform([(b, 1) for b in data], bit_cyc * (1 + error), idle=3)
    assert [b for _, b, _ in run_rx(levels, bit_cyc)] == data


def test_receiver_flags_a_missing_stop_bit_and_waits_for_the_line():
    bit_cyc = 8
    levels, _ = waveform([(0x41, 0)], bit_cyc)
    # Hold the line low (a break) for three characters more, then send a good byte.
    levels = levels[: -12 * bit_cyc - 10] + [0] * (30 * bit_cyc)
    tail, _ = waveform([(0x42, 1)], bit_cyc)
    got = run_rx(levels + tail, bit_cyc)
    assert [(b, e) for _, b, e in got] == [(0x41, 1), (0x42, 0)]


def test_receiver_ignores_a_glitch_shorter_than_half_a_bit():
    bit_cyc = 8
    levels = [1] * 5 + [0] * 3 + [1] * 40
    tail, _ = waveform([(0x99, 1)], bit_cyc)
    assert [(b, e) for _, b, e in run_rx(levels + tail, bit_cyc)] == [(0x99, 0)]


def test_loopback_at_full_rate():
    bit_cyc = 4
    rng = random.Random(3)
    data = [rng.randrange(256) for _ in range(40)]
    levels, _ = run_tx(data, bit_cyc)
    assert [(b, e) for _, b, e in run_rx(levels, bit_cyc)] == [(b, 0) for b in data]


@pytest.mark.parametrize("cls", [UartRx, UartTx])
@pytest.mark.parametrize("bad", [3, 0, 4.5])
def test_bit_cycles_checked(cls, bad):
    with pytest.raises(ValueError, match=f"bit_cyc must be an integer of at least 4, not {bad!r}"):
        cls(bad)
