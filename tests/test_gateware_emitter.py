"""PulseEmitter against hand-worked cycles of docs/timing.md ("Pulse-pair emitter")."""

import pytest
from amaranth.hdl import Cat, Module
from amaranth.lib import wiring
from amaranth.lib.wiring import In, Out
from amaranth.sim import Simulator

from dvgate.gateware.emitter import PulseEmitter, above
from dvgate.params import HardwareParams
from dvgate.sim.testbench import run_cycles

WATCH = ("accept", "busy", "pos", "neg", "pend_pos", "pend_neg")


def params(**changes) -> HardwareParams:
    base = dict(clock_hz=1e6, names=("x",), edge_rising=True, min_width_cyc=2, absence_cyc=100,
                scheme="burst", rest=1, width_cyc=2, gap_cyc=3, order="interleaved",
                active_low=False, frac_bits=8, rate_bits=16, owed_bits=8, clamp=4, backlog=12)
    base.update(changes)
    return HardwareParams(**base)


def run(p: HardwareParams, cycles: int, loads: dict[int, tuple[int, int]],
        arm: list[int] | None = None, offers: dict[int, tuple[int, int]] | None = None,
        ) -> list[dict[str, int]]:
    """``loads[k]`` is handed over at cycle k; ``offers[k]`` is only shown (no load)."""
    arm = arm if arm is not None else [1] * (cycles + 1)
    inputs = []
    for k in range(cycles):
        new = loads.get(k) or (offers or {}).get(k) or (0, 0)
        inputs.append({"load": int(k in loads), "new_pos": new[0], "new_neg": new[1],
                       "armed": arm[k], "armed_next": arm[k + 1]})
    return run_cycles(PulseEmitter(p), inputs, WATCH)


def pulses(rows: list[dict[str, int]]) -> list[tuple[str, int, int]]:
    """(line, rise, fall) of every pulse, by rise."""
    found = []
    for line in ("pos", "neg"):
        rise = None
        for k, row in enumerate(rows):
            if row[line] and rise is None:
                rise = k
            elif not row[line] and rise is not None:
                found.append((line, rise, k))
                rise = None
        assert rise is None, "pulse still high at the end of the run"
    return sorted(found, key=lambda f: f[1])


def test_width_gap_and_busy() -> None:
    # W = 2, G = 3: a start at k drives k+1..k+W; starts W + G = 5 cycles apart.
    rows = run(params(), 22, {2: (3, 0)})
    assert pulses(rows) == [("pos", 3, 5), ("pos", 8, 10), ("pos", 13, 15)]
    assert [rows[k]["pend_pos"] for k in (2, 3, 8, 13)] == [0, 2, 1, 0]
    # Busy from the first start until the last gap ends (GAP, timer 0 at 17, IDLE at 18).
    assert [k for k, r in enumerate(rows) if r["busy"]] == list(range(3, 18))


def test_width_and_gap_of_one_cycle() -> None:
    rows = run(params(width_cyc=1, gap_cyc=1), 10, {0: (0, 3)})
    assert pulses(rows) == [("neg", 1, 2), ("neg", 3, 4), ("neg", 5, 6)]


def test_interleaved_order_starts_positive_after_reset() -> None:
    rows = run(params(width_cyc=1, gap_cyc=1), 14, {0: (3, 2)})
    assert [f[0] for f in pulses(rows)] == ["pos", "neg", "pos", "neg", "pos"]
    assert [f[1] for f in pulses(rows)] == [1, 3, 5, 7, 9]


def test_grouped_order() -> None:
    rows = run(params(width_cyc=1, gap_cyc=1, order="grouped"), 14, {0: (3, 2)})
    assert [f[0] for f in pulses(rows)] == ["pos", "pos", "pos", "neg", "neg"]


def test_interleaved_remembers_the_last_line() -> None:
    # The first burst ends on pos; the next one with both lines starts on neg.
    rows = run(params(width_cyc=1, gap_cyc=1), 20, {0: (1, 0), 8: (1, 1)})
    assert pulses(rows) == [("pos", 1, 2), ("neg", 9, 10), ("pos", 11, 12)]


def test_load_during_a_burst_follows_the_current_pulses() -> None:
    # Start at 2 (pos, one more pos pending); a hand-over at 5 (in the gap) adds one
    # of each. At 7 both lines wait and pos went last: neg, then pos, pos.
    rows = run(params(), 26, {2: (2, 0), 5: (1, 1)})
    assert pulses(rows) == [("pos", 3, 5), ("neg", 8, 10), ("pos", 13, 15), ("pos", 18, 20)]
    assert (rows[6]["pend_pos"], rows[6]["pend_neg"]) == (2, 1)


def test_accept_is_the_backlog_limit() -> None:
    # B = 12. Cycle 0 shows 7 + 6 = 13 (refused) and cycle 1 loads 6 + 6 = 12;
    # the start at 1 leaves 11 pending, so at 2 one more fits and two do not.
    rows = run(params(), 4, {1: (6, 6)}, offers={0: (7, 6), 2: (1, 0), 3: (1, 1)})
    assert [r["accept"] for r in rows] == [0, 1, 1, 0]
    assert rows[2]["pend_pos"] + rows[2]["pend_neg"] == 11


def test_disarm_cuts_a_pulse_and_clears() -> None:
    p = params(width_cyc=4, gap_cyc=2)
    # Load at 1 -> high from 2 for 4 cycles, but armed falls at cycle 4 (arm list
    # index = cycle): out = line & armed ends the pulse at 4. Pending pulses are lost.
    arm = [1, 1, 1, 1, 0, 0, 1, 1] + [1] * 20
    rows = run(p, 26, {1: (3, 0), 8: (1, 1)}, arm=arm)
    found = pulses(rows)
    assert found[0] == ("pos", 2, 4)
    assert (rows[5]["pend_pos"], rows[5]["busy"]) == (0, 0)
    # After re-arming, last is negative again: the next burst starts positive.
    assert found[1:] == [("pos", 9, 13), ("neg", 15, 19)]


def test_one_disarmed_cycle_ends_the_pulse() -> None:
    # Armed low at cycle 3 only: the output is idle at 3 and the emitter is cleared, so
    # the pulse does not come back at 4 although armed is high again.
    p = params(width_cyc=4, gap_cyc=2)
    arm = [1, 1, 1, 0] + [1] * 20
    rows = run(p, 16, {1: (2, 0)}, arm=arm)
    assert pulses(rows) == [("pos", 2, 3)]
    assert (rows[4]["pend_pos"], rows[4]["busy"]) == (0, 0)


@pytest.mark.parametrize(("width", "gap"), [(5, 1), (1, 4), (3, 3)])
def test_period_and_busy_for_other_widths_and_gaps(width: int, gap: int) -> None:
    # Three pulses loaded at 2 start at 2, 2 + P and 2 + 2P (P = W + G), each high W
    # cycles from the cycle after its start; busy until the last gap's final cycle.
    period = width + gap
    rows = run(params(width_cyc=width, gap_cyc=gap, order="grouped"), 4 + 3 * period, {2: (3, 0)})
    assert pulses(rows) == [("pos", 3 + j * period, 3 + j * period + width) for j in range(3)]
    assert [k for k, r in enumerate(rows) if r["busy"]] == list(range(3, 3 + 3 * period))


def test_counts_at_the_full_width_of_the_pending_registers() -> None:
    # Backlog 64 = one strobe's worth (rest 1, clamp 62): the pending registers and the
    # hand-over's counts have the same width, so the pending update works modulo that
    # width. Loading 63 + 1 starts a positive pulse at once (62 and 1 left); then 63
    # pending leave room for one more pulse, not two.
    p = params(rest=1, clamp=62, backlog=64, width_cyc=1, gap_cyc=1)
    rows = run(p, 4, {0: (63, 1)}, offers={1: (1, 0), 2: (1, 1)})
    assert [r["accept"] for r in rows[:3]] == [1, 1, 0]
    assert (rows[1]["pend_pos"], rows[1]["pend_neg"]) == (62, 1)
    assert (rows[3]["pend_pos"], rows[3]["pend_neg"]) == (62, 0)


class _Above(wiring.Component):
    """``above(value, limit)`` for every limit of ``limits``, one output bit each."""

    def __init__(self, width: int, limits: list[int]) -> None:
        self._limits = limits
        super().__init__({"value": In(width), "above": Out(len(limits))})

    def elaborate(self, platform) -> Module:
        m = Module()
        m.d.comb += self.above.eq(Cat(above(self.value, limit) for limit in self._limits))
        return m


def test_above_is_the_integer_compare() -> None:
    # Every value of small widths against every limit around their range (Python's > is
    # the reference).
    for width in range(1, 6):
        limits = list(range(-1, (1 << width) + 1))
        dut = _Above(width, limits)
        got: list[int] = []

        async def bench(ctx, dut: _Above = dut, width: int = width, got: list[int] = got) -> None:
            for value in range(1 << width):
                ctx.set(dut.value, value)
                got.append(ctx.get(dut.above))

        sim = Simulator(dut)
        sim.add_testbench(bench)
        sim.run()
        for value, bits in enumerate(got):
            assert [(bits >> i) & 1 for i in range(len(limits))] == [int(value > c) for c in limits], (width, value)
