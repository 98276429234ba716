"""The pulse counters in block RAM: totals plus pending edges, and the telemetry's snapshot."""

import random

import pytest
from amaranth.sim import Simulator

from dvgate.gateware.pulse_counts import PulseCounters

BASE = 53  # payload offset of ``pos`` in the telemetry reply (any offset works)


def random_lines(n: int, cycles: int, seed: int, busy: float) -> list[int]:
    """Levels of ``2 n`` lines per cycle; every line toggles with probability ``busy``."""
    rng = random.Random(seed)
    levels, now = [], 0
    for _ in range(cycles):
        for k in range(2 * n):
            if rng.random() < busy:
                now ^= 1 << k
        levels.append(now)
    return levels


def rises_through(levels: list[int], line: int, cycle: int) -> int:
    """Rising edges of ``line`` on cycles ``0 .. cycle`` (low before cycle 0)."""
    count, before = 0, 0
    for level in levels[: cycle + 1]:
        bit = (level >> line) & 1
        count += bit & ~before & 1
        before = bit
    return count


def run(n: int, levels: list[int], snaps: list[tuple[int, int]], read_gap: int) -> tuple[list, list]:
    """Drive the lines; at each ``(cycle, channel)`` snap, read the eight bytes back slowly.

    Returns the bytes read per snap and each line's count (total plus pending) per cycle.
    """
    dut = PulseCounters(n, BASE)
    replies: list[bytes] = []
    counts: list[list[int]] = []
    plan = dict(snaps)

    async def bench(ctx):
        reading, reply, wait = None, bytearray(), 0
        for cycle, level in enumerate(levels):
            ctx.set(dut.lines, level)
            ctx.set(dut.snap, cycle in plan)
            ctx.set(dut.channel, plan.get(cycle, (cycle * 7) % 256))  # junk between requests
            if cycle in plan:
                # As the encoder does: from the byte before ``pos``, one step per byte.
                reading, reply, wait = -1, bytearray(), read_gap
            step = False
            if reading is not None:
                if wait:
                    wait -= 1
                else:
                    step = True
            take = step and reading >= 0
            ctx.set(dut.idx, BASE + (reading if reading is not None else 20))
            ctx.set(dut.step, step)
            ctx.set(dut.take, take)
            if take:
                reply.append(ctx.get(dut.data))
            if step:
                reading += 1
                wait = 3
                if reading == 8:
                    replies.append(bytes(reply))
                    reading = None
            counts.append([(ctx.get(dut.totals.data[k]) + ctx.get(dut.pending[k])) & 0xFFFF_FFFF
                           for k in range(2 * n)])
            await ctx.tick()

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return replies, counts


@pytest.mark.parametrize(("n", "seed", "busy"), [(1, 1, 0.5), (1, 2, 1.0), (3, 3, 0.6), (4, 4, 1.0)])
def test_snapshot_bytes_equal_the_counts_at_the_request(n, seed, busy):
    cycles = 900
    levels = random_lines(n, cycles, seed, busy)
    rng = random.Random(seed)
    # Requests far apart, as the reply's busy time makes them; some right at the start.
    snaps = [(c, rng.randrange(n)) for c in (0, 3, 250, 251 + rng.randrange(40), 600 + rng.randrange(100))]
    snaps = sorted({c: ch for c, ch in snaps}.items())
    snaps = [s for i, s in enumerate(snaps) if i == 0 or s[0] - snaps[i - 1][0] >= 120]
    replies, counts = run(n, levels, snaps, read_gap=2 * n + 2)
    assert len(replies) == len(snaps)
    for (cycle, ch), reply in zip(snaps, replies, strict=True):
        want = [rises_through(levels, 2 * ch + k, cycle) for k in range(2)]
        got = [int.from_bytes(reply[4 * k: 4 * k + 4], "little") for k in range(2)]
        assert got == want, f"snap at {cycle} for channel {ch}"
    # Between snapshots too: total plus pending counts every rise before the cycle.
    for cycle in range(0, cycles, 37):
        assert counts[cycle] == [rises_through(levels, k, cycle - 1) for k in range(2 * n)]


@pytest.mark.parametrize("n", [1, 3])
def test_pending_part_carries_into_the_next_byte(n):
    # Lines that rise every other cycle, read at every instant around the 256th rise: at
    # some of them the pending part carries out of the total's low byte.
    levels = [(c % 2) * ((1 << 2 * n) - 1) for c in range(560)]
    for cycle in range(500, 500 + 4 * n + 4):
        replies, _ = run(n, levels, [(cycle, n - 1)], read_gap=2 * n + 2)
        want = rises_through(levels, 2 * n - 2, cycle)
        assert [int.from_bytes(replies[0][k: k + 4], "little") for k in (0, 4)] == [want, want]
